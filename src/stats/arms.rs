//! Decision quantities for k = 2..=64 arms with one control: P(best), expected loss,
//! P(beats control), relative lift, ROPE and harm probabilities.
//!
//! Every quantity is a 1-D integral over one shared grid (see `grid`): with independent
//! posteriors, P(i best) = ∫ f_i Π_{j≠i} F_j and E[max_j θ_j − θ_i] = ∫ F_i (1 − Π_{j≠i} F_j) dθ
//! (E. Miller, "Formulas for Bayesian A/B Testing", 2015, for the k-arm integrals; the loss
//! form from (X − Y)⁺ = ∫ 1{Y < u < X} du). For "lower is better" (defect rates) F and S swap.
//! 1 − Π F_j is accumulated as a sum of positive terms, (1 − PQ) = (1 − P) + P(1 − Q), so a
//! tiny loss never arises as a difference of numbers near 1.

use statrs::distribution::{ContinuousCDF, Normal};

use super::grid::{logistic, rule, softplus, Grid, Kernel, NP};
use super::posterior::tail_levels;
use super::{Beta, Gamma, Interval, StatsError};

/// Largest number of arms `compare` accepts.
pub const MAX_ARMS: usize = 64;

/// The posteriors of all arms of one metric, in input order.
#[derive(Clone, Debug, PartialEq)]
pub enum Arms {
    /// Conversion rates: higher is better.
    Beta(Vec<Beta>),
    /// Defect rates per unit exposure: lower is better.
    Gamma(Vec<Gamma>),
}

impl Arms {
    /// Number of arms.
    pub fn len(&self) -> usize {
        match self {
            Arms::Beta(v) => v.len(),
            Arms::Gamma(v) => v.len(),
        }
    }

    /// True when there are no arms.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// Whether a higher rate is the better outcome for this metric.
    pub fn higher_is_better(&self) -> bool {
        matches!(self, Arms::Beta(_))
    }
}

/// Options for [`compare`].
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct CompareOptions {
    /// Index of the control arm.
    pub control: usize,
    /// Probability level of every credible interval (0 < level < 1).
    pub level: f64,
    /// Half-width of the region of practical equivalence on the relative lift: the variant is
    /// practically equivalent when |θ_v/θ_c − 1| < rope.
    pub rope: f64,
    /// Relative margin for harm: a conversion variant harms when θ_v < (1 − m)·θ_c, a defect
    /// variant when θ_v > (1 + m)·θ_c.
    pub harm_margin: f64,
}

impl Default for CompareOptions {
    fn default() -> Self {
        CompareOptions {
            control: 0,
            level: 0.95,
            rope: 0.01,
            harm_margin: 0.0,
        }
    }
}

/// Relative lift θ_v/θ_c − 1 of a variant against the control.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Lift {
    /// Posterior mean E[θ_v]·E[1/θ_c] − 1; +∞ when the control's first shape is ≤ 1, where
    /// E[1/θ_c] diverges.
    pub mean: f64,
    /// Equal-tailed credible interval of the lift.
    pub interval: Interval,
}

/// Everything `compare` reports for one arm.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct ArmSummary {
    /// Posterior mean of the rate.
    pub mean: f64,
    /// Posterior standard deviation of the rate.
    pub sd: f64,
    /// Equal-tailed credible interval of the rate.
    pub interval: Interval,
    /// Probability that this arm is the best of all k (sums to 1 over the arms).
    pub prob_best: f64,
    /// Expected regret of shipping this arm, in rate units: E[max_j θ_j − θ_v] for conversion,
    /// E[θ_v − min_j θ_j] for defect rates.
    pub expected_loss: f64,
    /// P(θ_v > θ_c) for conversion, P(θ_v < θ_c) for defect rates; None for the control.
    pub prob_beats_control: Option<f64>,
    /// Relative lift against the control; None for the control.
    pub lift: Option<Lift>,
    /// P(|θ_v/θ_c − 1| < rope); None for the control.
    pub prob_practically_equivalent: Option<f64>,
    /// P(variant worse than control by more than the harm margin, relative); None for the
    /// control.
    pub prob_harm: Option<f64>,
}

