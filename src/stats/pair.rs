//! The two-arm fast path for defect rates: every decision quantity of a control and one
//! variant with Gamma posteriors from one Beta(a_v, a_c) table instead of the shared grid's
//! pass and the ratio integrals (`compare` still reads the rate intervals off the arms' own
//! shared table).
//!
//! Why it is exact (a direct derivation; docs/methods.md §10): with X = r_v·λ_v ~ Gamma(a_v, 1)
//! and Y = r_c·λ_c ~ Gamma(a_c, 1) independent, W = X/(X+Y) ~ Beta(a_v, a_c) is independent of
//! T = X + Y ~ Gamma(a_v + a_c, 1), and λ_v/λ_c = (r_c/r_v)·W/(1 − W). So, with
//! t = logit W and t_c = ln(c·r_v/r_c),
//! - P(λ_v < c·λ_c) = P(t < t_c) = F_W, P(λ_v > c·λ_c) = S_W (both read from the table, never
//!   one as 1 − the other): P(better than control) and P(best) at c = 1, harm at c = 1 + m,
//!   ROPE at c = 1 ± ρ;
//! - λ_v − λ_c = T·(1/r_v + 1/r_c)·(W − w₀) with w₀ = r_v/(r_v + r_c), hence
//!   E[(λ_v − λ_c)⁺] = (a_v + a_c)(1/r_v + 1/r_c)·∫_{w₀}^1 S_W(u) du and
//!   E[(λ_c − λ_v)⁺] = (a_v + a_c)(1/r_v + 1/r_c)·∫_0^{w₀} F_W(u) du: integrals of positive
//!   functions, free of the cancellation of the closed difference form (METHODS §1.3);
//! - lift quantiles: ln(λ_v/λ_c) = ln(r_c/r_v) + t, so they are the table's own quantiles.
//!
//! Precondition: exactly two Gamma arms. Beta arms take the general path: they have no such
//! one-variable reduction, and the variant's CDF at the control's nodes would need a table of
//! its own, which is what the shared grid already is (the finite sum of METHODS §1.1 needs
//! integer shapes and log-Beta differences stable to 1e-12 at 1e9, not done).

use super::arms::{ArmSummary, CompareOptions, Decision, Lift};
use super::grid::{gauss_rule, logistic, rule, Grid, Kernel, GL_N, NP};
use super::posterior::tail_levels;
use super::{Gamma, Interval, StatsError};

/// The Beta(a_v, a_c) table of W and the constants that map it back to rates.
struct Pair {
    grid: Grid,
    /// ln(r_v/r_c): t = this is λ_v = λ_c.
    t0: f64,
    /// r_v/r_c.
    ratio_rates: f64,
    /// (a_v + a_c)(1/r_v + 1/r_c): E[T] times the scale of W − w₀.
    scale: f64,
}

impl Pair {
    fn new(v: &Gamma, c: &Gamma) -> Result<Pair, StatsError> {
        let grid = Grid::new(&[Kernel::beta(v.shape(), c.shape())])?;
        let ratio_rates = v.rate() / c.rate();
        Ok(Pair {
            grid,
            t0: ratio_rates.ln(),
            ratio_rates,
            scale: (v.shape() + c.shape()) * (1.0 / v.rate() + 1.0 / c.rate()),
        })
    }

    /// t at which λ_v = factor·λ_c; one rounding in the product and one in the logarithm.
    fn t_at(&self, factor: f64) -> f64 {
        (factor * self.ratio_rates).ln()
    }

    /// (P(W ≤ w(t)), P(W > w(t))).
    fn tails(&self, t: f64) -> (f64, f64) {
        let p = self.grid.eval(0, t);
        (p.cdf, p.sf)
    }

