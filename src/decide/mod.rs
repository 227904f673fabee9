//! The decision engine: from an experiment's posteriors and decision quantities to the rules
//! that hold now, each with the numbers it compared. Pure: no clocks, no I/O.
//!
//! Rules (docs/decisions.md): `harm` (a variant is clearly worse than the control on a
//! metric), `ship` (an arm's expected loss on the primary metric is below the threshold of
//! caring, no guardrail harm on it, no sample-ratio mismatch), `equivalent` (every variant
//! within the ROPE of the control on the primary metric with high probability),
//! `sample_ratio` (exposed units do not match the planned weights) and `crossovers` (too many
//! units seen in a second arm). Posteriors assume the model and clean data: the data-quality
//! rules are reported first and suspend shipping.

pub mod alerts;
pub mod betting;
pub mod evaluation;
pub mod screen;
pub mod standing;

use crate::event::Outcome;
use crate::experiment::{ExperimentDef, MetricKind};
use crate::state::MetricTotals;
use crate::stats::ArmSummary;
use crate::summary::ExperimentSummary;

/// Which rule a finding is about.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum Rule {
    /// Units per arm do not match the planned weights.
    SampleRatio,
    /// Too many units were exposed to a second arm.
    Crossovers,
    /// A variant is worse than the control by more than the margin, with high probability.
    Harm,
    /// Anytime-valid evidence that a variant is worse than the control by more than the
    /// margin: its test martingale reached 1/α.
    HarmEvidence,
    /// An arm can be shipped: its expected loss is below the threshold of caring.
    Ship,
    /// All variants are practically equivalent to the control.
    Equivalent,
    /// The experiment ran for its maximum duration without a ship or equivalence decision.
    Inconclusive,
}

impl Rule {
    /// Every rule.
    pub const ALL: [Rule; 7] = [
        Rule::SampleRatio,
        Rule::Crossovers,
        Rule::Harm,
        Rule::HarmEvidence,
        Rule::Ship,
        Rule::Equivalent,
        Rule::Inconclusive,
    ];

    /// The comparison the rule makes, as shown with each finding.
    pub fn test(self) -> &'static str {
        match self {
            Rule::SampleRatio => "p_value < threshold",
            Rule::Crossovers => "crossover share > threshold",
            Rule::Harm => "prob_harm >= threshold",
            Rule::HarmEvidence => "max_e_value >= 1/alpha",
            Rule::Ship => "expected_loss < threshold_of_caring and guardrails cleared",
            Rule::Equivalent => "min prob_practically_equivalent >= threshold",
            Rule::Inconclusive => "duration_days >= max_duration_days",
        }
    }

    /// The rule called `name`.
    pub fn from_name(name: &str) -> Option<Rule> {
        Rule::ALL.into_iter().find(|r| r.as_str() == name)
    }

    /// Stable name used in the API and metrics.
    pub fn as_str(self) -> &'static str {
        match self {
            Rule::SampleRatio => "sample_ratio",
            Rule::Crossovers => "crossovers",
            Rule::Harm => "harm",
            Rule::HarmEvidence => "harm_evidence",
            Rule::Ship => "ship",
            Rule::Equivalent => "equivalent",
            Rule::Inconclusive => "inconclusive",
        }
    }
}

/// A rule that holds now, with what it compared.
#[derive(Debug, Clone, PartialEq)]
pub struct Finding {
    /// The rule.
    pub rule: Rule,
    /// Metric index, for metric rules.
    pub metric: Option<usize>,
    /// Variant index, for per-variant rules.
    pub variant: Option<usize>,
    /// The quantity compared (a probability, an expected loss, a p-value, a share).
    pub value: f64,
    /// The threshold it was compared with.
    pub threshold: f64,
    /// How: e.g. "prob_harm >= threshold".
    pub test: &'static str,
    /// One sentence for the person on call.
    pub message: String,
    /// The data behind the comparison.
    pub evidence: Evidence,
}

