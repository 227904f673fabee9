//! Looks decided without quadrature: the exact values of an earlier look plus a proven bound
//! on how far they can have moved since ([`crate::stats::shift_bound`]).
//!
//! A rule's probability P at this look and its exact value P₀ at the anchor look (the last
//! look that computed the metric) differ by at most D, the total variation distance between the joint anchor and current
//! posteriors of the variant and the control (`pair_shift_bound`) (docs/methods.md §9
//! has the proof). The exact path itself is within `EXACT_ERROR` of the true value (1e-9
//! documented, ≤ 2.1e-10 verified against mpmath), so when P̂₀ + D + 2·`EXACT_ERROR` is below
//! the threshold, the exact path run now would also find P̂ below it: the rule cannot hold,
//! and the metric's quadrature is skipped. Otherwise the metric is computed exactly, and that
//! look becomes its new anchor.
//!
//! Which rules read a metric's numbers (`evaluate`): `harm` reads P(harm) of each variant;
//! on the primary metric `equivalent` reads the smallest ROPE probability (it cannot hold when
//! one variant's is proven below its threshold) and `ship` reads expected losses, which are
//! not probabilities and have no such bound, and the guardrails' clearance (a guardrail not
//! computed would block shipping): with a `ship` rule the primary metric and the guardrails
//! are computed at every look. A rule that cannot hold on this look
//! at all (an arm short of `min_units`, equivalence before `min_duration`) needs no bound. Findings are therefore the same as the
//! exact path's on every look; `plan`'s tests compare whole simulated runs both ways.

use crate::state::ExperimentSnapshot;
use crate::stats::{pair_shift_bound, Arms};
use crate::summary::summarize_rules_only_selected;

use super::evaluation::{evaluation_time, Evaluation};

/// Allowance for the exact path's error on one probability. docs/methods.md §5 promises
/// ≤ 1e-9 and verifies ≤ 2.1e-10 against mpmath; ten times the promise is kept in hand.
pub const EXACT_ERROR: f64 = 1e-8;

/// One metric's exact values at its anchor look.
#[derive(Debug, Clone)]
struct Anchor {
    posteriors: Arms,
    harm: Vec<Option<f64>>,
    rope: Vec<Option<f64>>,
}

/// Per-experiment state of the screen: one anchor per metric, and counts for `--bench`.
#[derive(Debug, Clone, Default)]
pub struct Screen {
    anchors: Vec<Option<Anchor>>,
    /// Metric evaluations skipped because the bound decided them.
    pub skipped: u64,
    /// Metric evaluations computed exactly.
    pub computed: u64,
}

impl Screen {
    /// A screen with no anchors: the first look of every metric is computed exactly.
    pub fn new() -> Self {
        Self::default()
    }

