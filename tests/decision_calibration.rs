//! Operating characteristics of the default harm rule under continuous monitoring, measured by
//! simulation through the real decision engine: the A/A false-alarm rate (no true difference)
//! and how fast a clearly worse variant is caught. Deterministic (fixed seed); the figures are
//! recorded in docs/decisions.md. The optional-stopping effect that makes these differ from a
//! single look is documented there (Sanborn & Hills 2014; de Heide & Grünwald 2021).

use std::sync::Arc;

use posteriord::decide::{evaluate, Rule};
use posteriord::event::Outcome;
use posteriord::experiment::{
    ExperimentDef, ExperimentRules, MetricDef, MetricKind, MetricRules, Prior, VariantDef,
};
use posteriord::state::{ConversionTotals, ExperimentSnapshot, MetricTotals, OutcomeCounts};
use posteriord::summary::summarize;
use rand::rngs::StdRng;
use rand::SeedableRng;
use rand_distr::{Binomial, Distribution};

fn def() -> Arc<ExperimentDef> {
    Arc::new(ExperimentDef {
        id: "crumb-reviews-widget".into(),
        generation: 0,
        control: 0,
        variants: ["control", "widget"]
            .iter()
            .map(|n| VariantDef {
                name: n.to_string(),
                weight: 0.5,
            })
            .collect(),
        metrics: vec![MetricDef {
            name: "purchase".into(),
            kind: MetricKind::Conversion,
            prior: Prior::Beta {
                alpha: 1.0,
                beta: 1.0,
            },
            variant_priors: vec![None, None],
            rules: MetricRules::default(),
        }],
        rules: ExperimentRules::default(),
    })
}

/// Runs of `looks` looks, `step` units per arm between looks; returns for each run the units
/// per arm at the first harm finding, if any.
fn simulate(runs: usize, looks: u64, step: u64, rates: [f64; 2], seed: u64) -> Vec<Option<u64>> {
    let d = def();
    let mut rng = StdRng::seed_from_u64(seed);
    (0..runs)
        .map(|_| {
            let mut conv = [0u64; 2];
            for look in 1..=looks {
                for arm in 0..2 {
                    conv[arm] += Binomial::new(step, rates[arm]).unwrap().sample(&mut rng);
                }
                let n = look * step;
                let mut outcomes = OutcomeCounts::default();
                outcomes.0[Outcome::ALL
                    .iter()
                    .position(|o| *o == Outcome::Applied)
                    .unwrap()] = 2 * n;
                let snap = ExperimentSnapshot {
                    def: Arc::clone(&d),
                    units: vec![n, n],
                    metrics: vec![MetricTotals::Conversion(
                        conv.iter()
                            .map(|&s| ConversionTotals {
                                trials: n,
                                successes: s,
                            })
                            .collect(),
                    )],
                    outcomes,
                    last_event_time: None,
                    first_event_time: None,
                    positions: Vec::new(),
                };
                if evaluate(&summarize(snap, 0.95))
                    .iter()
                    .any(|f| f.rule == Rule::Harm)
                {
                    return Some(n);
                }
            }
            None
        })
        .collect()
}

#[test]
fn aa_false_alarms_are_rare_and_a_clearly_worse_variant_is_caught() {
    // A/A: 10% conversion in both arms, a look every 500 units per arm up to 20,000 (40 looks).
    let aa = simulate(200, 40, 500, [0.10, 0.10], 11);
    let false_alarms = aa.iter().filter(|r| r.is_some()).count();
    let rate = false_alarms as f64 / aa.len() as f64;
    // Worse: the variant converts 7.5% (25% relative harm).
    let worse = simulate(200, 40, 500, [0.10, 0.075], 12);
    let mut caught: Vec<u64> = worse.iter().flatten().copied().collect();
    caught.sort_unstable();
    let power = caught.len() as f64 / worse.len() as f64;
    let median = caught.get(caught.len() / 2).copied().unwrap_or(0);
    eprintln!(
        "A/A false harm alarms: {false_alarms}/{} = {rate:.3}; 25% worse caught in {:.3} of runs, median at {median} units per arm",
        aa.len(),
        power
    );
    // One look at P ≥ 0.999 (the default) would alarm about 0.1% of A/A runs; 40 looks raise
    // it (optional stopping: measured 3/200 = 0.015 with this seed; 17/200 with the former
    // default 0.99). The bound is loose on purpose: the test guards against a rule that alarms
    // far more often, and docs/decisions.md reports the measured figure.
    assert!(rate < 0.15, "A/A false-alarm rate {rate}");
    assert!(power > 0.95, "power {power}");
    assert!(
        median <= 5_000,
        "median detection at {median} units per arm"
    );
}