/// What a finding was computed from, for the person who has to trust or overrule it.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct Evidence {
    /// The arms involved (the variant and the control; every arm for experiment rules).
    pub arms: Vec<ArmEvidence>,
    /// Latest event time in the data.
    pub event_time: Option<crate::event::Micros>,
    /// Input positions (shard, next offset) the data reflects.
    pub positions: Vec<(String, i64)>,
}

/// An arm's posterior, by family, so every document can name its parameters.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum PosteriorParams {
    /// Beta(alpha, beta): a conversion metric.
    Beta {
        /// Prior alpha plus successes.
        alpha: f64,
        /// Prior beta plus failures.
        beta: f64,
    },
    /// Gamma(shape, rate): a defect rate.
    Gamma {
        /// Prior shape plus defects.
        shape: f64,
        /// Prior rate plus exposure.
        rate: f64,
    },
}

/// One arm's posterior and exposed units.
#[derive(Debug, Clone, PartialEq)]
pub struct ArmEvidence {
    /// Variant index.
    pub variant: usize,
    /// Variant name.
    pub name: String,
    /// Posterior parameters; `None` for experiment-level rules.
    pub posterior: Option<PosteriorParams>,
    /// Exposed units.
    pub units: u64,
}

pub(crate) fn eligible(
    def: &ExperimentDef,
    totals: &MetricTotals,
    units: &[u64],
    metric: usize,
    arm: usize,
) -> bool {
    let rules = &def.metrics[metric].rules;
    if units[arm] < rules.min_units {
        return false;
    }
    match (def.metrics[metric].kind, totals) {
        (MetricKind::DefectRate(_), MetricTotals::Defect(v)) => {
            v[arm].exposure >= rules.min_exposure
        }
        _ => true,
    }
}