/// Compute every decision quantity for `arms`, returned in input order.
pub fn compare(arms: &Arms, opts: &CompareOptions) -> Result<Vec<ArmSummary>, StatsError> {
    let k = arms.len();
    if !(2..=MAX_ARMS).contains(&k) {
        return Err(StatsError::ArmCount(k));
    }
    if opts.control >= k {
        return Err(StatsError::ControlOutOfRange {
            control: opts.control,
            n_arms: k,
        });
    }
    let (lo_q, hi_q) = tail_levels(opts.level)?;
    if !opts.rope.is_finite() || opts.rope < 0.0 {
        return Err(StatsError::InvalidMargin {
            name: "rope",
            value: opts.rope,
        });
    }
    if !opts.harm_margin.is_finite() || opts.harm_margin < 0.0 {
        return Err(StatsError::InvalidMargin {
            name: "harm_margin",
            value: opts.harm_margin,
        });
    }
    let higher = arms.higher_is_better();
    let (kernels, moments): (Vec<Kernel>, Vec<(f64, f64, f64)>) = match arms {
        Arms::Beta(v) => (
            v.iter().map(Beta::kernel).collect(),
            v.iter()
                .map(|b| {
                    let inv = if b.alpha() > 1.0 {
                        (b.alpha() + b.beta() - 1.0) / (b.alpha() - 1.0)
                    } else {
                        f64::INFINITY
                    };
                    (b.mean(), b.sd(), inv)
                })
                .collect(),
        ),
        Arms::Gamma(v) => (
            v.iter().map(Gamma::kernel).collect(),
            v.iter()
                .map(|g| {
                    let inv = if g.shape() > 1.0 {
                        g.rate() / (g.shape() - 1.0)
                    } else {
                        f64::INFINITY
                    };
                    (g.mean(), g.sd(), inv)
                })
                .collect(),
        ),
    };
    let grid = Grid::new(&kernels)?;
    let c = opts.control;
    let totals = integrate_all(&grid, c, higher);

    let log_cumulants: Vec<[f64; 4]> = (0..k).map(|j| log_cumulants(&grid, j, higher)).collect();
    let mut out = Vec::with_capacity(k);
    for j in 0..k {
        let kernel = grid.arms[j].kernel;
        let interval = Interval {
            level: opts.level,
            lower: kernel.value(grid.quantile_t(j, lo_q)),
            upper: kernel.value(grid.quantile_t(j, hi_q)),
        };
        let (mean, sd, _) = moments[j];
        let mut summary = ArmSummary {
            mean,
            sd,
            interval,
            prob_best: totals.best[j].clamp(0.0, 1.0),
            expected_loss: totals.loss[j].max(0.0),
            prob_beats_control: None,
            lift: None,
            prob_practically_equivalent: None,
            prob_harm: None,
        };
        if j != c {
            summary.prob_beats_control = Some(totals.beats[j].clamp(0.0, 1.0));
            let ratio = Ratio::new(&grid, j, c, higher);
            let guess = ratio_guess(&log_cumulants[j], &log_cumulants[c]);
            let lower = ratio.quantile(lo_q, &guess)?;
            let upper = ratio.quantile(hi_q, &guess)?;
            let lift_mean = if moments[c].2.is_finite() {
                moments[j].0 * moments[c].2 - 1.0
            } else {
                f64::INFINITY
            };
            summary.lift = Some(Lift {
                mean: lift_mean,
                interval: Interval {
                    level: opts.level,
                    lower: lower.exp_m1(),
                    upper: upper.exp_m1(),
                },
            });
            let rope_hi = ratio.eval(opts.rope.ln_1p()).cdf;
            let rope_lo = if opts.rope < 1.0 {
                ratio.eval((-opts.rope).ln_1p()).cdf
            } else {
                0.0
            };
            summary.prob_practically_equivalent = Some((rope_hi - rope_lo).clamp(0.0, 1.0));
            let harm = if higher {
                if opts.harm_margin < 1.0 {
                    ratio.eval((-opts.harm_margin).ln_1p()).cdf
                } else {
                    0.0
                }
            } else {
                ratio.eval(opts.harm_margin.ln_1p()).sf
            };
            summary.prob_harm = Some(harm.clamp(0.0, 1.0));
        }
        out.push(summary);
    }
    Ok(out)
}

