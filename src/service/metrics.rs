//! Prometheus metrics: process-level counters updated by the sources, and per-experiment gauges
//! refreshed from the engine at each scrape (so they are never staler than the scrape itself).

use prometheus::{
    Encoder, GaugeVec, HistogramOpts, HistogramVec, IntCounterVec, IntGauge, IntGaugeVec, Opts,
    Registry, TextEncoder,
};

use crate::event::{Outcome, RejectReason};
use crate::state::skew::Direction;
use crate::summary::ExperimentSummary;

pub use super::source::Source;

/// All metrics of one process, in their own registry (no global state, so tests can run
/// several services in one process).
pub struct Metrics {
    registry: Registry,
    /// Held while gauges rebuilt from state (per experiment, per alert state) are cleared and
    /// refilled, and while a scrape encodes, so that a scrape never sees them half rebuilt.
    pub scrape: std::sync::Mutex<()>,
    /// Valid events by source and outcome.
    pub events: IntCounterVec,
    /// Refused events by source and reason.
    pub rejected: IntCounterVec,
    /// 1 while the configured Kafka cluster answers metadata requests; no series at all when
    /// no Kafka is configured, so no rule fires on a component deliberately absent.
    kafka_reachable: IntGaugeVec,
    /// HTTP requests by method, route template and status.
    http_requests: IntCounterVec,
    /// HTTP request durations by method, route template and status.
    http_duration: HistogramVec,
    /// Events read under a `[[source]]` mapping, by the source's name and outcome (or
    /// `rejected`): how many lines of each of a team's streams were ignored, for instance.
    pub mapped_events: IntCounterVec,
    /// Outcomes held for the assignments of co-partitioned topics and then decided, by why
    /// (`watermark`: the assignments caught up; `lateness`: the bound passed first).
    pub held_decided: IntCounterVec,
    /// Exposed units per experiment and variant.
    pub variant_units: IntGaugeVec,
    /// Messages between the next offset to apply and the partition's high watermark.
    pub kafka_lag: IntGaugeVec,
    /// Next offset to apply per partition (everything before it is in the state).
    pub kafka_next_offset: IntGaugeVec,
    /// Partitions whose state is being restored right now.
    pub restoring: IntGauge,
    /// Refused messages sent to the dead-letter topic, by reason.
    pub dead_letters: IntCounterVec,
    /// Dead-letter messages that could not be delivered.
    pub dead_letter_errors: prometheus::IntCounter,
    /// State snapshots written, by outcome (ok, error).
    pub state_saves: IntCounterVec,
    /// 1 while every file of the state directory can be written (0: state not durable).
    pub state_durable: IntGauge,
    /// Files of the state directory failing to be written now.
    pub state_failing_files: IntGauge,
    /// Bytes free for posteriord on the file system of the state directory.
    pub state_free_bytes: IntGauge,
    /// Experiments whose stored state did not fit the configuration at restore.
    pub restore_mismatches: prometheus::IntCounter,
    /// Partition states published to the changelog, by result (ok, error).
    pub changelog_publishes: IntCounterVec,
    /// Partials read from the partials topic, by what the merger did (taken, stale, conflict).
    pub group_partials: IntCounterVec,
    /// Reference-time boundaries evaluated here as the experiment's owner.
    pub group_boundaries: IntCounterVec,
    /// Each input partition's reference-time watermark as its heartbeat last said (seconds
    /// since the epoch).
    pub group_watermark: prometheus::GaugeVec,
    /// Alerts by rule and state (open, easing, closed, recorded).
    pub alerts: IntGaugeVec,
    /// Alert changes by rule and change (opened, closed).
    pub alert_changes: IntCounterVec,
    /// Alert delivery attempts by sink kind and result.
    pub alert_deliveries: IntCounterVec,
    /// Rule evaluations by stage: `queued` by the ingest path, `done` by the evaluator.
    pub evaluations: IntCounterVec,
    /// Metrics whose numbers an evaluation could not compute, by reason
    /// (`out_of_range`: counts or priors outside the supported range; `internal`: ours).
    pub evaluation_failures: IntCounterVec,
    /// Posterior mean per experiment, metric and variant.
    pub posterior_mean: GaugeVec,
    /// Lower end of the 95% equal-tailed credible interval.
    pub interval_lower: GaugeVec,
    /// Upper end of the 95% equal-tailed credible interval.
    pub interval_upper: GaugeVec,
    /// P(variant is the best arm).
    pub prob_best: GaugeVec,
    /// Expected loss of shipping the variant, in rate units.
    pub expected_loss: GaugeVec,
    /// P(variant better than the control); absent for the control.
    pub prob_better_than_control: GaugeVec,
    /// P(variant worse than control by more than the harm margin); absent for the control.
    pub prob_harm: GaugeVec,
    /// p-value of the sample-ratio test per experiment.
    pub sample_ratio_p_value: GaugeVec,
    /// Timed events checked against a reference time, by source.
    pub event_time_checked: IntCounterVec,
    /// Events whose time was beyond the source's bounds, by source, direction and action.
    pub event_time_skewed: IntCounterVec,
    /// Largest skew beyond the bounds seen, by source and direction (seconds).
    pub event_time_largest_skew: GaugeVec,
    /// What the checks found per source, for the API and the dashboard.
    pub clock: super::clock::ClockHealth,
    /// Per co-partitioned Kafka shard: wall-clock time minus its reference-time watermark
    /// (seconds), set at each scrape ([`Metrics::set_reference_lags`]).
    reference_lag: GaugeVec,
    /// Records of co-partitioned topics applied out of reference-time order, by topic and
    /// why: `behind_watermark` (read after their shard's watermark had passed their
    /// timestamp: a clock behind by more than the idle allowance) or `ahead_of_clock`
    /// (stamped further ahead of this instance's clock than the allowance: sorted as
    /// `now + allowance`, so one bad stamp cannot stall its topic).
    pub records_out_of_order: IntCounterVec,
}

