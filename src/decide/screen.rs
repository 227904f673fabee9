//! Looks decided without quadrature: the exact values of an earlier look plus a proven bound
//! on how far they can have moved since ([`crate::stats::proven_below`]).
//!
//! A rule's probability P at this look and its exact value P₀ at the anchor look (the last
//! look that computed the metric) are the probabilities of one event under two joint
//! posteriors of the variant and the control; a divergence between those laws bounds how far P
//! can be from P₀, the tighter the closer P₀ lies to 0 or 1 (the data-processing inequality,
//! docs/methods.md §9 has the proof): KL in either order (`pair_divergence`), then Rényi
//! divergences of the orders `RENYI_ORDERS` (`pair_renyi`), the first that decides ending the
//! search. Harm and the ROPE are anchored apart: a look that must compute harm while every
//! possible equivalence is already decided leaves the ROPE out (`Compute::WithoutEquivalence`).
//! The exact path itself is within `EXACT_ERROR` of the true value (1e-9 documented,
//! ≤ 2.1e-10 verified against mpmath), so when the true value is proven below
//! threshold − `EXACT_ERROR` starting from P̂₀ + `EXACT_ERROR`, the exact path run now would also
//! find P̂ below the threshold: the rule cannot hold, and the metric's quadrature is skipped.
//! Otherwise the metric is computed exactly, and that look becomes its new anchor.
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
use crate::stats::{
    pair_divergence, pair_renyi, proven_below, proven_below_renyi, Arms, RENYI_ORDERS,
};
use crate::summary::{summarize_rules_only_chosen, Compute};

use super::evaluation::{evaluation_time, Evaluation};

/// Allowance for the exact path's error on one probability. docs/methods.md §5 promises
/// ≤ 1e-9 and verifies ≤ 2.1e-10 against mpmath; ten times the promise is kept in hand.
pub const EXACT_ERROR: f64 = 1e-8;

/// Exact values of one quantity (P(harm) or the ROPE probability of each variant) at the look
/// that last computed it, with that look's posteriors.
#[derive(Debug, Clone)]
struct Anchor {
    posteriors: Arms,
    values: Vec<Option<f64>>,
}

/// One metric's anchors: harm and ROPE are anchored separately, because a look may compute
/// harm alone when the ROPE probabilities are already proven below their threshold.
#[derive(Debug, Clone, Default)]
struct Anchors {
    harm: Option<Anchor>,
    rope: Option<Anchor>,
}

