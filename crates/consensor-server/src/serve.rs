//! Running the server: bind, serve until a shutdown signal, drain within a bound.

use std::future::Future;
use std::net::SocketAddr;
use std::sync::Arc;
use std::time::Duration;

use anyhow::Context;
use axum::extract::ConnectInfo;
use axum::Router;
use consensor_store::{connect_with, Store, StoreOptions};
use hyper_util::rt::{TokioIo, TokioTimer};
use hyper_util::server::graceful::GracefulShutdown;
use tokio::net::TcpListener;
use tokio::task::JoinSet;
use tokio::time::Instant;

use crate::config::{redact_url, Config};
use crate::http::app;
use crate::state::{AppState, Clock, SystemClock};

/// Opens the store named by the configuration (creating an SQLite file and running migrations).
pub async fn open_state(config: Config, clock: Arc<dyn Clock>) -> anyhow::Result<AppState> {
    let options = StoreOptions {
        max_connections: config.database_max_connections,
        acquire_timeout: config.database_acquire_timeout,
        history_ms: config.rules.history_ms,
        ..StoreOptions::default()
    };
    let store = connect_with(&config.database_url, &options)
        .await
        .with_context(|| {
            format!(
                "could not open the database {}",
                redact_url(&config.database_url)
            )
        })?;
    Ok(AppState {
        store,
        config: Arc::new(config),
        clock,
        ingest: Arc::default(),
    })
}

/// Serves `state` on `listener`, with the consensus worker beside it, until `shutdown` resolves,
/// then stops accepting connections and lets requests in flight finish for at most the configured
/// grace period, after which the connections still open are closed. A batch in flight either
/// commits before its connection is closed or is rolled back with its transaction: never
/// half-stored. When the configuration sets `[metrics] listen`, `/metrics` is served on that
/// address too.
pub async fn run(
    listener: TcpListener,
    state: AppState,
    shutdown: impl Future<Output = ()> + Send + 'static,
) -> anyhow::Result<()> {
    let metrics_listener = match state.config.metrics_listen {
        Some(address) => Some(
            TcpListener::bind(address)
                .await
                .with_context(|| format!("could not listen on {address} for metrics"))?,
        ),
        None => None,
    };
    run_with_metrics_listener(listener, metrics_listener, state, shutdown).await
}

