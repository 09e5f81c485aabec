//! Running the service on a socket: our own accept loop over hyper's HTTP/1 connections, the
//! socket's limits, the job sweeper and graceful shutdown. It owns nothing of the routes.
//!
//! Limits held here (each a flag, see `config.rs`): the time to receive a request's headers
//! (hyper's `header_read_timeout`, counted from the moment the connection is ready for that
//! request), the time a connection may sit idle (no request in flight, no byte moved), and the
//! number of connections served in full. Connections beyond that number are still accepted, so
//! the listener's backlog never fills and load balancers' health checks keep an answer: they are
//! served `/healthz` and `/readyz` only, one request each, under a tight header timeout, and
//! everything else there gets 503. `accept` failing (descriptors exhausted: EMFILE, ENFILE) backs
//! off and retries instead of spinning or stopping the server.
//!
//! On SIGTERM or Ctrl-C the listener stops accepting, new executions get 503, unfinished jobs
//! are marked failed (they live in memory and would be lost anyway), and requests in flight get
//! the grace period to finish; connections still open after it are dropped.

use std::future::Future;
use std::io;
use std::pin::Pin;
use std::sync::atomic::{AtomicU64, AtomicUsize, Ordering};
use std::sync::Arc;
use std::task::{Context, Poll};
use std::time::{Duration, Instant};

use axum::body::Body;
use axum::http::{header, HeaderValue, Method, Request, Response, StatusCode};
use axum::Router;
use hyper::body::Incoming;
use hyper::server::conn::http1;
use hyper_util::rt::{TokioIo, TokioTimer};
use tokio::io::{AsyncRead, AsyncWrite, ReadBuf};
use tokio::net::{TcpListener, TcpStream};
use tokio::sync::{watch, OwnedSemaphorePermit, Semaphore};
use tokio::task::JoinSet;
use tower::ServiceExt;

use super::body::problem_response;
use super::config::Config;
use super::state::AppState;

/// How often expired jobs are swept out and, when no computation runs, the allocator hands
/// back the pages freed since (`allocator::release_freed`).
const SWEEP_EVERY: Duration = Duration::from_secs(5);

/// First pause after `accept` fails for want of descriptors or memory; doubled on every failure
/// in a row up to `ACCEPT_BACKOFF_MAX`. Closing connections (timeouts) frees descriptors within
/// milliseconds to seconds, so retrying sooner only spins.
const ACCEPT_BACKOFF_MIN: Duration = Duration::from_millis(5);
const ACCEPT_BACKOFF_MAX: Duration = Duration::from_secs(1);

/// Descriptors kept free beyond `--max-connections` when checking the process's limit: the
/// listener, the runtime's epoll and wake-up descriptors, log files, a job store's sockets, and
/// connections beyond the cap while they wait for their tight timeout.
const DESCRIPTOR_MARGIN: u64 = 128;

/// Binds `config.bind` and serves until SIGTERM or Ctrl-C.
pub async fn serve(config: Config) -> Result<(), String> {
    let bind = config.bind;
    let descriptors = raise_descriptor_limit();
    if let Some(limit) = descriptors {
        let wanted = config.max_connections as u64 + DESCRIPTOR_MARGIN;
        if limit < wanted {
            tracing::warn!(
                descriptor_limit = limit,
                max_connections = config.max_connections,
                "the descriptor limit leaves little room above --max-connections: accept may fail with EMFILE (it backs off and retries); raise `ulimit -n` or lower --max-connections"
            );
        }
    }
    let state = AppState::new(config)?;
    let listener = TcpListener::bind(bind)
        .await
        .map_err(|e| format!("cannot listen on {bind}: {e}"))?;
    let addr = listener.local_addr().map_err(|e| e.to_string())?;
    tracing::info!(%addr, threads = state.pool().stats().threads, descriptor_limit = descriptors, "zonetally listening");
    serve_on(listener, state, shutdown_signal()).await
}