/// Evaluate every rule of `summary`'s experiment. Findings are ordered data quality first,
/// then harm, ship, equivalent.
pub fn evaluate(summary: &ExperimentSummary) -> Vec<Finding> {
    let snap = &summary.snapshot;
    let def: &ExperimentDef = &snap.def;
    let xr = &def.rules;
    let mut out = Vec::new();
    let control = def.control;

    // Data quality.
    let mut srm_holds = false;
    if let Some(Ok(srm)) = &summary.sample_ratio {
        // The chi-square approximation needs enough units in every arm (≥ 5 expected is the
        // textbook rule of thumb); below that the check stays silent.
        let n: u64 = snap.units.iter().sum();
        let enough = def.variants.iter().all(|v| v.weight * n as f64 >= 5.0);
        if enough && srm.p_value < xr.srm_p {
            srm_holds = true;
            out.push(Finding {
                evidence: Evidence::default(),
                rule: Rule::SampleRatio,
                metric: None,
                variant: None,
                value: srm.p_value,
                threshold: xr.srm_p,
                test: Rule::SampleRatio.test(),
                message: format!(
                    "exposed units {:?} do not match the planned weights (chi-square {:.2}, p = {}); check assignment and logging before trusting any result; shipping is suspended",
                    snap.units,
                    srm.chi2,
                    p_value_text(srm.p_value)
                ),
            });
        }
    }
    let crossovers = snap.outcomes.get(Outcome::Crossover) as f64;
    let units_total: f64 = snap.units.iter().sum::<u64>() as f64;
    if units_total > 0.0 {
        let share = crossovers / units_total;
        if share > xr.max_crossover_share {
            out.push(Finding {
                evidence: Evidence::default(),
                rule: Rule::Crossovers,
                metric: None,
                variant: None,
                value: share,
                threshold: xr.max_crossover_share,
                test: Rule::Crossovers.test(),
                message: format!(
                    "{:.2}% of units were also exposed to another arm; assignment is leaking, so results mix arms",
                    share * 100.0
                ),
            });
        }
    }

    // Harm, on every metric.
    let mut harmed: Vec<(usize, usize)> = Vec::new();
    for (m, metric) in def.metrics.iter().enumerate() {
        let (Some(rule), Ok(arms)) = (metric.rules.harm, &summary.metrics[m].arms) else {
            continue;
        };
        for (v, arm) in arms.iter().enumerate() {
            if v == control
                || !eligible(def, &snap.metrics[m], &snap.units, m, v)
                || !eligible(def, &snap.metrics[m], &snap.units, m, control)
            {
                continue;
            }
            let Some(p) = arm.prob_harm else { continue };
            if p >= rule.probability {
                harmed.push((m, v));
                out.push(Finding {
                evidence: Evidence::default(),
                    rule: Rule::Harm,
                    metric: Some(m),
                    variant: Some(v),
                    value: p,
                    threshold: rule.probability,
                    test: Rule::Harm.test(),
                    message: format!(
                        "`{}` is worse than `{}` on `{}`{} with probability {:.4} (threshold {}); consider stopping it",
                        def.variants[v].name,
                        def.variants[control].name,
                        metric.name,
                        if rule.margin > 0.0 { format!(" by more than {:.1}% relative", rule.margin * 100.0) } else { String::new() },
                        p,
                        rule.probability
                    ),
                });
            }
        }
    }

    // Ship and equivalence, on the primary metric.
    let p = xr.primary;
    let primary = &def.metrics[p];
    if let Ok(arms) = &summary.metrics[p].arms {
        let all_eligible =
            (0..def.variants.len()).all(|v| eligible(def, &snap.metrics[p], &snap.units, p, v));
        if all_eligible {
            if let (Some(rule), false, true) = (primary.rules.ship, srm_holds, long_enough(summary))
            {
                let best = arms
                    .iter()
                    .enumerate()
                    .filter(|(v, _)| !xr.guardrails.iter().any(|g| harmed.contains(&(*g, *v))))
                    .min_by(|a, b| a.1.expected_loss.total_cmp(&b.1.expected_loss));
                if let Some((v, arm)) = best {
                    if arm.expected_loss < rule.threshold_of_caring
                        && guardrail_blockers(summary, v).is_empty()
                    {
                        out.push(Finding {
                            evidence: Evidence::default(),
                            rule: Rule::Ship,
                            metric: Some(p),
                            variant: Some(v),
                            value: arm.expected_loss,
                            threshold: rule.threshold_of_caring,
                            test: Rule::Ship.test(),
                            message: ship_message(def, p, v, arm, rule.threshold_of_caring),
                        });
                    }
                }
            }
            let equivalent: Vec<f64> = arms
                .iter()
                .enumerate()
                .filter(|(v, _)| *v != control)
                .filter_map(|(_, a)| a.prob_practically_equivalent)
                .collect();
            if !equivalent.is_empty() && long_enough(summary) {
                let worst = equivalent.iter().copied().fold(f64::INFINITY, f64::min);
                if worst >= xr.equivalence_probability {
                    out.push(Finding {
                evidence: Evidence::default(),
                        rule: Rule::Equivalent,
                        metric: Some(p),
                        variant: None,
                        value: worst,
                        threshold: xr.equivalence_probability,
                        test: Rule::Equivalent.test(),
                        message: format!(
                            "every variant is within ±{:.1}% (relative) of `{}` on `{}` with probability ≥ {:.3}; more traffic is unlikely to change the choice",
                            primary.rules.rope * 100.0,
                            def.variants[control].name,
                            primary.name,
                            worst
                        ),
                    });
                }
            }
        }
    }
    // Inconclusive: out of time by the events' own clock, with neither ship nor equivalence.
    // Measured from the experiment's start over times that passed the event-time check.
    if let (Some(max), Some(ran)) = (
        xr.max_duration,
        xr.ran(snap.first_event_time, snap.last_event_time),
    ) {
        let decided = out
            .iter()
            .any(|f| matches!(f.rule, Rule::Ship | Rule::Equivalent));
        if ran >= max && !decided {
            let day = 86_400.0 * 1e6;
            out.push(Finding {
                evidence: Evidence::default(),
                rule: Rule::Inconclusive,
                metric: Some(p),
                variant: None,
                value: ran as f64 / day,
                threshold: max as f64 / day,
                test: Rule::Inconclusive.test(),
                message: format!(
                    "ran {:.1} days (limit {:.1}) without a ship or equivalence decision on `{}`; the data cannot tell the arms apart at the thresholds set",
                    ran as f64 / day,
                    max as f64 / day,
                    primary.name
                ),
            });
        }
    }
    for f in &mut out {
        f.evidence = evidence_of(summary, f);
    }
    out
}

