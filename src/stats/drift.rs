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
    Some((divergence(from, to, i)?, divergence(to, from, i)?))
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

/// An upper bound on KL(from‖to) of the joint posterior of arms `i` and `j` (`i ≠ j`): the sum
/// of the arms' own. `None` when the arms are not of the same family or count.
pub fn pair_divergence(from: &Arms, to: &Arms, i: usize, j: usize) -> Option<f64> {
    Some(divergence(from, to, i)? + divergence(from, to, j)?)
}

/// KL(from_i ‖ to_i) of arm `i` alone (an upper bound).
fn divergence(from: &Arms, to: &Arms, i: usize) -> Option<f64> {
    match (from, to) {
        (Arms::Beta(p), Arms::Beta(q)) if p.len() == q.len() && i < p.len() => {
            Some(beta_kl(&p[i], &q[i]))
        }
        (Arms::Gamma(p), Arms::Gamma(q)) if p.len() == q.len() && i < p.len() => {
            Some(gamma_kl(&p[i], &q[i]))
        }
        _ => None,
    }
}

/// KL(from‖to) and KL(to‖from) of the joint posterior of arms `i` and `j` (`i ≠ j`): the sums
/// of the arms' own divergences (KL is additive over independent arms), each an upper bound.
/// `None` when the arms are not of the same family or count.
pub fn pair_divergences(from: &Arms, to: &Arms, i: usize, j: usize) -> Option<(f64, f64)> {
    let (fi, bi) = divergences(from, to, i)?;
    let (fj, bj) = divergences(from, to, j)?;
    Some((fi + fj, bi + bj))
}

/// A lower bound on kl(x‖y) = x·ln(x/y) + (1−x)·ln((1−x)/(1−y)), the divergence between two
/// Bernoulli laws, for 0 ≤ x, y ≤ 1 (+∞ where it is infinite). The logarithms are taken as
/// `ln_1p` of the relative difference, so that near x = y each term is accurate to a few
/// ulps of its own size; the allowance subtracted is 1e-12 of the terms' magnitudes plus
/// 1e-300, far above that.
fn binary_kl_lower(x: f64, y: f64) -> f64 {
    let term = |x: f64, y: f64| -> f64 {
        if x <= 0.0 {
            0.0
        } else if y <= 0.0 {
            f64::INFINITY
        } else {
            x * ((x - y) / y).ln_1p()
        }
    };
    let (t1, t2) = (term(x, y), term(1.0 - x, 1.0 - y));
    let value = t1 + t2;
    if !value.is_finite() {
        return value;
    }
    value - 1e-12 * (t1.abs() + t2.abs()) - 1e-300
}

/// True when an event whose probability under the earlier posterior `from` is at most `p` is
/// proven to have probability below `t` under the later posterior `to`, given upper bounds
/// `kl_from_to` = KL(from‖to) and `kl_to_from` = KL(to‖from) of the laws the event is one of.
///
/// **Why it is rigorous.** With p₀ = P_from(E) ≤ p and p₁ = P_to(E), the log-sum inequality
/// applied on E and on its complement gives kl(p₀‖p₁) ≤ KL(from‖to) and kl(p₁‖p₀) ≤
/// KL(to‖from): a divergence does not grow when the laws are reduced to one event (the
/// data-processing inequality; T. M. Cover and J. A. Thomas, *Elements of Information
/// Theory*, 2nd ed., Wiley 2006, §2.7 \[M\]). Suppose p₁ ≥ t > p ≥ p₀. kl(x‖y) is convex in each
/// argument with its minimum 0 at x = y, so kl(p₁‖p₀) ≥ kl(t‖p₀) ≥ kl(t‖p) and
/// kl(p₀‖p₁) ≥ kl(p₀‖t) ≥ kl(p‖t). Hence if kl(p‖t) > KL(from‖to) or kl(t‖p) > KL(to‖from),
/// then p₁ < t. This is never weaker than
/// Pinsker's inequality (kl(x‖y) ≥ 2(x − y)²), and much stronger for an event already far in a
/// tail: near p₀ ≈ 0.95, kl(p₁‖p₀) ≈ (p₁ − p₀)²/(2p₀(1 − p₀)), so the same divergence allows a
/// move 2√(p₀(1 − p₀)) ≈ 0.44 times the total variation bound.
pub fn proven_below(p: f64, t: f64, kl_from_to: f64, kl_to_from: f64) -> bool {
    if p.is_nan() || t.is_nan() || p >= t || t > 1.0 {
        return false;
    }
    let p = p.max(0.0);
    binary_kl_lower(p, t) > kl_from_to || binary_kl_lower(t, p) > kl_to_from
}