fn counter_vec(registry: &Registry, name: &str, help: &str, labels: &[&str]) -> IntCounterVec {
    let c = IntCounterVec::new(Opts::new(name, help), labels).expect("valid metric definition");
    registry
        .register(Box::new(c.clone()))
        .expect("metric registered once");
    c
}

fn gauge_vec(registry: &Registry, name: &str, help: &str, labels: &[&str]) -> GaugeVec {
    let g = GaugeVec::new(Opts::new(name, help), labels).expect("valid metric definition");
    registry
        .register(Box::new(g.clone()))
        .expect("metric registered once");
    g
}

const ARM: &[&str] = &["experiment", "metric", "variant"];

impl Metrics {
    /// Fresh metrics with every event counter pre-registered at zero, so dashboards and alert
    /// rules see a series before the first event of each kind.
    pub fn new() -> Metrics {
        let registry = Registry::new();
        let events = counter_vec(
            &registry,
            "posteriord_events_total",
            "Valid events by source and outcome (applied, or why not).",
            &["source", "outcome"],
        );
        let rejected = counter_vec(
            &registry,
            "posteriord_events_rejected_total",
            "Refused events by source and reason.",
            &["source", "reason"],
        );
        let mapped_events = counter_vec(
            &registry,
            "posteriord_mapped_events_total",
            "Events read under a [[source]] mapping, by source name and outcome (or rejected).",
            &["source_name", "outcome"],
        );
        let held_decided = counter_vec(
            &registry,
            "posteriord_held_outcomes_decided_total",
            "Outcomes of co-partitioned topics held for their assignments, then decided: by why (watermark, lateness).",
            &["why"],
        );
        let int_gauge_vec = |name: &str, help: &str, labels: &[&str]| {
            let g =
                IntGaugeVec::new(Opts::new(name, help), labels).expect("valid metric definition");
            registry
                .register(Box::new(g.clone()))
                .expect("metric registered once");
            g
        };
        let int_gauge = |name: &str, help: &str| {
            let g = IntGauge::new(name, help).expect("valid metric definition");
            registry
                .register(Box::new(g.clone()))
                .expect("metric registered once");
            g
        };
        let counter = |name: &str, help: &str| {
            let c = prometheus::IntCounter::new(name, help).expect("valid metric definition");
            registry
                .register(Box::new(c.clone()))
                .expect("metric registered once");
            c
        };
        let kafka_reachable = int_gauge_vec(
            "posteriord_kafka_reachable",
            "1 while the configured Kafka cluster answers metadata requests, 0 while it does not; absent when no Kafka is configured.",
            &[],
        );
        let build_info = int_gauge_vec(
            "posteriord_build_info",
            "Always 1; the labels say which build runs.",
            &["version", "os", "arch"],
        );
        build_info
            .with_label_values(&[
                env!("CARGO_PKG_VERSION"),
                std::env::consts::OS,
                std::env::consts::ARCH,
            ])
            .set(1);
        let http_requests = counter_vec(
            &registry,
            "posteriord_http_requests_total",
            "HTTP requests answered, by method, route template (unmatched paths as `other`) and status code.",
            &["method", "route", "status"],
        );
        let http_duration = HistogramVec::new(
            HistogramOpts::new(
                "posteriord_http_request_duration_seconds",
                "Time from receiving an HTTP request to its response head, by method, route template and status code.",
            )
            // From 1 ms (a probe) to 10 s (the request timeout's order).
            .buckets(vec![
                0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0,
            ]),
            &["method", "route", "status"],
        )
        .expect("valid metric definition");
        registry
            .register(Box::new(http_duration.clone()))
            .expect("metric registered once");
        // CPU, memory, open files and start time of this process, under the names every
        // Prometheus client library uses (`process_*`), from the prometheus crate's collector.
        #[cfg(target_os = "linux")]
        registry
            .register(Box::new(
                prometheus::process_collector::ProcessCollector::for_self(),
            ))
            .expect("process collector registered once");
        let variant_units = int_gauge_vec(
            "posteriord_variant_units",
            "Exposed units per experiment variant.",
            &["experiment", "variant"],
        );
        let kafka_lag = int_gauge_vec(
            "posteriord_kafka_lag",
            "Messages not yet applied: high watermark minus next offset to apply.",
            &["topic", "partition"],
        );
        let kafka_next_offset = int_gauge_vec(
            "posteriord_kafka_next_offset",
            "Next offset to apply; everything before it is in the state.",
            &["topic", "partition"],
        );
        let restoring = int_gauge(
            "posteriord_restoring_partitions",
            "Partitions whose state is being restored.",
        );
        let dead_letters = counter_vec(
            &registry,
            "posteriord_dead_letters_total",
            "Refused messages written to the dead-letter topic, by reason.",
            &["reason"],
        );
        let dead_letter_errors = counter(
            "posteriord_dead_letter_errors_total",
            "Dead-letter messages that could not be delivered.",
        );
        let state_saves = counter_vec(
            &registry,
            "posteriord_state_saves_total",
            "State snapshots written, by result.",
            &["result"],
        );
        let state_durable = int_gauge(
            "posteriord_state_durable",
            "1 while every file of the state directory can be written; 0 while events posted over HTTP are refused or saves fail (state not durable).",
        );
        state_durable.set(1);
        let state_failing_files = int_gauge(
            "posteriord_state_failing_files",
            "Files (or kinds of file) of the state directory whose last write failed.",
        );
        let state_free_bytes = int_gauge(
            "posteriord_state_free_bytes",
            "Bytes free for posteriord on the file system holding the state directory.",
        );
        let restore_mismatches = counter(
            "posteriord_restore_mismatches_total",
            "Experiments whose stored state did not fit the configuration at restore.",
        );
        let changelog_publishes = counter_vec(
            &registry,
            "posteriord_changelog_publishes_total",
            "Partition states published to the changelog topic, by result.",
            &["result"],
        );
        let group_partials = counter_vec(
            &registry,
            "posteriord_group_partials_total",
            "Partial totals read from the partials topic, by result (taken; stale: a redelivery or an older one; revised: a partition's new holder placed records at other boundaries; conflict: two writers for one partition).",
            &["result"],
        );
        let group_boundaries = counter_vec(
            &registry,
            "posteriord_group_boundaries_evaluated_total",
            "Reference-time boundaries this instance evaluated as the experiment's owner.",
            &["experiment"],
        );
        let group_watermark = gauge_vec(
            &registry,
            "posteriord_group_partition_watermark_seconds",
            "Reference time every record of the input partition before which has been applied, as its last heartbeat said (seconds since the epoch); decisions wait for the smallest.",
            &["partition"],
        );
        let alerts = int_gauge_vec(
            "posteriord_alerts",
            "Alerts by rule and state (open, easing, closed, recorded).",
            &["rule", "state"],
        );
        let alert_changes = counter_vec(
            &registry,
            "posteriord_alert_changes_total",
            "Alert changes by rule and change (opened, closed).",
            &["rule", "change"],
        );
        let alert_deliveries = counter_vec(
            &registry,
            "posteriord_alert_deliveries_total",
            "Alert delivery attempts by sink (webhook, kafka) and result (ok, error).",
            &["sink", "result"],
        );
        let evaluations = counter_vec(
            &registry,
            "posteriord_evaluations_total",
            "Rule evaluations by stage: queued (an experiment became due) and done.",
            &["stage"],
        );
        for stage in ["queued", "done"] {
            evaluations.with_label_values(&[stage]);
        }
        let evaluation_failures = counter_vec(
            &registry,
            "posteriord_evaluation_failures_total",
            "Metrics of an evaluation whose numbers could not be computed, by reason \
             (out_of_range: counts or priors outside the supported range; internal: a failure \
             of ours, please report). Other metrics and experiments are evaluated as usual.",
            &["reason"],
        );
        for reason in ["out_of_range", "internal"] {
            evaluation_failures.with_label_values(&[reason]);
        }
        let reference_lag = gauge_vec(
            &registry,
            "posteriord_shard_reference_lag_seconds",
            "Per co-partitioned Kafka shard: now minus the reference time (record timestamp) below which every record of its topics is applied.",
            &["shard"],
        );
        let records_out_of_order = counter_vec(
            &registry,
            "posteriord_kafka_records_out_of_order_total",
            "Records of co-partitioned topics applied out of reference-time order, by topic and why (behind_watermark: stamped before what their shard had applied; ahead_of_clock: stamped further ahead of this instance's clock than the idle allowance).",
            &["topic", "why"],
        );
        let m = Metrics {
            evaluations,
            evaluation_failures,
            alert_deliveries,
            alerts,
            alert_changes,
            changelog_publishes,
            group_partials,
            group_boundaries,
            group_watermark,
            kafka_lag,
            kafka_next_offset,
            restoring,
            dead_letters,
            dead_letter_errors,
            state_saves,
            state_durable,
            state_failing_files,
            state_free_bytes,
            restore_mismatches,
            posterior_mean: gauge_vec(
                &registry,
                "posteriord_posterior_mean",
                "Posterior mean of the metric's rate per variant.",
                ARM,
            ),
            interval_lower: gauge_vec(
                &registry,
                "posteriord_posterior_interval_lower",
                "Lower end of the 95% equal-tailed credible interval.",
                ARM,
            ),
            interval_upper: gauge_vec(
                &registry,
                "posteriord_posterior_interval_upper",
                "Upper end of the 95% equal-tailed credible interval.",
                ARM,
            ),
            prob_best: gauge_vec(
                &registry,
                "posteriord_prob_best",
                "Posterior probability that the variant is the best arm.",
                ARM,
            ),
            expected_loss: gauge_vec(
                &registry,
                "posteriord_expected_loss",
                "Expected loss (regret, in rate units) of shipping the variant.",
                ARM,
            ),
            prob_better_than_control: gauge_vec(
                &registry,
                "posteriord_prob_better_than_control",
                "Posterior probability that the variant is better than the control.",
                ARM,
            ),
            prob_harm: gauge_vec(
                &registry,
                "posteriord_prob_harm",
                "Posterior probability that the variant is worse than the control by more than the harm margin (relative).",
                ARM,
            ),
            sample_ratio_p_value: gauge_vec(
                &registry,
                "posteriord_sample_ratio_p_value",
                "p-value of the chi-square test of the units per variant against the configured weights (sample ratio mismatch when small).",
                &["experiment"],
            ),
            http_requests,
            http_duration,
            event_time_checked: counter_vec(
                &registry,
                "posteriord_event_time_checked_total",
                "Timed events checked against their reference time (Kafka record timestamp, HTTP receive time), by source.",
                &["source"],
            ),
            event_time_skewed: counter_vec(
                &registry,
                "posteriord_event_time_skewed_total",
                "Events whose time was beyond the source's bounds around its reference time, by source, direction (ahead, behind) and action (refused, clamped).",
                &["source", "direction", "action"],
            ),
            event_time_largest_skew: gauge_vec(
                &registry,
                "posteriord_event_time_largest_skew_seconds",
                "Largest skew beyond the bounds seen since start, by source and direction.",
                &["source", "direction"],
            ),
            clock: Default::default(),
            registry,
            scrape: std::sync::Mutex::new(()),
            events,
            rejected,
            mapped_events,
            held_decided,
            kafka_reachable,
            variant_units,
            reference_lag,
            records_out_of_order,
        };
        for source in [Source::Http, Source::Kafka, Source::Simulator] {
            for outcome in Outcome::ALL {
                m.events
                    .with_label_values(&[source.as_str(), outcome.as_str()]);
            }
            for reason in RejectReason::ALL {
                m.rejected
                    .with_label_values(&[source.as_str(), reason.as_str()]);
            }
            m.event_time_checked.with_label_values(&[source.as_str()]);
            for d in Direction::ALL {
                for action in ["refused", "clamped"] {
                    m.event_time_skewed
                        .with_label_values(&[source.as_str(), d.as_str(), action]);
                }
                m.event_time_largest_skew
                    .with_label_values(&[source.as_str(), d.as_str()]);
            }
        }
        m
    }