/// Add the `harm_evidence` findings of `evidence` (already advanced by this look) to the
/// findings of `summary`, after the other harm findings; a variant with such evidence on the
/// primary metric or a guardrail is not shipped. Suspended while a sample-ratio mismatch holds:
/// the processes assume units are assigned with the planned weights.
pub fn add_evidence_findings(
    summary: &ExperimentSummary,
    evidence: &betting::EvidenceBook,
    findings: &mut Vec<Finding>,
) {
    if findings.iter().any(|f| f.rule == Rule::SampleRatio) {
        return;
    }
    let def = &summary.snapshot.def;
    let key = def.state_key();
    let mut found = Vec::new();
    for (m, metric) in def.metrics.iter().enumerate() {
        let Some(rule) = metric.rules.evidence else {
            continue;
        };
        for v in (0..def.variants.len()).filter(|&v| v != def.control) {
            let Some(process) = evidence.get(&key, m, v) else {
                continue;
            };
            if !process.alarmed(rule.alpha) {
                continue;
            }
            let st = process.standing();
            let mut f = Finding {
                rule: Rule::HarmEvidence,
                metric: Some(m),
                variant: Some(v),
                value: st.max_e_value,
                threshold: 1.0 / rule.alpha,
                test: Rule::HarmEvidence.test(),
                message: format!(
                    "`{}` is worse than `{}` on `{}`{}: the evidence against \"not worse\" reached {:.1} (alarm at 1/α = {:.0}; a false alarm has probability at most {} however often this is looked at); consider stopping it",
                    def.variants[v].name,
                    def.variants[def.control].name,
                    metric.name,
                    if rule.margin > 0.0 { format!(" by more than {:.1}% relative", rule.margin * 100.0) } else { String::new() },
                    st.max_e_value,
                    1.0 / rule.alpha,
                    rule.alpha
                ),
                evidence: Evidence::default(),
            };
            f.evidence = evidence_of(summary, &f);
            found.push(f);
        }
    }
    if found.is_empty() {
        return;
    }
    let blocked: Vec<usize> = found
        .iter()
        .filter(|f| {
            f.metric
                .is_some_and(|m| m == def.rules.primary || def.rules.guardrails.contains(&m))
        })
        .filter_map(|f| f.variant)
        .collect();
    findings.retain(|f| !(f.rule == Rule::Ship && f.variant.is_some_and(|v| blocked.contains(&v))));
    let at = findings
        .iter()
        .rposition(|f| matches!(f.rule, Rule::SampleRatio | Rule::Crossovers | Rule::Harm))
        .map_or(0, |i| i + 1);
    findings.splice(at..at, found);
}

/// Whether the experiment ran `min_duration` of event time (ship and equivalence wait for it).
/// Data without event times cannot show a duration; the rule's standing says so
/// ([`standing`]) and the minimum is not applied.
pub fn long_enough(summary: &ExperimentSummary) -> bool {
    let snap = &summary.snapshot;
    let rules = &snap.def.rules;
    match rules.ran(snap.first_event_time, snap.last_event_time) {
        Some(ran) => ran >= rules.min_duration,
        None => true,
    }
}

