//! The running service: shared state, the tasks that feed it (Kafka, simulator) and the HTTP
//! server that reads it, all stopped by one cancellation token and awaited before return.

use std::net::SocketAddr;
use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};
use std::sync::mpsc::{Receiver, Sender};
use std::sync::{Arc, Mutex, MutexGuard};

use anyhow::Context;
use tokio::net::TcpListener;
use tokio_util::sync::CancellationToken;
use tokio_util::task::TaskTracker;

use crate::alerting::{AlertFile, Delivery};
use crate::config::Config;
use crate::decide::alerts::{AlertBook, AlertChange};
use crate::decide::cadence::Cadence;
use crate::metrics::Metrics;
use crate::metrics::Source;
use crate::simulate::SimulateOptions;
use crate::state::shards::Shards;
use crate::state::ExperimentSnapshot;
use crate::store::{Store, Wal};

/// State shared by every task of the service.
pub struct Shared {
    /// The experiments' state, by input shard. A std `Mutex`, not an async one: it is held
    /// only to apply one batch or copy snapshots (microseconds), never across an `.await`.
    pub shards: Mutex<Shards>,
    /// Prometheus metrics.
    pub metrics: Metrics,
    /// Largest accepted encoded event.
    pub max_event_bytes: usize,
    /// `Some` when Kafka is configured: whether its brokers answered the last probe.
    kafka_reachable: Option<AtomicBool>,
    /// Partitions being restored; readiness is false while any is.
    restoring: AtomicUsize,
    /// Where state is stored (`None` for the demo, which keeps nothing).
    pub store: Option<Store>,
    /// How often changed state is written.
    pub snapshot_interval: std::time::Duration,
    /// Write-ahead log of events posted over HTTP (with a store only). Its lock also orders
    /// HTTP batches: a batch is logged and applied while holding it.
    http_wal: Option<Mutex<Wal>>,
    /// Alerts raised by the evaluator; read by `GET /v1/alerts`.
    pub alerts: Mutex<AlertBook>,
    /// Alert events not yet delivered to every sink.
    outbox: Mutex<Vec<Delivery>>,
    /// Where the alert book and the outbox are kept (with a store only).
    alert_file: Option<AlertFile>,
    /// Alert settings (sinks, cadence).
    pub alerts_config: crate::config::AlertsConfig,
    /// Decision quantities over time, recorded at each evaluation (bounded; stored with a
    /// store).
    pub history: crate::http::history::Recorder,
    /// Summaries shared by the readers (at most `http::cache::MAX_AGE` old).
    pub summaries: crate::http::cache::SummaryCache,
    /// Where each experiment stands, refreshed in the background for the fleet lists.
    pub fleet: crate::http::fleet::FleetIndex,
    /// Experiments defined over the API, and the archive. Lock order: catalog, then shards.
    catalog: Mutex<crate::catalog::Catalog>,
    /// Serialises [`Shared::save_dirty`] (taken before the shards' lock).
    save_lock: Mutex<()>,
    /// Publishes the catalog of API experiments to the other instances (set once the Kafka
    /// changelog is reachable).
    catalog_publisher: std::sync::OnceLock<CatalogPublisher>,
    /// When experiments are due for evaluation, by event time and count.
    pub cadence: Cadence,
    /// Snapshots of due experiments, to the evaluator.
    due: Sender<ExperimentSnapshot>,
    /// The evaluator's end of `due`, taken once by [`run`].
    evaluation_queue: Mutex<Option<Receiver<ExperimentSnapshot>>>,
}

/// Sends an instance's catalog (its id, the catalog's JSON) to the other instances.
pub type CatalogPublisher = Box<dyn Fn(&str, &[u8]) + Send + Sync>;

impl Shared {
    /// Fresh shared state for `config`.
    pub fn new(config: &Config) -> Shared {
        let (due, queue) = std::sync::mpsc::channel();
        Shared {
            cadence: Cadence::new(
                config.alerts.evaluate_every.as_micros() as i64,
                config.alerts.evaluate_every_events,
            ),
            due,
            evaluation_queue: Mutex::new(Some(queue)),
            shards: Mutex::new(Shards::new(config.experiments.iter().cloned())),
            metrics: Metrics::new(),
            max_event_bytes: config
                .kafka
                .as_ref()
                .map_or(crate::decode::DEFAULT_MAX_EVENT_BYTES, |k| {
                    k.max_event_bytes
                }),
            kafka_reachable: config.kafka.as_ref().map(|_| AtomicBool::new(false)),
            restoring: AtomicUsize::new(0),
            store: None,
            snapshot_interval: config.store.snapshot_interval,
            http_wal: None,
            alerts: Mutex::new(AlertBook::new(config.alerts.hold_down.as_micros() as i64)),
            outbox: Mutex::new(Vec::new()),
            alert_file: None,
            alerts_config: config.alerts.clone(),
            history: crate::http::history::Recorder::in_memory(config.history_arm_points),
            summaries: Default::default(),
            fleet: Default::default(),
            catalog: Mutex::new(crate::catalog::Catalog::in_memory(
                config.experiments.iter().map(|e| e.id.clone()),
            )),
            save_lock: Mutex::new(()),
            catalog_publisher: std::sync::OnceLock::new(),
        }
    }

