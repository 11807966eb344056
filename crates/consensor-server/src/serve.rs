//! Running the server: bind, serve until a shutdown signal, drain within a bound.

use std::future::Future;
use std::sync::Arc;
use std::time::Duration;

use anyhow::Context;
use consensor_store::{connect_with, Store, StoreOptions};
use tokio::net::TcpListener;

use crate::config::{redact_url, Config};
use crate::http::app;
use crate::state::{AppState, Clock, SystemClock};

/// Opens the store named by the configuration (creating an SQLite file and running migrations).
pub async fn open_state(config: Config, clock: Arc<dyn Clock>) -> anyhow::Result<AppState> {
    let options = StoreOptions {
        max_connections: config.database_max_connections,
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
    })
}

/// Serves `state` on `listener`, with the consensus worker beside it, until `shutdown` resolves, then stops accepting connections and
/// lets requests in flight finish for at most the configured grace period. A batch in flight either
/// commits before the process exits or is rolled back with its transaction: never half-stored.
/// When the configuration sets `[metrics] listen`, `/metrics` is served on that address too.
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
/// `/metrics` without a token until the server and the worker have stopped.
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
    let store = state.store.clone();
    // The consensus worker runs beside the server and stops with it.
    let (stop_worker, worker_stop) = tokio::sync::watch::channel(false);
    let metrics_server = match metrics_listener {
        Some(metrics_listener) => {
            let metrics_address = metrics_listener
                .local_addr()
                .context("could not read the metrics listening address")?;
            let mut stop = worker_stop.clone();
            let app = crate::metrics::listener_app(state.clone());
            tracing::info!("metrics served on http://{metrics_address}/metrics");
            println!("metrics served on http://{metrics_address}/metrics");
            Some(tokio::spawn(async move {
                axum::serve(metrics_listener, app)
                    .with_graceful_shutdown(async move {
                        let _ = stop.wait_for(|stopped| *stopped).await;
                    })
                    .await
            }))
        }
        None => None,
    };
    let worker = tokio::spawn(crate::worker::run(
        state.clone(),
        state.config.worker.clone(),
        worker_stop,
    ));
    let router = app(state);
    tracing::info!("listening on http://{address}");
    // Printed as well as logged, so scripts can wait for it whatever the log settings.
    println!("listening on http://{address}");
    let (drain_started_tx, drain_started_rx) = tokio::sync::oneshot::channel::<()>();
    // The peer address goes with each request, so that anonymous public reads are rate-limited
    // per client address.
    let server = axum::serve(
        listener,
        router.into_make_service_with_connect_info::<std::net::SocketAddr>(),
    )
    .with_graceful_shutdown(async move {
        shutdown.await;
        tracing::info!("shutting down: no new connections; draining requests in flight");
        let _ = drain_started_tx.send(());
    });
    let served = tokio::spawn(async move { server.await });
    tokio::pin!(served);
    tokio::select! {
        result = &mut served => {
            result.context("server task failed")?.context("server failed")?;
        }
        _ = async {
            let _ = drain_started_rx.await;
            tokio::time::sleep(grace).await;
        } => {
            tracing::warn!(grace_seconds = grace.as_secs_f64(), "requests still in flight after the grace period; stopping");
        }
    }
    let _ = stop_worker.send(true);
    if tokio::time::timeout(grace, worker).await.is_err() {
        tracing::warn!("the worker did not stop within the grace period");
    }
    if let Some(metrics_server) = metrics_server {
        if tokio::time::timeout(grace, metrics_server).await.is_err() {
            tracing::warn!("the metrics listener did not stop within the grace period");
        }
    }
    store.close().await;
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
