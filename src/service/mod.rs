//! The service: everything the edges share, behind private fields, with one method per thing
//! an edge may ask. Synchronous: no task is spawned here and nothing awaits; the edges and
//! `app` run its methods on their own threads.
//!
//! What it owns, and the lock order where two are taken together (catalog, then shards;
//! save lock, then shards; the HTTP log, then shards):
//! - the experiments' state by input shard and the evaluation queue fed by ingest ([`ingest`]);
//! - evaluation and the alert desk — book, outbox and file under one lock ([`evaluate`],
//!   [`alerts`]);
//! - cached readings for the readers ([`readings`]), where each experiment stands for the
//!   fleet lists ([`fleet`]) and the history recorder ([`recorder`]);
//! - the catalog of experiments defined at run time ([`catalog`]);
//! - the store with its one atomic writer ([`store`]) and the metrics ([`metrics`]).

pub mod alerts;
pub mod catalog;
pub mod clock;
mod evaluate;
pub mod fleet;
pub mod group;
pub mod ingest;
pub mod metrics;
pub mod readings;
pub mod recorder;
mod source;
pub mod store;

use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};
use std::sync::mpsc::{Receiver, Sender};
use std::sync::{Arc, Mutex, MutexGuard, OnceLock};
use std::time::Duration;

use crate::config::Config;
use crate::decide::alerts::{Alert, AlertBook};
use crate::decide::evaluation::Reading;
use crate::event::Micros;
use crate::state::cadence::Cadence;
use crate::state::shards::{Shard, ShardId, ShardImage, Shards, HTTP_SHARD};
use crate::state::ExperimentSnapshot;
use crate::summary::ExperimentSummary;

use alerts::{AlertDesk, AlertFileError, Delivery};
use catalog::Catalog;
use ingest::{BatchReport, Item};
use metrics::{Metrics, Source};
use readings::SummaryCache;
use recorder::{HistoryFileError, Recorder};
use store::{Store, StoreError, StoreHealth, Wal};