    /// Where catalog changes are published (once; later calls are ignored).
    pub fn set_catalog_publisher(&self, publisher: CatalogPublisher) {
        let _ = self.catalog_publisher.set(publisher);
    }

    /// The catalog publisher, once the changelog is reachable.
    pub fn catalog_publisher(&self) -> Option<&CatalogPublisher> {
        self.catalog_publisher.get()
    }

    /// The catalog of API experiments (taken before the shards when both are needed).
    pub fn lock_catalog(&self) -> MutexGuard<'_, crate::catalog::Catalog> {
        self.catalog.lock().unwrap_or_else(|p| p.into_inner())
    }

    /// Decode and apply a batch from `source` (see [`crate::ingest::apply_batch`]) and queue
    /// the experiments it made due for evaluation, in input order.
    pub fn apply(
        &self,
        source: Source,
        items: &[crate::ingest::Item<'_>],
    ) -> crate::ingest::BatchReport {
        let mut report = crate::ingest::apply_batch_due(
            &self.shards,
            &self.metrics,
            source,
            items,
            self.max_event_bytes,
            Some(&self.cadence),
        );
        for snapshot in report.due.drain(..) {
            self.metrics
                .evaluations
                .with_label_values(&["queued"])
                .inc();
            // Fails only when the evaluator has stopped (shutdown); the state is kept anyway.
            let _ = self.due.send(snapshot);
        }
        report
    }

    /// Whether any partition is being restored.
    pub fn is_restoring(&self) -> bool {
        self.restoring.load(Ordering::SeqCst) > 0
    }

    /// Mark `n` partitions as restoring (positive) or done (negative).
    pub fn add_restoring(&self, n: isize) {
        if n >= 0 {
            self.restoring.fetch_add(n as usize, Ordering::SeqCst);
        } else {
            self.restoring.fetch_sub(n.unsigned_abs(), Ordering::SeqCst);
        }
        self.metrics
            .restoring
            .set(self.restoring.load(Ordering::SeqCst) as i64);
    }

    /// Write every changed shard accepted by `which` to the store. Images are taken under the
    /// lock (clearing the dirty mark), files written outside it; a failed write marks the
    /// shard dirty again so the next round retries. Returns whether all writes succeeded.
    pub fn save_dirty(&self, which: impl Fn(&str) -> bool) -> bool {
        let Some(store) = &self.store else {
            return true;
        };
        // One save at a time: two overlapping saves of a shard could store the older image
        // last, after the newer one had already trimmed the HTTP write-ahead log.
        let _one_at_a_time = self.save_lock.lock().unwrap_or_else(|p| p.into_inner());
        let images: Vec<(String, crate::state::shards::ShardImage)> = {
            let mut shards = self.lock_shards();
            shards
                .ids()
                .into_iter()
                .filter(|id| which(id))
                .filter_map(|id| {
                    let shard = shards.shard_mut(&id);
                    if !shard.dirty {
                        return None;
                    }
                    shard.dirty = false;
                    let image = shard.image();
                    Some((id, image))
                })
                .collect()
        };
        let mut all_ok = true;
        for (id, image) in images {
            match store.save(&id, &image) {
                Ok(()) => {
                    self.metrics.state_saves.with_label_values(&["ok"]).inc();
                    if let (Some(wal), true) = (&self.http_wal, id == crate::http::HTTP_SHARD) {
                        let from = image.next_offset.unwrap_or(0).max(0) as u64;
                        let mut wal = wal.lock().unwrap_or_else(|p| p.into_inner());
                        if let Err(e) = wal.truncate_before(from) {
                            tracing::warn!(error = %e, "cannot trim the HTTP write-ahead log; it keeps growing until the next save");
                        }
                    }
                }
                Err(e) => {
                    all_ok = false;
                    tracing::error!(shard = %id, error = %e, "cannot save state; will retry");
                    self.metrics.state_saves.with_label_values(&["error"]).inc();
                    self.lock_shards().shard_mut(&id).dirty = true;
                }
            }
        }
        all_ok
    }

    /// Pending alert deliveries.
    pub fn lock_outbox(&self) -> MutexGuard<'_, Vec<Delivery>> {
        self.outbox.lock().unwrap_or_else(|p| p.into_inner())
    }

    /// Write the alert book and the outbox together (no-op without a store).
    pub fn save_alerts(&self) {
        let Some(file) = &self.alert_file else { return };
        // Lock order: alerts, then outbox (the evaluator takes them in the same order).
        let book = self.alerts.lock().unwrap_or_else(|p| p.into_inner());
        let outbox = self.lock_outbox();
        if let Err(e) = file.save(book.alerts(), &outbox) {
            tracing::error!(error = %e, "cannot save alerts and their pending deliveries");
        }
    }

    /// Log (durably, when a store is configured) and apply a batch of events posted over
    /// HTTP. Nothing is applied if logging fails, so an error reply means "not accepted".
    pub fn ingest_http(
        &self,
        items: &[&[u8]],
    ) -> Result<crate::ingest::BatchReport, crate::store::StoreError> {
        let http = crate::http::HTTP_SHARD;
        let batch = |first: Option<i64>| -> Vec<crate::ingest::Item<'_>> {
            items
                .iter()
                .enumerate()
                .map(|(i, bytes)| crate::ingest::Item {
                    shard: http,
                    offset: first.map(|f| f + i as i64),
                    bytes,
                })
                .collect()
        };
        let Some(wal) = &self.http_wal else {
            return Ok(self.apply(Source::Http, &batch(None)));
        };
        let mut wal = wal.lock().unwrap_or_else(|p| p.into_inner());
        let first = self.lock_shards().shard_mut(http).next_offset.unwrap_or(0);
        wal.append(first as u64, items)?;
        Ok(self.apply(Source::Http, &batch(Some(first))))
    }

    /// Re-apply logged HTTP events that the stored HTTP shard does not hold yet.
    fn replay_http_wal(&self) -> anyhow::Result<()> {
        let Some(wal) = &self.http_wal else {
            return Ok(());
        };
        let mut wal = wal.lock().unwrap_or_else(|p| p.into_inner());
        let (records, torn) = wal.read()?;
        let from = self
            .lock_shards()
            .shard(crate::http::HTTP_SHARD)
            .and_then(|s| s.next_offset)
            .unwrap_or(0);
        let pending: Vec<&(u64, Vec<u8>)> = records
            .iter()
            .filter(|(seq, _)| *seq as i64 >= from)
            .collect();
        let items: Vec<crate::ingest::Item<'_>> = pending
            .iter()
            .map(|(seq, bytes)| crate::ingest::Item {
                shard: crate::http::HTTP_SHARD,
                offset: Some(*seq as i64),
                bytes,
            })
            .collect();
        if !items.is_empty() {
            self.apply(Source::Http, &items);
            tracing::info!(
                events = items.len(),
                "replayed events posted over HTTP from the write-ahead log"
            );
        }
        if torn {
            tracing::warn!("the HTTP write-ahead log ended in a partial record (a crash mid-write); it was cut off — that request had not been answered");
        }
        wal.truncate_before(from.max(0) as u64)?;
        Ok(())
    }

    /// Read shard `id` from the store (if stored), reporting experiments that no longer fit.
    pub fn load_shard(
        &self,
        id: &str,
    ) -> Result<Option<crate::state::shards::Shard>, crate::store::StoreError> {
        let Some(store) = &self.store else {
            return Ok(None);
        };
        let defs = self.lock_shards().defs().to_vec();
        let Some(loaded) = store.load(id, &defs)? else {
            return Ok(None);
        };
        for m in &loaded.mismatches {
            tracing::error!(shard = %id, "{m}; that experiment starts empty in this shard");
            self.metrics.restore_mismatches.inc();
        }
        Ok(Some(loaded.shard))
    }

    /// The shards, even if a panic elsewhere poisoned the lock: the state is updated one
    /// event at a time, so it is consistent between events.
    pub fn lock_shards(&self) -> MutexGuard<'_, Shards> {
        self.shards.lock().unwrap_or_else(|p| p.into_inner())
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
    /// Keep state in the store directory (off for the demo).
    pub persist: bool,
}

