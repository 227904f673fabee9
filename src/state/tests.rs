//! Unit tests of the event semantics: first exposure, first conversion, duplicates, crossovers,
//! orphans, id dedup and tallies, on a small invented bakery experiment.

use std::borrow::Cow;

use super::*;
use crate::experiment::{MetricDef, Prior, VariantDef};

fn bakery() -> ExperimentDef {
    let beta = Prior::Beta {
        alpha: 1.0,
        beta: 1.0,
    };
    let gamma = Prior::Gamma {
        shape: 1.0,
        rate: 1.0,
    };
    ExperimentDef {
        id: "crumb-checkout".into(),
        generation: 0,
        control: 0,
        variants: vec![
            VariantDef {
                name: "control".into(),
                weight: 0.5,
            },
            VariantDef {
                name: "short-copy".into(),
                weight: 0.5,
            },
        ],
        metrics: vec![
            MetricDef {
                name: "purchase".into(),
                kind: MetricKind::Conversion,
                prior: beta,
                variant_priors: vec![None, None],
                rules: Default::default(),
            },
            MetricDef {
                name: "payment-error".into(),
                kind: MetricKind::DefectRate(ExposureBasis::Units),
                prior: gamma,
                variant_priors: vec![None, None],
                rules: Default::default(),
            },
            MetricDef {
                name: "oven-faults".into(),
                kind: MetricKind::DefectRate(ExposureBasis::Reported),
                prior: gamma,
                variant_priors: vec![None, None],
                rules: Default::default(),
            },
        ],
        rules: Default::default(),
    }
}

fn ev(body: EventBody<'static>) -> Event<'static> {
    Event {
        experiment: Cow::Borrowed("crumb-checkout"),
        id: None,
        time: None,
        body,
    }
}

fn exposure(variant: &'static str, unit: &'static str) -> Event<'static> {
    ev(EventBody::Exposure {
        variant: variant.into(),
        unit: unit.into(),
    })
}

fn conversion(metric: &'static str, unit: &'static str) -> Event<'static> {
    ev(EventBody::Conversion {
        metric: metric.into(),
        unit: unit.into(),
    })
}

