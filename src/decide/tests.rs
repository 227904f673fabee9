//! Rule semantics, table-driven: each rule fires at its threshold and not just below it, on
//! posteriors computed by the real statistics core (so thresholds are set relative to the
//! computed quantity, and the test checks the comparison and the gating, not the numbers).

use std::sync::Arc;

use super::*;
use crate::experiment::{
    ExperimentRules, ExposureBasis, HarmRule, MetricDef, MetricRules, Prior, ShipRule, VariantDef,
};
use crate::state::{ConversionTotals, DefectTotals, ExperimentSnapshot, OutcomeCounts};
use crate::summary::summarize;

struct Arm {
    units: u64,
    conversions: u64,
    errors: u64,
}

fn def(
    conv_rules: MetricRules,
    defect_rules: MetricRules,
    rules: ExperimentRules,
) -> ExperimentDef {
    ExperimentDef {
        id: "crumb-checkout".into(),
        generation: 0,
        control: 0,
        variants: ["control", "short-copy", "long-copy"]
            .iter()
            .map(|n| VariantDef {
                name: n.to_string(),
                weight: 1.0 / 3.0,
            })
            .collect(),
        metrics: vec![
            MetricDef {
                name: "purchase".into(),
                kind: MetricKind::Conversion,
                prior: Prior::Beta {
                    alpha: 1.0,
                    beta: 1.0,
                },
                variant_priors: vec![None; 3],
                rules: conv_rules,
            },
            MetricDef {
                name: "payment-error".into(),
                kind: MetricKind::DefectRate(ExposureBasis::Units),
                prior: Prior::Gamma {
                    shape: 1.0,
                    rate: 1.0,
                },
                variant_priors: vec![None; 3],
                rules: defect_rules,
            },
        ],
        rules,
    }
}

fn rules() -> ExperimentRules {
    ExperimentRules {
        primary: 0,
        guardrails: vec![1],
        ..ExperimentRules::default()
    }
}

fn findings(
    def: ExperimentDef,
    arms: &[Arm],
    crossovers: u64,
) -> (Vec<Finding>, ExperimentSummary) {
    let mut outcomes = OutcomeCounts::default();
    outcomes.0[Outcome::ALL
        .iter()
        .position(|o| *o == Outcome::Crossover)
        .unwrap()] = crossovers;
    outcomes.0[0] = arms.iter().map(|a| a.units).sum();
    let snap = ExperimentSnapshot {
        def: Arc::new(def),
        units: arms.iter().map(|a| a.units).collect(),
        metrics: vec![
            MetricTotals::Conversion(
                arms.iter()
                    .map(|a| ConversionTotals {
                        trials: a.units,
                        successes: a.conversions,
                    })
                    .collect(),
            ),
            MetricTotals::Defect(
                arms.iter()
                    .map(|a| DefectTotals {
                        count: a.errors,
                        exposure: a.units as f64,
                    })
                    .collect(),
            ),
        ],
        outcomes,
        last_event_time: None,
        first_event_time: None,
        positions: Vec::new(),
    };
    // The evaluator's cheaper summary (no lift intervals; ROPE on the primary only) must
    // not change a single finding, bit for bit.
    let fast = evaluate(&crate::summary::summarize_for_decisions(snap.clone()));
    let rules_only = evaluate(&crate::summary::summarize_rules_only(snap.clone()));
    assert_eq!(format!("{rules_only:?}"), format!("{fast:?}"));
    let summary = summarize(snap, 0.95);
    let found = evaluate(&summary);
    assert_eq!(format!("{fast:?}"), format!("{found:?}"));
    (found, summary)
}

fn rules_of(f: &[Finding]) -> Vec<(Rule, Option<usize>, Option<usize>)> {
    f.iter().map(|x| (x.rule, x.metric, x.variant)).collect()
}

fn even(conversions: [u64; 3], errors: [u64; 3]) -> Vec<Arm> {
    (0..3)
        .map(|i| Arm {
            units: 4_000,
            conversions: conversions[i],
            errors: errors[i],
        })
        .collect()
}

fn harm_at(p: f64) -> MetricRules {
    MetricRules {
        harm: Some(HarmRule {
            probability: p,
            margin: 0.0,
        }),
        ..MetricRules::default()
    }
}