/// Wall-clock time in microseconds since the epoch.
pub fn now_micros() -> i64 {
    (time::OffsetDateTime::now_utc().unix_timestamp_nanos() / 1_000) as i64
}

/// Evaluate one due experiment (its snapshot as of the event that made it due) and fold the
/// findings into the alert book with that event's time as "now"; each change is recorded with
/// its deliveries, then logged as one structured line (the log sink) and counted.
pub fn evaluate_due(shared: &Shared, snapshot: ExperimentSnapshot) {
    // Quadrature runs outside the alerts lock; only the fold takes it.
    let mut evaluation = crate::decide::cadence::assess(snapshot);
    crate::http::history::record(
        shared,
        &evaluation.summary,
        &evaluation.findings,
        evaluation.at,
    );
    {
        let mut book = shared.alerts.lock().unwrap_or_else(|p| p.into_inner());
        evaluation.fold_into(&mut book);
    }
    shared
        .metrics
        .evaluations
        .with_label_values(&["done"])
        .inc();
    let changes = evaluation.changes;
    if changes.is_empty() {
        return;
    }
    // Delivery stamps are operational, so they use the wall clock.
    let now = now_micros();
    // Recorded durably, with their deliveries, before anything is announced.
    let deliveries = crate::alerting::deliveries_for(&changes, &shared.alerts_config, now);
    shared.lock_outbox().extend(deliveries);
    shared.save_alerts();
    for change in changes {
        let (kind, alert) = match &change {
            AlertChange::Opened(a) => ("opened", a),
            AlertChange::Closed(a) => ("closed", a),
        };
        shared
            .metrics
            .alert_changes
            .with_label_values(&[alert.key.rule.as_str(), kind])
            .inc();
        tracing::warn!(
            alert_id = %alert.id,
            change = kind,
            state = alert.state.as_str(),
            experiment = %alert.key.experiment,
            metric = alert.key.metric.as_deref().unwrap_or(""),
            variant = alert.key.variant.as_deref().unwrap_or(""),
            rule = alert.key.rule.as_str(),
            value = alert.finding.value,
            threshold = alert.finding.threshold,
            caution = crate::http::doc::CAUTION_SHORT,
            "{}",
            alert.finding.message
        );
    }
}

