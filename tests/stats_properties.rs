//! Property tests over the whole accepted input range of the statistics core
//! (docs/methods.md, "Accepted ranges"): every input the core accepts is answered, with
//! finite numbers that obey the laws of probability. Extreme priors (shapes 1e-10 to 1e3),
//! counts from 0 to 1e9 (1e12 for defect counts), 2 to 64 arms, interval levels up to
//! 1 − 1e-10.
//!
//! The laws checked are mathematical facts, not values of ours: P(best) sums to 1 over the
//! arms, expected losses are non-negative, equal-tailed intervals nest as the level grows,
//! P(better than control) + P(worse than control) = 1 (continuous posteriors do not tie), and a
//! loss is at least the gap of means when the arm is behind (Jensen: E[max] ≥ max E). The
//! values themselves are checked against mpmath in tests/stats_reference.rs.

use proptest::prelude::*;

use posteriord::stats::{compare, decide, Arms, Beta, CompareOptions, Gamma, MAX_LEVEL};

/// Shapes spread evenly in log10 over [1e-10, 1e3]: the prior part of a posterior.
fn prior_shape() -> impl Strategy<Value = f64> {
    prop_oneof![
        (-10.0f64..3.0).prop_map(|e| 10f64.powf(e)),
        Just(1e-10),
        Just(1.0),
    ]
}

/// Counts spread evenly in log10 over [1, 1e9], with 0 as its own case.
fn count(max_exp: f64) -> impl Strategy<Value = u64> {
    prop_oneof![
        1 => Just(0u64),
        4 => (0.0f64..max_exp).prop_map(|e| 10f64.powf(e).round() as u64),
    ]
}

fn beta_arm() -> impl Strategy<Value = Beta> {
    (prior_shape(), prior_shape(), count(9.0), 0.0f64..=1.0).prop_map(|(a, b, n, share)| {
        let s = (n as f64 * share).round() as u64;
        Beta::posterior(&Beta::new(a, b).unwrap(), n, s.min(n)).unwrap()
    })
}

fn gamma_arm() -> impl Strategy<Value = Gamma> {
    (
        prior_shape(),
        (-3.0f64..3.0).prop_map(|e| 10f64.powf(e)),
        count(12.0),
        (-3.0f64..12.0).prop_map(|e| 10f64.powf(e)),
        any::<bool>(),
    )
        .prop_map(|(a, r, c, exposure, has_exposure)| {
            let e = if has_exposure { exposure } else { 0.0 };
            Gamma::posterior(&Gamma::new(a, r).unwrap(), c, e).unwrap()
        })
}

fn arms() -> impl Strategy<Value = Arms> {
    prop_oneof![
        3 => prop::collection::vec(beta_arm(), 2..=5).prop_map(Arms::Beta),
        3 => prop::collection::vec(gamma_arm(), 2..=5).prop_map(Arms::Gamma),
        1 => prop::collection::vec(beta_arm(), 6..=64).prop_map(Arms::Beta),
        1 => prop::collection::vec(gamma_arm(), 6..=64).prop_map(Arms::Gamma),
    ]
}

fn level() -> impl Strategy<Value = f64> {
    prop_oneof![0.5f64..0.999, Just(0.95), Just(MAX_LEVEL), Just(1.0 - 1e-6)]
}

fn means(arms: &Arms) -> Vec<f64> {
    match arms {
        Arms::Beta(v) => v.iter().map(Beta::mean).collect(),
        Arms::Gamma(v) => v.iter().map(Gamma::mean).collect(),
    }
}

/// Cases per property: a few in the default run (a debug build spends seconds on a 64-arm
/// case), many more in the soak run (`POSTERIORD_SOAK=1`).
fn cases() -> u32 {
    if std::env::var("POSTERIORD_SOAK").is_ok_and(|v| v == "1") {
        256
    } else {
        12
    }
}

proptest! {
    #![proptest_config(ProptestConfig { cases: cases(), ..ProptestConfig::default() })]

    #[test]
    fn every_accepted_input_is_answered_lawfully(
        arms in arms(),
        level in level(),
        rope in prop_oneof![Just(0.01), 0.0f64..2.0],
        harm in prop_oneof![Just(0.0), 0.0f64..2.0],
        control_pick in any::<prop::sample::Index>(),
    ) {
        let k = arms.len();
        let control = control_pick.index(k);
        let opts = CompareOptions { control, level, rope, harm_margin: harm, ..CompareOptions::default() };
        let got = compare(&arms, &opts);
        prop_assert!(got.is_ok(), "refused {arms:?} at level {level}: {:?}", got.err());
        let got = got.unwrap();
        let mu = means(&arms);
        let higher = arms.higher_is_better();
        let total: f64 = got.iter().map(|s| s.prob_best).sum();
        prop_assert!((total - 1.0).abs() < 1e-9, "P(best) sums to {total} for {arms:?}");
        let scale = mu.iter().copied().fold(0.0, f64::max);
        for (j, s) in got.iter().enumerate() {
            for v in [s.mean, s.sd, s.prob_best, s.expected_loss, s.interval.lower, s.interval.upper] {
                prop_assert!(v.is_finite(), "arm {j}: non-finite {s:?}");
            }
            prop_assert!(s.expected_loss >= 0.0);
            prop_assert!(s.interval.lower <= s.interval.upper, "arm {j}: {s:?}");
            // Jensen: E[max_i θ_i] ≥ max_i μ_i, so an arm's loss is at least its gap to the
            // best mean (up to the 1e-9 relative accuracy goal in rate units).
            let best_mean = if higher {
                mu.iter().copied().fold(f64::NEG_INFINITY, f64::max)
            } else {
                mu.iter().copied().fold(f64::INFINITY, f64::min)
            };
            let gap = (best_mean - mu[j]).abs();
            prop_assert!(s.expected_loss >= gap - 1e-9 * scale.max(1.0) - 1e-12,
                "arm {j}: loss {} below the gap of means {gap}", s.expected_loss);
            if j == control {
                continue;
            }
            let beats = s.prob_better_than_control.unwrap();
            let harm_p = s.prob_harm.unwrap();
            let eq = s.prob_practically_equivalent.unwrap();
            for p in [beats, harm_p, eq] {
                prop_assert!((0.0..=1.0).contains(&p), "arm {j}: {s:?}");
            }
            if harm == 0.0 {
                prop_assert!((beats + harm_p - 1.0).abs() < 1e-9,
                    "arm {j}: P(better) {beats} + P(worse) {harm_p} != 1");
            }
            let lift = s.lift.unwrap();
            // An end beyond double range is +∞ (documented); never NaN, never below −1.
            prop_assert!(lift.interval.lower >= -1.0 && lift.interval.lower <= lift.interval.upper,
                "arm {j}: lift {lift:?}");
            prop_assert!(!lift.interval.upper.is_nan() && !lift.mean.is_nan());
        }
        // Nesting: a narrower level gives an interval inside this one.
        let inner = compare(&arms, &CompareOptions { level: level * 0.5, lift_interval: false, equivalence: false, ..opts }).unwrap();
        for (a, b) in inner.iter().zip(&got) {
            prop_assert!(a.interval.lower >= b.interval.lower && a.interval.upper <= b.interval.upper,
                "intervals do not nest: {:?} inside {:?}", a.interval, b.interval);
        }
        // The decision-only entry point answers the same input with the same numbers.
        let d = decide(&arms, control).unwrap();
        for (x, s) in d.iter().zip(&got) {
            prop_assert_eq!(x.prob_best, s.prob_best);
            prop_assert_eq!(x.expected_loss, s.expected_loss);
        }
    }
}
