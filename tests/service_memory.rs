//! The binary's allocator, on a real `zonetally serve` process: it allocates with jemalloc,
//! reports the allocator's accounting in /metrics, and hands freed pages back to the system
//! once no computation runs (src/api/allocator.rs).

mod service_support;

use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

use serde_json::json;
use service_support::{metric, uneven_raster};

struct Server {
    child: Child,
    base: String,
}

impl Drop for Server {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

async fn serve() -> Server {
    let port = std::net::TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
        .port();
    let child = Command::new(env!("CARGO_BIN_EXE_zonetally"))
        .args(["serve", "--bind", &format!("127.0.0.1:{port}")])
        .env("ZONETALLY_LOG", "warn")
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    let server = Server {
        child,
        base: format!("http://127.0.0.1:{port}"),
    };
    let start = Instant::now();
    while reqwest::get(format!("{}/healthz", server.base))
        .await
        .is_err()
    {
        assert!(
            start.elapsed() < Duration::from_secs(20),
            "the server never answered"
        );
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    server
}

async fn metrics(server: &Server) -> String {
    reqwest::get(format!("{}/metrics", server.base))
        .await
        .unwrap()
        .text()
        .await
        .unwrap()
}

#[tokio::test]
async fn an_idle_server_hands_freed_pages_back() {
    let server = serve().await;
    let text = metrics(&server).await;
    let bytes = |text: &str, kind: &str| {
        metric(
            text,
            &format!("zonetally_allocator_bytes{{kind=\"{kind}\"}}"),
        )
    };
    // The binary allocates with jemalloc, so its accounting is there and consistent.
    let (allocated, active, resident) = (
        bytes(&text, "allocated"),
        bytes(&text, "active"),
        bytes(&text, "resident"),
    );
    assert!(
        allocated > 0.0 && active >= allocated && resident >= active,
        "{text}"
    );

    // A computation that decodes a 3 MB body and frees what it built.
    let inputs = json!({"raster": uneven_raster(400, 400), "zones": [
        {"id": "west", "rect": {"row": 0, "col": 0, "rows": 400, "cols": 200}}],
        "evidence": {"total": 52000}});
    let reply = reqwest::Client::new()
        .post(format!("{}/processes/zone-counts/execution", server.base))
        .json(&json!({"inputs": inputs}))
        .send()
        .await
        .unwrap();
    assert_eq!(reply.status(), 200);
    let freed = bytes(&metrics(&server).await, "dirty");
    assert!(
        freed >= 2.0 * 1048576.0,
        "the computation left only {freed} bytes of freed pages: too small to tell"
    );

    // jemalloc alone returns them over its 10 s decay time; the idle sweep (every 5 s) at once.
    let start = Instant::now();
    let mut dirty = freed;
    while dirty > 512.0 * 1024.0 {
        assert!(
            start.elapsed() < Duration::from_secs(7),
            "{dirty} bytes of freed pages still held {:?} after the computation (from {freed})",
            start.elapsed()
        );
        tokio::time::sleep(Duration::from_millis(250)).await;
        dirty = bytes(&metrics(&server).await, "dirty");
    }
}
