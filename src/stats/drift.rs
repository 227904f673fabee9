//! How far a posterior probability can move between two looks: a rigorous bound from the
//! Kullback–Leibler divergence between an arm's old and new posterior, for deciding a rule
//! without recomputing it.
//!
//! **Why it is rigorous.** Every probability the rules compare with a threshold (harm, ROPE,
//! P(better than control), P(best)) is P_π(E) = E_π[1_E(θ)] for an event E of the arms' rates θ
//! and π the product of the arms' independent posteriors. For two such products π, π',
//! |P_π(E) − P_π'(E)| ≤ TV(π, π') ≤ Σ_j TV(π_j, π'_j) (couple the arms one at a time; the
//! total variation distance of a product is at most the sum over its factors), and by
//! Pinsker's inequality TV(p, q) ≤ √(KL(p‖q)/2), for either order of p and q (A. B. Tsybakov,
//! *Introduction to Nonparametric Estimation*, Springer 2009, Lemma 2.5 [M]). Only the arms an
//! event involves count: harm and ROPE of a variant involve the variant and the control.
//! So a probability known at an earlier look, plus this bound, brackets its value now.
//!
//! **The divergences in closed form** (both families are exponential families; e.g.
//! W. D. Penny, "KL-divergences of Normal, Gamma, Dirichlet and Wishart densities", 2001 [M]):
//! KL(Beta(a₁,b₁) ‖ Beta(a₂,b₂)) = ln B(a₂,b₂) − ln B(a₁,b₁) + (a₁−a₂)ψ(a₁) +
//! (b₁−b₂)ψ(b₁) + (a₂−a₁+b₂−b₁)ψ(a₁+b₁), and KL(Gamma(a₁,r₁) ‖ Gamma(a₂,r₂)) =
//! (a₁−a₂)ψ(a₁) − ln Γ(a₁) + ln Γ(a₂) + a₂ ln(r₁/r₂) + a₁(r₂−r₁)/r₁. At 1e9 counts the ln Γ terms are ~2e10 and
//! cancel to ~1e-3, so they are regrouped: with R(x, Δ) = ln Γ(x+Δ) − ln Γ(x) − Δψ(x) ≥ 0,
//! KL_Beta = R(a₁, Δa) + R(b₁, Δb) − R(a₁+b₁, Δa+Δb) and
//! KL_Gamma = R(a₁, Δa) − a₁·log1pmx(v) − Δa·ln(1+v), v = r₂/r₁ − 1; and R itself, for
//! x, x+Δ ≥ 10, from Stirling's form: with u = Δ/x,
//! R = x·[(1+u)·log1pmx(u) + u²] − ½·log1pmx(u) + δ(x+Δ) − δ(x) − Δ·δ′(x), δ the Stirling
//! remainder — every term small, none a difference of large numbers.
//!
//! **Rounding.** Each divergence carries an upper error allowance of 1e-12 of the sum of the
//! magnitudes of its terms (a few hundred ulps of each) plus 1e-14, added before the square
//! root, so the bound stays an upper bound in floating point.

use statrs::function::gamma::{digamma, ln_gamma};

use super::special::{log1pmx, stirling_delta};
use super::{Arms, Beta, Gamma};

/// Relative allowance for rounding in a divergence (see the module comment).
const REL_SLACK: f64 = 1e-12;
/// Absolute allowance for rounding in a divergence.
const ABS_SLACK: f64 = 1e-14;

/// δ′(x), the derivative of the Stirling remainder, for x ≥ 10: −Σ (2k−1)·c_k / x^{2k} with
/// the coefficients c_k of `stirling_delta`'s series.
fn stirling_delta_prime(x: f64) -> f64 {
    let r2 = 1.0 / (x * x);
    -r2 * (1.0 / 12.0
        + r2 * (-3.0 / 360.0
            + r2 * (5.0 / 1260.0
                + r2 * (-7.0 / 1680.0
                    + r2 * (9.0 / 1188.0 + r2 * (-11.0 * 691.0 / 360_360.0 + r2 * 13.0 / 156.0))))))
}