struct Totals {
    best: Vec<f64>,
    loss: Vec<f64>,
    beats: Vec<f64>,
}

/// One pass over all nodes: P(best), expected loss and P(beats control) for every arm.
fn integrate_all(grid: &Grid, control: usize, higher: bool) -> Totals {
    let k = grid.arms.len();
    let r = rule();
    let jac_kernel = grid.arms[0].kernel;
    let mut totals = Totals {
        best: vec![0.0; k],
        loss: vec![0.0; k],
        beats: vec![0.0; k],
    };
    // "good" = P(θ_j below u) for higher-is-better, P(θ_j above u) otherwise; "bad" is its
    // complement, both taken from the tables (never 1 − the other).
    let mut dens = vec![0.0; k];
    let mut good = vec![0.0; k];
    let mut bad = vec![0.0; k];
    let mut pre = vec![0.0; k + 1];
    let mut cpre = vec![0.0; k + 1];
    let mut suf = vec![0.0; k + 1];
    let mut csuf = vec![0.0; k + 1];
    for p in 0..grid.n_panels() {
        let half = 0.5 * (grid.breaks[p + 1] - grid.breaks[p]);
        for i in 0..NP {
            let t = grid.node(p, i);
            let w = half * r.w[i];
            let jac = jac_kernel.jacobian(t);
            for j in 0..k {
                let arm = &grid.arms[j];
                let (g, f, s) = if p < arm.p0 {
                    (0.0, 0.0, 1.0)
                } else if p >= arm.p1 {
                    (0.0, 1.0, 0.0)
                } else {
                    let idx = (p - arm.p0) * NP + i;
                    (arm.dens[idx], arm.cdf[idx], arm.sf[idx])
                };
                dens[j] = g;
                if higher {
                    good[j] = f;
                    bad[j] = s;
                } else {
                    good[j] = s;
                    bad[j] = f;
                }
            }
            pre[0] = 1.0;
            cpre[0] = 0.0;
            for j in 0..k {
                pre[j + 1] = pre[j] * good[j];
                cpre[j + 1] = cpre[j] + pre[j] * bad[j];
            }
            suf[k] = 1.0;
            csuf[k] = 0.0;
            for j in (0..k).rev() {
                suf[j] = suf[j + 1] * good[j];
                csuf[j] = csuf[j + 1] + suf[j + 1] * bad[j];
            }
            for j in 0..k {
                let others = pre[j] * suf[j + 1];
                let not_others = cpre[j] + pre[j] * csuf[j + 1];
                totals.best[j] += w * dens[j] * others;
                totals.loss[j] += w * jac * good[j] * not_others;
                totals.beats[j] += w * dens[j] * good[control];
            }
        }
    }
    totals
}

/// First four cumulants of ln θ_j from the grid (used only to start the lift root search).
fn log_cumulants(grid: &Grid, j: usize, beta: bool) -> [f64; 4] {
    let arm = &grid.arms[j];
    let ln_theta = |t: f64| if beta { -softplus(-t) } else { t };
    let mut m1 = 0.0;
    for p in arm.p0..arm.p1 {
        for i in 0..NP {
            m1 += grid.weight(p, i) * arm.dens[(p - arm.p0) * NP + i] * ln_theta(grid.node(p, i));
        }
    }
    let (mut m2, mut m3, mut m4) = (0.0, 0.0, 0.0);
    for p in arm.p0..arm.p1 {
        for i in 0..NP {
            let d = ln_theta(grid.node(p, i)) - m1;
            let w = grid.weight(p, i) * arm.dens[(p - arm.p0) * NP + i];
            m2 += w * d * d;
            m3 += w * d * d * d;
            m4 += w * d * d * d * d;
        }
    }
    [m1, m2, m3, m4 - 3.0 * m2 * m2]
}