    /// ∫ over t > t0 of S_W·dw (`upper`), or over t < t0 of F_W·dw.
    fn tail_integral(&self, t0: f64, upper: bool) -> f64 {
        let g = &self.grid;
        let arm = &g.arms[0];
        let (lo, hi) = (g.breaks[arm.p0], g.breaks[arm.p1]);
        let r = rule();
        let jac = |t: f64| logistic(t) * logistic(-t);
        let mut sum = 0.0;
        // Outside the table the tail is exactly 1 on one side: ∫ dw in closed form.
        if upper && t0 < lo {
            sum += logistic_diff(t0, lo);
        }
        if !upper && t0 > hi {
            sum += logistic_diff(hi, t0);
        }
        let (a, b) = if upper {
            (t0.max(lo), hi)
        } else {
            (lo, t0.min(hi))
        };
        if a >= b {
            return sum;
        }
        // Whole panels from the table; the panel cut by t0 by a Gauss–Legendre rule on the
        // interpolant (a degree-16 polynomial times the smooth jacobian on a panel already
        // sized for both).
        let cut = g.breaks.partition_point(|&x| x <= t0).saturating_sub(1);
        for p in arm.p0..arm.p1 {
            let (pa, pb) = (g.breaks[p], g.breaks[p + 1]);
            let inside = if upper { pa >= t0 } else { pb <= t0 };
            if inside {
                let half = 0.5 * (pb - pa);
                let base = (p - arm.p0) * NP;
                for i in 0..NP {
                    let t = g.node(p, i);
                    let tail = if upper {
                        arm.sf[base + i]
                    } else {
                        arm.cdf[base + i]
                    };
                    sum += half * r.w[i] * jac(t) * tail;
                }
            } else if p == cut && pa < t0 && t0 < pb {
                let (x0, x1) = if upper { (t0, pb) } else { (pa, t0) };
                let (mid, half) = (0.5 * (x0 + x1), 0.5 * (x1 - x0));
                let gl = gauss_rule();
                let mut cursor = p;
                for i in 0..GL_N {
                    let t = mid + half * gl.x[i];
                    let (tail, _) = g.tail_near(0, t, &mut cursor, upper);
                    sum += half * gl.w[i] * jac(t) * tail;
                }
            }
        }
        sum
    }
}

/// logistic(y) − logistic(x) for x ≤ y without cancellation where both sit in one tail.
fn logistic_diff(x: f64, y: f64) -> f64 {
    if y <= 0.0 {
        // e^x·(e^{y−x} − 1) / ((1 + e^x)(1 + e^y)), every exponential ≤ 1.
        x.exp() * (y - x).exp_m1() / ((1.0 + x.exp()) * (1.0 + y.exp()))
    } else if x >= 0.0 {
        // The mirror image: logistic(−x) − logistic(−y).
        (-y).exp() * (y - x).exp_m1() / ((1.0 + (-x).exp()) * (1.0 + (-y).exp()))
    } else {
        // One value below 1/2, one above: no cancellation.
        logistic(y) - logistic(x)
    }
}

/// The arms in (variant, control) order, when the fast path applies.
fn pair_of(arms: &[Gamma], control: usize) -> Option<(&Gamma, &Gamma)> {
    (arms.len() == 2 && control < 2).then(|| (&arms[1 - control], &arms[control]))
}

/// P(best), loss and P(better than control) of two Gamma arms; `None` when the precondition
/// (two arms) does not hold.
pub(crate) fn decide(arms: &[Gamma], control: usize) -> Option<Result<Vec<Decision>, StatsError>> {
    let (v, c) = pair_of(arms, control)?;
    Some(Pair::new(v, c).map(|pair| {
        let core = Core::of(&pair);
        let mut out = vec![core.control_decision(); 2];
        out[1 - control] = core.variant_decision();
        out
    }))
}

/// The shared-pass quantities of both arms.
struct Core {
    /// P(λ_v < λ_c).
    better: f64,
    /// P(λ_v > λ_c).
    worse: f64,
    loss_v: f64,
    loss_c: f64,
}

impl Core {
    fn of(pair: &Pair) -> Core {
        let (better, worse) = pair.tails(pair.t0);
        Core {
            better,
            worse,
            loss_v: pair.scale * pair.tail_integral(pair.t0, true),
            loss_c: pair.scale * pair.tail_integral(pair.t0, false),
        }
    }

    fn variant_decision(&self) -> Decision {
        Decision {
            prob_best: self.better.clamp(0.0, 1.0),
            expected_loss: self.loss_v.max(0.0),
            prob_better_than_control: Some(self.better.clamp(0.0, 1.0)),
        }
    }

    fn control_decision(&self) -> Decision {
        Decision {
            prob_best: self.worse.clamp(0.0, 1.0),
            expected_loss: self.loss_c.max(0.0),
            prob_better_than_control: None,
        }
    }
}

