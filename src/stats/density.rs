//! Densities for plots: each arm's posterior density on a range that holds nearly all its
//! mass, and the density of the relative lift θ_v/θ_c − 1 by one-dimensional quadrature
//! (docs/methods.md §6).

use super::{Arms, Beta, Gamma, StatsError};

/// Posterior mass left outside a plotting range, per tail.
pub const PLOT_TAIL: f64 = 5e-4;
/// Mass left outside the region the lift integral covers, per tail and arm.
const LIFT_TAIL: f64 = 1e-14;
/// Simpson intervals of the lift integral (even).
const LIFT_INTERVALS: usize = 256;

fn pdf(arms: &Arms, i: usize, x: f64) -> f64 {
    match arms {
        Arms::Beta(v) => v[i].pdf(x),
        Arms::Gamma(v) => v[i].pdf(x),
    }
}

fn quantile(arms: &Arms, i: usize, p: f64) -> Result<f64, StatsError> {
    match arms {
        Arms::Beta(v) => Beta::quantile(&v[i], p),
        Arms::Gamma(v) => Gamma::quantile(&v[i], p),
    }
}

fn check_index(arms: &Arms, i: usize) -> Result<(), StatsError> {
    if i >= arms.len() {
        return Err(StatsError::ControlOutOfRange {
            control: i,
            n_arms: arms.len(),
        });
    }
    Ok(())
}

/// The `[PLOT_TAIL, 1 − PLOT_TAIL]` quantiles of arm `i`: where its density is worth drawing.
pub fn plot_range(arms: &Arms, i: usize) -> Result<(f64, f64), StatsError> {
    check_index(arms, i)?;
    Ok((
        quantile(arms, i, PLOT_TAIL)?,
        quantile(arms, i, 1.0 - PLOT_TAIL)?,
    ))
}

/// Density of arm `i`'s posterior at each of `xs` (0 outside the support).
pub fn posterior_density(arms: &Arms, i: usize, xs: &[f64]) -> Result<Vec<f64>, StatsError> {
    check_index(arms, i)?;
    Ok(xs
        .iter()
        .map(|&x| {
            let d = pdf(arms, i, x);
            if d.is_finite() && d > 0.0 {
                d
            } else {
                0.0
            }
        })
        .collect())
}