/// Rebuild the alert gauges from the book; under `metrics.scrape`, so that a scrape never
/// sees them cleared and half refilled.
fn refresh_alert_gauges(shared: &Shared) {
    let book = shared.alerts.lock().unwrap_or_else(|p| p.into_inner());
    let _scrape = shared
        .metrics
        .scrape
        .lock()
        .unwrap_or_else(|p| p.into_inner());
    shared.metrics.alerts.reset();
    for a in book.alerts() {
        shared
            .metrics
            .alerts
            .with_label_values(&[a.key.rule.as_str(), a.state.as_str()])
            .inc();
    }
}

/// The evaluator: a dedicated thread that takes the snapshots queued by the ingest path, in
/// order, and evaluates them, so quadrature never runs on the ingest path. On shutdown it
/// evaluates what is already queued, then returns.
fn evaluator(
    shared: Arc<Shared>,
    queue: Receiver<ExperimentSnapshot>,
    shutdown: CancellationToken,
) {
    use std::sync::mpsc::RecvTimeoutError;
    loop {
        match queue.recv_timeout(std::time::Duration::from_millis(100)) {
            Ok(snapshot) => {
                evaluate_due(&shared, snapshot);
                while let Ok(snapshot) = queue.try_recv() {
                    evaluate_due(&shared, snapshot);
                }
                refresh_alert_gauges(&shared);
            }
            Err(RecvTimeoutError::Timeout) if shutdown.is_cancelled() => break,
            Err(RecvTimeoutError::Timeout) => {}
            Err(RecvTimeoutError::Disconnected) => break,
        }
    }
    while let Ok(snapshot) = queue.try_recv() {
        evaluate_due(&shared, snapshot);
    }
    refresh_alert_gauges(&shared);
}