#[test]
fn harm_fires_at_its_threshold_and_not_below() {
    // long-copy converts 8% against the control's 12%.
    let arms = even([480, 470, 320], [10, 10, 10]);
    let (_, summary) = findings(
        def(harm_at(0.99), MetricRules::default(), rules()),
        &arms,
        0,
    );
    let p = summary.metrics[0].arms.as_ref().unwrap()[2]
        .prob_harm
        .unwrap();
    assert!(p > 0.999, "{p}");
    // A threshold just above the probability is not met; one just at or below it is.
    let above = (p + 1.0) / 2.0;
    let (f, _) = findings(
        def(
            harm_at(above.min(1.0 - 1e-15)),
            MetricRules::default(),
            rules(),
        ),
        &arms,
        0,
    );
    assert!(
        !rules_of(&f).contains(&(Rule::Harm, Some(0), Some(2))),
        "{f:?}"
    );
    let (f, _) = findings(def(harm_at(p), MetricRules::default(), rules()), &arms, 0);
    assert!(
        rules_of(&f).contains(&(Rule::Harm, Some(0), Some(2))),
        "{f:?}"
    );
    let harm = f.iter().find(|x| x.rule == Rule::Harm).unwrap();
    assert_eq!(harm.value, p);
    assert!(
        harm.message.contains("long-copy") && harm.message.contains("purchase"),
        "{}",
        harm.message
    );
    // short-copy (11.75% vs 12%) is nowhere near.
    assert!(!rules_of(&f).contains(&(Rule::Harm, Some(0), Some(1))));
}

#[test]
fn nothing_is_decided_below_the_minimum_sample() {
    let arms = even([480, 470, 320], [10, 10, 10]);
    let few = MetricRules {
        min_units: 4_001,
        ..MetricRules::default()
    };
    let (f, _) = findings(def(few, MetricRules::default(), rules()), &arms, 0);
    assert!(!f.iter().any(|x| x.metric == Some(0)), "{f:?}");
    let exactly = MetricRules {
        min_units: 4_000,
        ..MetricRules::default()
    };
    let (f, _) = findings(def(exactly, MetricRules::default(), rules()), &arms, 0);
    assert!(rules_of(&f).contains(&(Rule::Harm, Some(0), Some(2))));
}

fn ship_at(t: f64) -> MetricRules {
    MetricRules {
        ship: Some(ShipRule {
            threshold_of_caring: t,
        }),
        ..MetricRules::default()
    }
}

#[test]
fn ship_fires_below_the_threshold_of_caring_and_picks_the_smallest_loss() {
    // short-copy converts 14% against 12% and 12.2%.
    let arms = even([480, 560, 488], [10, 10, 10]);
    let (_, summary) = findings(def(ship_at(1.0), MetricRules::default(), rules()), &arms, 0);
    let losses: Vec<f64> = summary.metrics[0]
        .arms
        .as_ref()
        .unwrap()
        .iter()
        .map(|a| a.expected_loss)
        .collect();
    let best = losses[1];
    assert!(best < losses[0] && best < losses[2], "{losses:?}");
    let (f, _) = findings(
        def(ship_at(best * 1.000_001), MetricRules::default(), rules()),
        &arms,
        0,
    );
    let ship = f.iter().find(|x| x.rule == Rule::Ship).expect("ship holds");
    assert_eq!((ship.variant, ship.value), (Some(1), best));
    assert!(
        ship.message.contains("review"),
        "the caution travels with the decision"
    );
    let (f, _) = findings(
        def(ship_at(best), MetricRules::default(), rules()),
        &arms,
        0,
    );
    assert!(
        !f.iter().any(|x| x.rule == Rule::Ship),
        "strictly below: {f:?}"
    );
}

#[test]
fn guardrail_harm_blocks_shipping_that_variant() {
    // short-copy wins on purchase but triples payment errors.
    let arms = even([480, 560, 488], [20, 60, 20]);
    let (f, _) = findings(def(ship_at(0.01), harm_at(0.99), rules()), &arms, 0);
    assert!(
        rules_of(&f).contains(&(Rule::Harm, Some(1), Some(1))),
        "{f:?}"
    );
    let ship = f.iter().find(|x| x.rule == Rule::Ship);
    assert_ne!(ship.and_then(|s| s.variant), Some(1), "{f:?}");
    // Without the guardrail, short-copy ships.
    let no_guard = ExperimentRules {
        guardrails: vec![],
        ..rules()
    };
    let (f, _) = findings(def(ship_at(0.01), harm_at(0.99), no_guard), &arms, 0);
    assert_eq!(
        f.iter().find(|x| x.rule == Rule::Ship).unwrap().variant,
        Some(1)
    );
}