    /// Count what the event-time check of one batch found (`skewed` from
    /// `clock::check_batch`), after it updated `self.clock`.
    pub fn count_clock(&self, source: Source, checked: u64, skewed: &[super::clock::Skewed]) {
        if checked > 0 {
            self.event_time_checked
                .with_label_values(&[source.as_str()])
                .inc_by(checked);
        }
        if skewed.is_empty() {
            return;
        }
        for x in skewed {
            let action = if x.clamped { "clamped" } else { "refused" };
            self.event_time_skewed
                .with_label_values(&[source.as_str(), x.direction.as_str(), action])
                .inc();
        }
        let now = self.clock.of(source);
        for (k, d) in Direction::ALL.into_iter().enumerate() {
            self.event_time_largest_skew
                .with_label_values(&[source.as_str(), d.as_str()])
                .set(now.largest[k] as f64 / 1e6);
        }
    }

    /// Count one valid event.
    pub fn count_outcome(&self, source: Source, outcome: Outcome, n: u64) {
        if n > 0 {
            self.events
                .with_label_values(&[source.as_str(), outcome.as_str()])
                .inc_by(n);
        }
    }

    /// Count one refused event.
    pub fn count_reject(&self, source: Source, reason: RejectReason) {
        self.rejected
            .with_label_values(&[source.as_str(), reason.as_str()])
            .inc();
    }