/// Store the HTTP shard on the snapshot cadence and once more at shutdown.
async fn save_http_shard(
    shared: Arc<Shared>,
    every: std::time::Duration,
    shutdown: CancellationToken,
) {
    let http = |id: &str| id == crate::http::HTTP_SHARD;
    let mut tick = tokio::time::interval(every);
    loop {
        tokio::select! {
            _ = shutdown.cancelled() => break,
            _ = tick.tick() => {}
        }
        let s = Arc::clone(&shared);
        let _ = tokio::task::spawn_blocking(move || s.save_dirty(http)).await;
    }
    // The final save happens in `run`, after the HTTP server has finished its requests.
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
    let mut shared = Shared::new(&config);
    if options.persist {
        let store =
            Store::open(&config.store.dir).context("cannot open the state store (store.dir)")?;
        shared.http_wal = Some(Mutex::new(
            Wal::open(&store, crate::http::HTTP_SHARD)
                .context("cannot open the HTTP write-ahead log")?,
        ));
        let file = AlertFile::new(&config.store.dir);
        let (book, pending) =
            crate::alerting::restore(&file, config.alerts.hold_down.as_micros() as i64)
                .map_err(|e| anyhow::anyhow!("cannot read the stored alerts: {e}"))?;
        if !pending.is_empty() {
            tracing::info!(
                pending = pending.len(),
                "alert deliveries pending from before the restart"
            );
        }
        shared.alerts = Mutex::new(book);
        shared.outbox = Mutex::new(pending);
        shared.alert_file = Some(file);
        shared.store = Some(store);
        shared.history = crate::http::history::Recorder::restore(
            &config.store.dir,
            &config.experiments,
            config.history_arm_points,
        )
        .context("cannot open the stored history (store.dir)")?;
        // API experiments join before any stored state is read, so their state restores.
        let (catalog, defs, warnings) = crate::catalog::Catalog::load(
            &config.store.dir,
            config.experiments.iter().map(|e| e.id.clone()),
        )
        .context("cannot read the experiments defined over the API")?;
        for w in warnings {
            tracing::warn!("{w}");
        }
        if !defs.is_empty() {
            tracing::info!(experiments = defs.len(), "experiments defined over the API");
        }
        let shards = shared.shards.get_mut().unwrap_or_else(|p| p.into_inner());
        for def in defs {
            shards.define(def);
        }
        shared.catalog = Mutex::new(catalog);
    }
    let shared = Arc::new(shared);
    // Events posted over HTTP are kept in their own shard: stored on the snapshot cadence,
    // logged ahead in between.
    if let Some(shard) = shared.load_shard(crate::http::HTTP_SHARD)? {
        shared
            .lock_shards()
            .insert(crate::http::HTTP_SHARD.to_string(), shard);
        tracing::info!("restored the state of events posted over HTTP");
    }
    shared
        .replay_http_wal()
        .context("cannot replay the HTTP write-ahead log")?;
    let tracker = TaskTracker::new();
    if let (Some(topic), Some(k)) = (&config.alerts.kafka_topic, &config.kafka) {
        // Best effort: a broker that is down now gets the topic created on a later start;
        // the producer keeps retrying meanwhile.
        if let Err(e) = crate::kafka::ensure_topic(k, topic).await {
            tracing::warn!(topic, error = %e, "cannot check or create the alerts topic now");
        }
    }
    if !config.alerts.webhooks.is_empty() || config.alerts.kafka_topic.is_some() {
        let sinks = crate::alerting::Sinks::new(&config.alerts, config.kafka.as_ref())
            .map_err(|e| anyhow::anyhow!(e))?;
        tracker.spawn(crate::alerting::deliver_loop(
            Arc::clone(&shared),
            sinks,
            shutdown.clone(),
        ));
    }
    let queue = shared
        .evaluation_queue
        .lock()
        .unwrap_or_else(|p| p.into_inner())
        .take()
        .context("the evaluator was already started")?;
    {
        let (s, token) = (Arc::clone(&shared), shutdown.clone());
        tracker.spawn_blocking(move || evaluator(s, queue, token));
    }
    tracker.spawn(crate::http::fleet::keep_fresh(
        Arc::clone(&shared),
        shutdown.clone(),
    ));
    if shared.store.is_some() {
        tracker.spawn(save_http_shard(
            Arc::clone(&shared),
            config.store.snapshot_interval,
            shutdown.clone(),
        ));
    }
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
    let auth = crate::http::guard::Auth::new(&config.http, listener.local_addr()?)?;
    let router = crate::http::router(Arc::clone(&shared), &config.http, auth);
    let served = crate::http::serve(listener, router, shutdown.clone()).await;
    // If the server stopped on its own (an accept error), the other tasks must stop too.
    shutdown.cancel();
    tracker.close();
    tracker.wait().await;
    let s = Arc::clone(&shared);
    let saved =
        tokio::task::spawn_blocking(move || s.save_dirty(|id| id == crate::http::HTTP_SHARD))
            .await
            .unwrap_or(false);
    if !saved {
        tracing::error!("the state of events posted over HTTP could not be saved at shutdown");
    }
    let s = Arc::clone(&shared);
    let _ = tokio::task::spawn_blocking(move || s.history.save()).await;
    tracing::info!("all tasks stopped");
    served.context("the HTTP server failed")
}