    /// Summarize `snapshot` with the rules' inputs, computing only the metrics whose rules
    /// the bound cannot decide, and evaluate the rules (as
    /// [`super::evaluation::assess_rules_only`], with the same findings).
    pub fn assess(&mut self, snapshot: ExperimentSnapshot) -> Evaluation {
        let def = std::sync::Arc::clone(&snapshot.def);
        let n_metrics = def.metrics.len();
        if self.anchors.len() != n_metrics {
            self.anchors = vec![None; n_metrics];
        }
        let at = evaluation_time(&snapshot);
        // Which rules could hold at all on this look, from the counts alone (as `evaluate`
        // decides it): harm needs both arms eligible, equivalence every arm eligible and the
        // minimum duration run. A rule that cannot hold needs no bound.
        let control = def.control;
        let possible: Vec<Possible> = (0..n_metrics)
            .map(|m| {
                let totals = &snapshot.metrics[m];
                let ok = |v: usize| super::eligible(&def, totals, &snapshot.units, m, v);
                let k = def.variants.len();
                Possible {
                    harm: (0..k)
                        .map(|v| v != control && ok(v) && ok(control))
                        .collect(),
                    equivalence: m == def.rules.primary
                        && ran_long_enough(&snapshot)
                        && (0..k).all(ok),
                }
            })
            .collect();
        let anchors = &self.anchors;
        let (mut skipped, mut computed) = (0u64, 0u64);
        let summary = summarize_rules_only_selected(snapshot, &mut |m, posteriors| {
            let quiet = match posteriors {
                Ok(now) => silent(&def, m, anchors[m].as_ref(), now, &possible[m]),
                Err(_) => false,
            };
            if quiet {
                skipped += 1;
            } else {
                computed += 1;
            }
            !quiet
        });
        self.skipped += skipped;
        self.computed += computed;
        for (m, metric) in summary.metrics.iter().enumerate() {
            if let (Ok(posteriors), Ok(arms)) = (&metric.posteriors, &metric.arms) {
                self.anchors[m] = Some(Anchor {
                    posteriors: posteriors.clone(),
                    harm: arms.iter().map(|a| a.prob_harm).collect(),
                    rope: arms.iter().map(|a| a.prob_practically_equivalent).collect(),
                });
            }
        }
        let findings = super::evaluate(&summary);
        Evaluation {
            summary,
            findings,
            changes: Vec::new(),
            at,
        }
    }
}

/// Which of a metric's rules can hold on this look at all.
struct Possible {
    /// Per variant: `harm` can hold (both arms eligible; never for the control).
    harm: Vec<bool>,
    /// `equivalent` can hold (primary metric, every arm eligible, minimum duration run).
    equivalence: bool,
}

/// `long_enough` of `evaluate`, from the snapshot alone.
fn ran_long_enough(snapshot: &ExperimentSnapshot) -> bool {
    match (snapshot.first_event_time, snapshot.last_event_time) {
        (Some(first), Some(last)) => last - first >= snapshot.def.rules.min_duration,
        _ => true,
    }
}

/// True when no rule reading metric `m`'s numbers can hold at posteriors `now`: the rule
/// cannot hold on this look at all (`possible`), or the anchor's exact values and the shift
/// bound prove it below its threshold.
fn silent(
    def: &crate::experiment::ExperimentDef,
    m: usize,
    anchor: Option<&Anchor>,
    now: &Arms,
    possible: &Possible,
) -> bool {
    let metric = &def.metrics[m];
    let primary = m == def.rules.primary;
    let ship = def.metrics[def.rules.primary].rules.ship.is_some();
    // `ship` reads the primary metric's expected losses (no bound) and the guardrails'
    // clearance, whose absence blocks shipping: with a ship rule, those are always computed.
    if ship && (primary || def.rules.guardrails.contains(&m)) {
        return false;
    }
    let c = def.control;
    let k = now.len();
    let harm_rule = metric
        .rules
        .harm
        .filter(|_| possible.harm.iter().any(|&p| p));
    if harm_rule.is_none() && !possible.equivalence {
        return true;
    }
    let Some(anchor) = anchor else {
        return false;
    };
    let mut moved = vec![0.0; k];
    for (v, slot) in moved.iter_mut().enumerate().filter(|(v, _)| *v != c) {
        match pair_shift_bound(&anchor.posteriors, now, v, c) {
            Some(d) => *slot = d,
            None => return false,
        }
    }
    let below = |value: Option<f64>, v: usize, threshold: f64| {
        value.is_some_and(|p| p + moved[v] + 2.0 * EXACT_ERROR < threshold)
    };
    if let Some(rule) = harm_rule {
        let all_below = (0..k)
            .filter(|&v| possible.harm[v])
            .all(|v| below(anchor.harm[v], v, rule.probability));
        if !all_below {
            return false;
        }
    }
    if possible.equivalence {
        let one_below = (0..k)
            .filter(|&v| v != c)
            .any(|v| below(anchor.rope[v], v, def.rules.equivalence_probability));
        if !one_below {
            return false;
        }
    }
    true
}