/// [`run`] with the separate metrics listener already bound (tests bind it on port 0); it serves
/// `/metrics` without a token until the shutdown.
///
/// The whole stop is bounded by `shutdown_grace` from the moment `shutdown` resolves: the listeners
/// close at once (a new connection is refused), idle connections are closed, each connection with a
/// request in flight is closed after its answer, the worker is told to stop, and whatever is still
/// running when the grace period ends is cut off.
pub async fn run_with_metrics_listener(
    listener: TcpListener,
    metrics_listener: Option<TcpListener>,
    state: AppState,
    shutdown: impl Future<Output = ()> + Send + 'static,
) -> anyhow::Result<()> {
    let address = listener
        .local_addr()
        .context("could not read the listening address")?;
    let grace = state.config.shutdown_grace;
    let connection_settings = ConnectionSettings {
        head_timeout: state.config.request_head_timeout,
    };
    let store = state.store.clone();
    // `None` while serving; the deadline of the drain once the shutdown has begun.
    let (stop_serving, serving_stop) = tokio::sync::watch::channel::<Option<Instant>>(None);
    // The consensus worker runs beside the server and stops with it.
    let (stop_worker, worker_stop) = tokio::sync::watch::channel(false);
    let metrics_server = match metrics_listener {
        Some(metrics_listener) => {
            let metrics_address = metrics_listener
                .local_addr()
                .context("could not read the metrics listening address")?;
            let app = crate::metrics::listener_app(state.clone());
            tracing::info!("metrics served on http://{metrics_address}/metrics");
            println!("metrics served on http://{metrics_address}/metrics");
            Some(tokio::spawn(serve_connections(
                metrics_listener,
                app,
                connection_settings,
                serving_stop.clone(),
            )))
        }
        None => None,
    };
    let mut worker = tokio::spawn(crate::worker::run(
        state.clone(),
        state.config.worker.clone(),
        worker_stop,
    ));
    let router = app(state);
    tracing::info!("listening on http://{address}");
    // Printed as well as logged, so scripts can wait for it whatever the log settings.
    println!("listening on http://{address}");
    let mut server = tokio::spawn(serve_connections(
        listener,
        router,
        connection_settings,
        serving_stop,
    ));
    let early_end = tokio::select! {
        () = shutdown => None,
        result = &mut server => Some(result),
    };
    let deadline = Instant::now() + grace;
    tracing::info!(
        grace_seconds = grace.as_secs_f64(),
        "shutting down: no new connections; draining requests in flight"
    );
    let _ = stop_serving.send(Some(deadline));
    let _ = stop_worker.send(true);
    let served = match early_end {
        Some(result) => result,
        // `serve_connections` returns by the deadline: it cuts off what is still running then.
        None => server.await,
    };
    let cut_off = served.context("the server task failed")?;
    if cut_off > 0 {
        tracing::warn!(
            connections = cut_off,
            grace_seconds = grace.as_secs_f64(),
            "requests still in flight after the grace period; their connections were closed"
        );
    }
    if let Some(metrics_server) = metrics_server {
        let _ = metrics_server.await;
    }
    if tokio::time::timeout_at(deadline, &mut worker)
        .await
        .is_err()
    {
        tracing::warn!("the worker did not stop within the grace period; stopping it");
        worker.abort();
        let _ = worker.await;
    }
    // Every task that held a connection has ended, so closing the pool waits for nothing but the
    // connections' own goodbyes (SQLite checkpoints its write-ahead log); bounded by what is left
    // of the grace period, and at least a moment, so that a database that stopped answering cannot
    // hold up the exit.
    let close_by = deadline.max(Instant::now() + STORE_CLOSE_WAIT);
    if tokio::time::timeout_at(close_by, store.close())
        .await
        .is_err()
    {
        tracing::warn!("the database connections did not close in time");
    }
    tracing::info!("stopped");
    Ok(())
}

/// `consensor serve`: loads the configuration, opens the database, serves until SIGINT or SIGTERM.
pub async fn serve(config: Config) -> anyhow::Result<()> {
    let listen = config.listen;
    let state = open_state(config, Arc::new(SystemClock)).await?;
    let listener = TcpListener::bind(listen)
        .await
        .with_context(|| format!("could not listen on {listen}"))?;
    run(listener, state, shutdown_signal()).await
}

/// Resolves on SIGINT (Ctrl-C) or SIGTERM.
pub async fn shutdown_signal() {
    let interrupt = async {
        let _ = tokio::signal::ctrl_c().await;
    };
    #[cfg(unix)]
    let terminate = async {
        match tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate()) {
            Ok(mut signal) => {
                signal.recv().await;
            }
            Err(_) => std::future::pending::<()>().await,
        }
    };
    #[cfg(not(unix))]
    let terminate = std::future::pending::<()>();
    tokio::select! {
        _ = interrupt => {},
        _ = terminate => {},
    }
}

/// How long a test helper may wait for a server to come up.
pub const STARTUP_WAIT: Duration = Duration::from_secs(30);

/// How long closing the database pool may take at least, once every request and the worker have
/// stopped, even when the grace period is over.
const STORE_CLOSE_WAIT: Duration = Duration::from_secs(1);

/// How long to wait before accepting again after an error such as "too many open files".
const ACCEPT_ERROR_PAUSE: Duration = Duration::from_secs(1);