/// Every quantity of `compare` for two Gamma arms; `None` when the precondition does not
/// hold. The options are validated by the caller.
pub(crate) fn compare(
    arms: &[Gamma],
    opts: &CompareOptions,
) -> Option<Result<Vec<ArmSummary>, StatsError>> {
    let (v, c) = pair_of(arms, opts.control)?;
    Some(compare_pair(v, c, arms, opts))
}

fn compare_pair(
    v: &Gamma,
    c: &Gamma,
    arms: &[Gamma],
    opts: &CompareOptions,
) -> Result<Vec<ArmSummary>, StatsError> {
    let (lo_q, hi_q) = tail_levels(opts.level)?;
    let pair = Pair::new(v, c)?;
    let core = Core::of(&pair);
    // Both rate intervals from one table of the two arms (the general path's own, so they
    // are the same numbers): one panel construction instead of two.
    let kernels: Vec<Kernel> = arms.iter().map(Gamma::kernel).collect();
    let rates = Grid::new(&kernels)?;
    let mut out = Vec::with_capacity(2);
    for (j, arm) in arms.iter().enumerate() {
        let is_control = j == opts.control;
        let interval = Interval {
            level: opts.level,
            lower: rates.quantile_t(j, lo_q).exp(),
            upper: rates.quantile_t(j, hi_q).exp(),
        };
        let d = if is_control {
            core.control_decision()
        } else {
            core.variant_decision()
        };
        let mut summary = ArmSummary {
            mean: arm.mean(),
            sd: arm.sd(),
            interval,
            prob_best: d.prob_best,
            expected_loss: d.expected_loss,
            prob_better_than_control: d.prob_better_than_control,
            lift: None,
            prob_practically_equivalent: None,
            prob_harm: None,
        };
        if !is_control {
            pair.pairwise(v, c, opts, lo_q, hi_q).apply(&mut summary);
        }
        out.push(summary);
    }
    Ok(out)
}

/// The quantities of one variant against the control that depend on that pair alone: the
/// lift interval, ROPE and harm probabilities (each per its option).
pub(crate) struct Pairwise {
    lift: Option<Lift>,
    equivalent: Option<f64>,
    harm: f64,
}

impl Pairwise {
    /// Writes these into the variant's summary (the fields `compare` leaves to this route).
    pub(crate) fn apply(self, summary: &mut ArmSummary) {
        summary.lift = self.lift;
        summary.prob_practically_equivalent = self.equivalent;
        summary.prob_harm = Some(self.harm);
    }
}

/// The pairwise quantities of Gamma variant `v` against Gamma control `c` from their own
/// Beta(a_v, a_c) table, for metrics of any number of arms: the shared grid of k arms keeps
/// P(best), the losses and P(better than control), whose integrals need every arm, while these
/// need the pair only and are exact in one variable (module doc). The options are validated
/// by the caller.
pub(crate) fn pairwise(
    v: &Gamma,
    c: &Gamma,
    opts: &CompareOptions,
) -> Result<Pairwise, StatsError> {
    let (lo_q, hi_q) = tail_levels(opts.level)?;
    Ok(Pair::new(v, c)?.pairwise(v, c, opts, lo_q, hi_q))
}