/// Raises this process's soft limit on open descriptors to its hard limit (as Go's runtime
/// does), and returns the soft limit now in force; `None` where it cannot be read.
pub fn raise_descriptor_limit() -> Option<u64> {
    #[cfg(unix)]
    {
        let mut lim = libc::rlimit {
            rlim_cur: 0,
            rlim_max: 0,
        };
        // SAFETY: getrlimit and setrlimit only read and write the struct passed by pointer.
        unsafe {
            if libc::getrlimit(libc::RLIMIT_NOFILE, &mut lim) != 0 {
                return None;
            }
            if lim.rlim_cur < lim.rlim_max {
                let raised = libc::rlimit {
                    rlim_cur: lim.rlim_max,
                    rlim_max: lim.rlim_max,
                };
                if libc::setrlimit(libc::RLIMIT_NOFILE, &raised) == 0 {
                    lim.rlim_cur = lim.rlim_max;
                }
            }
        }
        #[allow(clippy::unnecessary_cast)] // rlim_t is not u64 on every unix
        Some(lim.rlim_cur as u64)
    }
    #[cfg(not(unix))]
    {
        None
    }
}

/// The socket's limits, read once from the configuration.
#[derive(Clone, Copy, Debug)]
struct SocketLimits {
    max_connections: usize,
    header: Option<Duration>,
    idle: Option<Duration>,
    overflow: Duration,
}

impl SocketLimits {
    fn of(config: &Config) -> SocketLimits {
        let positive = |d: Duration| (!d.is_zero()).then_some(d);
        SocketLimits {
            max_connections: config.max_connections,
            header: positive(config.header_timeout()),
            idle: positive(config.keep_alive_timeout()),
            // A zero here would refuse every health check: keep at least 1 ms.
            overflow: config.overflow_timeout().max(Duration::from_millis(1)),
        }
    }
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
                if let Err(e) = state.jobs().purge_expired() {
                    tracing::warn!(error = %e, "cannot sweep expired jobs");
                }
                // Idle: hand the pages the last computations freed back to the system.
                let pool = state.pool_stats();
                if pool.queued == 0 && pool.running == 0 {
                    super::allocator::release_freed();
                }
            }
        })
    };
    let grace = state.config().shutdown_grace();
    let limits = SocketLimits::of(state.config());
    let app = super::router(state.clone());
    let permits = Arc::new(Semaphore::new(limits.max_connections));
    let (stop_tx, stop_rx) = watch::channel(false);
    let mut conns = JoinSet::new();
    let mut backoff = ACCEPT_BACKOFF_MIN;
    let mut signal = std::pin::pin!(signal);
    loop {
        tokio::select! {
            _ = &mut signal => break,
            accepted = listener.accept() => match accepted {
                Ok((stream, _peer)) => {
                    backoff = ACCEPT_BACKOFF_MIN;
                    let permit = permits.clone().try_acquire_owned().ok();
                    conns.spawn(connection(stream, app.clone(), permit, limits, stop_rx.clone()));
                }
                Err(e) if per_connection(&e) => {}
                Err(e) => {
                    tracing::warn!(error = %e, pause_ms = backoff.as_millis() as u64, "accept failed: pausing before the next");
                    tokio::select! {
                        _ = &mut signal => break,
                        _ = tokio::time::sleep(backoff) => {}
                        // A connection closing frees a descriptor.
                        Some(_) = conns.join_next(), if !conns.is_empty() => {}
                    }
                    backoff = (backoff * 2).min(ACCEPT_BACKOFF_MAX);
                }
            },
            Some(done) = conns.join_next(), if !conns.is_empty() => {
                if let Err(e) = done {
                    if e.is_panic() {
                        tracing::error!("a connection task panicked");
                    }
                }
            }
        }
    }
    drop(listener);
    let failed = state.begin_shutdown();
    tracing::info!(
        failed_jobs = failed,
        connections = conns.len(),
        "shutting down: no new work accepted"
    );
    let _ = stop_tx.send(true);
    let drained =
        tokio::time::timeout(grace, async { while conns.join_next().await.is_some() {} }).await;
    if drained.is_err() {
        tracing::warn!(
            grace_seconds = grace.as_secs_f64(),
            connections = conns.len(),
            "grace period over: dropping requests still running"
        );
        conns.shutdown().await;
    }
    sweeper.abort();
    Ok(())
}