/// Why a guardrail does not (yet) clear shipping variant `v`.
#[derive(Debug, Clone, PartialEq)]
pub enum Blocker {
    /// Too little data on the guardrail: which arm, and what it has of what it needs.
    Waiting {
        /// Guardrail metric.
        metric: usize,
        /// The arm short of data.
        arm: usize,
        /// "units" or "exposure".
        what: &'static str,
        /// What it has.
        have: f64,
        /// What it needs.
        need: f64,
    },
    /// The posterior probability of worsening beyond the margin is above the clearance
    /// probability.
    NotCleared {
        /// Guardrail metric.
        metric: usize,
        /// P(worse than the control by more than the margin).
        probability: f64,
        /// The largest probability that clears.
        threshold: f64,
        /// The clearance margin.
        margin: f64,
    },
    /// The guardrail's numbers could not be computed.
    Failed {
        /// Guardrail metric.
        metric: usize,
        /// Why.
        reason: String,
    },
}

/// The guardrails that keep variant `v` from shipping; empty when every guardrail with a
/// clearance rule is cleared (always for the control, the status quo).
pub fn guardrail_blockers(summary: &ExperimentSummary, v: usize) -> Vec<Blocker> {
    let snap = &summary.snapshot;
    let def = &snap.def;
    let control = def.control;
    if v == control {
        return Vec::new();
    }
    let mut out = Vec::new();
    for &g in &def.rules.guardrails {
        let Some(clear) = def.metrics[g].rules.clear else {
            continue;
        };
        if let Some(b) = [control, v]
            .into_iter()
            .find_map(|arm| shortfall(def, &snap.metrics[g], &snap.units, g, arm))
        {
            out.push(b);
            continue;
        }
        match prob_beyond(summary, g, v, clear.margin) {
            Ok(p) if p <= clear.probability => {}
            Ok(p) => out.push(Blocker::NotCleared {
                metric: g,
                probability: p,
                threshold: clear.probability,
                margin: clear.margin,
            }),
            Err(reason) => out.push(Blocker::Failed { metric: g, reason }),
        }
    }
    out
}

/// What arm `arm` lacks on metric `m` before its rules may hold, if anything.
pub(crate) fn shortfall(
    def: &ExperimentDef,
    totals: &MetricTotals,
    units: &[u64],
    m: usize,
    arm: usize,
) -> Option<Blocker> {
    let rules = &def.metrics[m].rules;
    if units[arm] < rules.min_units {
        return Some(Blocker::Waiting {
            metric: m,
            arm,
            what: "units",
            have: units[arm] as f64,
            need: rules.min_units as f64,
        });
    }
    if let MetricTotals::Defect(t) = totals {
        if t[arm].exposure < rules.min_exposure {
            return Some(Blocker::Waiting {
                metric: m,
                arm,
                what: "exposure",
                have: t[arm].exposure,
                need: rules.min_exposure,
            });
        }
    }
    None
}

/// P(variant `v` worse than the control by more than `margin`, relative) on metric `m`:
/// the summary's own harm probability when the margins agree, else one two-arm comparison.
pub fn prob_beyond(
    summary: &ExperimentSummary,
    m: usize,
    v: usize,
    margin: f64,
) -> Result<f64, String> {
    let def = &summary.snapshot.def;
    let ms = &summary.metrics[m];
    let harm_margin = def.metrics[m].rules.harm.map_or(0.0, |h| h.margin);
    if harm_margin == margin {
        if let Ok(arms) = &ms.arms {
            if let Some(p) = arms[v].prob_harm {
                return Ok(p);
            }
        }
    }
    let posteriors = ms.posteriors.as_ref().map_err(|e| e.to_string())?;
    let c = def.control;
    let pair = match posteriors {
        crate::stats::Arms::Beta(b) => crate::stats::Arms::Beta(vec![b[c], b[v]]),
        crate::stats::Arms::Gamma(g) => crate::stats::Arms::Gamma(vec![g[c], g[v]]),
    };
    let options = crate::stats::CompareOptions {
        control: 0,
        harm_margin: margin,
        lift_interval: false,
        equivalence: false,
        ..crate::stats::CompareOptions::default()
    };
    let arms = crate::stats::compare(&pair, &options).map_err(|e| e.to_string())?;
    arms[1]
        .prob_harm
        .ok_or_else(|| "no harm probability for the variant".to_string())
}