/// An upper bound on the Rényi divergence of order α > 1,
/// D_α(from‖to) = ln ∫ p_from^α · p_to^(1−α) / (α − 1), of Beta(a₁, b₁) from Beta(a₂, b₂);
/// +∞ where the integral diverges (α·a₁ + (1−α)·a₂ ≤ 0 or the same for b).
///
/// For an exponential family with log-partition A the integral is
/// exp(A(α·η₁ + (1−α)·η₂) − α·A(η₁) − (1−α)·A(η₂)); for the Beta A = ln Γ(a) + ln Γ(b) −
/// ln Γ(a + b). Writing every ln Γ(x + d) as ln Γ(x) + d·ψ(x) + R(x, d) (R of
/// `lgamma_remainder`), the ln Γ and ψ terms cancel exactly and, with Δ = a₂ − a₁,
/// each ln Γ term contributes R(x, (1−α)Δ)/(α − 1) + R(x, Δ): the same cancellation-free
/// pieces as the KL divergence (its limit at α → 1).
fn beta_renyi(from: &Beta, to: &Beta, alpha: f64) -> f64 {
    let part = |x: f64, d: f64| -> Option<(f64, f64)> {
        let shrunk = (1.0 - alpha) * d;
        if x + shrunk <= 0.0 {
            return None;
        }
        let (r1, m1) = lgamma_remainder(x, shrunk);
        let (r2, m2) = lgamma_remainder(x, d);
        Some((r1 / (alpha - 1.0) + r2, m1 / (alpha - 1.0) + m2))
    };
    let (a1, b1) = (from.alpha(), from.beta());
    let (a2, b2) = (to.alpha(), to.beta());
    let (Some((ra, ma)), Some((rb, mb)), Some((rn, mn))) = (
        part(a1, a2 - a1),
        part(b1, b2 - b1),
        part(a1 + b1, (a2 + b2) - (a1 + b1)),
    ) else {
        return f64::INFINITY;
    };
    (ra + rb - rn).max(0.0) + REL_SLACK * (ma + mb + mn) + ABS_SLACK
}