impl Pair {
    fn pairwise(
        &self,
        v: &Gamma,
        c: &Gamma,
        opts: &CompareOptions,
        lo_q: f64,
        hi_q: f64,
    ) -> Pairwise {
        let lift = opts.lift_interval.then(|| {
            // ln(λ_v/λ_c) = t − ln(r_v/r_c); the quantiles are monotone in the level.
            let lower = self.grid.quantile_t(0, lo_q) - self.t0;
            let upper = self.grid.quantile_t(0, hi_q) - self.t0;
            let (lower, upper) = (lower.min(upper), upper.max(lower));
            let mean = if c.shape() > 1.0 {
                v.mean() * (c.rate() / (c.shape() - 1.0)) - 1.0
            } else {
                f64::INFINITY
            };
            Lift {
                mean,
                interval: Interval {
                    level: opts.level,
                    lower: lower.exp_m1(),
                    upper: upper.exp_m1(),
                },
            }
        });
        let equivalent = opts.equivalence.then(|| {
            let t_hi = self.t_at(1.0 + opts.rope);
            let p = if opts.rope < 1.0 {
                let t_lo = self.t_at(1.0 - opts.rope);
                let (f_lo, s_lo) = self.tails(t_lo);
                let (f_hi, s_hi) = self.tails(t_hi);
                // The difference of the smaller tails of the two ends.
                if s_lo < f_hi {
                    s_lo - s_hi
                } else {
                    f_hi - f_lo
                }
            } else {
                self.tails(t_hi).0
            };
            p.clamp(0.0, 1.0)
        });
        // At margin 0 this is P(λ_v > λ_c) at t0, the very value `Core` reads.
        let harm = if opts.harm_margin == 0.0 {
            self.tails(self.t0).1
        } else {
            self.tails(self.t_at(1.0 + opts.harm_margin)).1
        };
        Pairwise {
            lift,
            equivalent,
            harm: harm.clamp(0.0, 1.0),
        }
    }
}

#[cfg(test)]
// Reference values are kept with every digit their source printed.
#[allow(clippy::excessive_precision)]
mod tests {
    use super::super::arms::{compare_general, decide_general, Arms};
    use super::*;
    use proptest::prelude::*;

    /// Largest difference between the fast path and the general path, scaled: probabilities
    /// absolute, losses and lift ends relative to the larger of 1 and their own size.
    /// Returns (probabilities, losses and rate intervals, lift interval ends).
    fn worst(a: &[ArmSummary], b: &[ArmSummary]) -> (f64, f64, f64) {
        let mut prob: f64 = 0.0;
        let mut rest: f64 = 0.0;
        let mut lift: f64 = 0.0;
        let rel = |x: f64, y: f64| (x - y).abs() / x.abs().max(y.abs()).max(1.0);
        let opt = |x: Option<f64>, y: Option<f64>| match (x, y) {
            (Some(x), Some(y)) => (x - y).abs(),
            (None, None) => 0.0,
            _ => f64::INFINITY,
        };
        for (x, y) in a.iter().zip(b) {
            prob = prob
                .max((x.prob_best - y.prob_best).abs())
                .max(opt(x.prob_better_than_control, y.prob_better_than_control))
                .max(opt(x.prob_harm.map(|_| 0.0), y.prob_harm.map(|_| 0.0)));
            rest = rest
                .max(rel(x.expected_loss, y.expected_loss))
                .max(rel(x.interval.lower, y.interval.lower))
                .max(rel(x.interval.upper, y.interval.upper));
            match (x.lift, y.lift) {
                (Some(l), Some(m)) => {
                    // ln(1 + lift) is ill-conditioned where the lower end is near −1 (one
                    // ulp of a lift of −1 + 5e-13 moves it by 2e-4), and the plain relative
                    // difference where the ends are astronomical: the better of the two.
                    let log_rel = |x: f64, y: f64| rel(x, y).min(rel(x.ln_1p(), y.ln_1p()));
                    lift = lift
                        .max(log_rel(l.interval.lower, m.interval.lower))
                        .max(log_rel(l.interval.upper, m.interval.upper));
                    if l.mean.is_finite() || m.mean.is_finite() {
                        rest = rest.max(rel(l.mean, m.mean));
                    }
                }
                (None, None) => {}
                _ => rest = f64::INFINITY,
            }
        }
        (prob, rest, lift)
    }

    /// A shape or rate drawn log-uniformly from [lo, hi].
    fn log_uniform(lo: f64, hi: f64) -> impl Strategy<Value = f64> {
        (lo.ln()..hi.ln()).prop_map(f64::exp)
    }

    /// Counts 0..1e9: zero, or log-uniform from 1.
    fn count() -> impl Strategy<Value = u64> {
        prop_oneof![
            Just(0u64),
            (0.0f64..(1e9f64).ln()).prop_map(|x| x.exp().round() as u64)
        ]
    }

    /// One arm over the accepted ranges: prior shape and rate 1e-3..1e3, counts 0..1e9,
    /// exposure 0..1e9 units.
    fn arm() -> impl Strategy<Value = Gamma> {
        (
            log_uniform(1e-3, 1e3),
            log_uniform(1e-3, 1e3),
            count(),
            prop_oneof![Just(0.0), log_uniform(1.0, 1e9)],
        )
            .prop_map(|(a, r, n, e)| Gamma::posterior(&Gamma::new(a, r).unwrap(), n, e).unwrap())
    }

