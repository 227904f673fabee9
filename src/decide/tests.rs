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

/// Guardrail rules without clearance, for tests of the ship rule's own comparison.
fn no_clear() -> MetricRules {
    MetricRules {
        clear: None,
        ..MetricRules::default()
    }
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
    let (_, summary) = findings(def(ship_at(1.0), no_clear(), rules()), &arms, 0);
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
        def(ship_at(best * 1.000_001), no_clear(), rules()),
        &arms,
        0,
    );
    let ship = f.iter().find(|x| x.rule == Rule::Ship).expect("ship holds");
    assert_eq!((ship.variant, ship.value), (Some(1), best));
    assert!(
        ship.message.contains("review"),
        "the caution travels with the decision"
    );
    let (f, _) = findings(def(ship_at(best), no_clear(), rules()), &arms, 0);
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
    let (f, summary) = findings(def(ship_at(0.01), no_clear(), rules()), &arms, 0);
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
    let (f, _) = findings(def(ship_at(0.01), no_clear(), loose), &arms, 0);
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
        let d = def(conv_rules, no_clear(), limited.clone());
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

#[test]
fn shipping_waits_for_guardrails_to_be_cleared_and_says_why() {
    // short-copy wins on purchase (14% vs 12%); payment errors 10 per 4 000 units in every
    // arm: too few to rule out a 20% worsening, so the guardrail is not cleared.
    let arms = even([480, 560, 488], [10, 10, 10]);
    let (f, summary) = findings(
        def(ship_at(0.01), MetricRules::default(), rules()),
        &arms,
        0,
    );
    assert!(!f.iter().any(|x| x.rule == Rule::Ship), "{f:?}");
    let blockers = guardrail_blockers(&summary, 1);
    let [Blocker::NotCleared {
        metric: 1,
        probability,
        threshold,
        margin,
    }] = blockers[..]
    else {
        panic!("{blockers:?}")
    };
    assert!(probability > threshold && margin == 0.2, "{blockers:?}");
    let st = standing::standings(&summary, &f, None);
    let ship = st
        .iter()
        .find(|s| s.rule == Rule::Ship && s.variant == Some(1))
        .unwrap();
    assert_eq!(ship.state, standing::State::NotYet);
    assert!(
        ship.detail
            .contains("guardrail `payment-error` not cleared"),
        "{}",
        ship.detail
    );
    // The control (the status quo) needs no clearance.
    assert!(guardrail_blockers(&summary, 0).is_empty());

    // With 4 000 errors per arm a 20% worsening is ruled out: cleared, short-copy ships.
    let many = even([480, 560, 488], [4_000, 4_000, 4_000]);
    let (f, summary) = findings(
        def(ship_at(0.01), MetricRules::default(), rules()),
        &many,
        0,
    );
    assert!(guardrail_blockers(&summary, 1).is_empty());
    assert_eq!(
        f.iter()
            .find(|x| x.rule == Rule::Ship)
            .and_then(|x| x.variant),
        Some(1),
        "{f:?}"
    );
    // 50% more errors in short-copy, with much data: never cleared (and harmed).
    let worse = even([480, 560, 488], [4_000, 6_000, 4_000]);
    let (f, summary) = findings(
        def(ship_at(0.01), MetricRules::default(), rules()),
        &worse,
        0,
    );
    assert!(matches!(
        guardrail_blockers(&summary, 1)[..],
        [Blocker::NotCleared { .. }]
    ));
    assert_ne!(
        f.iter()
            .find(|x| x.rule == Rule::Ship)
            .and_then(|x| x.variant),
        Some(1)
    );
}