fn unit_defect(unit: &'static str, count: u64) -> Event<'static> {
    ev(EventBody::Defect {
        metric: "payment-error".into(),
        target: Target::Unit(unit.into()),
        count,
        exposure: None,
    })
}

/// Applies `events` in order and returns the outcomes (or reject reasons) and the final snapshot.
fn check(events: &[Event<'static>]) -> (Vec<Result<Outcome, RejectReason>>, ExperimentSnapshot) {
    let mut engine = Engine::new([bakery()]);
    let outcomes = events
        .iter()
        .map(|e| engine.apply(e).map_err(|r| r.reason))
        .collect();
    let snap = engine.experiment("crumb-checkout").unwrap().snapshot();
    (outcomes, snap)
}

fn conv(snap: &ExperimentSnapshot, metric: usize) -> Vec<(u64, u64)> {
    match &snap.metrics[metric] {
        MetricTotals::Conversion(v) => v.iter().map(|t| (t.trials, t.successes)).collect(),
        other => panic!("not a conversion metric: {other:?}"),
    }
}

fn defects(snap: &ExperimentSnapshot, metric: usize) -> Vec<(u64, f64)> {
    match &snap.metrics[metric] {
        MetricTotals::Defect(v) => v.iter().map(|t| (t.count, t.exposure)).collect(),
        other => panic!("not a defect metric: {other:?}"),
    }
}

#[test]
fn first_exposure_adds_a_trial_and_a_unit_of_exposure() {
    let (out, snap) = check(&[exposure("control", "u1"), exposure("short-copy", "u2")]);
    assert_eq!(out, vec![Ok(Outcome::Applied), Ok(Outcome::Applied)]);
    assert_eq!(snap.units, vec![1, 1]);
    assert_eq!(conv(&snap, 0), vec![(1, 0), (1, 0)]);
    assert_eq!(defects(&snap, 1), vec![(0, 1.0), (0, 1.0)]);
    // Reported-exposure metrics get no exposure from units.
    assert_eq!(defects(&snap, 2), vec![(0, 0.0), (0, 0.0)]);
}

#[test]
fn repeat_exposure_is_a_duplicate_and_other_variant_a_crossover() {
    let (out, snap) = check(&[
        exposure("control", "u1"),
        exposure("control", "u1"),
        exposure("short-copy", "u1"),
        conversion("purchase", "u1"),
    ]);
    assert_eq!(
        out,
        vec![
            Ok(Outcome::Applied),
            Ok(Outcome::DuplicateExposure),
            Ok(Outcome::Crossover),
            Ok(Outcome::Applied),
        ]
    );
    // The unit stays in its first variant, and its conversion counts there.
    assert_eq!(snap.units, vec![1, 0]);
    assert_eq!(conv(&snap, 0), vec![(1, 1), (0, 0)]);
    assert_eq!(snap.outcomes.get(Outcome::Crossover), 1);
    assert_eq!(snap.outcomes.get(Outcome::DuplicateExposure), 1);
}

#[test]
fn conversions_count_once_per_unit_and_metric_and_need_an_exposure() {
    let (out, snap) = check(&[
        conversion("purchase", "ghost"),
        exposure("short-copy", "u1"),
        conversion("purchase", "u1"),
        conversion("purchase", "u1"),
    ]);
    assert_eq!(
        out,
        vec![
            Ok(Outcome::Orphan),
            Ok(Outcome::Applied),
            Ok(Outcome::Applied),
            Ok(Outcome::DuplicateConversion),
        ]
    );
    assert_eq!(conv(&snap, 0), vec![(0, 0), (1, 1)]);
    assert_eq!(snap.outcomes.get(Outcome::Orphan), 1);
}

#[test]
fn defects_follow_the_unit_and_accumulate() {
    let (out, snap) = check(&[
        unit_defect("u1", 2),
        exposure("short-copy", "u1"),
        unit_defect("u1", 2),
        unit_defect("u1", 3),
    ]);
    assert_eq!(
        out,
        vec![
            Ok(Outcome::Orphan),
            Ok(Outcome::Applied),
            Ok(Outcome::Applied),
            Ok(Outcome::Applied),
        ]
    );
    assert_eq!(defects(&snap, 1), vec![(0, 0.0), (5, 1.0)]);
}

#[test]
fn same_id_applies_once_but_an_invalid_event_does_not_use_up_its_id() {
    let mut first = exposure("control", "u1");
    first.id = Some("evt-1".into());
    let mut again = exposure("control", "u2");
    again.id = Some("evt-1".into());
    let mut bad = exposure("no-such-arm", "u3");
    bad.id = Some("evt-2".into());
    let mut fixed = exposure("short-copy", "u3");
    fixed.id = Some("evt-2".into());
    let (out, snap) = check(&[first, again, bad, fixed]);
    assert_eq!(
        out,
        vec![
            Ok(Outcome::Applied),
            Ok(Outcome::DuplicateId),
            Err(RejectReason::UnknownVariant),
            Ok(Outcome::Applied),
        ]
    );
    assert_eq!(snap.units, vec![1, 1]);
}

#[test]
fn reported_exposure_metrics_need_exposure_and_units_metrics_refuse_it() {
    let reported = |exposure| {
        ev(EventBody::Defect {
            metric: "oven-faults".into(),
            target: Target::Variant("control".into()),
            count: 4,
            exposure,
        })
    };
    let mut units_with_exposure = unit_defect("u1", 1);
    if let EventBody::Defect { exposure, .. } = &mut units_with_exposure.body {
        *exposure = Some(3.0);
    }
    let (out, snap) = check(&[
        reported(None),
        reported(Some(120.5)),
        exposure("control", "u1"),
        units_with_exposure,
    ]);
    assert_eq!(
        out,
        vec![
            Err(RejectReason::ExposureRequired),
            Ok(Outcome::Applied),
            Ok(Outcome::Applied),
            Err(RejectReason::ExposureNotAllowed),
        ]
    );
    assert_eq!(defects(&snap, 2), vec![(4, 120.5), (0, 0.0)]);
}

#[test]
fn tallies_add_directly_and_are_checked() {
    let tally = |metric: &'static str, amounts| {
        ev(EventBody::Tally {
            metric: metric.into(),
            variant: "short-copy".into(),
            amounts,
        })
    };
    let (out, snap) = check(&[
        tally(
            "purchase",
            TallyAmounts::Trials {
                trials: 100,
                successes: 7,
            },
        ),
        tally(
            "purchase",
            TallyAmounts::Trials {
                trials: 1,
                successes: 2,
            },
        ),
        tally(
            "purchase",
            TallyAmounts::Defects {
                count: 1,
                exposure: None,
            },
        ),
        tally(
            "payment-error",
            TallyAmounts::Defects {
                count: 9,
                exposure: None,
            },
        ),
        tally(
            "purchase",
            TallyAmounts::Trials {
                trials: u64::MAX,
                successes: 0,
            },
        ),
    ]);
    assert_eq!(
        out,
        vec![
            Ok(Outcome::Applied),
            Err(RejectReason::SuccessesExceedTrials),
            Err(RejectReason::MetricKindMismatch),
            Ok(Outcome::Applied),
            Err(RejectReason::TooLarge),
        ]
    );
    assert_eq!(conv(&snap, 0), vec![(0, 0), (100, 7)]);
    assert_eq!(defects(&snap, 1), vec![(0, 0.0), (9, 0.0)]);
    // A tally adds trials without units.
    assert_eq!(snap.units, vec![0, 0]);
}

#[test]
fn unknown_names_are_rejected_with_the_name() {
    let mut engine = Engine::new([bakery()]);
    let mut e = exposure("control", "u1");
    e.experiment = "rye-banner".into();
    let err = engine.apply(&e).unwrap_err();
    assert_eq!(err.reason, RejectReason::UnknownExperiment);
    assert!(err.message.contains("rye-banner"), "{}", err.message);
    let err = engine.apply(&conversion("refund", "u1")).unwrap_err();
    assert_eq!(err.reason, RejectReason::UnknownMetric);
    assert!(err.message.contains("refund"), "{}", err.message);
    let err = engine
        .apply(&conversion("payment-error", "u1"))
        .unwrap_err();
    assert_eq!(err.reason, RejectReason::MetricKindMismatch);
}

#[test]
fn successes_never_exceed_trials_whatever_the_order() {
    // Exhaustive over short sequences on two units: the invariant the posterior relies on.
    let pool = [
        exposure("control", "a"),
        exposure("short-copy", "a"),
        exposure("short-copy", "b"),
        conversion("purchase", "a"),
        conversion("purchase", "b"),
    ];
    for mask in 0..(5u32.pow(4)) {
        let mut m = mask;
        let seq: Vec<_> = (0..4)
            .map(|_| {
                let e = pool[(m % 5) as usize].clone();
                m /= 5;
                e
            })
            .collect();
        let (_, snap) = check(&seq);
        for (t, s) in conv(&snap, 0) {
            assert!(s <= t, "successes {s} > trials {t} for {seq:?}");
        }
        assert!(snap.units.iter().sum::<u64>() <= 2);
    }
}

/// A redefinition that appends a variant and a conversion metric keeps every count, starts
/// the new metric with one trial per already-exposed unit, and keeps successes ≤ trials when
/// old units convert on it.
#[test]
fn appending_variants_and_metrics_keeps_the_state() {
    let old = bakery();
    let mut new = bakery();
    new.variants.push(VariantDef {
        name: "long-copy".into(),
        weight: 0.5,
    });
    let mut added = new.metrics[0].clone();
    added.name = "newsletter".into();
    new.metrics.push(added);
    for m in &mut new.metrics {
        m.variant_priors.push(None);
    }
    assert_eq!(old.incompatibility(&new), None);
    let mut engine = Engine::new([old.clone()]);
    for (v, u) in [("control", "a"), ("short-copy", "b"), ("short-copy", "c")] {
        engine.apply(&exposure(v, u)).unwrap();
    }
    engine.apply(&conversion("purchase", "b")).unwrap();
    assert!(engine.define(Arc::new(new)).is_none());
    let s = engine.experiment("crumb-checkout").unwrap().snapshot();
    assert_eq!(s.units, vec![1, 2, 0]);
    let MetricTotals::Conversion(p) = &s.metrics[0] else {
        panic!("purchase is a conversion metric")
    };
    assert_eq!((p[1].trials, p[1].successes, p[2].trials), (2, 1, 0));
    let MetricTotals::Defect(d) = &s.metrics[1] else {
        panic!("payment-error is a defect metric")
    };
    assert_eq!(
        d.iter().map(|t| t.exposure).collect::<Vec<_>>(),
        [1.0, 2.0, 0.0]
    );
    engine.apply(&conversion("newsletter", "c")).unwrap();
    engine.apply(&exposure("long-copy", "d")).unwrap();
    let s = engine.experiment("crumb-checkout").unwrap().snapshot();
    let MetricTotals::Conversion(n) = &s.metrics[3] else {
        panic!("newsletter is a conversion metric")
    };
    assert_eq!(
        n.iter()
            .map(|t| (t.trials, t.successes))
            .collect::<Vec<_>>(),
        [(1, 0), (2, 1), (1, 0)]
    );
}

#[test]
fn reordering_or_reprioring_a_running_experiment_is_refused() {
    let old = bakery();
    let mut swapped = bakery();
    swapped.variants.swap(0, 1);
    assert!(old
        .incompatibility(&swapped)
        .unwrap()
        .contains("variant #0"));
    let mut reprior = bakery();
    reprior.metrics[0].prior = Prior::Beta {
        alpha: 2.0,
        beta: 8.0,
    };
    assert!(old.incompatibility(&reprior).unwrap().contains("prior"));
    let mut fewer = bakery();
    fewer.metrics.pop();
    assert!(old.incompatibility(&fewer).is_some());
    // A new generation starts empty even with the same shape.
    let mut engine = Engine::new([old.clone()]);
    engine.apply(&exposure("control", "a")).unwrap();
    let mut next = old.clone();
    next.generation = 1;
    engine.define(Arc::new(next));
    assert!(engine
        .experiment("crumb-checkout")
        .unwrap()
        .snapshot()
        .is_empty());
    assert_eq!(
        engine.experiment("crumb-checkout").unwrap().image().id,
        "crumb-checkout~1"
    );
    assert!(engine.remove("crumb-checkout").is_some());
    assert!(engine.experiment("crumb-checkout").is_none());
}

/// Stored state of an older generation is not restored into a newer one with the same id.
#[test]
fn stored_state_of_an_earlier_generation_is_not_restored() {
    let mut old = bakery();
    old.generation = 1;
    let mut shard = shards::Shard::new(&[Arc::new(old.clone())]);
    shard.apply(&exposure("control", "a")).unwrap();
    let image = shard.image();
    assert_eq!(image.experiments[0].id, "crumb-checkout~1");
    let mut new = old.clone();
    new.generation = 2;
    let (restored, mismatches) = shards::Shard::from_image(&[Arc::new(new)], image.clone());
    assert!(restored
        .engine()
        .experiment("crumb-checkout")
        .unwrap()
        .snapshot()
        .is_empty());
    assert!(
        mismatches[0].reason.contains("earlier generation"),
        "{}",
        mismatches[0]
    );
    let (same, none) = shards::Shard::from_image(&[Arc::new(old)], image);
    assert!(none.is_empty());
    assert_eq!(
        same.engine()
            .experiment("crumb-checkout")
            .unwrap()
            .snapshot()
            .units,
        [1, 0]
    );
}

/// A shard restored outside the lock while an experiment was defined or removed is brought in
/// line with the definitions when it is put in place.
#[test]
fn an_inserted_shard_follows_the_current_definitions() {
    let mut shards = shards::Shards::new([bakery()]);
    let stale = shards::Shard::new(shards.defs());
    let mut orchard = bakery();
    orchard.id = "orchard-sprout-tray".into();
    orchard.generation = 1;
    shards.define(orchard);
    assert!(shards.undefine("crumb-checkout"));
    shards.insert("kafka/exp-events/0".into(), stale);
    let shard = shards.shard_mut("kafka/exp-events/0");
    assert!(shard.engine().experiment("crumb-checkout").is_none());
    let mut e = exposure("control", "a");
    e.experiment = Cow::Borrowed("orchard-sprout-tray");
    assert_eq!(shard.apply(&e).unwrap(), Outcome::Applied);
}

#[test]
fn a_due_event_yields_the_snapshot_as_of_that_event_and_rejects_do_not_count() {
    use crate::state::cadence::Cadence;
    let mut engine = Engine::new([bakery()]);
    let cadence = Cadence::new(i64::MAX, 3);
    let names = ["u1", "u2", "u3", "u4", "u5", "u6"];
    let mut due = Vec::new();
    for (i, unit) in names.iter().enumerate() {
        let mut snaps = Vec::new();
        let r = engine.apply_due(&exposure("control", unit), None, &cadence, &mut snaps);
        assert_eq!(r, Ok(Outcome::Applied));
        if let Some(s) = snaps.pop() {
            due.push((i, s.units[0]));
        }
        // An invalid event changes nothing and does not advance the cadence.
        let r = engine.apply_due(&exposure("no-such-arm", unit), None, &cadence, &mut snaps);
        assert!(r.is_err() && snaps.is_empty());
    }
    assert_eq!(due, vec![(2, 3), (5, 6)]);
}

#[test]
fn a_due_snapshot_merged_from_one_shard_equals_the_merged_snapshot() {
    let mut shards = shards::Shards::new([bakery()]);
    shards
        .shard_mut("kafka/t/0")
        .apply(&exposure("control", "a"))
        .unwrap();
    shards.shard_mut("kafka/t/0").advance(0);
    shards
        .shard_mut("http")
        .apply(&exposure("short-copy", "b"))
        .unwrap();
    let mut snap = shards
        .shard("kafka/t/0")
        .unwrap()
        .engine()
        .experiment("crumb-checkout")
        .unwrap()
        .snapshot();
    shards.merge_others("kafka/t/0", &mut snap);
    assert_eq!(snap, shards.snapshot("crumb-checkout").unwrap());
    assert_eq!(snap.units, vec![1, 1]);
}

/// Attribution through exposures: three invented bakery experiments, two defining `purchase`.
mod attribution {
    use super::*;

    const T0: Micros = 1_767_225_600_000_000; // 2026-01-01T00:00:00Z (date -u -d @1767225600)
    const SEC: Micros = 1_000_000;

    fn def(id: &str, window_hours: Option<i64>) -> ExperimentDef {
        let mut d = bakery();
        d.id = id.into();
        d.rules.attribution_window = window_hours.map(|h| h * 3_600 * SEC);
        d
    }

    fn engine() -> Engine {
        let mut only_crash = def("oven-timer", None);
        only_crash.metrics.retain(|m| m.name == "payment-error");
        only_crash.rules.primary = 0;
        Engine::new([
            def("crumb-checkout", None),
            def("loaf-labels", Some(1)),
            only_crash,
        ])
    }

    fn expose(
        e: &mut Engine,
        exp: &'static str,
        variant: &'static str,
        unit: &'static str,
        t: Micros,
    ) {
        let r = e.apply(&Event {
            experiment: exp.into(),
            id: None,
            time: Some(t),
            body: EventBody::Exposure {
                variant: variant.into(),
                unit: unit.into(),
            },
        });
        assert_eq!(r, Ok(Outcome::Applied));
    }

    fn outcome(metric: &'static str, unit: &'static str, t: Micros, count: u64) -> Event<'static> {
        Event {
            experiment: "".into(),
            id: None,
            time: Some(t),
            body: EventBody::Outcome {
                metric: metric.into(),
                unit: unit.into(),
                count,
                exposure: None,
            },
        }
    }

    fn successes(e: &Engine, exp: &str) -> Vec<u64> {
        match &e.experiment(exp).unwrap().snapshot().metrics[0] {
            MetricTotals::Conversion(v) => v.iter().map(|t| t.successes).collect(),
            other => panic!("{other:?}"),
        }
    }

    fn defects(e: &Engine, exp: &str) -> Vec<u64> {
        let snap = e.experiment(exp).unwrap().snapshot();
        let i = snap.def.metric_index("payment-error").unwrap();
        match &snap.metrics[i] {
            MetricTotals::Defect(v) => v.iter().map(|t| t.count).collect(),
            other => panic!("{other:?}"),
        }
    }

    #[test]
    fn an_outcome_counts_in_every_experiment_that_exposed_the_unit_before_it() {
        let mut e = engine();
        expose(&mut e, "crumb-checkout", "short-copy", "ann", T0);
        expose(&mut e, "loaf-labels", "control", "ann", T0 + 10 * SEC);
        expose(&mut e, "oven-timer", "control", "ann", T0);
        assert_eq!(e.n_memberships(), 3);
        // At T0 + 5 s ann is in crumb-checkout only; oven-timer has no `purchase`.
        assert_eq!(
            e.apply(&outcome("purchase", "ann", T0 + 5 * SEC, 1)),
            Ok(Outcome::Applied)
        );
        assert_eq!(successes(&e, "crumb-checkout"), vec![0, 1]);
        assert_eq!(successes(&e, "loaf-labels"), vec![0, 0]);
        // Later she is in both: the conversion counts once per experiment.
        assert_eq!(
            e.apply(&outcome("purchase", "ann", T0 + 20 * SEC, 1)),
            Ok(Outcome::Applied)
        );
        assert_eq!(successes(&e, "crumb-checkout"), vec![0, 1]);
        assert_eq!(successes(&e, "loaf-labels"), vec![1, 0]);
        assert_eq!(
            e.apply(&outcome("purchase", "ann", T0 + 30 * SEC, 1)),
            Ok(Outcome::DuplicateConversion)
        );
        // Defects count each time, in all three experiments, with their count.
        for _ in 0..2 {
            assert_eq!(
                e.apply(&outcome("payment-error", "ann", T0 + 40 * SEC, 3)),
                Ok(Outcome::Applied)
            );
        }
        assert_eq!(defects(&e, "crumb-checkout"), vec![0, 6]);
        assert_eq!(defects(&e, "loaf-labels"), vec![6, 0]);
        assert_eq!(defects(&e, "oven-timer"), vec![6, 0]);
        let applied = e.experiment("loaf-labels").unwrap().snapshot().outcomes;
        assert_eq!(applied.get(Outcome::Applied), 1 + 1 + 2);
        assert_eq!(applied.get(Outcome::DuplicateConversion), 1);
    }

    #[test]
    fn misses_are_told_apart_and_change_nothing() {
        let mut e = engine();
        assert_eq!(
            e.apply(&outcome("purchase", "bob", T0, 1)),
            Ok(Outcome::Unexposed)
        );
        expose(&mut e, "oven-timer", "control", "bob", T0);
        // In an experiment, but not one defining the metric.
        assert_eq!(
            e.apply(&outcome("purchase", "bob", T0, 1)),
            Ok(Outcome::Unexposed)
        );
        expose(&mut e, "crumb-checkout", "control", "bob", T0 + 60 * SEC);
        assert_eq!(
            e.apply(&outcome("purchase", "bob", T0 + 59 * SEC, 1)),
            Ok(Outcome::BeforeExposure)
        );
        // Exposure times are kept to the second: the same second counts.
        expose(&mut e, "loaf-labels", "control", "cy", T0 + 500_000);
        assert_eq!(
            e.apply(&outcome("purchase", "cy", T0 + 100_000, 1)),
            Ok(Outcome::Applied)
        );
        // loaf-labels attributes for one hour after the exposure, inclusive.
        expose(&mut e, "loaf-labels", "short-copy", "dee", T0);
        assert_eq!(
            e.apply(&outcome("payment-error", "dee", T0 + 3_601 * SEC, 1)),
            Ok(Outcome::OutsideWindow)
        );
        assert_eq!(
            e.apply(&outcome("payment-error", "dee", T0 + 3_600 * SEC, 1)),
            Ok(Outcome::Applied)
        );
        assert_eq!(defects(&e, "loaf-labels"), vec![0, 1]);
        assert_eq!(successes(&e, "crumb-checkout"), vec![0, 0]);
        // No time: refused, since it cannot be compared with exposures.
        let mut timeless = outcome("purchase", "bob", T0, 1);
        timeless.time = None;
        assert_eq!(
            e.apply(&timeless).unwrap_err().reason,
            RejectReason::MissingField
        );
        // Misses are no experiment's outcome.
        let snap = e.experiment("crumb-checkout").unwrap().snapshot();
        assert_eq!(snap.outcomes.get(Outcome::BeforeExposure), 0);
    }

    #[test]
    fn an_outcome_naming_its_experiment_counts_there_only() {
        let mut e = engine();
        expose(&mut e, "crumb-checkout", "control", "eve", T0);
        expose(&mut e, "loaf-labels", "control", "eve", T0);
        let mut o = outcome("purchase", "eve", T0, 1);
        o.experiment = "loaf-labels".into();
        assert_eq!(e.apply(&o), Ok(Outcome::Applied));
        assert_eq!(successes(&e, "loaf-labels"), vec![1, 0]);
        assert_eq!(successes(&e, "crumb-checkout"), vec![0, 0]);
        o.body = EventBody::Outcome {
            metric: "purchase".into(),
            unit: "nobody".into(),
            count: 1,
            exposure: None,
        };
        assert_eq!(e.apply(&o), Ok(Outcome::Orphan));
    }

    #[test]
    fn removing_an_experiment_keeps_the_others_attributing() {
        let mut e = engine();
        expose(&mut e, "crumb-checkout", "control", "fay", T0);
        expose(&mut e, "loaf-labels", "short-copy", "fay", T0);
        assert!(e.remove("crumb-checkout").is_some());
        assert_eq!(e.n_memberships(), 1);
        assert_eq!(
            e.apply(&outcome("purchase", "fay", T0, 1)),
            Ok(Outcome::Applied)
        );
        assert_eq!(successes(&e, "loaf-labels"), vec![0, 1]);
    }

    #[test]
    fn an_attributed_outcome_can_make_several_experiments_due() {
        use crate::state::cadence::Cadence;
        let mut e = engine();
        let cadence = Cadence::new(i64::MAX, 2);
        let mut due = Vec::new();
        for exp in ["crumb-checkout", "loaf-labels"] {
            let x = Event {
                experiment: exp.into(),
                id: None,
                time: Some(T0),
                body: EventBody::Exposure {
                    variant: "control".into(),
                    unit: "gil".into(),
                },
            };
            assert_eq!(
                e.apply_due(&x, None, &cadence, &mut due),
                Ok(Outcome::Applied)
            );
        }
        assert!(due.is_empty());
        let r = e.apply_due(&outcome("purchase", "gil", T0, 1), None, &cadence, &mut due);
        assert_eq!(r, Ok(Outcome::Applied));
        let ids: Vec<_> = due.iter().map(|s| s.def.id.clone()).collect();
        assert_eq!(ids, vec!["crumb-checkout", "loaf-labels"]);
    }
}

