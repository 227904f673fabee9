//! Where every rule stands, per metric and variant: holds; not yet (waiting for data, or below
//! its threshold, with the numbers); suspended (by a sample-ratio alarm); or cannot hold with
//! this configuration. Read by the experiment document, the dashboard and `replay`, so that a
//! rule that is silent says why. Pure: computed from a summary, its findings and the
//! anytime-valid processes.

use super::betting::EvidenceBook;
use super::{guardrail_blockers, shortfall, Blocker, Finding, Rule};
use crate::experiment::{ExperimentDef, ExposureBasis, MetricKind};
use crate::state::MetricTotals;
use crate::summary::ExperimentSummary;

/// The state of one rule for one metric and variant.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum State {
    /// The rule holds now.
    Holds,
    /// It does not hold yet: waiting for data, or its quantity is on the wrong side of the
    /// threshold.
    NotYet,
    /// Suspended while a sample-ratio mismatch holds.
    Suspended,
    /// It can never hold with this configuration and these data.
    CannotHold,
}

impl State {
    /// Stable name used in documents.
    pub fn as_str(self) -> &'static str {
        match self {
            State::Holds => "holds",
            State::NotYet => "not_yet",
            State::Suspended => "suspended",
            State::CannotHold => "cannot_hold",
        }
    }
}

/// Where one rule stands.
#[derive(Debug, Clone, PartialEq)]
pub struct RuleStanding {
    /// The rule.
    pub rule: Rule,
    /// Metric index, for metric rules.
    pub metric: Option<usize>,
    /// Variant index, for per-variant rules.
    pub variant: Option<usize>,
    /// Where it stands.
    pub state: State,
    /// The quantity compared, when there is one yet.
    pub value: Option<f64>,
    /// Its threshold.
    pub threshold: Option<f64>,
    /// Data so far and data needed, when waiting for data.
    pub progress: Option<(f64, f64)>,
    /// One sentence: why it stands where it stands.
    pub detail: String,
}

fn standing(rule: Rule, metric: Option<usize>, variant: Option<usize>) -> RuleStanding {
    RuleStanding {
        rule,
        metric,
        variant,
        state: State::NotYet,
        value: None,
        threshold: None,
        progress: None,
        detail: String::new(),
    }
}

/// Configurations under which a rule can never hold, or may never hold, as warnings for
/// `check-config` (each names the experiment, metric and key).
pub fn config_warnings(def: &ExperimentDef) -> Vec<String> {
    let mut out = Vec::new();
    for m in &def.metrics {
        if m.kind == MetricKind::DefectRate(ExposureBasis::Reported) && m.rules.min_units > 0 {
            out.push(format!(
                "experiment `{}`, metric `{}`: rules.min_units = {} on a metric with reported exposure; if its events carry no units (defects per machine hour, say) no rule on it can ever hold — use rules.min_exposure instead",
                def.id, m.name, m.rules.min_units
            ));
        }
    }
    let p = &def.metrics[def.rules.primary];
    if p.rules.ship.is_some() {
        if let Some(max) = def.rules.max_duration {
            if max < def.rules.min_duration {
                out.push(format!(
                    "experiment `{}`: max_duration_days is shorter than min_duration_days, so `ship` and `equivalent` cannot hold",
                    def.id
                ));
            }
        }
    }
    out
}

/// Whether metric `m` can never reach its unit minimum in these data: it has reported
/// exposure but no arm has units.
fn units_never_come(summary: &ExperimentSummary, m: usize) -> bool {
    let snap = &summary.snapshot;
    let rules = &snap.def.metrics[m].rules;
    let exposed = match &snap.metrics[m] {
        MetricTotals::Defect(t) => t.iter().any(|a| a.exposure > 0.0),
        MetricTotals::Conversion(_) => false,
    };
    snap.def.metrics[m].kind == MetricKind::DefectRate(ExposureBasis::Reported)
        && rules.min_units > 0
        && exposed
        && snap.units.iter().all(|&u| u == 0)
}

