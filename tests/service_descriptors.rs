//! Running out of descriptors: with the process's soft limit lowered, `accept` fails with
//! EMFILE; the server pauses, logs, and serves again once descriptors free up. A test binary of
//! its own, since the limit is the whole process's.

mod service_support;

use std::io::Write;
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use service_support::socket::Server;
use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tokio::net::TcpStream;
use zonetally::Config;

#[derive(Clone, Default)]
struct Log(Arc<Mutex<Vec<u8>>>);

impl Write for Log {
    fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
        self.0.lock().unwrap().extend_from_slice(buf);
        Ok(buf.len())
    }
    fn flush(&mut self) -> std::io::Result<()> {
        Ok(())
    }
}

fn set_soft_limit(n: u64) {
    let mut lim = libc::rlimit {
        rlim_cur: 0,
        rlim_max: 0,
    };
    // SAFETY: getrlimit and setrlimit only read and write the struct passed by pointer.
    unsafe {
        assert_eq!(libc::getrlimit(libc::RLIMIT_NOFILE, &mut lim), 0);
        lim.rlim_cur = n as libc::rlim_t;
        assert_eq!(libc::setrlimit(libc::RLIMIT_NOFILE, &lim), 0);
    }
}

fn open_descriptors() -> u64 {
    std::fs::read_dir("/proc/self/fd").unwrap().count() as u64
}

async fn healthz(addr: std::net::SocketAddr) -> std::io::Result<String> {
    let mut s = TcpStream::connect(addr).await?;
    s.write_all(b"GET /healthz HTTP/1.1\r\nHost: test\r\nConnection: close\r\n\r\n")
        .await?;
    let mut out = String::new();
    s.read_to_string(&mut out).await?;
    Ok(out)
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn accept_out_of_descriptors_pauses_and_recovers() {
    let log = Log::default();
    let writer = log.clone();
    let _ = tracing_subscriber::fmt()
        .with_writer(move || writer.clone())
        .with_ansi(false)
        .try_init();
    let hard = zonetally::api::server::raise_descriptor_limit().expect("a descriptor limit");
    let server = Server::start(Config {
        threads: 1,
        ..Config::default()
    })
    .await;
    assert!(healthz(server.addr)
        .await
        .unwrap()
        .starts_with("HTTP/1.1 200"));

    set_soft_limit(open_descriptors() + 16);
    // Connect until this process is out of descriptors: each connection costs two here (both
    // ends), so the server's accept runs out too. Bounded: the limit is 16 above what is open.
    let mut held = Vec::new();
    for _ in 0..64 {
        match TcpStream::connect(server.addr).await {
            Ok(s) => held.push(s),
            Err(e) => {
                assert_eq!(e.raw_os_error(), Some(libc::EMFILE), "{e}");
                break;
            }
        }
    }
    assert!(held.len() < 64, "the lowered limit was not reached");
    let start = Instant::now();
    while !String::from_utf8_lossy(&log.0.lock().unwrap()).contains("accept failed") {
        assert!(
            start.elapsed() < Duration::from_secs(5),
            "the server never reported a failed accept"
        );
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
    // Descriptors back: the server serves again, by itself.
    drop(held);
    set_soft_limit(hard);
    let start = Instant::now();
    let answer = loop {
        if let Ok(Ok(a)) = tokio::time::timeout(Duration::from_secs(2), healthz(server.addr)).await
        {
            break a;
        }
        assert!(
            start.elapsed() < Duration::from_secs(10),
            "no answer after descriptors were freed"
        );
        tokio::time::sleep(Duration::from_millis(50)).await;
    };
    assert!(answer.starts_with("HTTP/1.1 200"), "{answer}");
    assert!(!server.handle.is_finished(), "the server stopped");
    let text = String::from_utf8_lossy(&log.0.lock().unwrap()).to_string();
    let failures = text.matches("accept failed").count();
    eprintln!(
        "accept failed {failures} times while out of descriptors; recovered in {:?}",
        start.elapsed()
    );
    // Paused between failures (5 ms doubling up to 1 s), not spinning.
    assert!(failures < 200, "accept spun: {failures} failures logged");
}
