//! Hostile clients over real sockets on 127.0.0.1:0: idle connections by the thousand, bodies
//! trickled a byte at a time, headers that never end, compressed bodies, invented methods and
//! paths, a full queue. Every test is bounded in connections and time (each well under 20 s) and
//! uses small timeouts through `Config`; time bounds asserted are liveness bounds only.

mod service_support;

use std::time::{Duration, Instant};

use serde_json::{json, Value};
use service_support::socket::Server;
use service_support::{block_pool, get, state_with, submit_tea_job, tea_inputs, until};
use tokio::io::{AsyncRead, AsyncReadExt, AsyncWriteExt};
use tokio::net::TcpStream;
use zonetally::Config;

fn config() -> Config {
    Config {
        threads: 2,
        queue: 8,
        ..Config::default()
    }
}

/// A response read off a raw socket: status, headers (lowercased names) and body.
struct Raw {
    status: u16,
    headers: Vec<(String, String)>,
    body: Vec<u8>,
}

impl Raw {
    fn header(&self, name: &str) -> Option<&str> {
        self.headers
            .iter()
            .find(|(n, _)| n == name)
            .map(|(_, v)| v.as_str())
    }
    fn json(&self) -> Value {
        serde_json::from_slice(&self.body)
            .unwrap_or_else(|e| panic!("not JSON ({e}): {}", String::from_utf8_lossy(&self.body)))
    }
}

/// Reads one response (headers and a `Content-Length` body) as soon as it is complete, without
/// waiting for the connection to close.
async fn read_response<R: AsyncRead + Unpin>(stream: &mut R) -> Raw {
    let mut buf = Vec::new();
    let mut chunk = [0u8; 4096];
    loop {
        if let Some(end) = buf.windows(4).position(|w| w == b"\r\n\r\n") {
            let head = String::from_utf8_lossy(&buf[..end]).to_string();
            let mut lines = head.split("\r\n");
            let status: u16 = lines
                .next()
                .and_then(|l| l.split(' ').nth(1))
                .and_then(|s| s.parse().ok())
                .unwrap_or_else(|| panic!("no status line in {head:?}"));
            let headers: Vec<(String, String)> = lines
                .filter_map(|l| l.split_once(':'))
                .map(|(n, v)| (n.trim().to_ascii_lowercase(), v.trim().to_string()))
                .collect();
            let len: usize = headers
                .iter()
                .find(|(n, _)| n == "content-length")
                .and_then(|(_, v)| v.parse().ok())
                .unwrap_or(0);
            if buf.len() >= end + 4 + len {
                let body = buf[end + 4..end + 4 + len].to_vec();
                return Raw {
                    status,
                    headers,
                    body,
                };
            }
        }
        let n = stream
            .read(&mut chunk)
            .await
            .expect("the connection failed before a whole response arrived");
        assert!(
            n > 0,
            "the connection closed before a whole response arrived: {:?}",
            String::from_utf8_lossy(&buf)
        );
        buf.extend_from_slice(&chunk[..n]);
    }
}

/// Waits until the server closes `stream` (end of file or reset); the time it took.
async fn closed_within<R: AsyncRead + Unpin>(stream: &mut R, limit: Duration) -> Duration {
    let start = Instant::now();
    let mut chunk = [0u8; 1024];
    loop {
        match tokio::time::timeout(
            limit.saturating_sub(start.elapsed()),
            stream.read(&mut chunk),
        )
        .await
        {
            Ok(Ok(0)) | Ok(Err(_)) => return start.elapsed(),
            Ok(Ok(_)) => continue,
            Err(_) => panic!("the server kept the connection open past {limit:?}"),
        }
    }
}

async fn raw_get(addr: std::net::SocketAddr, path: &str) -> Raw {
    let mut s = TcpStream::connect(addr).await.expect("connect");
    s.write_all(format!("GET {path} HTTP/1.1\r\nHost: test\r\n\r\n").as_bytes())
        .await
        .unwrap();
    read_response(&mut s).await
}