/// Per-experiment state of the screen: one anchor per metric, and counts for `--bench`.
#[derive(Debug, Clone, Default)]
pub struct Screen {
    anchors: Vec<Anchors>,
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
            self.anchors = vec![Anchors::default(); n_metrics];
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
        let summary = summarize_rules_only_chosen(snapshot, &mut |m, posteriors| {
            let chosen = match posteriors {
                Ok(now) => choose(&def, m, &anchors[m], now, &possible[m]),
                Err(_) => Compute::All,
            };
            if chosen == Compute::Skip {
                skipped += 1;
            } else {
                computed += 1;
            }
            chosen
        });
        self.skipped += skipped;
        self.computed += computed;
        for (m, metric) in summary.metrics.iter().enumerate() {
            if let (Ok(posteriors), Ok(arms)) = (&metric.posteriors, &metric.arms) {
                let anchor = |values: Vec<Option<f64>>| Anchor {
                    posteriors: posteriors.clone(),
                    values,
                };
                self.anchors[m].harm = Some(anchor(arms.iter().map(|a| a.prob_harm).collect()));
                let rope: Vec<Option<f64>> =
                    arms.iter().map(|a| a.prob_practically_equivalent).collect();
                // A look that left the ROPE out keeps the earlier ROPE anchor.
                if rope.iter().any(Option::is_some) {
                    self.anchors[m].rope = Some(anchor(rope));
                }
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

/// What of metric `m` to compute at posteriors `now`: nothing when no rule reading its numbers
/// can hold (the rule cannot hold on this look at all (`possible`), or an anchor's exact
/// values and the divergence bound prove it below its threshold); without the ROPE when only
/// the equivalence rule is so decided; everything otherwise.
fn choose(
    def: &crate::experiment::ExperimentDef,
    m: usize,
    anchors: &Anchors,
    now: &Arms,
    possible: &Possible,
) -> Compute {
    let metric = &def.metrics[m];
    let primary = m == def.rules.primary;
    let ship = def.metrics[def.rules.primary].rules.ship.is_some();
    let c = def.control;
    let k = now.len();
    let harm_rule = metric
        .rules
        .harm
        .filter(|_| possible.harm.iter().any(|&p| p));
    // Equivalence: silent when it cannot hold on this look, or when one variant's ROPE
    // probability is proven below its threshold.
    let equivalence_silent = !possible.equivalence
        || anchors.rope.as_ref().is_some_and(|anchor| {
            let mut proof = Proof::new(anchor, now, c);
            (0..k)
                .filter(|&v| v != c)
                .any(|v| proof.below(v, def.rules.equivalence_probability))
        });
    // `ship` reads the primary metric's expected losses (no bound) and the guardrails'
    // clearance, whose absence blocks shipping: with a ship rule, those are always computed.
    let always = ship && (primary || def.rules.guardrails.contains(&m));
    let harm_silent = !always
        && match (harm_rule, anchors.harm.as_ref()) {
            (None, _) => true,
            (Some(_), None) => false,
            (Some(rule), Some(anchor)) => {
                let mut proof = Proof::new(anchor, now, c);
                (0..k)
                    .filter(|&v| possible.harm[v])
                    .all(|v| proof.below(v, rule.probability))
            }
        };
    match (harm_silent, equivalence_silent) {
        (true, true) => Compute::Skip,
        (false, true) => Compute::WithoutEquivalence,
        (_, false) => Compute::All,
    }
}

/// Proofs that a variant's anchored probability is still below a threshold, with each pair
/// divergence computed at most once and the second order only when the first does not decide.
struct Proof<'a> {
    anchor: &'a Anchor,
    now: &'a Arms,
    control: usize,
    /// Per variant: KL(anchor‖now) and KL(now‖anchor) of (variant, control), once computed;
    /// `None` inside when the families differ.
    forward: Vec<Option<Option<f64>>>,
    backward: Vec<Option<Option<f64>>>,
}

impl<'a> Proof<'a> {
    fn new(anchor: &'a Anchor, now: &'a Arms, control: usize) -> Proof<'a> {
        let k = now.len();
        Proof {
            anchor,
            now,
            control,
            forward: vec![None; k],
            backward: vec![None; k],
        }
    }

    /// True when variant `v`'s value now is proven below `threshold` as the exact path would
    /// compute it. The anchor's true value is at most P̂₀ + ε, and the exact path run now
    /// reports at most the true value + ε: proving the true value below threshold − ε from
    /// P̂₀ + ε proves the exact path's value below the threshold.
    fn below(&mut self, v: usize, threshold: f64) -> bool {
        let Some(p) = self.anchor.values.get(v).copied().flatten() else {
            return false;
        };
        let (p, t) = ((p + EXACT_ERROR).min(1.0), threshold - EXACT_ERROR);
        let (anchor, now, c) = (&self.anchor.posteriors, self.now, self.control);
        let Some(forward) =
            *self.forward[v].get_or_insert_with(|| pair_divergence(anchor, now, v, c))
        else {
            return false;
        };
        if proven_below(p, t, forward, f64::INFINITY) {
            return true;
        }
        let Some(backward) =
            *self.backward[v].get_or_insert_with(|| pair_divergence(now, anchor, v, c))
        else {
            return false;
        };
        if proven_below(p, t, forward, backward) {
            return true;
        }
        // Near a threshold, Rényi divergences of higher orders decide longer moves than KL
        // (`stats::proven_below_renyi`); a few orders cost far less than the quadrature.
        RENYI_ORDERS.iter().any(|&alpha| {
            pair_renyi(anchor, now, v, c, alpha).is_some_and(|d| proven_below_renyi(p, t, alpha, d))
        })
    }
}