#[test]
fn a_guardrail_with_too_little_data_blocks_shipping_and_says_so() {
    let arms = even([480, 560, 488], [4_000, 4_000, 4_000]);
    let guard = MetricRules {
        min_exposure: 5_000.0,
        ..MetricRules::default()
    };
    let (f, summary) = findings(def(ship_at(0.01), guard, rules()), &arms, 0);
    assert!(!f.iter().any(|x| x.rule == Rule::Ship), "{f:?}");
    assert!(matches!(
        guardrail_blockers(&summary, 1)[..],
        [Blocker::Waiting { what: "exposure", need, .. }] if need == 5_000.0
    ));
    let st = standing::standings(&summary, &f, None);
    let ship = st
        .iter()
        .find(|s| s.rule == Rule::Ship && s.variant == Some(1))
        .unwrap();
    assert!(
        ship.detail
            .contains("waiting for data: `control` has 4000 of 5000 exposure on `payment-error`"),
        "{}",
        ship.detail
    );
    assert_eq!(ship.progress, Some((4_000.0, 5_000.0)));
}

#[test]
fn ship_and_equivalence_wait_for_the_minimum_duration() {
    let day: i64 = 86_400_000_000;
    let arms = even([480, 560, 488], [4_000, 4_000, 4_000]);
    let at = |span: i64| {
        let (_, summary) = findings(
            def(ship_at(0.01), MetricRules::default(), rules()),
            &arms,
            0,
        );
        let mut snap = summary.snapshot.clone();
        snap.first_event_time = Some(0);
        snap.last_event_time = Some(span);
        let s = summarize(snap, 0.95);
        let f = evaluate(&s);
        (f, s)
    };
    let (f, s) = at(7 * day - 1);
    assert!(!f.iter().any(|x| x.rule == Rule::Ship), "{f:?}");
    let st = standing::standings(&s, &f, None);
    let ship = st
        .iter()
        .find(|x| x.rule == Rule::Ship && x.variant == Some(1))
        .unwrap();
    assert!(
        ship.detail.contains("minimum duration: 7.0 of 7.0 days"),
        "{}",
        ship.detail
    );
    let (f, _) = at(7 * day);
    assert!(f.iter().any(|x| x.rule == Rule::Ship), "{f:?}");
}

#[test]
fn every_rule_says_where_it_stands() {
    // Below the unit minimum: harm waits with its progress.
    let arms = even([480, 470, 320], [10, 10, 10]);
    let few = MetricRules {
        min_units: 4_500,
        ..MetricRules::default()
    };
    let (f, summary) = findings(def(few, MetricRules::default(), rules()), &arms, 0);
    let st = standing::standings(&summary, &f, None);
    let harm = st
        .iter()
        .find(|s| s.rule == Rule::Harm && s.metric == Some(0) && s.variant == Some(2))
        .unwrap();
    assert_eq!(harm.state, standing::State::NotYet);
    assert_eq!(harm.progress, Some((4_000.0, 4_500.0)));
    assert!(
        harm.detail.contains("4000 of 4500 units"),
        "{}",
        harm.detail
    );
    // Above it: holds.
    let (f, summary) = findings(
        def(MetricRules::default(), MetricRules::default(), rules()),
        &arms,
        0,
    );
    let st = standing::standings(&summary, &f, None);
    let harm = st
        .iter()
        .find(|s| s.rule == Rule::Harm && s.metric == Some(0) && s.variant == Some(2))
        .unwrap();
    assert_eq!(harm.state, standing::State::Holds, "{harm:?}");
    // Below its threshold: value and threshold.
    let short = st
        .iter()
        .find(|s| s.rule == Rule::Harm && s.metric == Some(0) && s.variant == Some(1))
        .unwrap();
    assert_eq!(short.state, standing::State::NotYet);
    assert!(short.value.unwrap() < 0.999 && short.threshold == Some(0.999));
    // Anytime-valid evidence without processes: waiting.
    assert!(st
        .iter()
        .any(|s| s.rule == Rule::HarmEvidence && s.detail.starts_with("waiting for data")));
    // A sample-ratio mismatch suspends shipping.
    let mut skewed = even([480, 560, 488], [10, 10, 10]);
    skewed[1].units = 3_500;
    skewed[1].conversions = 490;
    let (f, summary) = findings(def(ship_at(0.01), no_clear(), rules()), &skewed, 0);
    let st = standing::standings(&summary, &f, None);
    assert!(st
        .iter()
        .filter(|s| s.rule == Rule::Ship)
        .all(|s| s.state == standing::State::Suspended));
    assert_eq!(st[0].state, standing::State::Holds, "sample ratio first");
}