/// R(x, Δ) = ln Γ(x+Δ) − ln Γ(x) − Δ·ψ(x) (≥ 0 by convexity of ln Γ), with the magnitude of
/// the terms it was computed from (for the rounding allowance).
fn lgamma_remainder(x: f64, d: f64) -> (f64, f64) {
    if d == 0.0 {
        return (0.0, 0.0);
    }
    let y = x + d;
    if x >= 10.0 && y >= 10.0 {
        let u = d / x;
        let l = log1pmx(u);
        let main = x * ((1.0 + u) * l + u * u);
        let half = -0.5 * l;
        let stir = stirling_delta(y) - stirling_delta(x);
        let slope = -d * stirling_delta_prime(x);
        let value = main + half + stir + slope;
        (
            value,
            main.abs() + (x * u * u).abs() + half.abs() + stir.abs() + slope.abs(),
        )
    } else {
        let (gy, gx, s) = (ln_gamma(y), ln_gamma(x), d * digamma(x));
        (gy - gx - s, gy.abs() + gx.abs() + s.abs())
    }
}

/// An upper bound on KL(Beta(a₁, b₁) ‖ Beta(a₂, b₂)).
pub(crate) fn beta_kl(from: &Beta, to: &Beta) -> f64 {
    let (a1, b1) = (from.alpha(), from.beta());
    let (a2, b2) = (to.alpha(), to.beta());
    let (ra, ma) = lgamma_remainder(a1, a2 - a1);
    let (rb, mb) = lgamma_remainder(b1, b2 - b1);
    let (rn, mn) = lgamma_remainder(a1 + b1, (a2 + b2) - (a1 + b1));
    let kl = ra + rb - rn;
    kl.max(0.0) + REL_SLACK * (ma + mb + mn) + ABS_SLACK
}

/// An upper bound on KL(Gamma(a₁, r₁) ‖ Gamma(a₂, r₂)) (shape, rate).
pub(crate) fn gamma_kl(from: &Gamma, to: &Gamma) -> f64 {
    let (a1, r1) = (from.shape(), from.rate());
    let (a2, r2) = (to.shape(), to.rate());
    let da = a2 - a1;
    let v = (r2 - r1) / r1;
    let (ra, ma) = lgamma_remainder(a1, da);
    let t1 = -a1 * log1pmx(v);
    let t2 = -da * v.ln_1p();
    let kl = ra + t1 + t2;
    kl.max(0.0) + REL_SLACK * (ma + t1.abs() + t2.abs()) + ABS_SLACK
}

/// KL(from_i ‖ to_i) and KL(to_i ‖ from_i) of arm `i`; `None` when the arms are not of the same
/// family or count.
fn divergences(from: &Arms, to: &Arms, i: usize) -> Option<(f64, f64)> {
    match (from, to) {
        (Arms::Beta(p), Arms::Beta(q)) if p.len() == q.len() && i < p.len() => {
            Some((beta_kl(&p[i], &q[i]), beta_kl(&q[i], &p[i])))
        }
        (Arms::Gamma(p), Arms::Gamma(q)) if p.len() == q.len() && i < p.len() => {
            Some((gamma_kl(&p[i], &q[i]), gamma_kl(&q[i], &p[i])))
        }
        _ => None,
    }
}

/// An upper bound on the total variation distance between arm `i`'s posterior in `from` and
/// in `to`: Pinsker's √(KL/2) with the smaller of the two orders, at most 1. `None` when the
/// arms are not of the same family or count.
pub fn shift_bound(from: &Arms, to: &Arms, i: usize) -> Option<f64> {
    let (forward, backward) = divergences(from, to, i)?;
    Some((0.5 * forward.min(backward)).sqrt().min(1.0))
}

/// An upper bound on how far the probability of any event of arms `i` and `j` (`i ≠ j`) can
/// move from `from` to `to`: the total variation distance between the two joint posteriors.
/// KL is additive over independent arms, so Pinsker's inequality on the joint law gives
/// √((KL_i + KL_j)/2) (in one order for both arms; the smaller order is used), up to √2
/// tighter than the sum of the arms' own bounds.
pub fn pair_shift_bound(from: &Arms, to: &Arms, i: usize, j: usize) -> Option<f64> {
    let (fi, bi) = divergences(from, to, i)?;
    let (fj, bj) = divergences(from, to, j)?;
    Some((0.5 * (fi + fj).min(bi + bj)).sqrt().min(1.0))
}

