//! The look-to-look bound (`stats::shift_bound`, used by `decide::screen`) against the exact
//! path on 10⁵ random looks (seeded): between any two looks of a simulated experiment, every
//! probability the exact path reports moves by no more than the bound plus twice the exact
//! path's error allowance, every rule the bound declares silent is silent on the exact
//! path, and every "below the threshold now" the divergence test (`stats::proven_below`, the
//! data-processing inequality) claims for a probability or its complement holds. The claim is a theorem (Pinsker's inequality and the coupling bound for products,
//! docs/methods.md §9); this checks the closed-form divergences and their rounding allowance
//! against it, on conversion and defect-rate arms from no data to 1e9 units and with priors
//! from Beta(1e-3, 1e-3) to Beta(50, 950).
//!
//!     cargo test --release --test stats_screen     # 100 000 looks (~20 s)
//!     cargo test --test stats_screen               # debug build: 10 000 looks
//!
//! `POSTERIORD_SCREEN_LOOKS=N` sets the number of looks.

use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};
use rand_distr::{Binomial, Distribution, Poisson};

use posteriord::stats::{
    compare, pair_divergences, pair_renyi, pair_shift_bound, proven_below, proven_below_renyi,
    shift_bound, Arms, Beta, CompareOptions, Gamma, RENYI_ORDERS,
};

/// Twice the exact path's error allowance (`decide::screen::EXACT_ERROR`).
const SLACK: f64 = 2e-8;

/// Harm thresholds a rule may use; each is checked at every look.
const THRESHOLDS: [f64; 5] = [0.5, 0.9, 0.95, 0.99, 0.999];

fn looks_wanted() -> usize {
    std::env::var("POSTERIORD_SCREEN_LOOKS")
        .ok()
        .and_then(|s| s.parse().ok())
        .unwrap_or(if cfg!(debug_assertions) {
            10_000
        } else {
            100_000
        })
}

/// The probabilities a bound brackets: P(best) and, for the variant, P(better than control), harm, ROPE.
fn probabilities(arms: &Arms, opts: &CompareOptions) -> Vec<f64> {
    let s = compare(arms, opts).expect("accepted input is answered");
    let mut out: Vec<f64> = s.iter().map(|a| a.prob_best).collect();
    out.push(s[1].prob_better_than_control.unwrap());
    out.push(s[1].prob_harm.unwrap());
    out.push(s[1].prob_practically_equivalent.unwrap());
    out
}

