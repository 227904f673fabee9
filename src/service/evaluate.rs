//! The evaluator: takes the snapshots that ingest queued as due, in order, runs the one
//! evaluation step on each, records the history and folds the findings into the alert desk.
//! It runs on its own thread, so quadrature never runs on the ingest path.

use std::time::Duration;

use crate::decide::alerts::AlertChange;
use crate::state::ExperimentSnapshot;

use super::{lock, now_micros, EvaluatorStarted, Service};

/// How often an idle evaluator looks at its stop condition.
const IDLE_WAIT: Duration = Duration::from_millis(100);

impl Service {
    /// Evaluate queued snapshots until `stop()` holds (looked at whenever the queue is idle),
    /// then what is already queued, and return. Runs once per service.
    pub fn run_evaluator(&self, stop: impl Fn() -> bool) -> Result<(), EvaluatorStarted> {
        use std::sync::mpsc::RecvTimeoutError;
        let queue = lock(&self.evaluation_queue)
            .take()
            .ok_or(EvaluatorStarted)?;
        loop {
            match queue.recv_timeout(IDLE_WAIT) {
                Ok(snapshot) => {
                    self.evaluate_due(snapshot);
                    while let Ok(snapshot) = queue.try_recv() {
                        self.evaluate_due(snapshot);
                    }
                    self.refresh_alert_gauges();
                }
                Err(RecvTimeoutError::Timeout) if stop() => break,
                Err(RecvTimeoutError::Timeout) => {}
                Err(RecvTimeoutError::Disconnected) => break,
            }
        }
        while let Ok(snapshot) = queue.try_recv() {
            self.evaluate_due(snapshot);
        }
        self.refresh_alert_gauges();
        Ok(())
    }

    /// Evaluate one due experiment (its snapshot as of the event that made it due) and fold
    /// the findings into the alert book with that event's time as "now"; each change is
    /// recorded with its deliveries, then logged as one structured line (the log sink) and
    /// counted.
    pub(super) fn evaluate_due(&self, snapshot: ExperimentSnapshot) {
        // Quadrature runs outside the desk's lock; only the fold takes it.
        let mut evaluation = crate::decide::evaluation::assess(snapshot);
        self.note_failures(&evaluation.summary);
        self.recorder
            .record(&evaluation.summary, &evaluation.findings, evaluation.at);
        let changes = {
            let mut desk = lock(&self.desk);
            evaluation.fold_into(desk.book_mut());
            let changes = std::mem::take(&mut evaluation.changes);
            if !changes.is_empty() {
                // Delivery stamps are operational, so they use the wall clock. Recorded
                // durably, with their deliveries, before anything is announced.
                desk.record(&changes, now_micros());
            }
            changes
        };
        self.metrics.evaluations.with_label_values(&["done"]).inc();
        for change in changes {
            let (kind, alert) = match &change {
                AlertChange::Opened(a) => ("opened", a),
                AlertChange::Closed(a) => ("closed", a),
            };
            self.metrics
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
                caution = crate::doc::CAUTION_SHORT,
                "{}",
                alert.message_now()
            );
        }
    }

    /// Count the metrics whose numbers could not be computed; the rules skip them and every
    /// other metric and experiment is evaluated as usual. Logged once per experiment, metric
    /// and message, not at every look (the document carries the message meanwhile).
    fn note_failures(&self, summary: &crate::summary::ExperimentSummary) {
        let def = &summary.snapshot.def;
        for (m, ms) in summary.metrics.iter().enumerate() {
            let Err(e) = &ms.arms else { continue };
            let reason = if e.is_internal() {
                "internal"
            } else {
                "out_of_range"
            };
            self.metrics
                .evaluation_failures
                .with_label_values(&[reason])
                .inc();
            let key = (def.id.clone(), def.metrics[m].name.clone(), e.to_string());
            if lock(&self.failures_logged).insert(key) {
                tracing::error!(
                    experiment = %def.id,
                    metric = %def.metrics[m].name,
                    reason,
                    error = %e,
                    "cannot compute this metric's numbers; its rules are skipped until they can be{}",
                    if e.is_internal() { " (a failure of ours: please report it)" } else { "" }
                );
            }
        }
    }

    /// Rebuild the alert gauges from the book; under `metrics.scrape`, so that a scrape never
    /// sees them cleared and half refilled.
    pub(super) fn refresh_alert_gauges(&self) {
        let desk = lock(&self.desk);
        let _scrape = lock(&self.metrics.scrape);
        self.metrics.alerts.reset();
        for a in desk.book().alerts() {
            self.metrics
                .alerts
                .with_label_values(&[a.key.rule.as_str(), a.state.as_str()])
                .inc();
        }
    }
}