#[cfg(test)]
mod tests {
    // Reference values are copied digit for digit from mpmath at 40 digits.
    #![allow(clippy::excessive_precision)]
    use super::*;

    fn beta(a: f64, b: f64) -> Beta {
        Beta::new(a, b).unwrap()
    }

    fn gamma(a: f64, r: f64) -> Gamma {
        Gamma::new(a, r).unwrap()
    }

    /// KL(Beta(a1,b1) || Beta(a2,b2)) and KL(Gamma) by mpmath 1.3 at 40 digits from the
    /// textbook formulas in the module comment (loggamma, digamma). Ours must be above (the
    /// rounding allowance, ~1e-11 here) and close: the allowance moves √(KL/2) by < 3e-6.
    #[test]
    fn divergences_match_mpmath_from_small_to_huge_counts() {
        let beta_cases = [
            // (a1, b1, a2, b2, KL) — mpmath
            (3.0, 5.0, 4.0, 5.0, 0.11202788984541662),
            (501.0, 9501.0, 511.0, 9701.0, 0.00037607992032801166),
            (
                1.0e7,
                9.9e8,
                1.0e7 + 1400.0,
                9.9e8 + 1.3e5,
                0.00037349011157463349,
            ),
            (0.5, 0.5, 0.5, 10.5, 12.126791314602454),
        ];
        for (a1, b1, a2, b2, want) in beta_cases {
            let got = beta_kl(&beta(a1, b1), &beta(a2, b2));
            assert!(got >= want, "upper bound: {got} < {want}");
            assert!(
                got - want <= 1e-7 * want + 1e-10,
                "beta {a1},{b1} -> {a2},{b2}: {got} vs {want}"
            );
        }
        let gamma_cases = [
            (6.0, 7.0, 33.0, 25.0, 4.1259947924205213),
            (
                1.0e6 + 1.0,
                1.0e6 + 1.0,
                1.001e6 + 1.0,
                1.0012e6 + 1.0,
                0.019977588915754128,
            ),
            (51.0, 101.0, 52.0, 103.0, 9.6437199874841692e-5),
        ];
        for (a1, r1, a2, r2, want) in gamma_cases {
            let got = gamma_kl(&gamma(a1, r1), &gamma(a2, r2));
            assert!(got >= want, "upper bound: {got} < {want}");
            assert!(
                got - want <= 1e-7 * want + 1e-10,
                "gamma {a1},{r1} -> {a2},{r2}: {got} vs {want}"
            );
        }
    }

    #[test]
    fn identical_posteriors_are_zero_apart() {
        let a = Arms::Beta(vec![beta(40.0, 960.0), beta(55.0, 945.0)]);
        assert!(shift_bound(&a, &a, 1).unwrap() < 1e-6);
        let g = Arms::Gamma(vec![gamma(40.0, 960.0), gamma(1e-3, 5.0)]);
        assert!(shift_bound(&g, &g, 1).unwrap() < 1e-6);
        assert_eq!(shift_bound(&a, &g, 0), None);
        assert!(pair_shift_bound(&a, &a, 0, 1).unwrap() < 1e-6);
    }

    #[test]
    fn the_joint_bound_is_never_looser_than_the_sum_of_the_arms() {
        let from = Arms::Beta(vec![beta(41.0, 960.0), beta(55.0, 946.0)]);
        let to = Arms::Beta(vec![beta(52.0, 1150.0), beta(61.0, 1141.0)]);
        let pair = pair_shift_bound(&from, &to, 0, 1).unwrap();
        let sum = shift_bound(&from, &to, 0).unwrap() + shift_bound(&from, &to, 1).unwrap();
        assert!(pair > 0.0 && pair <= sum, "{pair} vs {sum}");
    }
}