/// What every connection of a listener is served with.
#[derive(Debug, Clone, Copy)]
struct ConnectionSettings {
    /// `request_head_timeout_seconds`: the time a connection has to send a complete request head
    /// (the request line and every header field), counted from the moment the server is ready
    /// for it: from the connection's start, or from the end of the previous answer on a
    /// keep-alive connection. A connection that takes longer is closed.
    head_timeout: Duration,
}

/// Accepts connections on `listener` and serves `router` on each (HTTP/1.1) until `stop` holds a
/// deadline; then closes the listener (new connections are refused), asks every connection to
/// close once its request in flight has been answered (an idle one closes at once), waits for them
/// until the deadline and cuts off those still open. Returns how many were cut off.
///
/// axum's own `serve` sets no timer on hyper's connections, so hyper's header read timeout never
/// runs there and a client sending its request head byte by byte, or not at all, holds a
/// connection for ever; the request timeout of [`crate::http::app`] starts only once the head has
/// arrived. Here hyper's `header_read_timeout` runs on tokio's timer.
async fn serve_connections(
    listener: TcpListener,
    router: Router,
    settings: ConnectionSettings,
    mut stop: tokio::sync::watch::Receiver<Option<Instant>>,
) -> usize {
    let graceful = GracefulShutdown::new();
    let mut connections: JoinSet<()> = JoinSet::new();
    let deadline = loop {
        // Reap the connections that have ended, so that the set holds only open ones.
        while connections.try_join_next().is_some() {}
        let accepted = tokio::select! {
            stopped = stop.wait_for(Option::is_some) => {
                // A dropped sender (the server's owner is gone) stops at once.
                break stopped.ok().and_then(|deadline| *deadline).unwrap_or_else(Instant::now);
            }
            accepted = listener.accept() => accepted,
        };
        let (stream, peer) = match accepted {
            Ok(accepted) => accepted,
            Err(error) if is_per_connection_error(&error) => continue,
            Err(error) => {
                tracing::error!(%error, "could not accept a connection; pausing");
                tokio::select! {
                    _ = stop.wait_for(Option::is_some) => {}
                    () = tokio::time::sleep(ACCEPT_ERROR_PAUSE) => {}
                }
                continue;
            }
        };
        let router = router.clone();
        // The peer address goes with each request, as axum's `ConnectInfo`, so that anonymous
        // public reads are rate-limited per client address.
        let service = hyper::service::service_fn(
            move |mut request: hyper::Request<hyper::body::Incoming>| {
                request
                    .extensions_mut()
                    .insert(ConnectInfo::<SocketAddr>(peer));
                tower::ServiceExt::oneshot(router.clone(), request)
            },
        );
        let connection = hyper::server::conn::http1::Builder::new()
            .timer(TokioTimer::new())
            .header_read_timeout(settings.head_timeout)
            .serve_connection(TokioIo::new(stream), service);
        let connection = graceful.watch(connection);
        connections.spawn(async move {
            // A connection that ends in an error (the client went away, a malformed or late
            // request head) concerns that client only.
            if let Err(error) = connection.await {
                tracing::debug!(%peer, %error, "connection ended with an error");
            }
        });
    };
    drop(listener);
    // Tells every watched connection to finish, and waits until each has.
    if tokio::time::timeout_at(deadline, graceful.shutdown())
        .await
        .is_ok()
    {
        while connections.join_next().await.is_some() {}
        return 0;
    }
    while connections.try_join_next().is_some() {}
    let cut_off = connections.len();
    // Dropping a connection's task drops its request handler, and with it any transaction not
    // yet committed (rolled back by the database).
    connections.shutdown().await;
    cut_off
}

/// Accept errors that concern one connection only (the client gave up before it was accepted).
fn is_per_connection_error(error: &std::io::Error) -> bool {
    matches!(
        error.kind(),
        std::io::ErrorKind::ConnectionRefused
            | std::io::ErrorKind::ConnectionAborted
            | std::io::ErrorKind::ConnectionReset
    )
}
