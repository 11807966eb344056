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
pub async fn run(
    listener: TcpListener,
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
    let server = axum::serve(listener, router).with_graceful_shutdown(async move {
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