#[test]
fn probabilities_move_no_further_than_the_bound_on_random_looks() {
    let wanted = looks_wanted();
    let mut rng = StdRng::seed_from_u64(0x5eed_0018);
    let (mut looks, mut decided, mut rules_checked) = (0usize, 0usize, 0usize);
    // The divergence test `decide::screen` uses (`stats::proven_below`): claims checked, and
    // how many it decided beyond the total-variation test above.
    let (mut kl_claims, mut kl_decided, mut kl_only) = (0usize, 0usize, 0usize);
    // Harm rule checks (as counted in `decided`) the divergence test decides: never fewer.
    let mut kl_harm = 0usize;
    // Claims of the Rényi test (`stats::proven_below_renyi`, the orders `decide::screen`
    // tries), and how many the divergence test above had not decided.
    let (mut renyi_decided, mut renyi_only) = (0usize, 0usize);
    let mut widest_gap = 0.0f64;
    while looks < wanted {
        let conversion = rng.random_bool(0.6);
        // Traffic per look per arm: from a trickle to 1e7 (1e9 units after 100 looks).
        let per_look = [3u64, 40, 200, 5_000, 10_000_000][rng.random_range(0..5)];
        let base: f64 = if conversion {
            10f64.powf(rng.random_range(-3.0..-0.3))
        } else {
            10f64.powf(rng.random_range(-4.0..0.0))
        };
        let effect = [0.0, 0.0, -0.05, 0.05, -0.2, 0.3][rng.random_range(0..6)];
        let rates = [base, (base * (1.0 + effect)).min(0.999)];
        let (pa, pb) =
            [(1.0, 1.0), (1e-3, 1e-3), (50.0, 950.0), (0.5, 0.5)][rng.random_range(0..4)];
        let opts = CompareOptions {
            control: 0,
            level: 0.95,
            rope: [0.01, 0.05][rng.random_range(0..2)],
            harm_margin: [0.0, 0.0, 0.1][rng.random_range(0..3)],
            lift_interval: false,
            equivalence: true,
        };
        let run_looks = rng.random_range(20..150).min(wanted - looks);
        let mut n = [0u64; 2];
        let mut s = [0u64; 2];
        let mut anchor: Option<(Arms, Vec<f64>)> = None;
        for _ in 0..run_looks {
            for j in 0..2 {
                let add = if conversion {
                    Binomial::new(per_look, rates[j]).unwrap().sample(&mut rng)
                } else {
                    Poisson::new(per_look as f64 * rates[j])
                        .unwrap()
                        .sample(&mut rng) as u64
                };
                n[j] += per_look;
                s[j] += add;
            }
            let arms = if conversion {
                Arms::Beta(
                    (0..2)
                        .map(|j| Beta::new(pa + s[j] as f64, pb + (n[j] - s[j]) as f64).unwrap())
                        .collect(),
                )
            } else {
                Arms::Gamma(
                    (0..2)
                        .map(|j| Gamma::new(pa + s[j] as f64, pa + n[j] as f64).unwrap())
                        .collect(),
                )
            };
            let now = probabilities(&arms, &opts);
            looks += 1;
            if let Some((old_arms, old)) = &anchor {
                let moved = pair_shift_bound(old_arms, &arms, 0, 1).unwrap();
                let sum = shift_bound(old_arms, &arms, 0).unwrap()
                    + shift_bound(old_arms, &arms, 1).unwrap();
                assert!(moved <= sum + 1e-15, "joint {moved} > sum {sum}");
                for (q, (&p_old, &p_now)) in old.iter().zip(&now).enumerate() {
                    let gap = (p_now - p_old).abs();
                    widest_gap = widest_gap.max(gap / (moved + SLACK));
                    assert!(
                        gap <= moved + SLACK,
                        "quantity {q} moved {gap:e} > bound {moved:e}: {old_arms:?} -> {arms:?}"
                    );
                }
                // The rule-level claim decide::screen relies on.
                let harm_old = old[3];
                for t in THRESHOLDS {
                    rules_checked += 1;
                    if harm_old + moved + SLACK < t {
                        decided += 1;
                        assert!(
                            now[3] < t,
                            "harm {} at threshold {t} after a silent bound",
                            now[3]
                        );
                    }
                }
                // The data-processing test, as `decide::screen` applies it, on every
                // probability and on its complement (the same test bounds it from below), at
                // every threshold: a claim "below t now" must hold on the exact path.
                let (forward, backward) = pair_divergences(old_arms, &arms, 0, 1).unwrap();
                let renyi: Vec<f64> = RENYI_ORDERS
                    .iter()
                    .map(|&alpha| pair_renyi(old_arms, &arms, 0, 1, alpha).unwrap())
                    .collect();
                for (q, (&p_old, &p_now)) in old.iter().zip(&now).enumerate() {
                    for (before, after) in [(p_old, p_now), (1.0 - p_old, 1.0 - p_now)] {
                        for t in THRESHOLDS.iter().chain(&[0.01, 0.05, 0.1]) {
                            kl_claims += 1;
                            let half = SLACK / 2.0;
                            let (p, t_in) = ((before + half).min(1.0), t - half);
                            let by_kl = proven_below(p, t_in, forward, backward);
                            for (&alpha, &d) in RENYI_ORDERS.iter().zip(&renyi) {
                                if proven_below_renyi(p, t_in, alpha, d) {
                                    renyi_decided += 1;
                                    if !by_kl {
                                        renyi_only += 1;
                                    }
                                    assert!(
                                        after < *t,
                                        "quantity {q}: {after} not below {t} after the Rényi test \
                                         of order {alpha} from {before} (D {d:e}): {old_arms:?} -> {arms:?}"
                                    );
                                }
                            }
                            if by_kl {
                                kl_decided += 1;
                                if q == 3 && before == p_old && THRESHOLDS.contains(t) {
                                    kl_harm += 1;
                                }
                                if before + moved + SLACK >= *t {
                                    kl_only += 1;
                                }
                                assert!(
                                    after < *t,
                                    "quantity {q}: {after} not below {t} after the divergence test \
                                     from {before} (KL {forward:e}, {backward:e}): {old_arms:?} -> {arms:?}"
                                );
                            }
                        }
                    }
                }
                // Re-anchor as the screen does when the bound stops deciding (here: when it
                // grows past 0.3, to test both short and long distances).
                if moved > 0.3 {
                    anchor = Some((arms.clone(), now.clone()));
                }
            } else {
                anchor = Some((arms.clone(), now.clone()));
            }
        }
    }
    println!(
        "{looks} looks; {decided} of {rules_checked} harm rule checks decided by the bound; largest move / bound = {widest_gap:.3}"
    );
    println!(
        "divergence test: {kl_decided} of {kl_claims} claims decided, {kl_only} of them beyond the total-variation bound; harm rule checks decided: {kl_harm} (total variation: {decided})"
    );
    println!("Rényi test: {renyi_decided} claims decided (order by order), {renyi_only} of them beyond the divergence test");
    assert!(
        renyi_only > 0,
        "the Rényi test decided too little to be tested"
    );
    assert!(
        kl_harm >= decided && kl_only > 0,
        "the divergence test decided too little to be tested"
    );
    assert!(
        decided * 2 > rules_checked,
        "the bound decided too little to be tested"
    );
}