/// Why a stored service cannot be opened.
#[derive(Debug, thiserror::Error)]
pub enum OpenError {
    /// The state directory or a shard file.
    #[error("cannot open the state store (store.dir): {0}")]
    Store(#[source] StoreError),
    /// The write-ahead log of events posted over HTTP.
    #[error("cannot open or replay the HTTP write-ahead log: {0}")]
    Wal(#[source] StoreError),
    /// The alert book and its pending deliveries.
    #[error("cannot read the stored alerts: {0}")]
    Alerts(#[from] AlertFileError),
    /// The recorded history.
    #[error("cannot open the stored history (store.dir): {0}")]
    History(#[from] HistoryFileError),
    /// The experiments defined over the API.
    #[error("cannot read the experiments defined over the API: {0}")]
    Catalog(#[source] StoreError),
}

/// What [`StoreHealth`] calls the HTTP write-ahead log.
const HTTP_LOG: &str = "HTTP write-ahead log";

/// What [`StoreHealth`] calls the periodic write probe of the state directory.
const SPACE_PROBE: &str = "state directory (write probe)";

/// Sends an instance's catalog (its id, the catalog's JSON) to the other instances.
pub type CatalogPublisher = Box<dyn Fn(&str, &[u8]) + Send + Sync>;

/// The evaluator was started before.
#[derive(Debug, thiserror::Error)]
#[error("the evaluator was already started")]
pub struct EvaluatorStarted;

/// The state and parts shared by every edge of a running posteriord.
pub struct Service {
    /// The experiments' state, by input shard. A std `Mutex`, not an async one: it is held
    /// only to apply one batch or copy snapshots (microseconds), never across an `.await`.
    shards: Mutex<Shards>,
    metrics: Metrics,
    /// Largest accepted encoded event.
    max_event_bytes: usize,
    /// `[[source]]` mappings, by name.
    sources: Vec<crate::config::SourceConfig>,
    /// `Some` when Kafka is configured: whether its brokers answered the last probe.
    kafka_reachable: Option<AtomicBool>,
    /// Partitions being restored; readiness is false while any is.
    restoring: AtomicUsize,
    /// Where state is stored (`None` for the demo, which keeps nothing).
    store: Option<Store>,
    /// How often changed state is written.
    snapshot_interval: Duration,
    /// Write-ahead log of events posted over HTTP (with a store only). Its lock also orders
    /// HTTP batches: a batch is logged and applied while holding it.
    http_wal: Option<Mutex<Wal>>,
    /// Alerts, their pending deliveries and their file.
    desk: Mutex<AlertDesk>,
    /// Decision quantities over time, recorded at each evaluation.
    recorder: Recorder,
    /// Summaries shared by the readers.
    readings: SummaryCache,
    /// Where each experiment stands, refreshed in rounds for the fleet lists.
    fleet: fleet::FleetIndex,
    /// Experiments defined over the API, and the archive. Lock order: catalog, then shards.
    catalog: Mutex<Catalog>,
    /// Serialises [`Service::save_dirty`] (taken before the HTTP log's and the shards' locks).
    save_lock: Mutex<()>,
    /// Which files of the store are failing to be written (readiness and metrics read it).
    health: StoreHealth,
    /// Size of the last HTTP request refused because it could not be logged: the store is
    /// writable again once a probe of that size fits.
    refused_bytes: std::sync::atomic::AtomicU64,
    /// Publishes the catalog of API experiments to the other instances (set once the Kafka
    /// changelog is reachable).
    catalog_publisher: OnceLock<CatalogPublisher>,
    /// When experiments are due for evaluation, by event time and count.
    cadence: Cadence,
    /// How far event time may stray from its reference, per source.
    event_time: crate::config::EventTimeConfig,
    /// Snapshots of due experiments, to the evaluator.
    due: Sender<ExperimentSnapshot>,
    /// The evaluator's end of `due`, taken once by [`Service::run_evaluator`].
    evaluation_queue: Mutex<Option<Receiver<ExperimentSnapshot>>>,
    /// (experiment, metric, message) of numbers that could not be computed, already logged:
    /// a failing metric is logged once, not at every look.
    failures_logged: Mutex<std::collections::HashSet<(String, String, String)>>,
    /// Set when experiments are decided across the consumer group (co-partitioned topics).
    group: OnceLock<group::Group>,
}

/// The experiment the service's unit tests count, defined as over the API.
#[cfg(test)]
fn test_checkout_copy() -> crate::experiment::ExperimentDef {
    crate::config::experiment_from_json(
        "crumb-checkout-copy",
        &serde_json::json!({
            "variants": [{"name": "control"}, {"name": "short-copy"}],
            "metric": [{"name": "purchase", "kind": "conversion"},
                       {"name": "payment-error", "kind": "defect_rate", "exposure": "reported"}]
        }),
    )
    .unwrap()
}

/// Wall-clock time in microseconds since the epoch.
pub fn now_micros() -> Micros {
    (time::OffsetDateTime::now_utc().unix_timestamp_nanos() / 1_000) as i64
}

/// A lock whose holder panicked still guards consistent data here: every structure behind one
/// changes one event, one evaluation or one file at a time.
fn lock<T>(m: &Mutex<T>) -> MutexGuard<'_, T> {
    m.lock().unwrap_or_else(|p| p.into_inner())
}

impl Service {
    /// A service that keeps nothing on disk (the demo, tests).
    pub fn in_memory(config: &Config) -> Service {
        let (due, queue) = std::sync::mpsc::channel();
        Service {
            cadence: config.alerts.cadence(),
            event_time: config.event_time,
            due,
            evaluation_queue: Mutex::new(Some(queue)),
            shards: Mutex::new({
                let mut shards = Shards::new(config.experiments.iter().cloned());
                if let Some(k) = &config.kafka {
                    shards.set_lateness(
                        i64::try_from(k.outcome_lateness.as_micros()).unwrap_or(i64::MAX),
                    );
                }
                shards
            }),
            metrics: Metrics::with_kafka(config.kafka.is_some()),
            max_event_bytes: config.max_event_bytes(),
            sources: config.sources.clone(),
            kafka_reachable: config.kafka.as_ref().map(|_| AtomicBool::new(false)),
            restoring: AtomicUsize::new(0),
            store: None,
            snapshot_interval: config.store.snapshot_interval,
            http_wal: None,
            desk: Mutex::new(AlertDesk::in_memory(&config.alerts)),
            recorder: Recorder::in_memory(config.history_arm_points),
            readings: SummaryCache::default(),
            fleet: fleet::FleetIndex::default(),
            catalog: Mutex::new(Catalog::in_memory(
                config.experiments.iter().map(|e| e.id.clone()),
            )),
            save_lock: Mutex::new(()),
            health: StoreHealth::default(),
            refused_bytes: std::sync::atomic::AtomicU64::new(0),
            catalog_publisher: OnceLock::new(),
            failures_logged: Mutex::default(),
            group: OnceLock::new(),
        }
    }

    /// A service over the store in `config.store.dir`: alerts, history, API experiments and
    /// the HTTP shard restored, and events logged over HTTP since its last save re-applied.
    pub fn open(config: &Config) -> Result<Service, OpenError> {
        let dir = &config.store.dir;
        let store = Store::open(dir).map_err(OpenError::Store)?;
        // Saves interrupted by a crash leave temporary files: give their space back first.
        for d in [dir.clone(), dir.join("shards"), dir.join("history")] {
            store::remove_stale_temps(&d);
        }
        let wal = Wal::open(&store, HTTP_SHARD).map_err(OpenError::Wal)?;
        let health = StoreHealth::default();
        let mut desk = AlertDesk::restore(dir, &config.alerts)?;
        desk.watch(health.clone());
        let mut recorder = Recorder::restore(dir, &config.experiments, config.history_arm_points)?;
        recorder.watch(health.clone());
        // API experiments join before any stored state is read, so their state restores.
        let (catalog, defs, warnings) =
            Catalog::load(dir, config.experiments.iter().map(|e| e.id.clone()))
                .map_err(OpenError::Catalog)?;
        for w in warnings {
            tracing::warn!("{w}");
        }
        if !defs.is_empty() {
            tracing::info!(experiments = defs.len(), "experiments defined over the API");
        }
        let mut service = Service::in_memory(config);
        service.health = health;
        {
            let shards = service.shards.get_mut().unwrap_or_else(|p| p.into_inner());
            for def in defs {
                shards.define(def);
            }
        }
        service.store = Some(store);
        service.http_wal = Some(Mutex::new(wal));
        service.desk = Mutex::new(desk);
        service.recorder = recorder;
        service.catalog = Mutex::new(catalog);
        // Events posted over HTTP are kept in their own shard: stored on the snapshot
        // cadence, logged ahead in between.
        let http_shard = service.load_shard(HTTP_SHARD).map_err(|e| match e {
            StoreError::Corrupt { path, reason } => OpenError::Store(StoreError::Corrupt {
                reason: format!(
                    "{reason}. Fix: restore it from a backup; or move it aside (`mv {p} {p}.damaged`) \
                     to start with the events posted over HTTP since the last save only — those \
                     before it are then lost",
                    p = path.display()
                ),
                path,
            }),
            e => OpenError::Store(e),
        })?;
        if let Some(shard) = http_shard {
            service.lock_shards().insert(ShardId::http(), shard);
            tracing::info!("restored the state of events posted over HTTP");
        }
        service.replay_http_wal().map_err(OpenError::Wal)?;
        Ok(service)
    }

    /// Prometheus metrics.
    pub fn metrics(&self) -> &Metrics {
        &self.metrics
    }

    /// Largest accepted encoded event.
    pub fn max_event_bytes(&self) -> usize {
        self.max_event_bytes
    }

    /// Whether state is kept in a store.
    pub fn is_stored(&self) -> bool {
        self.store.is_some()
    }

    /// How often changed state is written.
    pub fn snapshot_interval(&self) -> Duration {
        self.snapshot_interval
    }

    /// The shards, even if a panic elsewhere poisoned the lock: the state is updated one
    /// event at a time, so it is consistent between events.
    pub fn lock_shards(&self) -> MutexGuard<'_, Shards> {
        lock(&self.shards)
    }

    /// The catalog of API experiments (taken before the shards when both are needed).
    pub fn lock_catalog(&self) -> MutexGuard<'_, Catalog> {
        lock(&self.catalog)
    }

    /// The recorded history.
    pub fn recorder(&self) -> &Recorder {
        &self.recorder
    }

    /// The reading (summary and findings) of `snapshot` for a reader, shared with other
    /// readers when recent.
    pub fn reading(&self, snapshot: ExperimentSnapshot) -> Arc<Reading> {
        self.readings.reading(snapshot)
    }

    /// One refresh round of the fleet's verdicts (see [`fleet::FleetIndex::refresh`]): runs
    /// the quadrature for the experiments whose totals changed; how many that was.
    pub fn refresh_fleet(&self) -> usize {
        let snapshots = self.lock_shards().snapshots();
        self.fleet.refresh(snapshots, &self.readings)
    }

    /// Every experiment now with where it stands, from the latest verdicts and the alert
    /// book. Cheap: copies pointers and counts alerts; computes no summary.
    pub fn fleet(&self) -> Vec<fleet::Member> {
        let defs = self.lock_shards().defs().to_vec();
        let facts = self.with_alerts(|book| fleet::alert_facts(book.alerts()));
        fleet::members(defs, &self.fleet, &facts)
    }

    /// Read the alert book under its lock.
    pub fn with_alerts<R>(&self, read: impl FnOnce(&AlertBook) -> R) -> R {
        read(lock(&self.desk).book())
    }

    /// Acknowledge alert `id` now (stored at once); the alert, if there is one.
    pub fn acknowledge_alert(&self, id: &str) -> Option<Alert> {
        lock(&self.desk).acknowledge(id, now_micros())
    }

    /// Alert deliveries due at `now`.
    pub fn due_deliveries(&self, now: Micros) -> Vec<Delivery> {
        lock(&self.desk).due(now)
    }

    /// Report delivery attempts made at `now`; a failed one is retried after
    /// `backoff(attempts)`.
    pub fn settle_deliveries(
        &self,
        results: &[(Delivery, Result<(), String>)],
        now: Micros,
        backoff: impl Fn(u32) -> Duration,
    ) {
        lock(&self.desk).settle(results, now, backoff, &self.metrics);
    }

    /// Where catalog changes are published (once; later calls are ignored).
    pub fn set_catalog_publisher(&self, publisher: CatalogPublisher) {
        let _ = self.catalog_publisher.set(publisher);
    }

    /// The catalog publisher, once the changelog is reachable.
    fn catalog_publisher(&self) -> Option<&CatalogPublisher> {
        self.catalog_publisher.get()
    }

    /// Decode and apply a batch from `source` (see [`ingest::apply_batch`]) and queue the
    /// experiments it made due for evaluation, in input order.
    pub fn apply(&self, source: Source, items: &[Item<'_>]) -> BatchReport {
        let mut report = ingest::apply_batch_checked(
            &self.shards,
            &self.metrics,
            source,
            items,
            self.max_event_bytes,
            Some(&self.cadence),
            &self.time_bounds(source),
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

    /// The event-time bounds of `source` (`[event_time]`; the simulator's events carry no
    /// reference and are not checked).
    pub fn time_bounds(&self, source: Source) -> crate::state::skew::TimeBounds {
        match source {
            Source::Http => self.event_time.http,
            Source::Kafka | Source::Simulator => self.event_time.kafka,
        }
    }

    /// Log (durably, when a store is configured) and apply a batch of events posted over
    /// HTTP. Nothing is applied if logging fails, so an error reply means "not accepted".
    /// The receive time is logged with the events: it is the reference their times are
    /// checked against, now and when a restart re-applies the log.
    pub fn ingest_http(&self, items: &[&[u8]]) -> Result<BatchReport, StoreError> {
        self.ingest_http_at(items, now_micros())
    }

    /// [`Service::ingest_http`] received at `received_at` (µs).
    pub fn ingest_http_at(
        &self,
        items: &[&[u8]],
        received_at: Micros,
    ) -> Result<BatchReport, StoreError> {
        let batch = |first: Option<i64>| -> Vec<Item<'_>> {
            items
                .iter()
                .enumerate()
                .map(|(i, bytes)| Item {
                    shard: HTTP_SHARD,
                    offset: first.map(|f| f + i as i64),
                    bytes,
                    mapping: None,
                    topic: None,
                    reference: Some(received_at),
                })
                .collect()
        };
        let Some(wal) = &self.http_wal else {
            return Ok(self.apply(Source::Http, &batch(None)));
        };
        let mut wal = lock(wal);
        let first = self
            .lock_shards()
            .shard_mut(HTTP_SHARD)
            .next_offset()
            .unwrap_or(0);
        let logged = wal.append(first as u64, received_at, items);
        self.health.note(HTTP_LOG, &logged);
        if logged.is_err() {
            self.refused_bytes
                .store(Wal::record_bytes(items), Ordering::Relaxed);
        }
        logged?;
        Ok(self.apply(Source::Http, &batch(Some(first))))
    }

    /// The mapping of source `name`.
    pub fn mapping(&self, name: &str) -> Option<&crate::mapping::Mapping> {
        self.sources
            .iter()
            .find(|s| s.mapping.name == name)
            .map(|s| &s.mapping)
    }

    /// The mapping Kafka topic `topic` is read under, if a `[[source]]` lists it.
    pub fn topic_mapping(&self, topic: &str) -> Option<&crate::mapping::Mapping> {
        self.sources
            .iter()
            .find(|s| s.topics.iter().any(|t| t == topic))
            .map(|s| &s.mapping)
    }

    /// Every Kafka topic a `[[source]]` lists: the co-partitioned, unit-keyed input topics.
    pub fn mapped_topics(&self) -> Vec<String> {
        self.sources.iter().flat_map(|s| s.topics.clone()).collect()
    }

    /// The shard that partition `partition` of input topic `topic` feeds: one per partition
    /// index for all co-partitioned (mapped) topics, one per partition for the others.
    pub fn kafka_shard(&self, topic: &str, partition: i32) -> ShardId {
        if self.topic_mapping(topic).is_some() {
            ShardId::co_partitioned(partition)
        } else {
            ShardId::kafka(topic, partition)
        }
    }

    /// [`Service::ingest_http`] for events in a source's own shape: each is read under
    /// `mapping` first and what it reads as is logged and applied in the built-in format (the
    /// write-ahead log's), so a restart re-applies exactly what was read. Refused and ignored
    /// events are counted here and never logged.
    pub fn ingest_http_mapped(
        &self,
        mapping: &crate::mapping::Mapping,
        items: &[&[u8]],
    ) -> Result<BatchReport, StoreError> {
        let mut results: Vec<Option<Result<crate::event::Outcome, crate::event::Reject>>> =
            Vec::with_capacity(items.len());
        let mut encoded = Vec::new();
        let mut at = Vec::new();
        for (i, bytes) in items.iter().enumerate() {
            match mapping.decode(bytes, self.max_event_bytes) {
                Ok(Some(event)) => {
                    encoded.push(crate::decode::encode_event(&event));
                    at.push(i);
                    results.push(None);
                }
                Ok(None) => {
                    self.metrics
                        .count_outcome(Source::Http, crate::event::Outcome::Ignored, 1);
                    results.push(Some(Ok(crate::event::Outcome::Ignored)));
                }
                Err(reject) => {
                    self.metrics.count_reject(Source::Http, reject.reason);
                    results.push(Some(Err(reject)));
                }
            }
        }
        let refs: Vec<&[u8]> = encoded.iter().map(Vec::as_slice).collect();
        let mut report = if refs.is_empty() {
            BatchReport::default()
        } else {
            self.ingest_http(&refs)?
        };
        for (i, r) in at.into_iter().zip(report.results.drain(..)) {
            results[i] = r;
        }
        report.results = results;
        Ok(report)
    }

    /// Re-apply logged HTTP events that the stored HTTP shard does not hold yet. Reads the
    /// log where it is and writes nothing, so it needs no free space.
    fn replay_http_wal(&self) -> Result<(), StoreError> {
        let Some(wal) = &self.http_wal else {
            return Ok(());
        };
        let wal = lock(wal);
        let (records, torn) = wal.read()?;
        // Events below the shard's position are in its stored state already; `apply`
        // skips them by offset, so a segment that outlived its save is harmless.
        let items: Vec<Item<'_>> = records
            .iter()
            .flat_map(|r| {
                r.events.iter().enumerate().map(move |(i, bytes)| Item {
                    shard: HTTP_SHARD,
                    offset: Some((r.first_seq + i as u64) as i64),
                    bytes,
                    mapping: None,
                    topic: None,
                    // Records of the previous log version have none: applied unchecked,
                    // as they were when first received.
                    reference: r.received_at,
                })
            })
            .collect();
        if !items.is_empty() {
            let report = self.apply(Source::Http, &items);
            let replayed = report.results.iter().filter(|r| r.is_some()).count();
            if replayed > 0 {
                tracing::info!(
                    events = replayed,
                    "replayed events posted over HTTP from the write-ahead log"
                );
            }
        }
        if torn > 0 {
            tracing::warn!(
                segments = torn,
                dir = %self.store.as_ref().map(|s| s.path(HTTP_SHARD)).unwrap_or_default().parent().map(|p| p.display().to_string()).unwrap_or_default(),
                "the HTTP write-ahead log ended in a partial record (a crash while a request was being logged); that request had not been answered and was not applied"
            );
        }
        Ok(())
    }

    /// Files of the store that cannot be written now, with the last error (empty while the
    /// state is durable).
    pub fn store_failures(&self) -> Vec<(String, String)> {
        self.health.failing()
    }

    /// Bytes free on the file system of the state directory, if stored.
    pub fn store_free_bytes(&self) -> Option<u64> {
        self.store.as_ref().and_then(|s| store::free_bytes(s.dir()))
    }

    /// Retry what failed to be written (alerts, history) and probe the state directory with
    /// a small file — or, while requests are being refused, a file the size of the last
    /// refused one — so readiness follows the store even when nothing else writes; called on
    /// the snapshot cadence. Shards are retried by their own savers.
    pub fn retry_store(&self) {
        let Some(store) = &self.store else { return };
        if self.health.is_failing(alerts::ALERTS_FILE) {
            lock(&self.desk).save();
        }
        if self.health.is_failing(recorder::HISTORY_FILES) {
            self.recorder.save();
        }
        let refusing =
            self.health.is_failing(HTTP_LOG) || self.health.is_failing(catalog::CATALOG_FILE);
        let size = if refusing {
            self.refused_bytes
                .load(Ordering::Relaxed)
                .clamp(4096, 1 << 20)
        } else {
            4096
        };
        let probe = store.dir().join(".posteriord-space-probe");
        let result = store::write_atomic(&probe, &vec![0u8; size as usize]);
        let _ = std::fs::remove_file(&probe);
        self.health.note(SPACE_PROBE, &result);
        if result.is_ok() && refusing {
            tracing::info!(probe_bytes = size, "the state directory takes writes again");
            self.health.succeeded(HTTP_LOG);
            self.health.succeeded(catalog::CATALOG_FILE);
        }
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
            self.metrics.set_kafka_reachable(reachable);
        }
    }

    /// Write every changed shard accepted by `which` to the store. Images are taken under the
    /// lock (clearing the dirty mark), files written outside it; a failed write marks the
    /// shard dirty again so the next round retries. Returns whether all writes succeeded.
    pub fn save_dirty(&self, which: impl Fn(&ShardId) -> bool) -> bool {
        let Some(store) = &self.store else {
            return true;
        };
        // One save at a time: two overlapping saves of a shard could store the older image
        // last, after the newer one had already removed the HTTP log's sealed segments.
        let _one_at_a_time = lock(&self.save_lock);
        // The HTTP shard's image is taken under the log's lock and the log sealed with it,
        // so the sealed segments hold exactly the events before the image's offset.
        let mut wal = match &self.http_wal {
            Some(wal) if which(&ShardId::http()) => Some(lock(wal)),
            _ => None,
        };
        let mut sealed = None;
        let images: Vec<(ShardId, ShardImage)> = {
            let mut shards = self.lock_shards();
            shards
                .ids()
                .into_iter()
                .filter(|id| which(id))
                .filter_map(|id| {
                    let image = shards.shard_mut(id.as_str()).take_unsaved()?;
                    if id.is_http() {
                        sealed = wal.as_mut().map(|w| w.seal());
                    }
                    Some((id, image))
                })
                .collect()
        };
        drop(wal);
        let mut all_ok = true;
        for (id, image) in images {
            let what = format!("state of shard {id}");
            let saved = store.save(id.as_str(), &image);
            self.health.note(&what, &saved);
            match saved {
                Ok(()) => {
                    self.metrics.state_saves.with_label_values(&["ok"]).inc();
                    store::crash_point("save-done", &store.path(id.as_str()));
                    if let (Some(wal), Some(sealed), true) = (&self.http_wal, sealed, id.is_http())
                    {
                        if let Err(e) = lock(wal).remove_sealed(sealed) {
                            tracing::warn!(error = %e, "cannot remove saved segments of the HTTP write-ahead log; they are skipped on replay and removed at the next save");
                        }
                    }
                }
                Err(e) => {
                    all_ok = false;
                    tracing::error!(shard = %id, error = %e, free_bytes = ?store::free_bytes(store.dir()), "cannot save state; will retry");
                    self.metrics.state_saves.with_label_values(&["error"]).inc();
                    self.lock_shards().shard_mut(id.as_str()).mark_unsaved();
                }
            }
        }
        all_ok
    }

    /// Store the HTTP shard if it changed; whether that succeeded.
    pub fn save_http_shard(&self) -> bool {
        self.save_dirty(ShardId::is_http)
    }

    /// Read shard `id` from the store (if stored), reporting experiments that no longer fit.
    pub fn load_shard(&self, id: &str) -> Result<Option<Shard>, StoreError> {
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

    /// Keep the unreadable stored file of shard `id` aside for inspection, so the next save
    /// does not overwrite it.
    pub fn set_aside_damaged(&self, id: &str) {
        if let Some(store) = &self.store {
            let path = store.path(id);
            let _ = std::fs::rename(&path, path.with_extension("state.damaged"));
        }
    }

    /// The shards built from stored image `image` over the current definitions, reporting
    /// experiments that no longer fit.
    pub fn shard_from_image(&self, id: &str, image: ShardImage) -> Shard {
        let defs = self.lock_shards().defs().to_vec();
        store::warn_if_without_exposures(id, &image);
        let (shard, mismatches) = Shard::from_image(&defs, image);
        for m in &mismatches {
            tracing::error!(
                shard = id,
                "{m}; that experiment starts empty in this shard"
            );
            self.metrics.restore_mismatches.inc();
        }
        shard
    }

    /// Refresh the per-experiment gauges from the current state and encode every metric in
    /// the Prometheus text format.
    pub fn scrape(&self) -> String {
        let snapshots = self.lock_shards().snapshots();
        let summaries: Vec<Arc<ExperimentSummary>> = snapshots
            .into_iter()
            .map(|s| Arc::clone(&self.reading(s).summary))
            .collect();
        let _scrape = lock(&self.metrics.scrape);
        self.metrics.set_experiment_gauges(&summaries);
        self.metrics
            .set_reference_lags(&self.reference_lags(now_micros()));
        let failing = self.health.failing().len();
        self.metrics.state_durable.set(i64::from(failing == 0));
        self.metrics.state_failing_files.set(failing as i64);
        if let Some(free) = self.store_free_bytes() {
            self.metrics
                .state_free_bytes
                .set(free.min(i64::MAX as u64) as i64);
        }
        self.metrics.encode()
    }

    /// The Kafka edge has applied every record with a reference time (record timestamp)
    /// below `t` of every topic of shard `shard` (see [`Shard::note_reference_watermark`]);
    /// nothing happens if the shard is not held here.
    pub fn note_reference_watermark(&self, shard: &ShardId, t: Micros) {
        if let Some(s) = self.lock_shards().shard_mut_if_present(shard) {
            s.note_reference_watermark(t);
        }
    }

    /// The reference-time watermark of shard `shard`, if it is held here and has one.
    pub fn reference_watermark(&self, shard: &ShardId) -> Option<Micros> {
        self.lock_shards()
            .shard(shard)
            .and_then(Shard::reference_watermark)
    }

    /// (shard, seconds from its reference-time watermark to `now`) of every shard with one.
    fn reference_lags(&self, now: Micros) -> Vec<(String, f64)> {
        let shards = self.lock_shards();
        shards
            .ids()
            .into_iter()
            .filter_map(|id| {
                let mark = shards.shard(&id)?.reference_watermark()?;
                Some((id.to_string(), (now - mark) as f64 / 1e6))
            })
            .collect()
    }

    /// The final saves at shutdown: the HTTP shard and the history. Whether the shard saved.
    pub fn save_at_shutdown(&self) -> bool {
        let saved = self.save_http_shard();
        self.recorder.save();
        saved
    }
}