#[test]
fn a_sample_ratio_mismatch_is_reported_and_suspends_shipping() {
    let mut arms = even([480, 560, 488], [10, 10, 10]);
    arms[1].units = 3_500;
    arms[1].conversions = 490;
    let (f, summary) = findings(
        def(ship_at(0.01), MetricRules::default(), rules()),
        &arms,
        0,
    );
    let p = summary
        .sample_ratio
        .as_ref()
        .unwrap()
        .as_ref()
        .unwrap()
        .p_value;
    assert!(p < 0.001, "{p}");
    assert_eq!(f[0].rule, Rule::SampleRatio, "data quality first: {f:?}");
    assert!(!f.iter().any(|x| x.rule == Rule::Ship), "{f:?}");
    // At a looser SRM threshold below the p-value, nothing is flagged and shipping resumes.
    let loose = ExperimentRules {
        srm_p: p * 0.5,
        ..rules()
    };
    let (f, _) = findings(def(ship_at(0.01), MetricRules::default(), loose), &arms, 0);
    assert!(!f.iter().any(|x| x.rule == Rule::SampleRatio));
    assert!(f.iter().any(|x| x.rule == Rule::Ship), "{f:?}");
}

#[test]
fn crossovers_above_their_share_are_flagged() {
    let arms = even([480, 480, 480], [10, 10, 10]);
    // 12,000 units: 120 crossovers is exactly 1% (not above), 121 is above.
    let (f, _) = findings(
        def(MetricRules::default(), MetricRules::default(), rules()),
        &arms,
        120,
    );
    assert!(!f.iter().any(|x| x.rule == Rule::Crossovers));
    let (f, _) = findings(
        def(MetricRules::default(), MetricRules::default(), rules()),
        &arms,
        121,
    );
    let c = f.iter().find(|x| x.rule == Rule::Crossovers).unwrap();
    assert!((c.value - 121.0 / 12_000.0).abs() < 1e-15);
}

#[test]
fn identical_arms_with_much_data_are_equivalent() {
    let arms: Vec<Arm> = (0..3)
        .map(|_| Arm {
            units: 2_000_000,
            conversions: 240_000,
            errors: 100,
        })
        .collect();
    let (f, summary) = findings(
        def(MetricRules::default(), MetricRules::default(), rules()),
        &arms,
        0,
    );
    let worst = summary.metrics[0].arms.as_ref().unwrap()[1..]
        .iter()
        .map(|a| a.prob_practically_equivalent.unwrap())
        .fold(1.0, f64::min);
    assert!(worst > 0.95, "{worst}");
    assert!(f.iter().any(|x| x.rule == Rule::Equivalent), "{f:?}");
    let strict = ExperimentRules {
        equivalence_probability: (worst + 1.0) / 2.0,
        ..rules()
    };
    let (f, _) = findings(
        def(MetricRules::default(), MetricRules::default(), strict),
        &arms,
        0,
    );
    assert!(!f.iter().any(|x| x.rule == Rule::Equivalent));
    // No harm on identical arms.
    assert!(!f.iter().any(|x| x.rule == Rule::Harm), "{f:?}");
}

#[test]
fn inconclusive_at_max_duration_unless_decided() {
    let day: i64 = 86_400_000_000;
    let arms = even([480, 470, 490], [10, 10, 10]);
    let limited = ExperimentRules {
        max_duration: Some(14 * day),
        ..rules()
    };
    let run = |span: i64, conv_rules: MetricRules| {
        let d = def(conv_rules, MetricRules::default(), limited.clone());
        let (_, summary) = findings(d, &arms, 0);
        let mut snap = summary.snapshot.clone();
        snap.first_event_time = Some(0);
        snap.last_event_time = Some(span);
        evaluate(&summarize(snap, 0.95))
    };
    assert!(!run(14 * day - 1, MetricRules::default())
        .iter()
        .any(|f| f.rule == Rule::Inconclusive));
    let f = run(14 * day, MetricRules::default());
    let inc = f
        .iter()
        .find(|f| f.rule == Rule::Inconclusive)
        .expect("inconclusive at the limit");
    assert_eq!((inc.value, inc.threshold), (14.0, 14.0));
    // A ship decision at the limit is not inconclusive.
    assert!(!run(20 * day, ship_at(1.0))
        .iter()
        .any(|f| f.rule == Rule::Inconclusive));
}