fn evidence_of(summary: &ExperimentSummary, f: &Finding) -> Evidence {
    let snap = &summary.snapshot;
    let control = snap.def.control;
    let arms_of: Vec<usize> = match f.variant {
        Some(v) if v != control => vec![control, v],
        Some(v) => vec![v],
        None => (0..snap.def.variants.len()).collect(),
    };
    let posterior = |v: usize| -> Option<PosteriorParams> {
        let m = f.metric?;
        match summary.metrics[m].posteriors.as_ref().ok()? {
            crate::stats::Arms::Beta(b) => b.get(v).map(|x| PosteriorParams::Beta {
                alpha: x.alpha(),
                beta: x.beta(),
            }),
            crate::stats::Arms::Gamma(g) => g.get(v).map(|x| PosteriorParams::Gamma {
                shape: x.shape(),
                rate: x.rate(),
            }),
        }
    };
    Evidence {
        arms: arms_of
            .into_iter()
            .map(|v| ArmEvidence {
                variant: v,
                name: snap.def.variants[v].name.clone(),
                posterior: posterior(v),
                units: snap.units[v],
            })
            .collect(),
        event_time: snap.last_event_time,
        positions: snap.positions.clone(),
    }
}

fn ship_message(
    def: &ExperimentDef,
    metric: usize,
    v: usize,
    arm: &ArmSummary,
    threshold: f64,
) -> String {
    let kind = def.metrics[metric].kind;
    let loss = rate_difference_text(arm.expected_loss, kind);
    let threshold = rate_difference_text(threshold, kind);
    let name = &def.variants[v].name;
    let metric = &def.metrics[metric].name;
    if v == def.control {
        // Keeping the control ships nothing: no shipping review to ask for.
        format!(
            "keeping the control `{name}` on `{metric}` risks an expected loss of {loss} (below the threshold of caring {threshold}): no variant is worth choosing over it; posteriors assume the model and clean data"
        )
    } else {
        format!(
            "choosing `{name}` on `{metric}` risks an expected loss of {loss} (below the threshold of caring {threshold}); posteriors assume the model and clean data, so review before shipping"
        )
    }
}

/// A p-value as a probability: three decimals, or two significant digits with an exponent
/// when it is below 0.001 (where mismatches are flagged).
pub fn p_value_text(p: f64) -> String {
    if p >= 1e-3 || p == 0.0 || !p.is_finite() {
        format!("{p:.3}")
    } else {
        format!("{p:.1e}")
    }
}

/// A difference of two rates (an expected loss, a threshold of caring) as people read it:
/// percentage points for conversion, with three significant digits; defects per unit of
/// exposure for defect rates.
pub fn rate_difference_text(x: f64, kind: MetricKind) -> String {
    match kind {
        MetricKind::Conversion => {
            let pp = x * 100.0;
            if pp == 0.0 || !pp.is_finite() {
                format!("{pp} pp")
            } else if pp.abs() >= 1e-3 {
                let digits = (2 - pp.abs().log10().floor() as i32).max(0) as usize;
                format!("{pp:.digits$} pp")
            } else {
                format!("{pp:.2e} pp")
            }
        }
        MetricKind::DefectRate(_) => format!("{x:.3e} per unit of exposure"),
    }
}

#[cfg(test)]
mod tests;