#[test]
fn shard_ids_keep_their_stored_text_form_and_say_their_kind() {
    // The text forms name files and changelog keys written by earlier versions.
    let k = shards::ShardId::kafka("exp-events", 3);
    assert_eq!(k.as_str(), "kafka/exp-events/3");
    assert!(k.is_kafka() && !k.is_http());
    assert_eq!(k.kafka_partition(), Some(3));
    assert_eq!(
        shards::ShardId::from("kafka/a/b/12").kafka_partition(),
        Some(12)
    );
    let h = shards::ShardId::http();
    assert_eq!(h.as_str(), shards::HTTP_SHARD);
    assert!(h.is_http() && !h.is_kafka());
    assert_eq!(h.kafka_partition(), None);
    assert_eq!(shards::ShardId::from("simulator").kafka_partition(), None);
}

#[test]
fn events_before_a_configured_start_are_refused_and_change_nothing() {
    let mut def = bakery();
    def.rules.start = Some(1_000);
    let mut engine = Engine::new([def.clone()]);
    let at = |t: i64| Event {
        experiment: Cow::Owned(def.id.clone()),
        id: None,
        time: Some(t),
        body: EventBody::Exposure {
            variant: Cow::Owned(def.variants[0].name.clone()),
            unit: Cow::Borrowed("early-bird"),
        },
    };
    let r = engine.apply(&at(999)).unwrap_err();
    assert_eq!(r.reason, RejectReason::BeforeStart);
    let snap = engine.experiment(&def.id).unwrap().snapshot();
    assert_eq!(
        (snap.first_event_time, snap.units.iter().sum::<u64>()),
        (None, 0)
    );
    assert_eq!(engine.apply(&at(1_000)), Ok(Outcome::Applied));
}