/// Errors of `accept` that concern one connection only (the peer gave up while it waited in
/// the backlog); anything else (EMFILE, ENFILE, ENOBUFS, ENOMEM) is the process's and is worth a
/// pause.
fn per_connection(e: &io::Error) -> bool {
    matches!(
        e.kind(),
        io::ErrorKind::ConnectionAborted
            | io::ErrorKind::ConnectionReset
            | io::ErrorKind::ConnectionRefused
            | io::ErrorKind::Interrupted
    )
}

/// Serves one connection: in full with a permit, health checks only without one.
async fn connection(
    stream: TcpStream,
    app: Router,
    permit: Option<OwnedSemaphorePermit>,
    limits: SocketLimits,
    mut stop: watch::Receiver<bool>,
) {
    let _ = stream.set_nodelay(true);
    let activity = Arc::new(Activity::new());
    let full = permit.is_some();
    let (header, idle) = if full {
        (limits.header, limits.idle)
    } else {
        (Some(limits.overflow), Some(limits.overflow))
    };
    let mut builder = http1::Builder::new();
    builder
        .timer(TokioTimer::new())
        .header_read_timeout(header)
        .keep_alive(full && idle.is_some());
    let io = TokioIo::new(Watched {
        inner: stream,
        activity: activity.clone(),
    });
    let service = {
        let activity = activity.clone();
        hyper::service::service_fn(move |req: Request<Incoming>| {
            let (app, busy) = (app.clone(), activity.begin());
            async move {
                let resp = if full || health_check(&req) {
                    app.oneshot(req.map(Body::new)).await
                } else {
                    Ok(over_capacity(limits.max_connections))
                };
                drop(busy);
                resp
            }
        })
    };
    let conn = builder.serve_connection(io, service);
    let mut conn = std::pin::pin!(conn);
    let mut draining = false;
    loop {
        tokio::select! {
            r = conn.as_mut() => {
                if let Err(e) = r {
                    tracing::debug!(error = %e, "connection closed with an error");
                }
                break;
            }
            _ = stop.changed(), if !draining => {
                draining = true;
                conn.as_mut().graceful_shutdown();
            }
            _ = idle_for(&activity, idle), if !draining => {
                tracing::debug!("closing an idle connection");
                break;
            }
        }
    }
    drop(permit);
}

fn health_check(req: &Request<Incoming>) -> bool {
    (req.method() == Method::GET || req.method() == Method::HEAD)
        && matches!(req.uri().path(), "/healthz" | "/readyz")
}

/// The answer on a connection beyond `--max-connections` to anything but a health check.
fn over_capacity(limit: usize) -> Response<Body> {
    let mut resp = problem_response(
        StatusCode::SERVICE_UNAVAILABLE,
        "too-many-connections",
        "too many connections",
        format!("this service already holds its limit of {limit} open connections: retry shortly, or reuse one connection for several requests"),
    );
    resp.headers_mut()
        .insert(header::RETRY_AFTER, HeaderValue::from(1u64));
    resp.headers_mut()
        .insert(header::CONNECTION, HeaderValue::from_static("close"));
    resp
}

/// Completes once the connection has had no request in flight and moved no byte for `limit`;
/// never when `limit` is `None`.
async fn idle_for(activity: &Activity, limit: Option<Duration>) {
    let Some(limit) = limit else {
        return std::future::pending().await;
    };
    loop {
        match activity.idle() {
            Some(quiet) if quiet >= limit => return,
            Some(quiet) => tokio::time::sleep(limit - quiet).await,
            None => tokio::time::sleep(limit).await,
        }
    }
}