/// How many descriptors this process may still open, after raising its soft limit.
fn descriptors_free() -> usize {
    let limit = zonetally::api::server::raise_descriptor_limit().unwrap_or(1024) as usize;
    let open = std::fs::read_dir("/proc/self/fd")
        .map(|d| d.count())
        .unwrap_or(64);
    limit.saturating_sub(open)
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn thousands_of_idle_connections_leave_health_checks_answered() {
    // Both ends of every connection live in this process: two descriptors each, and a margin.
    let idle = 2000.min(descriptors_free().saturating_sub(256) / 2);
    assert!(idle >= 200, "too few descriptors for this test ({idle})");
    let cap = idle / 4;
    let server = Server::start(Config {
        max_connections: cap,
        header_timeout: 10.0,
        keep_alive_timeout: 10.0,
        overflow_timeout: 1.0,
        ..config()
    })
    .await;
    let mut held = Vec::with_capacity(idle);
    for _ in 0..idle {
        held.push(TcpStream::connect(server.addr).await.expect("connect"));
    }
    // Behind them in the accept queue: health checks, on connections beyond the cap.
    let mut latencies = Vec::new();
    for path in ["/healthz", "/readyz", "/healthz"] {
        let start = Instant::now();
        let r = tokio::time::timeout(Duration::from_secs(1), raw_get(server.addr, path))
            .await
            .unwrap_or_else(|_| panic!("{path} took more than 1 s behind {idle} idle connections"));
        latencies.push(start.elapsed());
        assert_eq!(
            r.status,
            200,
            "{path}: {}",
            String::from_utf8_lossy(&r.body)
        );
    }
    // Beyond the cap, anything else is refused with a problem document, not left hanging.
    let r = tokio::time::timeout(Duration::from_secs(2), raw_get(server.addr, "/processes"))
        .await
        .expect("an answer beyond the cap");
    assert_eq!(r.status, 503);
    assert_eq!(r.json()["type"], "/problems/too-many-connections");
    assert!(r.json()["detail"]
        .as_str()
        .unwrap()
        .contains(&cap.to_string()));
    eprintln!("{idle} idle connections, cap {cap}: health checks answered in {latencies:?}");
    // The connections beyond the cap are closed after their tight timeout.
    let last = held.last_mut().unwrap();
    closed_within(last, Duration::from_secs(5)).await;
    drop(held);
    // Once the idle ones are gone, requests are served in full again.
    let c = reqwest::Client::new();
    let mut ok = false;
    for _ in 0..100 {
        if let Ok(r) = c.get(server.url("/processes")).send().await {
            if r.status() == 200 {
                ok = true;
                break;
            }
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    assert!(
        ok,
        "full service did not come back after the idle connections left"
    );
}

#[tokio::test]
async fn a_trickled_body_is_cut_off_with_408() {
    let server = Server::start(Config {
        body_timeout: 1.0,
        request_timeout: 30.0,
        ..config()
    })
    .await;
    let stream = TcpStream::connect(server.addr).await.unwrap();
    let (mut rd, mut wr) = stream.into_split();
    wr.write_all(b"POST /processes/zone-counts/execution HTTP/1.1\r\nHost: test\r\nContent-Type: application/json\r\nContent-Length: 1000\r\n\r\n").await.unwrap();
    let start = Instant::now();
    let trickle = tokio::spawn(async move {
        for _ in 0..1000 {
            if wr.write_all(b" ").await.is_err() {
                break;
            }
            tokio::time::sleep(Duration::from_millis(200)).await;
        }
    });
    let r = tokio::time::timeout(Duration::from_secs(6), read_response(&mut rd))
        .await
        .expect("no answer to a trickled body within 6 s");
    let took = start.elapsed();
    assert_eq!(r.status, 408, "{}", String::from_utf8_lossy(&r.body));
    assert_eq!(r.header("content-type"), Some("application/problem+json"));
    assert_eq!(r.header("connection"), Some("close"));
    let v = r.json();
    assert_eq!(v["type"], "/problems/body-timeout");
    assert_eq!(v["status"], 408);
    assert!(v["detail"].as_str().unwrap().contains("1 s"), "{v}");
    assert!(
        took >= Duration::from_millis(900),
        "cut off early: {took:?}"
    );
    closed_within(&mut rd, Duration::from_secs(3)).await;
    eprintln!("trickled body answered 408 after {took:?} (limit 1 s)");
    trickle.abort();
    let m = reqwest::get(server.url("/metrics"))
        .await
        .unwrap()
        .text()
        .await
        .unwrap();
    assert!(
        m.contains("route=\"/processes/{processId}/execution\",method=\"POST\",status=\"408\""),
        "the 408 is counted under its route"
    );
}

#[tokio::test]
async fn headers_that_never_end_are_disconnected_after_the_header_timeout() {
    let server = Server::start(Config {
        header_timeout: 1.0,
        keep_alive_timeout: 10.0,
        ..config()
    })
    .await;
    let mut s = TcpStream::connect(server.addr).await.unwrap();
    s.write_all(b"GET /healthz HTTP/1.1\r\nHost: test\r\nX-Slow: ")
        .await
        .unwrap();
    let took = closed_within(&mut s, Duration::from_secs(6)).await;
    assert!(took >= Duration::from_millis(800), "closed early: {took:?}");
    eprintln!("partial headers disconnected after {took:?} (limit 1 s)");
    // A byte now and then does not keep such a connection alive either.
    let mut s = TcpStream::connect(server.addr).await.unwrap();
    let start = Instant::now();
    s.write_all(b"GET /healthz HTTP/1.1\r\n").await.unwrap();
    let (mut rd, mut wr) = s.into_split();
    let drip = tokio::spawn(async move {
        for _ in 0..40 {
            tokio::time::sleep(Duration::from_millis(100)).await;
            if wr.write_all(b"X").await.is_err() {
                break;
            }
        }
    });
    let mut chunk = [0u8; 64];
    let r = tokio::time::timeout(Duration::from_secs(6), rd.read(&mut chunk)).await;
    assert!(matches!(r, Ok(Ok(0)) | Ok(Err(_))), "{r:?}");
    assert!(start.elapsed() < Duration::from_secs(6));
    drip.abort();
}

#[tokio::test]
async fn idle_keep_alive_connections_are_closed() {
    let server = Server::start(Config {
        header_timeout: 10.0,
        keep_alive_timeout: 1.0,
        ..config()
    })
    .await;
    // One request, then nothing: the connection is closed after the idle timeout.
    let mut s = TcpStream::connect(server.addr).await.unwrap();
    s.write_all(b"GET /healthz HTTP/1.1\r\nHost: test\r\n\r\n")
        .await
        .unwrap();
    assert_eq!(read_response(&mut s).await.status, 200);
    let took = closed_within(&mut s, Duration::from_secs(6)).await;
    assert!(took >= Duration::from_millis(800), "closed early: {took:?}");
    // A connection that never sends a byte goes the same way.
    let mut s = TcpStream::connect(server.addr).await.unwrap();
    closed_within(&mut s, Duration::from_secs(6)).await;
    // A request that computes longer than the idle timeout is not cut off: only quiet,
    // requestless connections are idle.
    let block = block_pool(&server.state);
    let c = reqwest::Client::new();
    let url = server.url("/processes/zone-counts/execution");
    let pending = tokio::spawn(async move {
        c.post(url)
            .json(&json!({"inputs": tea_inputs()}))
            .send()
            .await
    });
    tokio::time::sleep(Duration::from_millis(1500)).await;
    drop(block);
    let r = pending
        .await
        .unwrap()
        .expect("the computing request was dropped");
    assert_eq!(r.status(), 200);
}

#[tokio::test]
async fn compressed_bodies_are_refused_with_415() {
    let server = Server::start(config()).await;
    let c = reqwest::Client::new();
    let body = serde_json::to_vec(&json!({"inputs": tea_inputs()})).unwrap();
    for (path, coding) in [
        ("/processes/zone-counts/execution", "gzip"),
        ("/processes/zone-counts/execution", "identity, br"),
        ("/rasters", "deflate"),
    ] {
        let r = c
            .post(server.url(path))
            .header("content-type", "application/json")
            .header("content-encoding", coding)
            .body(body.clone())
            .send()
            .await
            .unwrap();
        assert_eq!(r.status(), 415, "{path} {coding}");
        assert_eq!(r.headers()["accept-encoding"], "identity");
        assert_eq!(
            r.headers()["content-type"],
            "application/problem+json",
            "{path}"
        );
        let v: Value = r.json().await.unwrap();
        assert_eq!(v["type"], "/problems/unsupported-content-encoding");
        let detail = v["detail"].as_str().unwrap();
        let named = coding.rsplit(", ").next().unwrap();
        assert!(
            detail.contains(&format!("`Content-Encoding: {named}`")),
            "{detail}"
        );
        assert!(detail.contains("uncompressed"), "{detail}");
    }
    // `identity` is no encoding at all.
    let r = c
        .post(server.url("/processes/zone-counts/execution"))
        .header("content-type", "application/json")
        .header("content-encoding", "identity")
        .body(body)
        .send()
        .await
        .unwrap();
    assert_eq!(r.status(), 200);
}

#[tokio::test]
async fn invented_methods_and_paths_do_not_grow_the_metrics() {
    let (_state, app) = state_with(config());
    // Warm every label the loop below can produce.
    let warm = |i: usize| {
        let method = format!("FROB{i}");
        let path = format!("/no/such/{i}");
        (method, path)
    };
    let send = |method: String, path: String| {
        let app = app.clone();
        async move {
            use tower::ServiceExt;
            let req = axum::http::Request::builder()
                .method(method.as_str())
                .uri(path)
                .body(axum::body::Body::empty())
                .unwrap();
            app.oneshot(req).await.unwrap().status()
        }
    };
    for i in 0..2 {
        let (m, p) = warm(i);
        send(m.clone(), p.clone()).await;
        send(m.clone(), "/healthz".into()).await;
        send("GET".into(), p).await;
    }
    let before = get(&app, "/metrics").await.body.len();
    for i in 0..500 {
        let (m, p) = warm(i);
        let status = match i % 3 {
            0 => send(m, p).await,
            1 => send(m, format!("/jobs/{i}")).await,
            _ => send("GET".into(), p).await,
        };
        assert!(status.is_client_error(), "{status}");
    }
    let text = String::from_utf8(get(&app, "/metrics").await.body.to_vec()).unwrap();
    assert!(
        text.len() <= before + 4096,
        "/metrics grew from {before} to {} bytes:\n{text}",
        text.len()
    );
    assert!(!text.contains("FROB"), "an invented method became a label");
    assert!(
        !text.contains("/no/such"),
        "an invented path became a label"
    );
    assert!(text.contains("route=\"other\""), "{text}");
    assert!(text.contains("method=\"other\""), "{text}");
}

#[tokio::test]
async fn readiness_is_off_while_the_queue_is_full_and_comes_back() {
    let (state, app) = state_with(Config {
        threads: 2,
        queue: 1,
        ..Config::default()
    });
    assert_eq!(get(&app, "/readyz").await.status, 200);
    let block = block_pool(&state);
    assert_eq!(submit_tea_job(&app).await.status, 201);
    let r = get(&app, "/readyz").await;
    assert_eq!(r.status, 503);
    assert_eq!(r.json()["type"], "/problems/busy");
    assert_eq!(r.header("retry-after").as_deref(), Some("1"));
    drop(block);
    let start = Instant::now();
    loop {
        if get(&app, "/readyz").await.status == 200 {
            break;
        }
        assert!(
            start.elapsed() < Duration::from_secs(10),
            "readiness did not come back"
        );
        tokio::time::sleep(Duration::from_millis(10)).await;
    }
    until("the queue to drain", || {
        let s = state.pool_stats();
        s.queued + s.running == 0
    })
    .await;
}

#[tokio::test]
async fn shutdown_drops_a_request_still_running_after_the_grace() {
    let mut server = Server::start(Config {
        shutdown_grace: 1.0,
        body_timeout: 30.0,
        ..config()
    })
    .await;
    // A body that is never finished keeps its request in flight.
    let mut s = TcpStream::connect(server.addr).await.unwrap();
    s.write_all(b"POST /rasters HTTP/1.1\r\nHost: test\r\nContent-Type: application/json\r\nContent-Length: 100\r\n\r\n{")
        .await
        .unwrap();
    tokio::time::sleep(Duration::from_millis(200)).await;
    let start = Instant::now();
    server.stop.take().unwrap().send(()).unwrap();
    let stopped = tokio::time::timeout(Duration::from_secs(5), &mut server.handle).await;
    assert!(
        matches!(stopped, Ok(Ok(Ok(())))),
        "the server did not stop: {stopped:?}"
    );
    let took = start.elapsed();
    assert!(
        took >= Duration::from_millis(900),
        "stopped before the grace: {took:?}"
    );
    closed_within(&mut s, Duration::from_secs(2)).await;
}