fn waiting_text(def: &ExperimentDef, b: &Blocker) -> String {
    match b {
        Blocker::Waiting {
            metric,
            arm,
            what,
            have,
            need,
        } => format!(
            "waiting for data: `{}` has {} of {} {what} on `{}`",
            def.variants[*arm].name,
            fmt_amount(*have),
            fmt_amount(*need),
            def.metrics[*metric].name
        ),
        Blocker::NotCleared {
            metric,
            probability,
            threshold,
            margin,
        } => format!(
            "guardrail `{}` not cleared: P(worse by more than {:.0}%) = {:.3} (must be ≤ {})",
            def.metrics[*metric].name,
            margin * 100.0,
            probability,
            threshold
        ),
        Blocker::Failed { metric, reason } => format!(
            "guardrail `{}` cannot be computed: {reason}",
            def.metrics[*metric].name
        ),
    }
}

fn fmt_amount(x: f64) -> String {
    if x.fract() == 0.0 && x.abs() < 1e15 {
        format!("{}", x as i64)
    } else {
        format!("{x:.1}")
    }
}

/// Where every configured rule of `summary`'s experiment stands, given the findings of the
/// same look (`findings`, including `harm_evidence` when `evidence` was advanced) and the
/// anytime-valid processes (`None` where none are kept, e.g. a one-off summary).
pub fn standings(
    summary: &ExperimentSummary,
    findings: &[Finding],
    evidence: Option<&EvidenceBook>,
) -> Vec<RuleStanding> {
    let snap = &summary.snapshot;
    let def = &snap.def;
    let xr = &def.rules;
    let control = def.control;
    let holds = |rule: Rule, m: Option<usize>, v: Option<usize>| {
        findings
            .iter()
            .find(|f| f.rule == rule && f.metric == m && f.variant == v)
    };
    let srm = findings.iter().any(|f| f.rule == Rule::SampleRatio);
    let mut out = Vec::new();

    // Sample ratio.
    let mut s = standing(Rule::SampleRatio, None, None);
    s.threshold = Some(xr.srm_p);
    match &summary.sample_ratio {
        None => {
            s.progress = Some((0.0, 1.0));
            s.detail = "waiting for data: no exposed units yet".into();
        }
        Some(Err(e)) => s.detail = format!("cannot be computed: {e}"),
        Some(Ok(r)) => {
            s.value = Some(r.p_value);
            if let Some(f) = holds(Rule::SampleRatio, None, None) {
                s.state = State::Holds;
                s.detail = f.message.clone();
            } else {
                s.detail = format!(
                    "p = {}, above the alarm threshold {}",
                    super::p_value_text(r.p_value),
                    xr.srm_p
                );
            }
        }
    }
    out.push(s);

    // Harm and anytime-valid harm, per metric and variant.
    for (m, metric) in def.metrics.iter().enumerate() {
        for v in (0..def.variants.len()).filter(|&v| v != control) {
            if let Some(rule) = metric.rules.harm {
                let mut s = standing(Rule::Harm, Some(m), Some(v));
                s.threshold = Some(rule.probability);
                let p = summary.metrics[m]
                    .arms
                    .as_ref()
                    .ok()
                    .and_then(|a| a[v].prob_harm);
                s.value = p;
                if let Some(f) = holds(Rule::Harm, Some(m), Some(v)) {
                    s.state = State::Holds;
                    s.detail = f.message.clone();
                } else if units_never_come(summary, m) {
                    s.state = State::CannotHold;
                    s.detail = format!(
                        "cannot hold: `{}` has reported exposure but its events carry no units, and rules.min_units = {} counts units; use rules.min_exposure",
                        metric.name, metric.rules.min_units
                    );
                } else if let Some(b) = [control, v]
                    .into_iter()
                    .find_map(|a| shortfall(def, &snap.metrics[m], &snap.units, m, a))
                {
                    if let Blocker::Waiting { have, need, .. } = &b {
                        s.progress = Some((*have, *need));
                    }
                    s.detail = waiting_text(def, &b);
                } else if let Some(p) = p {
                    s.detail = format!(
                        "P(worse) = {p:.4}, below the threshold {}",
                        rule.probability
                    );
                } else {
                    s.detail = "cannot be computed for these data".into();
                }
                out.push(s);
            }
            if let Some(rule) = metric.rules.evidence {
                let mut s = standing(Rule::HarmEvidence, Some(m), Some(v));
                s.threshold = Some(1.0 / rule.alpha);
                let process = evidence.and_then(|e| e.get(&def.state_key(), m, v));
                if let Some(p) = process {
                    s.value = Some(p.standing().max_e_value);
                }
                if let Some(f) = holds(Rule::HarmEvidence, Some(m), Some(v)) {
                    s.state = State::Holds;
                    s.detail = f.message.clone();
                } else if srm && process.is_some_and(|p| p.alarmed(rule.alpha)) {
                    s.state = State::Suspended;
                    s.detail = "suspended: the sample ratio does not match the planned weights, which the evidence assumes".into();
                } else if let Some(p) = process {
                    let st = p.standing();
                    s.detail = format!(
                        "evidence {:.2} (highest {:.2}), alarm at {:.0}",
                        st.e_value,
                        st.max_e_value,
                        1.0 / rule.alpha
                    );
                    if let Some((lo, hi)) = p.lift_interval(rule.alpha) {
                        let end = |x: f64| {
                            if x.is_finite() {
                                format!("{:+.1}%", x * 100.0)
                            } else {
                                "unbounded".to_string()
                            }
                        };
                        if lo.is_finite() || hi.is_finite() {
                            s.detail.push_str(&format!(
                                "; anytime-valid {:.0}% interval for the lift: {} … {}",
                                (1.0 - rule.alpha) * 100.0,
                                end(lo),
                                end(hi)
                            ));
                        }
                    }
                } else {
                    s.detail = "waiting for data: no look folded in yet".into();
                }
                out.push(s);
            }
        }
    }

    // Ship, per arm, on the primary metric.
    let p = xr.primary;
    let primary = &def.metrics[p];
    if let Some(rule) = primary.rules.ship {
        let arms = summary.metrics[p].arms.as_ref().ok();
        for v in 0..def.variants.len() {
            let mut s = standing(Rule::Ship, Some(p), Some(v));
            s.threshold = Some(rule.threshold_of_caring);
            s.value = arms.map(|a| a[v].expected_loss);
            if let Some(f) = holds(Rule::Ship, Some(p), Some(v)) {
                s.state = State::Holds;
                s.detail = f.message.clone();
                out.push(s);
                continue;
            }
            if srm {
                s.state = State::Suspended;
                s.detail = "suspended: the sample ratio does not match the planned weights; check assignment and logging".into();
                out.push(s);
                continue;
            }
            let mut why: Vec<String> = Vec::new();
            if units_never_come(summary, p) {
                s.state = State::CannotHold;
                why.push(format!(
                    "`{}` has reported exposure but its events carry no units, and rules.min_units counts units",
                    primary.name
                ));
            }
            if let Some(b) = (0..def.variants.len())
                .find_map(|a| shortfall(def, &snap.metrics[p], &snap.units, p, a))
            {
                if let Blocker::Waiting { have, need, .. } = &b {
                    s.progress = Some((*have, *need));
                }
                why.push(waiting_text(def, &b));
            }
            if let Some(ran) = xr.ran(snap.first_event_time, snap.last_event_time) {
                let day = 86_400e6;
                if ran < xr.min_duration {
                    if s.progress.is_none() {
                        s.progress = Some((ran as f64 / day, xr.min_duration as f64 / day));
                    }
                    why.push(format!(
                        "waiting for the minimum duration: {:.1} of {:.1} days",
                        ran as f64 / day,
                        xr.min_duration as f64 / day
                    ));
                }
            } else if xr.min_duration > 0 {
                why.push(
                    "events carry no time, so the minimum duration cannot be checked (not applied)"
                        .into(),
                );
            }
            if let Some(loss) = s.value {
                if loss >= rule.threshold_of_caring {
                    why.push(format!(
                        "expected loss {}, not below the threshold of caring {}",
                        super::rate_difference_text(loss, primary.kind),
                        super::rate_difference_text(rule.threshold_of_caring, primary.kind)
                    ));
                } else if arms.is_some_and(|a| {
                    a.iter()
                        .enumerate()
                        .any(|(j, x)| j != v && x.expected_loss < loss)
                }) {
                    why.push(format!(
                        "expected loss {} is below the threshold, but another arm's is lower",
                        super::rate_difference_text(loss, primary.kind)
                    ));
                }
            }
            if xr
                .guardrails
                .iter()
                .any(|&g| holds(Rule::Harm, Some(g), Some(v)).is_some())
            {
                why.push("a guardrail's harm rule holds for it".into());
            }
            if xr
                .guardrails
                .iter()
                .chain([&p])
                .any(|&g| holds(Rule::HarmEvidence, Some(g), Some(v)).is_some())
            {
                why.push("anytime-valid evidence of harm holds for it".into());
            }
            for b in guardrail_blockers(summary, v) {
                if let Blocker::Waiting { have, need, .. } = &b {
                    if s.progress.is_none() {
                        s.progress = Some((*have, *need));
                    }
                }
                why.push(waiting_text(def, &b));
            }
            if why.is_empty() {
                why.push("not the arm the rule would choose now".into());
            }
            s.detail = why.join("; ");
            out.push(s);
        }
    }

    // Equivalence.
    if let Ok(arms) = &summary.metrics[p].arms {
        let mut s = standing(Rule::Equivalent, Some(p), None);
        s.threshold = Some(xr.equivalence_probability);
        let worst = arms
            .iter()
            .enumerate()
            .filter(|(v, _)| *v != control)
            .filter_map(|(_, a)| a.prob_practically_equivalent)
            .fold(f64::INFINITY, f64::min);
        if worst.is_finite() {
            s.value = Some(worst);
        }
        if let Some(f) = holds(Rule::Equivalent, Some(p), None) {
            s.state = State::Holds;
            s.detail = f.message.clone();
        } else if let Some(b) = (0..def.variants.len())
            .find_map(|a| shortfall(def, &snap.metrics[p], &snap.units, p, a))
        {
            if let Blocker::Waiting { have, need, .. } = &b {
                s.progress = Some((*have, *need));
            }
            s.detail = waiting_text(def, &b);
        } else if !super::long_enough(summary) {
            s.detail = "waiting for the minimum duration".into();
        } else {
            s.detail = format!(
                "lowest P(within ±{:.1}% relative) = {:.3}, below {}",
                primary.rules.rope * 100.0,
                worst,
                xr.equivalence_probability
            );
        }
        out.push(s);
    }

    // Inconclusive.
    if let Some(max) = xr.max_duration {
        let mut s = standing(Rule::Inconclusive, Some(p), None);
        let day = 86_400e6;
        s.threshold = Some(max as f64 / day);
        if let Some(ran) = xr.ran(snap.first_event_time, snap.last_event_time) {
            s.value = Some(ran as f64 / day);
            s.progress = Some((ran as f64 / day, max as f64 / day));
        }
        if let Some(f) = holds(Rule::Inconclusive, Some(p), None) {
            s.state = State::Holds;
            s.detail = f.message.clone();
        } else if snap.first_event_time.is_none() {
            s.state = State::CannotHold;
            s.detail = "cannot hold: the events carry no time, so the duration is unknown".into();
        } else {
            s.detail = format!(
                "ran {:.1} of {:.1} days",
                s.value.unwrap_or(0.0),
                max as f64 / day
            );
        }
        out.push(s);
    }
    out
}
