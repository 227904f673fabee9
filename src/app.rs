//! The running service: shared state, the tasks that feed it (Kafka, simulator) and the HTTP
//! server that reads it, all stopped by one cancellation token and awaited before return.

use std::net::SocketAddr;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex, MutexGuard};

use anyhow::Context;
use tokio::net::TcpListener;
use tokio_util::sync::CancellationToken;
use tokio_util::task::TaskTracker;

use crate::config::Config;
use crate::metrics::Metrics;
use crate::simulate::SimulateOptions;
use crate::state::Engine;

/// State shared by every task of the service.
pub struct Shared {
    /// The experiments' state. A std `Mutex`, not an async one: it is held only to apply one
    /// batch or copy one snapshot (microseconds), never across an `.await`.
    pub engine: Mutex<Engine>,
    /// Prometheus metrics.
    pub metrics: Metrics,
    /// Largest accepted encoded event.
    pub max_event_bytes: usize,
    /// `Some` when Kafka is configured: whether its brokers answered the last probe.
    kafka_reachable: Option<AtomicBool>,
}

impl Shared {
    /// Fresh shared state for `config`.
    pub fn new(config: &Config) -> Shared {
        Shared {
            engine: Mutex::new(Engine::new(config.experiments.iter().cloned())),
            metrics: Metrics::new(),
            max_event_bytes: config
                .kafka
                .as_ref()
                .map_or(crate::decode::DEFAULT_MAX_EVENT_BYTES, |k| {
                    k.max_event_bytes
                }),
            kafka_reachable: config.kafka.as_ref().map(|_| AtomicBool::new(false)),
        }
    }

    /// The engine, even if a panic elsewhere poisoned the lock: the state is updated one
    /// event at a time, so it is consistent between events.
    pub fn lock_engine(&self) -> MutexGuard<'_, Engine> {
        self.engine.lock().unwrap_or_else(|p| p.into_inner())
    }

    /// `None` without Kafka; else whether the brokers answered the last probe.
    pub fn kafka_reachable(&self) -> Option<bool> {
        self.kafka_reachable
            .as_ref()
            .map(|b| b.load(Ordering::Relaxed))
    }

    /// Record the result of a broker probe.
    pub fn set_kafka_reachable(&self, reachable: bool) {
        if let Some(b) = &self.kafka_reachable {
            b.store(reachable, Ordering::Relaxed);
            self.metrics.kafka_reachable.set(i64::from(reachable));
        }
    }
}

/// What runs besides the configured sources.
#[derive(Debug, Clone, Default)]
pub struct RunOptions {
    /// Feed simulated traffic (the `demo` command).
    pub simulate: Option<SimulateOptions>,
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
    let probe = dir.join(".posteriord-write-check");
    std::fs::write(&probe, b"ok").with_context(|| {
        format!(
            "the state directory {} is not writable (store.dir)",
            dir.display()
        )
    })?;
    std::fs::remove_file(&probe).ok();
    Ok(())
}

/// Run the service until `shutdown` is cancelled, then stop every task and wait for them.
pub async fn run(
    config: Config,
    listener: TcpListener,
    options: RunOptions,
    shutdown: CancellationToken,
) -> anyhow::Result<()> {
    let shared = Arc::new(Shared::new(&config));
    let tracker = TaskTracker::new();
    if let Some(kafka) = &config.kafka {
        crate::kafka::start(kafka, Arc::clone(&shared), shutdown.clone(), &tracker)
            .context("cannot start the Kafka consumer")?;
    }
    if let Some(sim) = options.simulate {
        tracker.spawn(crate::simulate::run(
            sim,
            Arc::clone(&shared),
            shutdown.clone(),
        ));
    }
    let router = crate::http::router(Arc::clone(&shared), config.http.max_body_bytes);
    let served = crate::http::serve(listener, router, shutdown.clone()).await;
    // If the server stopped on its own (an accept error), the other tasks must stop too.
    shutdown.cancel();
    tracker.close();
    tracker.wait().await;
    tracing::info!("all tasks stopped");
    served.context("the HTTP server failed")
}
