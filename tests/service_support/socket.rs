//! A real server on 127.0.0.1:0, stopped by a oneshot standing in for SIGTERM.

use std::net::SocketAddr;

use tokio::net::TcpListener;
use tokio::sync::oneshot;
use tokio::task::JoinHandle;
use zonetally::{AppState, Config};

pub struct Server {
    pub addr: SocketAddr,
    pub state: AppState,
    pub stop: Option<oneshot::Sender<()>>,
    pub handle: JoinHandle<Result<(), String>>,
}

impl Server {
    pub async fn start(config: Config) -> Server {
        let state = AppState::new(config).expect("state");
        let listener = TcpListener::bind("127.0.0.1:0").await.expect("bind");
        let addr = listener.local_addr().unwrap();
        let (tx, rx) = oneshot::channel::<()>();
        let signal = async move {
            let _ = rx.await;
        };
        let handle = tokio::spawn(zonetally::api::server::serve_on(
            listener,
            state.clone(),
            signal,
        ));
        Server {
            addr,
            state,
            stop: Some(tx),
            handle,
        }
    }

    pub fn url(&self, path: &str) -> String {
        format!("http://{}{path}", self.addr)
    }
}