    /// Arms with comparable rates (the case that matters for decisions), by drawing the
    /// variant's count near the control's expectation.
    fn close_pair() -> impl Strategy<Value = (Gamma, Gamma)> {
        (
            log_uniform(1e-3, 1e3),
            log_uniform(1e-3, 1e3),
            log_uniform(1.0, 1e9),
            log_uniform(1e-3, 1.0),
            -4.0f64..4.0,
        )
            .prop_map(|(a, r, exposure, rate, z)| {
                let prior = Gamma::new(a, r).unwrap();
                let mean = rate * exposure;
                let nc = mean.round() as u64;
                let nv = (mean + z * mean.sqrt()).max(0.0).round() as u64;
                (
                    Gamma::posterior(&prior, nv, exposure).unwrap(),
                    Gamma::posterior(&prior, nc, exposure).unwrap(),
                )
            })
    }

    fn options(control: usize, margin: f64, rope: f64) -> CompareOptions {
        CompareOptions {
            control,
            harm_margin: margin,
            rope,
            ..CompareOptions::default()
        }
    }

    fn check(v: Gamma, c: Gamma, control: usize, margin: f64, rope: f64, lift_tol: f64) {
        let arms = if control == 0 { vec![c, v] } else { vec![v, c] };
        let family = Arms::Gamma(arms.clone());
        let opts = options(control, margin, rope);
        let fast = compare(&arms, &opts).unwrap().unwrap();
        let general = compare_general(&family, &opts).unwrap();
        let (prob, rest, lift) = worst(&fast, &general);
        // The general path's lift ends come from a ratio quadrature that loses accuracy
        // where both shapes are tiny and the ends astronomical (18% at ~1e226, i.e. 3e-4 in
        // ln(1 + lift)); the fast path's are the table's own quantiles and agree with mpmath
        // to 1e-13 there (`lift_ends_against_mpmath`). So ln(1 + lift) is compared, with a
        // tolerance set by the caller.
        assert!(
            lift <= lift_tol,
            "lift ends differ by {lift:e}: {v:?} {c:?}"
        );
        assert!(
            prob <= 1e-9,
            "probabilities differ by {prob:e}: {v:?} {c:?}"
        );
        assert!(
            rest <= 1e-9,
            "losses or intervals differ by {rest:e}: {v:?} {c:?}"
        );
        // Harm with a margin and ROPE: the general path's ratio quadrature is accurate to a
        // few 1e-9 only for tiny shapes with rates 1e8 apart (`harm_and_rope_against_mpmath`),
        // so these are checked against its shared-grid pass instead, which computes
        // P(λ_v < c·λ_c) as P(better than control) of the control rescaled to rate r_c/c.
        let below = |factor: f64| {
            let scaled = Gamma::new(c.shape(), c.rate() / factor).unwrap();
            let pair = if control == 0 {
                vec![scaled, v]
            } else {
                vec![v, scaled]
            };
            decide_general(&Arms::Gamma(pair), control).unwrap()[1 - control]
                .prob_better_than_control
                .unwrap()
        };
        let variant = &fast[1 - control];
        let harm = if margin == 0.0 {
            general[1 - control].prob_harm.unwrap()
        } else {
            1.0 - below(1.0 + margin)
        };
        let d = (variant.prob_harm.unwrap() - harm).abs();
        assert!(d <= 1e-9, "harm differs by {d:e}: {v:?} {c:?}");
        let rope_p = below(1.0 + rope) - if rope < 1.0 { below(1.0 - rope) } else { 0.0 };
        let d = (variant.prob_practically_equivalent.unwrap() - rope_p.clamp(0.0, 1.0)).abs();
        assert!(d <= 1e-9, "ROPE differs by {d:e}: {v:?} {c:?}");
        let quick = decide(&arms, control).unwrap().unwrap();
        let slow = decide_general(&family, control).unwrap();
        for (x, y) in quick.iter().zip(&slow) {
            assert_eq!(
                x.prob_best,
                fast[quick.iter().position(|q| q == x).unwrap()].prob_best
            );
            assert!((x.prob_best - y.prob_best).abs() <= 1e-9);
        }
    }

