//! Running the service on a socket: the job sweeper and graceful shutdown.
//!
//! On SIGTERM or Ctrl-C the listener stops accepting, new executions get 503, unfinished jobs
//! are marked failed (they live in memory and would be lost anyway), and requests in flight get
//! the grace period to finish.

use std::future::Future;
use std::time::Duration;

use tokio::net::TcpListener;

use super::config::Config;
use super::state::AppState;

/// How often expired jobs are swept out.
const SWEEP_EVERY: Duration = Duration::from_secs(5);

/// Binds `config.bind` and serves until SIGTERM or Ctrl-C.
pub async fn serve(config: Config) -> Result<(), String> {
    let bind = config.bind;
    let state = AppState::new(config)?;
    let listener = TcpListener::bind(bind)
        .await
        .map_err(|e| format!("cannot listen on {bind}: {e}"))?;
    let addr = listener.local_addr().map_err(|e| e.to_string())?;
    tracing::info!(%addr, threads = state.pool().stats().threads, "zonetally listening");
    serve_on(listener, state, shutdown_signal()).await
}

/// Serves `state` on `listener` until `signal` completes, then shuts down gracefully.
pub async fn serve_on(
    listener: TcpListener,
    state: AppState,
    signal: impl Future<Output = ()> + Send + 'static,
) -> Result<(), String> {
    let sweeper = {
        let state = state.clone();
        tokio::spawn(async move {
            let mut tick = tokio::time::interval(SWEEP_EVERY);
            loop {
                tick.tick().await;
                state.jobs().purge_expired();
            }
        })
    };
    let grace = state.config().shutdown_grace();
    let notify = std::sync::Arc::new(tokio::sync::Notify::new());
    let graceful = {
        let (state, notify) = (state.clone(), notify.clone());
        async move {
            signal.await;
            let failed = state.begin_shutdown();
            tracing::info!(failed_jobs = failed, "shutting down: no new work accepted");
            notify.notify_one();
        }
    };
    let app = super::router(state);
    let mut server = tokio::spawn(async move {
        axum::serve(listener, app)
            .with_graceful_shutdown(graceful)
            .await
    });
    let result = tokio::select! {
        r = &mut server => r,
        _ = notify.notified() => match tokio::time::timeout(grace, &mut server).await {
            Ok(r) => r,
            Err(_) => {
                tracing::warn!(grace_seconds = grace.as_secs_f64(), "grace period over: dropping requests still running");
                server.abort();
                Ok(Ok(()))
            }
        },
    };
    sweeper.abort();
    match result {
        Ok(Ok(())) => Ok(()),
        Ok(Err(e)) => Err(format!("server failed: {e}")),
        Err(e) => Err(format!("server task failed: {e}")),
    }
}

async fn shutdown_signal() {
    let ctrl_c = async {
        let _ = tokio::signal::ctrl_c().await;
    };
    #[cfg(unix)]
    let term = async {
        match tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate()) {
            Ok(mut s) => {
                s.recv().await;
            }
            Err(_) => std::future::pending::<()>().await,
        }
    };
    #[cfg(not(unix))]
    let term = std::future::pending::<()>();
    tokio::select! { _ = ctrl_c => {}, _ = term => {} }
}
