//! The one evaluation step every caller runs on a due snapshot: summarize → evaluate the rules
//! → fold into the alert book, with the snapshot's own event time as "now". Pure: no clock is
//! read, so the same event order gives the same decisions live, in `replay` and in `plan`
//! (when a snapshot is due is the state's own bookkeeping, `state::cadence`).

use std::sync::Arc;

use super::alerts::{AlertBook, AlertChange};
use super::Finding;
use crate::event::Micros;
use crate::state::ExperimentSnapshot;
use crate::summary::ExperimentSummary;

/// What a reader shows of one snapshot: its summary at a credible level and the rules that
/// hold on it, computed together once, so documents, pages and reports never run the rules
/// again on the same snapshot.
#[derive(Debug, Clone)]
pub struct Reading {
    /// The summary (shared: pages keep it while they render).
    pub summary: Arc<ExperimentSummary>,
    /// The rules that hold on it.
    pub findings: Vec<Finding>,
}

impl Reading {
    /// Summarize `snapshot` at credible level `level` and evaluate the rules on it.
    pub fn of(snapshot: ExperimentSnapshot, level: f64) -> Reading {
        let summary = crate::summary::summarize(snapshot, level);
        let findings = super::evaluate(&summary);
        Reading {
            summary: Arc::new(summary),
            findings,
        }
    }
}

/// The result of one evaluation: what a reader (history, dashboards, the alert sinks) needs.
#[derive(Debug)]
pub struct Evaluation {
    /// The summary the rules were evaluated on.
    pub summary: ExperimentSummary,
    /// The rules that held.
    pub findings: Vec<Finding>,
    /// Alert openings and closings this evaluation caused.
    pub changes: Vec<AlertChange>,
    /// Event time the evaluation stands for ("now" of the alert book).
    pub at: Micros,
}

/// The event time an evaluation of `snapshot` stands for: the latest event time in it (0 for
/// data without times, where only the event count drives the cadence).
pub fn evaluation_time(snapshot: &ExperimentSnapshot) -> Micros {
    snapshot.last_event_time.unwrap_or(0)
}

/// Summarize `snapshot` and evaluate the rules, at the snapshot's event time; no alert
/// changes yet (see [`Evaluation::fold_into`]).
pub fn assess(snapshot: ExperimentSnapshot) -> Evaluation {
    assess_with(snapshot, crate::summary::summarize_for_decisions)
}

/// [`assess`] with the rules' inputs only (no lift at all, so no history): for `plan`. The
/// findings, and so the decisions, are the same bit for bit.
pub fn assess_rules_only(snapshot: ExperimentSnapshot) -> Evaluation {
    assess_with(snapshot, crate::summary::summarize_rules_only)
}

fn assess_with(
    snapshot: ExperimentSnapshot,
    summarize: fn(ExperimentSnapshot) -> ExperimentSummary,
) -> Evaluation {
    let at = evaluation_time(&snapshot);
    // Only what the rules read (and, live, the primary metric's lift for the history): the
    // probabilities are those of the full summary, bit for bit, at a lower cost.
    let summary = summarize(snapshot);
    let findings = super::evaluate(&summary);
    Evaluation {
        summary,
        findings,
        changes: Vec::new(),
        at,
    }
}

impl Evaluation {
    /// Advance the anytime-valid harm processes in `book` by this look, add their findings,
    /// and fold all findings into `book` with the evaluation's event time as "now".
    pub fn fold_into(&mut self, book: &mut AlertBook) {
        book.evidence_mut().advance(&self.summary.snapshot);
        super::add_evidence_findings(&self.summary, book.evidence(), &mut self.findings);
        self.changes = book.update(&self.summary.snapshot.def, &self.findings, self.at);
    }
}

/// Summarize `snapshot`, evaluate the rules and fold the findings into `book`, with the
/// snapshot's event time as "now". The one evaluation step: the live evaluator (in two halves,
/// to keep the alert lock short), `replay` and `plan` all run it, so they cannot disagree.
pub fn evaluate_snapshot(book: &mut AlertBook, snapshot: ExperimentSnapshot) -> Evaluation {
    let mut evaluation = assess(snapshot);
    evaluation.fold_into(book);
    evaluation
}