#[test]
fn a_unit_minimum_on_a_metric_without_units_cannot_hold_and_is_warned_about() {
    // Crashes per machine hour: reported exposure, events carry no units.
    let mut d = def(MetricRules::default(), MetricRules::default(), rules());
    d.metrics[1].kind = MetricKind::DefectRate(ExposureBasis::Reported);
    assert!(standing::config_warnings(&d)[0].contains("rules.min_units = 500"));
    let snap = ExperimentSnapshot {
        def: Arc::new(d.clone()),
        units: vec![0, 0, 0],
        metrics: vec![
            MetricTotals::Conversion(vec![ConversionTotals::default(); 3]),
            MetricTotals::Defect(
                [20u64, 60, 20]
                    .iter()
                    .map(|&c| DefectTotals {
                        count: c,
                        exposure: 1_000.0,
                    })
                    .collect(),
            ),
        ],
        outcomes: OutcomeCounts::default(),
        last_event_time: None,
        first_event_time: None,
        positions: Vec::new(),
    };
    let s = summarize(snap.clone(), 0.95);
    let f = evaluate(&s);
    assert!(!f.iter().any(|x| x.rule == Rule::Harm), "{f:?}");
    let st = standing::standings(&s, &f, None);
    let harm = st
        .iter()
        .find(|x| x.rule == Rule::Harm && x.metric == Some(1) && x.variant == Some(1))
        .unwrap();
    assert_eq!(harm.state, standing::State::CannotHold, "{harm:?}");
    // With the reported-exposure default (no unit minimum) the same data raise harm, and
    // no warning is given.
    d.metrics[1].rules.min_units = 0;
    assert!(standing::config_warnings(&d).is_empty());
    let s = summarize(
        ExperimentSnapshot {
            def: Arc::new(d),
            ..snap
        },
        0.95,
    );
    let f = evaluate(&s);
    assert!(
        rules_of(&f).contains(&(Rule::Harm, Some(1), Some(1))),
        "{f:?}"
    );
}

#[test]
fn keeping_the_control_reads_as_keeping_it_and_losses_carry_their_unit() {
    // The control converts best (14% against 12% and 12.2%): the ship rule picks it.
    let arms = even([560, 480, 488], [10, 10, 10]);
    let (f, summary) = findings(def(ship_at(1.0), no_clear(), rules()), &arms, 0);
    let loss = summary.metrics[0].arms.as_ref().unwrap()[0].expected_loss;
    let ship = f.iter().find(|x| x.rule == Rule::Ship).expect("ship holds");
    assert_eq!(ship.variant, Some(0));
    assert!(
        ship.message.starts_with("keeping the control"),
        "{}",
        ship.message
    );
    assert!(
        !ship.message.contains("before shipping"),
        "{}",
        ship.message
    );
    assert!(
        ship.message.contains("model"),
        "the caution stays: {}",
        ship.message
    );
    // In percentage points, with the unit written, threshold too.
    assert!(
        ship.message
            .contains(&rate_difference_text(loss, MetricKind::Conversion)),
        "{}",
        ship.message
    );
    assert!(
        ship.message.contains("threshold of caring 100 pp"),
        "{}",
        ship.message
    );
    assert_eq!(
        rate_difference_text(0.0005, MetricKind::Conversion),
        "0.0500 pp"
    );
    assert_eq!(
        rate_difference_text(0.0262, MetricKind::Conversion),
        "2.62 pp"
    );
}