/// Cumulants of s = ln θ_v − ln θ_c.
fn ratio_guess(v: &[f64; 4], c: &[f64; 4]) -> [f64; 4] {
    [v[0] - c[0], v[1] + c[1], v[2] - c[2], v[3] + c[3]]
}

/// The distribution of s = ln(θ_v/θ_c) by quadrature over the narrower arm (in its working
/// variable), with the wider arm's CDF interpolated at the image of each node.
struct Ratio<'a> {
    grid: &'a Grid,
    v: usize,
    c: usize,
    beta: bool,
    /// Nodes of the variant and of the control.
    nodes_v: Vec<OuterNode>,
    nodes_c: Vec<OuterNode>,
    /// Largest conversion rate carried by each arm's nodes (for the kink test in `eval`).
    top_v: f64,
    top_c: f64,
    variant_is_narrower: bool,
}

/// A node of the outer arm with everything that does not depend on s precomputed.
struct OuterNode {
    t: f64,
    /// Quadrature weight × density.
    wg: f64,
    /// ln x (conversion only).
    ln_x: f64,
    /// 1 − x (conversion only).
    comp: f64,
}

fn outer_nodes(grid: &Grid, j: usize, beta: bool) -> (Vec<OuterNode>, f64) {
    let arm = &grid.arms[j];
    let mut nodes = Vec::with_capacity((arm.p1 - arm.p0) * NP);
    let mut top = 0.0f64;
    for p in arm.p0..arm.p1 {
        for i in 0..NP {
            let wg = grid.weight(p, i) * arm.dens[(p - arm.p0) * NP + i];
            // Dropped nodes carry < 1e-19 each: far below the 1e-15 the sums resolve.
            if wg <= 1e-19 {
                continue;
            }
            let t = grid.node(p, i);
            let (ln_x, comp) = if beta {
                (-softplus(-t), logistic(-t))
            } else {
                (0.0, 0.0)
            };
            top = top.max(logistic(t));
            nodes.push(OuterNode { t, wg, ln_x, comp });
        }
    }
    (nodes, top)
}

/// P(s_R ≤ s), P(s_R > s) and the density of s_R at s.
#[derive(Clone, Copy, Debug)]
struct RatioValue {
    cdf: f64,
    sf: f64,
    dens: f64,
}