/// An upper bound on D_α(from‖to) (α > 1) of Gamma(a₁, r₁) from Gamma(a₂, r₂) (shape, rate);
/// +∞ where the integral diverges.
///
/// A = ln Γ(a) − a·ln r; with Δ = a₂ − a₁, v = r₂/r₁ − 1 and w = (1−α)·v the rate terms
/// reduce to a₁·[(1−α)·log1pmx(v) − log1pmx(w)] + (1−α)·Δ·[ln(1+v) − ln(1+w)] (the ln r₁
/// terms cancel exactly), so that D_α = [R(a₁, (1−α)Δ) − (1−α)·R(a₁, Δ) + those]/(α − 1).
fn gamma_renyi(from: &Gamma, to: &Gamma, alpha: f64) -> f64 {
    let (a1, r1) = (from.shape(), from.rate());
    let (a2, r2) = (to.shape(), to.rate());
    let d = a2 - a1;
    let shrunk = (1.0 - alpha) * d;
    let v = (r2 - r1) / r1;
    let w = (1.0 - alpha) * v;
    if a1 + shrunk <= 0.0 || w <= -1.0 {
        return f64::INFINITY;
    }
    let (r_shrunk, m1) = lgamma_remainder(a1, shrunk);
    let (r_d, m2) = lgamma_remainder(a1, d);
    let t1 = r_shrunk;
    let t2 = (alpha - 1.0) * r_d;
    let t3 = a1 * ((1.0 - alpha) * log1pmx(v) - log1pmx(w));
    let t4 = (1.0 - alpha) * d * (v.ln_1p() - w.ln_1p());
    let sum = t1 + t2 + t3 + t4;
    let m3 = a1 * ((alpha - 1.0) * log1pmx(v).abs() + log1pmx(w).abs());
    let m4 = ((1.0 - alpha) * d).abs() * (v.ln_1p().abs() + w.ln_1p().abs());
    let slack = REL_SLACK * (m1 + (alpha - 1.0) * m2 + m3 + m4);
    (sum.max(0.0) + slack) / (alpha - 1.0) + ABS_SLACK
}

/// An upper bound on D_α(from‖to) of the joint posterior of arms `i` and `j` (`i ≠ j`), α > 1:
/// the sum of the arms' own (Rényi divergences add over independent factors). `None` when the
/// arms are not of the same family or count.
pub fn pair_renyi(from: &Arms, to: &Arms, i: usize, j: usize, alpha: f64) -> Option<f64> {
    let one = |k: usize| match (from, to) {
        (Arms::Beta(p), Arms::Beta(q)) if p.len() == q.len() && k < p.len() => {
            Some(beta_renyi(&p[k], &q[k], alpha))
        }
        (Arms::Gamma(p), Arms::Gamma(q)) if p.len() == q.len() && k < p.len() => {
            Some(gamma_renyi(&p[k], &q[k], alpha))
        }
        _ => None,
    };
    Some(one(i)? + one(j)?)
}

/// A lower bound on the Rényi divergence of order α > 1 between Bernoulli laws,
/// d_α(x‖y) = ln(x^α·y^(1−α) + (1−x)^α·(1−y)^(1−α))/(α − 1), written as
/// ln(1 + x·expm1((α−1)·ln(x/y)) + (1−x)·expm1((α−1)·ln((1−x)/(1−y))))/(α − 1) so that near
/// x = y nothing is lost to the leading 1.
fn binary_renyi_lower(x: f64, y: f64, alpha: f64) -> f64 {
    let term = |x: f64, y: f64| -> f64 {
        if x <= 0.0 {
            0.0
        } else if y <= 0.0 {
            f64::INFINITY
        } else {
            x * ((alpha - 1.0) * ((x - y) / y).ln_1p()).exp_m1()
        }
    };
    let (t1, t2) = (term(x, y), term(1.0 - x, 1.0 - y));
    let sum = t1 + t2;
    if !sum.is_finite() {
        return sum;
    }
    let sum = sum - 1e-12 * (t1.abs() + t2.abs()) - 1e-300;
    if sum <= -1.0 {
        return 0.0;
    }
    sum.ln_1p() / (alpha - 1.0) - 1e-15
}

/// The orders `proven_below_renyi` tries, from near KL to ones that favour events far in a
/// tail (for a probability at 0.95 and a threshold at 0.99 the best is about 5).
pub const RENYI_ORDERS: [f64; 5] = [1.5, 2.0, 3.0, 5.0, 9.0];