    /// Replace the per-shard reference lags with `lags` (shard, seconds): shards that moved
    /// to another instance lose their series.
    pub fn set_reference_lags(&self, lags: &[(String, f64)]) {
        self.reference_lag.reset();
        for (shard, seconds) in lags {
            self.reference_lag
                .with_label_values(&[shard.as_str()])
                .set(*seconds);
        }
    }

    /// [`Metrics::new`], with the Kafka reachability gauge at 0 (until the first probe
    /// answers) when Kafka is configured, and without it when not.
    pub fn with_kafka(kafka: bool) -> Metrics {
        let m = Metrics::new();
        if kafka {
            m.kafka_reachable.with_label_values(&[] as &[&str]).set(0);
        }
        m
    }

    /// The latest Kafka probe's answer.
    pub fn set_kafka_reachable(&self, reachable: bool) {
        self.kafka_reachable
            .with_label_values(&[] as &[&str])
            .set(i64::from(reachable));
    }

    /// Count one answered HTTP request. `route` is the route's template (`/v1/experiments/{id}`),
    /// never the path itself, so ids do not become label values.
    pub fn observe_http(&self, method: &str, route: &str, status: u16, seconds: f64) {
        let status = status.to_string();
        let labels = [method, route, status.as_str()];
        self.http_requests.with_label_values(&labels).inc();
        self.http_duration
            .with_label_values(&labels)
            .observe(seconds);
    }