/// What a connection last did: requests in flight and when a byte last moved.
struct Activity {
    start: Instant,
    last_micros: AtomicU64,
    in_flight: AtomicUsize,
}

impl Activity {
    fn new() -> Activity {
        Activity {
            start: Instant::now(),
            last_micros: AtomicU64::new(0),
            in_flight: AtomicUsize::new(0),
        }
    }
    fn touch(&self) {
        let now = self.start.elapsed().as_micros() as u64;
        self.last_micros.fetch_max(now, Ordering::Relaxed);
    }
    /// How long the connection has been quiet; `None` while a request is in flight.
    fn idle(&self) -> Option<Duration> {
        if self.in_flight.load(Ordering::Acquire) > 0 {
            return None;
        }
        let last = Duration::from_micros(self.last_micros.load(Ordering::Relaxed));
        Some(self.start.elapsed().saturating_sub(last))
    }
    fn begin(self: &Arc<Self>) -> InFlight {
        self.in_flight.fetch_add(1, Ordering::AcqRel);
        InFlight(self.clone())
    }
}

/// A request in flight on a connection, until dropped.
struct InFlight(Arc<Activity>);

impl Drop for InFlight {
    fn drop(&mut self) {
        self.0.touch();
        self.0.in_flight.fetch_sub(1, Ordering::AcqRel);
    }
}

/// A stream that records in `activity` when bytes move.
struct Watched {
    inner: TcpStream,
    activity: Arc<Activity>,
}

impl AsyncRead for Watched {
    fn poll_read(
        mut self: Pin<&mut Self>,
        cx: &mut Context<'_>,
        buf: &mut ReadBuf<'_>,
    ) -> Poll<io::Result<()>> {
        let before = buf.filled().len();
        let r = Pin::new(&mut self.inner).poll_read(cx, buf);
        if buf.filled().len() > before {
            self.activity.touch();
        }
        r
    }
}

impl AsyncWrite for Watched {
    fn poll_write(
        mut self: Pin<&mut Self>,
        cx: &mut Context<'_>,
        buf: &[u8],
    ) -> Poll<io::Result<usize>> {
        let r = Pin::new(&mut self.inner).poll_write(cx, buf);
        if matches!(r, Poll::Ready(Ok(n)) if n > 0) {
            self.activity.touch();
        }
        r
    }
    fn poll_write_vectored(
        mut self: Pin<&mut Self>,
        cx: &mut Context<'_>,
        bufs: &[io::IoSlice<'_>],
    ) -> Poll<io::Result<usize>> {
        let r = Pin::new(&mut self.inner).poll_write_vectored(cx, bufs);
        if matches!(r, Poll::Ready(Ok(n)) if n > 0) {
            self.activity.touch();
        }
        r
    }
    fn is_write_vectored(&self) -> bool {
        self.inner.is_write_vectored()
    }
    fn poll_flush(mut self: Pin<&mut Self>, cx: &mut Context<'_>) -> Poll<io::Result<()>> {
        Pin::new(&mut self.inner).poll_flush(cx)
    }
    fn poll_shutdown(mut self: Pin<&mut Self>, cx: &mut Context<'_>) -> Poll<io::Result<()>> {
        Pin::new(&mut self.inner).poll_shutdown(cx)
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

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn running_out_of_descriptors_is_not_a_connection_error() {
        assert!(!per_connection(&io::Error::from_raw_os_error(libc::EMFILE)));
        assert!(!per_connection(&io::Error::from_raw_os_error(libc::ENFILE)));
        assert!(per_connection(&io::Error::from(
            io::ErrorKind::ConnectionAborted
        )));
    }

    #[test]
    fn a_connection_is_idle_only_with_nothing_in_flight() {
        let a = Arc::new(Activity::new());
        let busy = a.begin();
        assert_eq!(a.idle(), None);
        drop(busy);
        assert!(a.idle().unwrap() < Duration::from_secs(1));
    }
}