/// True when an event whose probability under `from` is at most `p` is proven below `t` under
/// `to`, given an upper bound `renyi_from_to` on D_α(from‖to) (α > 1).
///
/// **Why it is rigorous.** Rényi divergences of every order satisfy the data-processing
/// inequality (T. van Erven and P. Harremoës, "Rényi divergence and Kullback–Leibler
/// divergence", IEEE Trans. Inf. Theory 60(7), 2014, Theorem 9 \[M\]), so with p₀ = P_from(E) and
/// p₁ = P_to(E), d_α(p₀‖p₁) ≤ D_α(from‖to). d_α(x‖y) does not decrease as x and y move apart
/// (the same inequality: for y ≤ x′ ≤ x a channel that maps Bernoulli(y) to itself takes
/// Bernoulli(x) to Bernoulli(x′), and likewise in the second argument; docs/methods.md §9
/// gives the channel), so p₀ ≤ p < t ≤ p₁
/// would give d_α(p‖t) ≤ d_α(p₀‖p₁) ≤ D_α; hence d_α(p‖t) > D_α proves p₁ < t. For a location
/// shift of a normal law the best order decides moves 2 to 3 times longer than KL near
/// p = 0.95 (docs/methods.md §9).
pub fn proven_below_renyi(p: f64, t: f64, alpha: f64, renyi_from_to: f64) -> bool {
    if p.is_nan() || t.is_nan() || p >= t || t > 1.0 || alpha.is_nan() || alpha <= 1.0 {
        return false;
    }
    binary_renyi_lower(p.max(0.0), t, alpha) > renyi_from_to
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

    /// kl(x‖y) of two Bernoulli laws by mpmath 1.3 at 40 digits (x·ln(x/y) + (1−x)·ln((1−x)/(1−y))
    /// of the decimal inputs). Ours is a lower bound and close to it.
    #[test]
    fn binary_divergence_is_a_close_lower_bound() {
        let cases = [
            (0.95, 0.99, 0.041291085014358418518),
            (0.99, 0.95, 0.02473614982436762031),
            (0.3, 0.7, 0.33891914415488137971),
            (0.0, 0.99, 4.6051701859880904799),
            (0.999999, 0.99, 0.010040115463293355498),
            (1e-12, 0.01, 0.010050335829465540128),
        ];
        for (x, y, want) in cases {
            let got = binary_kl_lower(x, y);
            assert!(got <= want, "kl({x}‖{y}) = {got} above {want}");
            assert!(got >= want * (1.0 - 1e-10), "kl({x}‖{y}) = {got} vs {want}");
        }
        // Near equality: (x − y)²/(2y(1 − y)) to first order, 2e-14 here (mpmath:
        // 1.9999999978946166094e-14 for the decimal inputs); never negative beyond the allowance.
        let near = binary_kl_lower(0.5, 0.5000001);
        assert!(near < 2.0e-14 && near > 1.99e-14, "{near}");
        assert_eq!(binary_kl_lower(0.5, 0.0), f64::INFINITY);
    }

    #[test]
    fn proven_below_follows_the_divergence_and_refuses_what_it_cannot_show() {
        // kl(0.95‖0.99) = 0.0413, kl(0.99‖0.95) = 0.0247 (mpmath, above).
        assert!(proven_below(0.95, 0.99, 0.04, 1.0));
        assert!(proven_below(0.95, 0.99, 1.0, 0.024));
        assert!(!proven_below(0.95, 0.99, 0.042, 0.025));
        // Pinsker alone would need √(KL/2) < 0.04, i.e. KL < 0.0032: this divergence is 7×
        // that and still decides.
        assert!(proven_below(0.95, 0.99, 0.023, 0.023));
        assert!(!proven_below(0.99, 0.99, 0.0, 0.0));
        assert!(!proven_below(f64::NAN, 0.99, 0.0, 0.0));
        assert!(proven_below(0.0, 0.5, 0.69, 1e9));
    }

    /// D_α of Beta and Gamma posteriors by mpmath 1.3 at 50 digits from the exponential-family
    /// closed form [A(α·η₁ + (1−α)·η₂) − α·A(η₁) − (1−α)·A(η₂)]/(α − 1) with loggamma (not the
    /// regrouped form used here). Ours must be above and close.
    #[test]
    fn renyi_divergences_match_mpmath_and_diverge_where_the_integral_does() {
        let beta_cases = [
            // (a1, b1, a2, b2, α, D_α) — mpmath
            (3.0, 5.0, 4.0, 5.0, 2.0, 0.27193371548364175883),
            (501.0, 9501.0, 511.0, 9701.0, 5.0, 0.0020333689691066842917),
            (
                1.0e7,
                9.9e8,
                1.0e7 + 1400.0,
                9.9e8 + 1.3e5,
                3.0,
                0.001120771233059141178,
            ),
            (0.5, 0.5, 0.5, 0.7, 1.5, 0.089749663694963654723),
            (40.0, 960.0, 41.0, 965.0, 9.0, 0.07573415187772658236),
        ];
        for (a1, b1, a2, b2, alpha, want) in beta_cases {
            let got = beta_renyi(&beta(a1, b1), &beta(a2, b2), alpha);
            assert!(got >= want, "upper bound: {got} < {want}");
            assert!(
                got - want <= 1e-7 * want + 1e-10,
                "beta {a1},{b1} -> {a2},{b2} at {alpha}: {got} vs {want}"
            );
        }
        let gamma_cases = [
            (6.0, 7.0, 7.0, 8.0, 2.0, 0.018355207558587785652),
            (
                1.0e6 + 1.0,
                1.0e6 + 1.0,
                1.001e6 + 1.0,
                1.0012e6 + 1.0,
                5.0,
                0.1003428319844237619,
            ),
            (51.0, 101.0, 52.0, 103.0, 9.0, 0.00097170091158067525062),
        ];
        for (a1, r1, a2, r2, alpha, want) in gamma_cases {
            let got = gamma_renyi(&gamma(a1, r1), &gamma(a2, r2), alpha);
            assert!(got >= want, "upper bound: {got} < {want}");
            assert!(
                got - want <= 1e-7 * want + 1e-10,
                "gamma {a1},{r1} -> {a2},{r2} at {alpha}: {got} vs {want}"
            );
        }
        // 9·40 + (1 − 9)·52 < 0: the integral diverges.
        assert_eq!(
            beta_renyi(&beta(40.0, 960.0), &beta(52.0, 1150.0), 9.0),
            f64::INFINITY
        );
        assert_eq!(
            gamma_renyi(&gamma(40.0, 960.0), &gamma(52.0, 1150.0), 9.0),
            f64::INFINITY
        );
    }

    /// d_α of Bernoulli laws by mpmath (50 digits, the direct form).
    #[test]
    fn binary_renyi_divergence_is_a_close_lower_bound() {
        let cases = [
            (0.95, 0.99, 5.0, 0.86686736316758304306),
            (0.5, 0.99, 1.5, 2.7172647606430726793),
            (0.9, 0.99, 3.0, 1.1871644989264423745),
            (0.0, 0.5, 2.0, std::f64::consts::LN_2), // mpmath: 0.69314718055994530942
            (0.5, 0.5000001, 2.0, 3.9999999957892332187e-14),
        ];
        for (x, y, alpha, want) in cases {
            let got = binary_renyi_lower(x, y, alpha);
            assert!(got <= want, "d_{alpha}({x}‖{y}) = {got} above {want}");
            assert!(
                got >= want * (1.0 - 1e-9) - 2e-15,
                "d_{alpha}({x}‖{y}) = {got} vs {want}"
            );
        }
        // From 0.95 to 0.99, order 5 decides a divergence KL could not (kl(0.95‖0.99) = 0.041).
        assert!(proven_below_renyi(0.95, 0.99, 5.0, 0.8));
        assert!(!proven_below_renyi(0.95, 0.99, 5.0, 0.9));
        assert!(!proven_below_renyi(0.99, 0.99, 5.0, 0.0));
        assert!(!proven_below_renyi(0.5, 0.99, 1.0, 0.0));
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
