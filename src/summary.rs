//! From an experiment's totals to its posteriors and decision quantities: the pure step between
//! state and the readers (HTTP API, metrics).

use crate::experiment::{MetricDef, Prior};
use crate::state::{ExperimentSnapshot, MetricTotals};
use crate::stats::{self, ArmSummary, Arms, Beta, CompareOptions, Gamma, SampleRatio, StatsError};

/// Credible level reported by the API and metrics.
pub const DEFAULT_LEVEL: f64 = 0.95;

/// Posteriors and decision quantities of one metric.
#[derive(Debug, Clone)]
pub struct MetricSummary {
    /// Posterior of every variant, in variant order.
    pub posteriors: Result<Arms, StatsError>,
    /// Decision quantities per variant, or why they could not be computed.
    pub arms: Result<Vec<ArmSummary>, StatsError>,
}

/// An experiment's snapshot with everything derived from it.
#[derive(Debug, Clone)]
pub struct ExperimentSummary {
    /// The totals the summary was computed from.
    pub snapshot: ExperimentSnapshot,
    /// One entry per metric, in definition order.
    pub metrics: Vec<MetricSummary>,
    /// Sample-ratio check of exposed units against the planned weights; `None` before any unit.
    pub sample_ratio: Option<Result<SampleRatio, StatsError>>,
}

/// Posterior of every variant of one metric.
pub fn posteriors(def: &MetricDef, totals: &MetricTotals) -> Result<Arms, StatsError> {
    match totals {
        MetricTotals::Conversion(v) => v
            .iter()
            .enumerate()
            .map(|(i, t)| {
                let (a, b) = match def.prior_for(i) {
                    Prior::Beta { alpha, beta } => (alpha, beta),
                    Prior::Gamma { .. } => unreachable!("config pairs conversion with Beta"),
                };
                Beta::new(a + t.successes as f64, b + (t.trials - t.successes) as f64)
            })
            .collect::<Result<Vec<_>, _>>()
            .map(Arms::Beta),
        MetricTotals::Defect(v) => v
            .iter()
            .enumerate()
            .map(|(i, t)| {
                let (shape, rate) = match def.prior_for(i) {
                    Prior::Gamma { shape, rate } => (shape, rate),
                    Prior::Beta { .. } => unreachable!("config pairs defect_rate with Gamma"),
                };
                Gamma::new(shape + t.count as f64, rate + t.exposure)
            })
            .collect::<Result<Vec<_>, _>>()
            .map(Arms::Gamma),
    }
}

/// Summarise `snapshot` at credible level `level`.
pub fn summarize(snapshot: ExperimentSnapshot, level: f64) -> ExperimentSummary {
    summarize_with(snapshot, level, Detail::Full)
}

/// Summarise `snapshot` for the evaluator: lift interval and ROPE probability on the primary
/// metric only (the rules read the ROPE there; the lift is kept for the history), none on the
/// guardrails. Every probability equals [`summarize`]'s bit for bit, at about four fifths of
/// its cost (benches/targets.rs), which adds up when thousands of experiments are
/// re-evaluated on a cadence.
pub fn summarize_for_decisions(snapshot: ExperimentSnapshot) -> ExperimentSummary {
    summarize_with(snapshot, DEFAULT_LEVEL, Detail::Evaluator)
}

/// Summarise `snapshot` with only what the stopping rules read: no lift interval at all,
/// the ROPE probability on the primary metric only. For `plan`, which runs thousands of
/// simulated looks and keeps no history; its findings equal [`summarize`]'s bit for bit.
pub fn summarize_rules_only(snapshot: ExperimentSnapshot) -> ExperimentSummary {
    summarize_with(snapshot, DEFAULT_LEVEL, Detail::Rules)
}

/// How much of the summary to compute.
#[derive(Clone, Copy, PartialEq, Eq)]
enum Detail {
    /// Everything (the API and the dashboard).
    Full,
    /// The rules' inputs plus the primary metric's lift (for the history).
    Evaluator,
    /// The rules' inputs only.
    Rules,
}

fn summarize_with(snapshot: ExperimentSnapshot, level: f64, detail: Detail) -> ExperimentSummary {
    summarize_selected(snapshot, level, detail, &mut |_, _| Compute::All)
}

/// What [`summarize_rules_only_chosen`] computes of one metric.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Compute {
    /// Nothing: `arms` is `Err(StatsError::NotComputed)`.
    Skip,
    /// Everything [`summarize_rules_only`] computes.
    All,
    /// The same without the ROPE probabilities (`prob_practically_equivalent: None`); every
    /// other number equals [`summarize_rules_only`]'s bit for bit (`CompareOptions`).
    WithoutEquivalence,
}

/// [`summarize_rules_only`] with the work on each metric chosen by
/// `choose(metric, posteriors)`: for a caller that has proved that no rule reading the numbers
/// it leaves out can hold (`decide::screen`).
pub fn summarize_rules_only_chosen(
    snapshot: ExperimentSnapshot,
    choose: &mut dyn FnMut(usize, &Result<Arms, StatsError>) -> Compute,
) -> ExperimentSummary {
    summarize_selected(snapshot, DEFAULT_LEVEL, Detail::Rules, choose)
}

/// [`summarize_rules_only`] for the metrics `compute(metric, posteriors)` selects; the others
/// keep their posteriors and get `arms: Err(StatsError::NotComputed)`. For a caller that has
/// already proved that no rule reading those metrics' numbers can hold (`decide::screen`).
/// The computed metrics equal [`summarize_rules_only`]'s bit for bit.
pub fn summarize_rules_only_selected(
    snapshot: ExperimentSnapshot,
    compute: &mut dyn FnMut(usize, &Result<Arms, StatsError>) -> bool,
) -> ExperimentSummary {
    summarize_selected(snapshot, DEFAULT_LEVEL, Detail::Rules, &mut |m, p| {
        if compute(m, p) {
            Compute::All
        } else {
            Compute::Skip
        }
    })
}

fn summarize_selected(
    snapshot: ExperimentSnapshot,
    level: f64,
    detail: Detail,
    choose: &mut dyn FnMut(usize, &Result<Arms, StatsError>) -> Compute,
) -> ExperimentSummary {
    let def = &snapshot.def;
    let metrics = def
        .metrics
        .iter()
        .zip(&snapshot.metrics)
        .enumerate()
        .map(|(i, (m, totals))| {
            // Each metric's own ROPE and harm margin shape its probabilities.
            let posteriors = posteriors(m, totals);
            let chosen = choose(i, &posteriors);
            let options = CompareOptions {
                control: def.control,
                level,
                rope: m.rules.rope,
                harm_margin: m.rules.harm.map_or(0.0, |h| h.margin),
                lift_interval: detail == Detail::Full
                    || (detail == Detail::Evaluator && i == def.rules.primary),
                equivalence: (detail == Detail::Full || i == def.rules.primary)
                    && chosen != Compute::WithoutEquivalence,
            };
            let arms = if chosen == Compute::Skip {
                Err(StatsError::NotComputed)
            } else {
                match &posteriors {
                    Ok(p) => stats::compare(p, &options),
                    Err(e) => Err(e.clone()),
                }
            };
            MetricSummary { posteriors, arms }
        })
        .collect();
    let sample_ratio = if snapshot.units.iter().all(|&u| u == 0) {
        None
    } else {
        let weights: Vec<f64> = def.variants.iter().map(|v| v.weight).collect();
        Some(stats::sample_ratio_mismatch(&snapshot.units, &weights))
    };
    ExperimentSummary {
        snapshot,
        metrics,
        sample_ratio,
    }
}