/// Density of the relative lift L = θ_v/θ_c − 1 of arm `variant` against arm `control`, at
/// each of `lifts`.
///
/// With R = θ_v/θ_c and independent posteriors, P(R ≤ ρ) = ∫ f_c(x) F_v(ρx) dx, so
/// f_R(ρ) = ∫ x f_c(x) f_v(ρx) dx. The integral runs in t = ln x (x dx = x² dt, which keeps the
/// integrand smooth near 0) over the overlap of the control's [1e-14, 1 − 1e-14] quantile
/// range with the variant's divided by ρ: outside it one factor carries less than 1e-14 of its
/// mass, and the overlap is no wider than the narrower posterior, so composite Simpson with
/// 256 intervals resolves both factors.
pub fn lift_density(
    arms: &Arms,
    control: usize,
    variant: usize,
    lifts: &[f64],
) -> Result<Vec<f64>, StatsError> {
    check_index(arms, control)?;
    check_index(arms, variant)?;
    let (c_lo, c_hi) = (
        quantile(arms, control, LIFT_TAIL)?,
        quantile(arms, control, 1.0 - LIFT_TAIL)?,
    );
    let (v_lo, v_hi) = (
        quantile(arms, variant, LIFT_TAIL)?,
        quantile(arms, variant, 1.0 - LIFT_TAIL)?,
    );
    let out = lifts
        .iter()
        .map(|&l| {
            let rho = 1.0 + l;
            if !(rho.is_finite() && rho > 0.0) {
                return 0.0;
            }
            let lo = c_lo.max(v_lo / rho).max(f64::MIN_POSITIVE);
            let hi = c_hi.min(v_hi / rho);
            // NaN bounds compare false too, and give 0.
            if hi.partial_cmp(&lo) != Some(std::cmp::Ordering::Greater) {
                return 0.0;
            }
            let (a, b) = (lo.ln(), hi.ln());
            let h = (b - a) / LIFT_INTERVALS as f64;
            let mut sum = 0.0;
            for k in 0..=LIFT_INTERVALS {
                let x = (a + h * k as f64).exp();
                let f = x * x * pdf(arms, control, x) * pdf(arms, variant, rho * x);
                let w = if k == 0 || k == LIFT_INTERVALS {
                    1.0
                } else if k % 2 == 1 {
                    4.0
                } else {
                    2.0
                };
                if f.is_finite() {
                    sum += w * f;
                }
            }
            (sum * h / 3.0).max(0.0)
        })
        .collect();
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Ratio of independent Gammas: (r_v λ_v)/(r_c λ_c) is beta prime(a_v, a_c), so
    /// f_R(ρ) = k·ρ'^(a_v−1)(1+ρ')^(−a_v−a_c)/B(a_v, a_c) with k = r_v/r_c and ρ' = kρ
    /// (N. L. Johnson, S. Kotz, N. Balakrishnan, *Continuous Univariate Distributions*, vol. 2,
    /// 2nd ed., 1995, the beta distribution of the second kind; from memory [M]).
    fn beta_prime_ratio(av: f64, rv: f64, ac: f64, rc: f64, rho: f64) -> f64 {
        let k = rv / rc;
        let x = k * rho;
        let ln =
            (av - 1.0) * x.ln() - (av + ac) * x.ln_1p() - statrs::function::beta::ln_beta(av, ac);
        k * ln.exp()
    }

    #[test]
    fn gamma_lift_density_matches_the_beta_prime_closed_form() {
        for &(av, rv, ac, rc) in &[
            (41.0, 10_000.0, 37.0, 9_800.0),
            (3.0, 2.0, 5.0, 4.0),
            (1_200.0, 300_000.0, 1_000.0, 310_000.0),
        ] {
            let arms = Arms::Gamma(vec![
                Gamma::new(ac, rc).unwrap(),
                Gamma::new(av, rv).unwrap(),
            ]);
            let lifts: Vec<f64> = (1..40).map(|i| -0.6 + i as f64 * 0.04).collect();
            let got = lift_density(&arms, 0, 1, &lifts).unwrap();
            let want: Vec<f64> = lifts
                .iter()
                .map(|l| beta_prime_ratio(av, rv, ac, rc, 1.0 + l))
                .collect();
            let peak = want.iter().copied().fold(0.0, f64::max);
            for ((l, g), w) in lifts.iter().zip(&got).zip(&want) {
                // 1e-5 relative, plus 1e-9 of the peak absolute: far below what a plot can show.
                // absolute: far below what a plot can show.
                assert!(
                    (g - w).abs() <= 1e-5 * w + 1e-9 * peak,
                    "a_v={av} lift={l}: {g} vs {w}"
                );
            }
        }
    }

    #[test]
    fn beta_lift_density_integrates_to_the_lift_interval_of_compare() {
        // The density and `compare`'s lift interval come from different integrals (f_R here,
        // the CDF of R there); the mass between the interval ends must be the level.
        let arms = Arms::Beta(vec![
            Beta::new(1.0 + 340.0, 1.0 + 2660.0).unwrap(),
            Beta::new(1.0 + 372.0, 1.0 + 2628.0).unwrap(),
        ]);
        let s = crate::stats::compare(&arms, &crate::stats::CompareOptions::default()).unwrap();
        let lift = s[1].lift.unwrap().interval;
        let n = 4000;
        let (a, b) = (lift.lower, lift.upper);
        let h = (b - a) / n as f64;
        let xs: Vec<f64> = (0..=n).map(|k| a + h * k as f64).collect();
        let d = lift_density(&arms, 0, 1, &xs).unwrap();
        let mass: f64 = d.windows(2).map(|w| 0.5 * (w[0] + w[1]) * h).sum();
        assert!((mass - 0.95).abs() < 1e-4, "{mass}");
    }

    #[test]
    fn posterior_density_is_zero_outside_the_support_and_ranges_hold_the_mass() {
        let arms = Arms::Beta(vec![
            Beta::new(3.0, 5.0).unwrap(),
            Beta::new(2.0, 2.0).unwrap(),
        ]);
        let d = posterior_density(&arms, 0, &[-0.5, 0.0, 0.5, 1.5]).unwrap();
        assert_eq!(d[0], 0.0);
        assert_eq!(d[3], 0.0);
        // Beta(3, 5) at 0.5: 105·0.5²·0.5⁴ = 1.640625 (closed form of the Beta pdf).
        assert!((d[2] - 1.640625).abs() < 1e-9);
        let (lo, hi) = plot_range(&arms, 1).unwrap();
        assert!(lo > 0.0 && hi < 1.0 && lo < 0.5 && hi > 0.5);
        assert!(plot_range(&arms, 2).is_err());
    }
}