    const CASES: u32 = 300;

    proptest! {
        #![proptest_config(ProptestConfig {
            // Failure seeds beside this file (`*.proptest-regressions`), kept in git.
            failure_persistence: Some(Box::new(
                proptest::test_runner::FileFailurePersistence::SourceParallel("proptest-regressions"),
            )),
            ..ProptestConfig::with_cases(CASES)
        })]

        /// The fast path against the shared-grid path over the accepted ranges.
        #[test]
        fn fast_path_matches_the_general_path(
            v in arm(), c in arm(), control in 0usize..2,
            margin in prop_oneof![Just(0.0), 0.0f64..0.5],
            rope in prop_oneof![Just(0.01), 0.0f64..2.0],
        ) {
            check(v, c, control, margin, rope, 1e-3);
        }

        /// The same where the arms are close, so every probability is far from 0 and 1.
        #[test]
        fn fast_path_matches_the_general_path_for_close_arms(
            (v, c) in close_pair(), control in 0usize..2,
            margin in prop_oneof![Just(0.0), 0.0f64..0.1],
        ) {
            check(v, c, control, margin, 0.01, 1e-6);
        }

        /// More than two Gamma arms: each variant's lift, ROPE and harm are those of the
        /// two-arm route for that variant and the control alone (the same table, so bit for
        /// bit; that route is checked against mpmath above and in tests/stats_reference.rs),
        /// and everything the shared grid computes is the general path's own number.
        #[test]
        fn many_arms_take_each_pairs_table(
            arms in prop::collection::vec(arm(), 3..=5),
            control in 0usize..5,
            margin in prop_oneof![Just(0.0), 0.0f64..0.5],
            rope in prop_oneof![Just(0.01), 0.0f64..2.0],
        ) {
            let control = control % arms.len();
            let opts = CompareOptions { level: 0.9, ..options(control, margin, rope) };
            let got = super::super::compare(&Arms::Gamma(arms.clone()), &opts).unwrap();
            let general = compare_general(&Arms::Gamma(arms.clone()), &opts).unwrap();
            for (j, (s, g)) in got.iter().zip(&general).enumerate() {
                prop_assert_eq!(
                    (s.mean, s.sd, s.interval, s.prob_best, s.expected_loss),
                    (g.mean, g.sd, g.interval, g.prob_best, g.expected_loss)
                );
                prop_assert_eq!(s.prob_better_than_control, g.prob_better_than_control);
                if j == control {
                    prop_assert!(s.lift.is_none() && s.prob_harm.is_none());
                    continue;
                }
                let two = compare(
                    &[arms[control], arms[j]],
                    &CompareOptions { control: 0, ..opts },
                )
                .unwrap()
                .unwrap();
                let t = &two[1];
                prop_assert_eq!(
                    (s.lift, s.prob_practically_equivalent, s.prob_harm),
                    (t.lift, t.prob_practically_equivalent, t.prob_harm)
                );
                // The shared grid's ∫ f_v·S_c and the pair table's F_W agree to 1e-9.
                let d = (s.prob_better_than_control.unwrap()
                    - t.prob_better_than_control.unwrap())
                .abs();
                prop_assert!(d <= 1e-9, "P(better) differs by {:e}", d);
            }
        }
    }

    /// METHODS §2 R11/R11c (mpmath, 40 digits): errors per 1k requests, A 50 in 100k,
    /// B 40 in 100k, Gamma(1, 1) prior → Gamma(51, 101), Gamma(41, 101).
    #[test]
    fn reference_r11() {
        let a = Gamma::new(51.0, 101.0).unwrap();
        let b = Gamma::new(41.0, 101.0).unwrap();
        let d = decide(&[a, b], 0).unwrap().unwrap();
        // P(λ_B < λ_A) = P(λ_A > λ_B).
        let p = d[1].prob_better_than_control.unwrap();
        assert!((p - 0.852_765_107_715_733_458).abs() < 1e-13, "{p}");
        assert!((d[1].expected_loss - 0.007_209_730_821_138_06).abs() < 1e-15);
        assert!((d[0].expected_loss - 0.106_219_631_811_237).abs() < 1e-14);
    }

    /// Where the two paths' lift ends differed most, the fast path agrees with mpmath (60
    /// digits, `betainc` inverted by `findroot`) on the 97.5% lift end.
    #[test]
    fn lift_ends_against_mpmath() {
        for (c, v, want) in [
            // The general path is 1e-9 relative off here.
            (
                (0.2959842143301759, 96.20250925628747),
                (0.20453143601752016, 1.0),
                1550303.340279202198598582,
            ),
            // 5e-6 relative off.
            (
                (0.02152049560018176, 1.0),
                (0.018175347710982285, 1.0),
                4.914_253_144_334_205_1e58,
            ),
            // 18% off (ln(1 + lift) 3e-4 relative off).
            (
                (0.0056943581346589585, 1.0),
                (0.005366463866371302, 1.0),
                1.533_602_155_032_141_3e226,
            ),
        ] {
            let c = Gamma::new(c.0, c.1).unwrap();
            let v = Gamma::new(v.0, v.1).unwrap();
            let s = compare(&[c, v], &CompareOptions::default())
                .unwrap()
                .unwrap();
            let upper = s[1].lift.unwrap().interval.upper;
            assert!((upper - want).abs() <= 1e-13 * want, "{upper:e}");
        }
    }

    /// Two equal tiny-shape arms (prior Gamma(0.106, 66), no data): lift ends near −1 and
    /// 2e12, where ln(1 + lift) of the lower end is ill-conditioned. mpmath (50 digits,
    /// `betainc` of Beta(a, a) inverted by `findroot`): w/(1 − w) − 1 at the 2.5% and 97.5%
    /// quantiles.
    #[test]
    fn lift_ends_of_equal_tiny_shapes_against_mpmath() {
        let g = Gamma::new(0.10633163689060922, 66.11532472677415).unwrap();
        let s = compare(&[g, g], &CompareOptions::default())
            .unwrap()
            .unwrap();
        let lift = s[1].lift.unwrap().interval;
        let (lower, upper) = (-0.999_999_999_999_500_458_9, 2_001_837_325_375.743_66);
        assert!((lift.lower - lower).abs() <= 2e-16, "{:e}", lift.lower);
        assert!(
            (lift.upper - upper).abs() <= 1e-13 * upper,
            "{:e}",
            lift.upper
        );
        let general =
            compare_general(&Arms::Gamma(vec![g, g]), &CompareOptions::default()).unwrap();
        let (p, rest, l) = worst(&s, &general);
        assert!(
            p <= 1e-9 && rest <= 1e-9 && l <= 1e-6,
            "{p:e} {rest:e} {l:e}"
        );
    }

    /// Where the fast path's harm and ROPE differed most from the general path's ratio
    /// quadrature (8e-9), it agrees with mpmath (50 digits, `betainc` of Beta(a_c, a_v) at
    /// r_c/(r_c + c·r_v)): variant Gamma(0.0016578552276172037, 450803768.7618457), control
    /// Gamma(0.030935442594251735, 1).
    #[test]
    fn harm_and_rope_against_mpmath() {
        let v = Gamma::new(0.0016578552276172037, 450803768.7618457).unwrap();
        let c = Gamma::new(0.030935442594251735, 1.0).unwrap();
        for (rope, margin, want_rope, want_harm) in [
            (
                0.01,
                0.1,
                1.699_184_894_445_883_7e-5,
                0.027_381_589_306_361_147_7,
            ),
            (
                0.5,
                0.0,
                9.375_476_690_077_875e-4,
                0.027_462_442_035_293_710_4,
            ),
            (
                1.5,
                0.1,
                0.973_305_075_126_660_9,
                0.027_381_589_306_361_147_7,
            ),
        ] {
            let opts = options(0, margin, rope);
            let s = compare(&[c, v], &opts).unwrap().unwrap();
            let got_rope = s[1].prob_practically_equivalent.unwrap();
            let got_harm = s[1].prob_harm.unwrap();
            assert!(
                (got_rope - want_rope).abs() <= 1e-15,
                "{rope}: {got_rope:e}"
            );
            assert!(
                (got_harm - want_harm).abs() <= 1e-15,
                "{margin}: {got_harm:e}"
            );
        }
    }
}