/// `decide::screen` computes a metric without its ROPE probabilities when only the equivalence
/// rule is already decided (`summary::Compute::WithoutEquivalence`); every other number must
/// then be the one the full rules-only summary computes, bit for bit, harm with a margin
/// included (it shares the ratio integrals' node cache with the ROPE).
#[test]
fn leaving_the_rope_out_changes_no_other_number() {
    let cases = [
        Arms::Beta(vec![
            Beta::new(41.0, 960.0).unwrap(),
            Beta::new(55.0, 946.0).unwrap(),
        ]),
        Arms::Beta(vec![
            Beta::new(5_001.0, 95_001.0).unwrap(),
            Beta::new(4_871.0, 95_131.0).unwrap(),
            Beta::new(5_120.0, 94_882.0).unwrap(),
        ]),
        Arms::Gamma(vec![
            Gamma::new(51.0, 101.0).unwrap(),
            Gamma::new(41.0, 101.0).unwrap(),
        ]),
        Arms::Gamma(vec![
            Gamma::new(201.0, 1e5).unwrap(),
            Gamma::new(260.0, 1e5).unwrap(),
            Gamma::new(190.0, 1e5).unwrap(),
        ]),
    ];
    for arms in &cases {
        for harm_margin in [0.0, 0.1] {
            let with = CompareOptions {
                control: 0,
                level: 0.95,
                rope: 0.01,
                harm_margin,
                lift_interval: false,
                equivalence: true,
            };
            let without = CompareOptions {
                equivalence: false,
                ..with
            };
            let (a, b) = (
                compare(arms, &with).unwrap(),
                compare(arms, &without).unwrap(),
            );
            for (x, y) in a.iter().zip(&b) {
                assert!(y.prob_practically_equivalent.is_none());
                let bits = |s: &posteriord::stats::ArmSummary| {
                    [
                        s.prob_best,
                        s.expected_loss,
                        s.prob_better_than_control.unwrap_or(-1.0),
                        s.prob_harm.unwrap_or(-1.0),
                        s.interval.lower,
                        s.interval.upper,
                        s.mean,
                        s.sd,
                    ]
                    .map(f64::to_bits)
                };
                assert_eq!(bits(x), bits(y), "{arms:?} at margin {harm_margin}");
            }
        }
    }
}
