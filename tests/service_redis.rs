//! Two services sharing one real Redis (`--job-store redis://...`), as two replicas behind a
//! load balancer would: a job submitted to one is polled, listed, fetched and dismissed through
//! the other; with Redis gone both refuse job work with 503s and are not ready, and they
//! recover by themselves when it is back. Needs `redis-server` (Debian package redis-server).

mod service_support;

use std::net::TcpStream;
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

use axum::body::Body;
use axum::http::{Request, StatusCode};
use service_support::*;
use zonetally::{app, AppState, Config};

struct RedisServer {
    child: Child,
    port: u16,
}

impl RedisServer {
    fn start(port: u16) -> RedisServer {
        let child = Command::new("redis-server")
            .args([
                "--port",
                &port.to_string(),
                "--bind",
                "127.0.0.1",
                "--save",
                "",
                "--appendonly",
                "no",
            ])
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .expect(
                "redis-server must be installed for this test (apt-get install -y redis-server)",
            );
        let start = Instant::now();
        while TcpStream::connect(("127.0.0.1", port)).is_err() {
            assert!(
                start.elapsed() < Duration::from_secs(10),
                "redis-server did not start"
            );
            std::thread::sleep(Duration::from_millis(20));
        }
        RedisServer { child, port }
    }
    fn stop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

impl Drop for RedisServer {
    fn drop(&mut self) {
        self.stop();
    }
}

fn free_port() -> u16 {
    std::net::TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
        .port()
}

fn replica(port: u16) -> (AppState, axum::Router) {
    let config = Config {
        job_store: format!("redis://127.0.0.1:{port}/0"),
        ..config()
    };
    let state = AppState::new(config).expect("state");
    let router = app(state.clone());
    (state, router)
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn two_replicas_share_their_jobs_through_redis() {
    let mut redis = RedisServer::start(free_port());
    let (a_state, a) = replica(redis.port);
    let (b_state, b) = replica(redis.port);
    assert_eq!(get(&a, "/readyz").await.status, StatusCode::OK);

    // Submitted to one, polled and fetched through the other.
    let created = submit_tea_job(&a).await;
    assert_eq!(created.status, StatusCode::CREATED);
    let location = created.header("location").unwrap();
    let done = wait_job(&b, &location).await;
    assert_eq!(done["status"], "successful");
    let through_b = get(&b, &format!("{location}/results")).await.ok_json();
    let through_a = get(&a, &format!("{location}/results")).await.ok_json();
    assert_eq!(through_a, through_b);
    let sync = post_json(
        &a,
        "/processes/zone-counts/execution",
        &serde_json::json!({"inputs": tea_inputs()}),
        None,
    )
    .await;
    assert_eq!(
        through_b,
        sync.ok_json(),
        "the job's results differ from the synchronous ones"
    );
    let listed = get(&b, "/jobs").await.ok_json();
    assert!(
        listed["jobs"]
            .as_array()
            .unwrap()
            .iter()
            .any(|j| j["jobID"] == done["jobID"]),
        "{listed}"
    );

    // A job queued on one replica, dismissed through the other, never runs.
    let block = block_pool(&a_state);
    let queued = submit_tea_job(&a).await;
    let queued_at = queued.header("location").unwrap();
    let dismissed = send(&b, Request::delete(&queued_at).body(Body::empty()).unwrap()).await;
    assert_eq!(dismissed.status, StatusCode::OK);
    assert_eq!(dismissed.json()["status"], "dismissed");
    drop(block);
    until("the dismissed job is forgotten", || {
        b_state
            .jobs()
            .record(queued_at.trim_start_matches("/jobs/"))
            .is_ok_and(|r| r.is_none())
    })
    .await;
    assert_eq!(get(&a, &queued_at).await.status, StatusCode::NOT_FOUND);

    // Redis gone: job routes refuse with 503 and Retry-After, readiness fails, liveness holds.
    redis.stop();
    for (name, router) in [("a", &a), ("b", &b)] {
        let refused = submit_tea_job(router).await;
        assert_eq!(refused.status, StatusCode::SERVICE_UNAVAILABLE, "{name}");
        assert_eq!(refused.json()["type"], "/problems/job-store", "{name}");
        assert!(refused.header("retry-after").is_some());
        assert_eq!(
            get(router, "/readyz").await.status,
            StatusCode::SERVICE_UNAVAILABLE,
            "{name}"
        );
        assert_eq!(
            get(router, "/healthz").await.status,
            StatusCode::OK,
            "{name}"
        );
    }
    // Back on the same address: both are ready again by themselves.
    let _redis = RedisServer::start(redis.port);
    let start = Instant::now();
    while get(&a, "/readyz").await.status != StatusCode::OK
        || get(&b, "/readyz").await.status != StatusCode::OK
    {
        assert!(start.elapsed() < Duration::from_secs(10), "not ready again");
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    let again = submit_tea_job(&b).await;
    assert_eq!(again.status, StatusCode::CREATED);
    assert_eq!(
        wait_job(&a, &again.header("location").unwrap()).await["status"],
        "successful"
    );
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn finished_jobs_expire_from_redis_and_leave_no_index_behind() {
    let redis = RedisServer::start(free_port());
    let config = Config {
        job_store: format!("redis://127.0.0.1:{}/0", redis.port),
        job_ttl: 0.2,
        ..config()
    };
    let state = AppState::new(config).expect("state");
    let router = app(state.clone());
    let mut locations = Vec::new();
    for _ in 0..2 {
        let created = submit_tea_job(&router).await;
        let location = created.header("location").unwrap();
        assert_eq!(wait_job(&router, &location).await["status"], "successful");
        locations.push(location);
    }
    assert!(state.jobs().held_bytes() > 0);
    // One record already gone from Redis (as its backstop expiry would take it): its indexes
    // are cleaned all the same.
    let client = redis::Client::open(format!("redis://127.0.0.1:{}/0", redis.port)).unwrap();
    let mut conn = client.get_connection().unwrap();
    let gone = format!(
        "zonetally:job:{}",
        locations[0].trim_start_matches("/jobs/")
    );
    let deleted: u32 = redis::cmd("DEL").arg(&gone).query(&mut conn).unwrap();
    assert_eq!(deleted, 1);
    tokio::time::sleep(Duration::from_millis(300)).await;
    assert_eq!(state.jobs().purge_expired(), Ok(1));
    assert_eq!(state.jobs().counts().unwrap().total(), 0);
    for location in &locations {
        assert_eq!(get(&router, location).await.status, StatusCode::NOT_FOUND);
    }
}