impl<'a> Ratio<'a> {
    fn new(grid: &'a Grid, v: usize, c: usize, beta: bool) -> Ratio<'a> {
        let (nodes_v, top_v) = outer_nodes(grid, v, beta);
        let (nodes_c, top_c) = outer_nodes(grid, c, beta);
        let variant_is_narrower = grid.arms[v].kernel.sd() <= grid.arms[c].kernel.sd();
        Ratio {
            grid,
            v,
            c,
            beta,
            nodes_v,
            nodes_c,
            top_v,
            top_c,
            variant_is_narrower,
        }
    }

    fn eval(&self, s: f64) -> RatioValue {
        // Over the control: θ_v ≤ e^s θ_c ⟺ τ_v ≤ image of t under θ ↦ e^s θ.
        // Over the variant: θ_v ≤ e^s θ_c ⟺ τ_c ≥ image of t under θ ↦ e^-s θ.
        // For conversion rates a map with factor > 1 sends some θ past 1, where the integrand
        // has a kink that quadrature resolves only to O(h²); the other orientation (factor
        // < 1) is smooth, so it is used whenever the narrower arm's nodes would reach the kink.
        let mut over_variant = self.variant_is_narrower;
        if self.beta {
            let (factor, top) = if over_variant {
                ((-s).exp(), self.top_v)
            } else {
                (s.exp(), self.top_c)
            };
            if factor * top >= 1.0 {
                over_variant = !over_variant;
            }
        }
        let (nodes, inner) = if over_variant {
            (&self.nodes_v, self.c)
        } else {
            (&self.nodes_c, self.v)
        };
        let shift = if over_variant { -s } else { s };
        let rho = shift.exp();
        let one_minus_rho = -shift.exp_m1();
        let mut acc = RatioValue {
            cdf: 0.0,
            sf: 0.0,
            dens: 0.0,
        };
        let mut cursor = self.grid.arms[inner].p0;
        for node in nodes {
            let image = if self.beta {
                let ln_rx = shift + node.ln_x;
                // 1 − ρx as a sum of positive terms when ρ ≤ 1: (1 − ρ) + ρ(1 − x).
                let one_minus = if shift <= 0.0 {
                    one_minus_rho + rho * node.comp
                } else {
                    -ln_rx.exp_m1()
                };
                if ln_rx >= 0.0 || one_minus <= 0.0 {
                    None
                } else {
                    Some((ln_rx - one_minus.ln(), 1.0 / one_minus))
                }
            } else {
                Some((node.t + shift, 1.0))
            };
            let (below, above, dens) = match image {
                // The image left the support (a conversion rate above 1): certainly below.
                None => (1.0, 0.0, 0.0),
                Some((tau, dtau)) => {
                    let pv = self.grid.eval_near(inner, tau, &mut cursor);
                    (pv.cdf, pv.sf, pv.dens * dtau)
                }
            };
            if over_variant {
                acc.cdf += node.wg * above;
                acc.sf += node.wg * below;
            } else {
                acc.cdf += node.wg * below;
                acc.sf += node.wg * above;
            }
            acc.dens += node.wg * dens;
        }
        acc
    }

    /// The s with P(ln R ≤ s) = q: safeguarded Newton from a Cornish–Fisher start.
    fn quantile(&self, q: f64, cumulants: &[f64; 4]) -> Result<f64, StatsError> {
        let z = Normal::new(0.0, 1.0)
            .map_err(|_| StatsError::Numerical("normal"))?
            .inverse_cdf(q);
        let sd = cumulants[1].max(0.0).sqrt();
        let (skew, kurt) = if sd > 0.0 {
            (
                cumulants[2] / (sd * sd * sd),
                cumulants[3] / (sd * sd * sd * sd),
            )
        } else {
            (0.0, 0.0)
        };
        // Cornish–Fisher expansion to second order (Abramowitz & Stegun 26.2.49).
        let w = z + (z * z - 1.0) * skew / 6.0 + (z * z * z - 3.0 * z) * kurt / 24.0
            - (2.0 * z * z * z - 5.0 * z) * skew * skew / 36.0;
        let mut s = cumulants[0] + sd * w;
        if !s.is_finite() {
            s = cumulants[0];
        }
        let upper_tail = q > 0.5;
        let target = if upper_tail { 1.0 - q } else { q };
        let (mut lo, mut hi) = (f64::NEG_INFINITY, f64::INFINITY);
        let mut step = sd.max(1e-12);
        for _ in 0..100 {
            let val = self.eval(s);
            let h = if upper_tail {
                target - val.sf
            } else {
                val.cdf - target
            };
            if h == 0.0 {
                return Ok(s);
            }
            if h < 0.0 {
                lo = s;
            } else {
                hi = s;
            }
            let newton = if val.dens > 0.0 {
                s - h / val.dens
            } else {
                f64::NAN
            };
            // Newton converges quadratically: after a step this small the remaining error is
            // ~1e-14 sd, below what the quadrature resolves, so no confirming evaluation.
            if newton.is_finite() && newton > lo && newton < hi && (newton - s).abs() <= 1e-7 * sd {
                return Ok(newton);
            }
            let next = if newton.is_finite() && newton > lo && newton < hi {
                newton
            } else if lo.is_finite() && hi.is_finite() {
                0.5 * (lo + hi)
            } else {
                step *= 2.0;
                if h < 0.0 {
                    s + step
                } else {
                    s - step
                }
            };
            let moved = (next - s).abs();
            s = next;
            if moved <= 1e-14 * (1.0 + s.abs()) {
                return Ok(s);
            }
            if lo.is_finite() && hi.is_finite() && hi - lo <= 1e-14 * (1.0 + s.abs()) {
                return Ok(s);
            }
        }
        Err(StatsError::Numerical(
            "lift quantile search did not converge",
        ))
    }
}