    /// Rebuild the per-experiment gauges from `summaries`: cleared first, so an experiment
    /// that was deleted or redefined leaves no stale series behind. Callers hold `scrape`.
    pub fn set_experiment_gauges(&self, summaries: &[std::sync::Arc<ExperimentSummary>]) {
        let m = self;
        m.variant_units.reset();
        for g in [
            &m.posterior_mean,
            &m.interval_lower,
            &m.interval_upper,
            &m.prob_best,
            &m.expected_loss,
            &m.prob_better_than_control,
            &m.prob_harm,
            &m.sample_ratio_p_value,
        ] {
            g.reset();
        }
        for s in summaries {
            let def = &s.snapshot.def;
            for (v, units) in def.variants.iter().zip(&s.snapshot.units) {
                m.variant_units
                    .with_label_values(&[def.id.as_str(), v.name.as_str()])
                    .set(*units as i64);
            }
            if let Some(Ok(sr)) = &s.sample_ratio {
                m.sample_ratio_p_value
                    .with_label_values(&[def.id.as_str()])
                    .set(sr.p_value);
            }
            for (metric, ms) in def.metrics.iter().zip(&s.metrics) {
                let Ok(arms) = &ms.arms else { continue };
                for (v, a) in def.variants.iter().zip(arms) {
                    let labels = [def.id.as_str(), metric.name.as_str(), v.name.as_str()];
                    m.posterior_mean.with_label_values(&labels).set(a.mean);
                    m.interval_lower
                        .with_label_values(&labels)
                        .set(a.interval.lower);
                    m.interval_upper
                        .with_label_values(&labels)
                        .set(a.interval.upper);
                    m.prob_best.with_label_values(&labels).set(a.prob_best);
                    m.expected_loss
                        .with_label_values(&labels)
                        .set(a.expected_loss);
                    if let Some(p) = a.prob_better_than_control {
                        m.prob_better_than_control.with_label_values(&labels).set(p);
                    }
                    if let Some(p) = a.prob_harm {
                        m.prob_harm.with_label_values(&labels).set(p);
                    }
                }
            }
        }
    }

    /// The registry in Prometheus text exposition format.
    pub fn encode(&self) -> String {
        let mut buf = Vec::new();
        TextEncoder::new()
            .encode(&self.registry.gather(), &mut buf)
            .expect("text encoding into memory cannot fail");
        String::from_utf8(buf).expect("the text format is UTF-8")
    }
}

impl Default for Metrics {
    fn default() -> Self {
        Metrics::new()
    }
}
