//! Assembly: builds the service from the resolved configuration, spawns the edges that feed it
//! (Kafka, the simulator, alert sinks) and the HTTP server that reads it, stops them all with
//! one cancellation token and awaits them, then makes the final saves. Nothing below imports
//! this module.

use std::net::SocketAddr;
use std::sync::Arc;

use anyhow::Context;
use tokio::net::TcpListener;
use tokio_util::sync::CancellationToken;
use tokio_util::task::TaskTracker;

use crate::config::Config;
use crate::service::Service;
use crate::simulate::SimulateOptions;

/// What runs besides the configured sources.
#[derive(Debug, Clone, Default)]
pub struct RunOptions {
    /// Feed simulated traffic (the `demo` command).
    pub simulate: Option<SimulateOptions>,
    /// Keep state in the store directory (off for the demo).
    pub persist: bool,
}

/// Bind the HTTP listener (separate from [`run`] so callers can print the bound address,
/// which matters with port 0).
pub async fn bind(addr: SocketAddr) -> anyhow::Result<TcpListener> {
    TcpListener::bind(addr)
        .await
        .with_context(|| format!("cannot listen on {addr}"))
}

/// Make sure the state directory exists and is writable, so a bad path fails at start-up
/// rather than at the first write.
pub fn prepare_store(config: &Config) -> anyhow::Result<()> {
    let dir = &config.store.dir;
    std::fs::create_dir_all(dir).with_context(|| {
        format!(
            "cannot create the state directory {} (store.dir)",
            dir.display()
        )
    })?;
    // An empty file: it needs no free space, so a directory that is merely full still
    // starts (not ready until space is freed) while a read-only one is named at once.
    let probe = dir.join(".posteriord-write-check");
    std::fs::File::create(&probe).with_context(|| {
        format!(
            "the state directory {} is not writable (store.dir); make it writable (a read-only \
             mount must be remounted read-write) and start again",
            dir.display()
        )
    })?;
    std::fs::remove_file(&probe).ok();
    Ok(())
}

/// Store the HTTP shard on the snapshot cadence, and retry or probe whatever of the store was
/// failing (the final save happens in [`run`], after the
/// HTTP server has finished its requests).
async fn save_http_shard(service: Arc<Service>, shutdown: CancellationToken) {
    let mut tick = tokio::time::interval(service.snapshot_interval());
    loop {
        tokio::select! {
            _ = shutdown.cancelled() => break,
            _ = tick.tick() => {}
        }
        let s = Arc::clone(&service);
        let _ = tokio::task::spawn_blocking(move || {
            s.save_http_shard();
            s.retry_store();
        })
        .await;
    }
}

/// Pause between rounds of the fleet's verdicts: a verdict is then at most about this old,
/// plus one round.
const FLEET_REFRESH_EVERY: std::time::Duration = crate::service::readings::MAX_AGE;

/// Refresh the fleet's verdicts (the states the lists and the overview read) every
/// [`FLEET_REFRESH_EVERY`] until `shutdown`; the first round starts at once. One round at a
/// time, on the blocking pool.
async fn refresh_fleet(service: Arc<Service>, shutdown: CancellationToken) {
    loop {
        let s = Arc::clone(&service);
        let round = tokio::task::spawn_blocking(move || s.refresh_fleet());
        tokio::select! {
            _ = shutdown.cancelled() => break,
            done = round => {
                if let Err(e) = done {
                    tracing::error!(error = %e, "a fleet refresh round failed; trying again");
                }
            }
        }
        tokio::select! {
            _ = shutdown.cancelled() => break,
            _ = tokio::time::sleep(FLEET_REFRESH_EVERY) => {}
        }
    }
}

/// Run the service until `shutdown` is cancelled, then stop every task and wait for them.
pub async fn run(
    config: Config,
    listener: TcpListener,
    options: RunOptions,
    shutdown: CancellationToken,
) -> anyhow::Result<()> {
    let service = Arc::new(if options.persist {
        Service::open(&config)?
    } else {
        Service::in_memory(&config)
    });
    let tracker = TaskTracker::new();
    if let (Some(topic), Some(k)) = (&config.alerts.kafka_topic, &config.kafka) {
        // Best effort: a broker that is down now gets the topic created on a later start;
        // the producer keeps retrying meanwhile.
        if let Err(e) = crate::kafka::client::ensure_topic(k, topic).await {
            tracing::warn!(topic, error = %e, "cannot check or create the alerts topic now");
        }
    }
    // Everything that can fail on configuration is built before the first task is spawned,
    // so such an error returns at once instead of leaving tasks running.
    let sinks = if !config.alerts.webhooks.is_empty() || config.alerts.kafka_topic.is_some() {
        Some(crate::sinks::Sinks::new(
            &config.alerts,
            config.kafka.as_ref(),
        )?)
    } else {
        None
    };
    let auth = crate::http::guard::Auth::new(&config.http, listener.local_addr()?)?;
    let router = crate::http::router(Arc::clone(&service), &config.http, auth);
    if let Some(sinks) = sinks {
        tracker.spawn(crate::sinks::deliver_loop(
            Arc::clone(&service),
            sinks,
            shutdown.clone(),
        ));
    }
    {
        let (s, token) = (Arc::clone(&service), shutdown.clone());
        // Started here, before any source, so nothing queued for evaluation waits long.
        tracker.spawn_blocking(move || s.run_evaluator(|| token.is_cancelled()));
    }
    tracker.spawn(refresh_fleet(Arc::clone(&service), shutdown.clone()));
    if service.is_stored() {
        tracker.spawn(save_http_shard(Arc::clone(&service), shutdown.clone()));
    }
    if let Some(kafka) = &config.kafka {
        let started = async {
            crate::kafka::check_co_partitioned(kafka, service.mapped_topics(), shutdown.clone())
                .await
                .context("cannot consume the [[source]] topics")?;
            crate::kafka::start(kafka, Arc::clone(&service), shutdown.clone(), &tracker)
                .context("cannot start the Kafka consumer")
        };
        if let Err(e) = started.await {
            // The evaluator and the other tasks are already running: stop and await them, or
            // the blocking ones would keep the process alive after this error.
            shutdown.cancel();
            tracker.close();
            tracker.wait().await;
            return Err(e);
        }
    }
    if let Some(sim) = options.simulate {
        tracker.spawn(crate::simulate::run(
            sim,
            Arc::clone(&service),
            shutdown.clone(),
        ));
    }
    let served = crate::http::serve(listener, router, shutdown.clone()).await;
    // If the server stopped on its own (an accept error), the other tasks must stop too.
    shutdown.cancel();
    tracker.close();
    tracker.wait().await;
    let s = Arc::clone(&service);
    let saved = tokio::task::spawn_blocking(move || s.save_at_shutdown())
        .await
        .unwrap_or(false);
    if !saved {
        tracing::error!("the state of events posted over HTTP could not be saved at shutdown");
    }
    tracing::info!("all tasks stopped");
    served.context("the HTTP server failed")
}
