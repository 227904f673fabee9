//! Anytime-valid evidence of harm: a test martingale (e-process) per metric and variant against
//! "the variant is not worse than the control by more than the margin", and an anytime-valid
//! confidence sequence for the ratio of the two rates. Pure arithmetic on the totals between
//! two looks; no clocks, no I/O.
//!
//! # Construction (docs/methods.md §5)
//! - **Conversion** (Bernoulli streams). Units arrive in random order, each in the control with
//!   probability w_c and in the variant with w_v (the planned weights, renormalised to the
//!   pair). Before a block of units, estimates (q_c, q_v) are fixed from the data so far; each
//!   unit then multiplies the process by q_arm(x)/r_arm(x), where (r_c, r_v = a·r_c) is the
//!   point of the null boundary θ_v = a·θ_c chosen so that E_θ[factor] = w_c f_c(θ_c) +
//!   w_v f_v(a·θ_c) — linear in θ_c, equal to 1 at r_c — has slope 0: then it is exactly 1 on
//!   the whole boundary and below 1 inside the null. The slope condition is a quadratic in
//!   r_c. With a = 1 its root is r = w_c q_c + w_v q_v, the weighted average that Turner, Ly &
//!   Grünwald (2024, JSPI 230, 106116, §3, 2×2 tables with block sizes n_a, n_b) give for the
//!   optimal ("GROW") e-variable of two Bernoulli streams [from memory].
//! - **Defect rates** (Poisson counts per exposure). Given a block's total count K and its
//!   exposure split, the variant's share of defects is Binomial(K, π) with
//!   π = s·λ_v/(s·λ_v + (1 − s)·λ_c), s the variant's share of the block's exposure; the null
//!   λ_v ≤ b·λ_c becomes π ≤ π₀ and each block multiplies the process by the likelihood ratio
//!   of a predictable π̂ > π₀ against π₀.
//!
//! A product of such factors is a nonnegative supermartingale with initial value 1 under every
//! null; by Ville's inequality it ever reaches 1/α with probability at most α, however often it
//! is looked at (Howard, Ramdas, McAuliffe & Sekhon 2021, Ann. Statist. 49(2), §2 [from
//! memory]; the "always valid p-value" min(1, 1/max E) is that of Johari, Koomen, Pekelis &
//! Walsh, KDD 2017 [from memory]). Inverting one such process per candidate ratio gives the
//! confidence sequence: the ratios whose process stays below 1/α.

use std::collections::HashMap;

use crate::experiment::MetricKind;
use crate::state::{ExperimentSnapshot, MetricTotals};

/// Log-ratio grid of the confidence sequence: ratios e^(−1.5) … e^(1.5) (lifts −78% … +348%)
/// in steps of 0.01 in the log, i.e. 1% relative resolution.
pub const GRID_LOG_MIN: f64 = -1.5;
/// Step of the confidence sequence's log-ratio grid.
pub const GRID_STEP: f64 = 0.01;
/// Points of the confidence sequence's grid.
pub const GRID_POINTS: usize = 301;

/// Which model a stream follows.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Stream {
    /// Units that convert or not (higher is better).
    Conversion,
    /// Defects per exposure (lower is better).
    Defect,
}

/// Totals of one arm: (units, conversions) or (exposure, defects).
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct ArmTotals {
    /// Units (conversion) or exposure (defects).
    pub size: f64,
    /// Conversions or defects.
    pub events: f64,
}

/// The e-process of one (metric, variant) pair against the control, and its confidence
/// sequence.
#[derive(Debug, Clone, PartialEq)]
pub struct HarmProcess {
    stream: Stream,
    /// Relative margin of the harm null (conversion: θ_v ≥ (1 − m)θ_c; defects:
    /// λ_v ≤ (1 + m)λ_c).
    margin: f64,
    /// ln of the current value.
    log_e: f64,
    /// ln of the largest value reached.
    log_max: f64,
    /// Totals at the last update: control, variant.
    last: [ArmTotals; 2],
    /// Blocks folded in.
    blocks: u64,
    /// Conversions that arrived in a block without new units of their arm (a unit converts
    /// after the look that counted it): carried to the arm's next units, so that a late
    /// conversion is counted once rather than lost.
    pending: [f64; 2],
    /// ln of the e-process of "ratio = grid point" for every grid point; empty when the
    /// confidence sequence is not kept (`plan`).
    grid: Vec<f64>,
}

/// Where the process stands.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Standing {
    /// Current value of the e-process.
    pub e_value: f64,
    /// Largest value reached (the rule holds once it reached 1/α).
    pub max_e_value: f64,
    /// Always-valid p-value min(1, 1/max E).
    pub p_value: f64,
}

impl HarmProcess {
    /// A process at 1 with no data; `with_interval` keeps the confidence sequence.
    pub fn new(stream: Stream, margin: f64, with_interval: bool) -> HarmProcess {
        HarmProcess {
            stream,
            margin,
            log_e: 0.0,
            log_max: 0.0,
            last: [ArmTotals::default(); 2],
            blocks: 0,
            pending: [0.0; 2],
            grid: if with_interval {
                vec![0.0; GRID_POINTS]
            } else {
                Vec::new()
            },
        }
    }

    /// The whole state as plain numbers, to hand over or store it (a pure core keeps no
    /// encoding): stream (0 conversion, 1 defect), margin, ln E, ln max E, the last totals of
    /// control and variant, blocks, the pending conversions, then the grid.
    pub fn to_numbers(&self) -> Vec<f64> {
        let mut out = vec![
            match self.stream {
                Stream::Conversion => 0.0,
                Stream::Defect => 1.0,
            },
            self.margin,
            self.log_e,
            self.log_max,
            self.last[0].size,
            self.last[0].events,
            self.last[1].size,
            self.last[1].events,
            self.blocks as f64,
            self.pending[0],
            self.pending[1],
        ];
        out.extend_from_slice(&self.grid);
        out
    }

    /// The process [`HarmProcess::to_numbers`] gave; `None` if they do not describe one.
    pub fn from_numbers(n: &[f64]) -> Option<HarmProcess> {
        if n.len() != 11 && n.len() != 11 + GRID_POINTS {
            return None;
        }
        let stream = if n[0] == 0.0 {
            Stream::Conversion
        } else if n[0] == 1.0 {
            Stream::Defect
        } else {
            return None;
        };
        Some(HarmProcess {
            stream,
            margin: n[1],
            log_e: n[2],
            log_max: n[3],
            last: [
                ArmTotals {
                    size: n[4],
                    events: n[5],
                },
                ArmTotals {
                    size: n[6],
                    events: n[7],
                },
            ],
            blocks: n[8] as u64,
            pending: [n[9], n[10]],
            grid: n[11..].to_vec(),
        })
    }

    /// The margin this process tests.
    pub fn margin(&self) -> f64 {
        self.margin
    }

    /// Blocks folded in so far.
    pub fn blocks(&self) -> u64 {
        self.blocks
    }

    /// Where the process stands.
    pub fn standing(&self) -> Standing {
        Standing {
            e_value: self.log_e.exp(),
            max_e_value: self.log_max.exp(),
            p_value: (-self.log_max).exp().min(1.0),
        }
    }

    /// Whether the process ever reached 1/`alpha`.
    pub fn alarmed(&self, alpha: f64) -> bool {
        self.log_max >= (1.0 / alpha).ln()
    }

    /// Fold in the data between the last update and `now` (control, variant totals; totals
    /// only grow). `weights` are the planned shares of the control and the variant (used for
    /// conversion; defects use the block's own exposure split).
    pub fn update(&mut self, now: [ArmTotals; 2], weights: [f64; 2]) {
        let d = |i: usize| ArmTotals {
            size: (now[i].size - self.last[i].size).max(0.0),
            events: (now[i].events - self.last[i].events).max(0.0),
        };
        let (mut dc, mut dv) = (d(0), d(1));
        if dc.size <= 0.0 && dv.size <= 0.0 && dc.events <= 0.0 && dv.events <= 0.0 {
            return;
        }
        if self.stream == Stream::Conversion {
            for (i, x) in [&mut dc, &mut dv].into_iter().enumerate() {
                let available = x.events + self.pending[i];
                x.events = available.min(x.size);
                self.pending[i] = available - x.events;
            }
        }
        let past = self.last;
        let factor = match self.stream {
            Stream::Conversion => {
                let w = weights[0] / (weights[0] + weights[1]);
                let (qc, qv) = (estimate(past[0]), estimate(past[1]));
                let a = 1.0 - self.margin;
                // Bet only where the estimate lies in the alternative (q_v < a·q_c): then
                // r_v > q_v and the factor's mean falls inside the null (module docs).
                if qv < a * qc {
                    conversion_log_factor(dc, dv, qc, qv, a, w)
                } else {
                    0.0
                }
            }
            Stream::Defect if defect_share(dc, dv).is_none() => {
                // A block needs exposure in both arms for the conditional binomial; until then
                // it keeps growing (its end depends on exposure only, not on the defects).
                return;
            }
            Stream::Defect => {
                let b = 1.0 + self.margin;
                match defect_share(dc, dv) {
                    Some(s) => {
                        let ratio = rate_ratio(past);
                        if ratio > b {
                            defect_log_factor(dc, dv, s, b, ratio)
                        } else {
                            0.0
                        }
                    }
                    None => 0.0,
                }
            }
        };
        if !self.grid.is_empty() {
            match self.stream {
                Stream::Conversion => {
                    let w = weights[0] / (weights[0] + weights[1]);
                    let (qc, qv) = (estimate(past[0]), estimate(past[1]));
                    for (j, g) in self.grid.iter_mut().enumerate() {
                        *g += conversion_log_factor(dc, dv, qc, qv, grid_ratio(j), w);
                    }
                }
                Stream::Defect => {
                    if let Some(s) = defect_share(dc, dv) {
                        let ratio = rate_ratio(past);
                        for (j, g) in self.grid.iter_mut().enumerate() {
                            *g += defect_log_factor(dc, dv, s, grid_ratio(j), ratio);
                        }
                    }
                }
            }
        }
        self.log_e += factor;
        self.log_max = self.log_max.max(self.log_e);
        self.last = now;
        self.blocks += 1;
    }

    /// The anytime-valid confidence sequence for the relative lift θ_v/θ_c − 1 at level
    /// 1 − `alpha`: the hull of the grid ratios whose process never reached 1/α (the
    /// running intersection), widened by one grid step on each side so that the true ratio
    /// between two grid points is covered. `None` when not kept; `(-1, +∞)`-like bounds at
    /// the grid's ends mean "not yet bounded on that side".
    pub fn lift_interval(&self, alpha: f64) -> Option<(f64, f64)> {
        if self.grid.is_empty() {
            return None;
        }
        let limit = (1.0 / alpha).ln();
        let kept: Vec<usize> = (0..GRID_POINTS).filter(|&j| self.grid[j] < limit).collect();
        let (lo, hi) = match (kept.first(), kept.last()) {
            (Some(&lo), Some(&hi)) => (lo, hi),
            // Every grid ratio rejected: the data sit outside the grid.
            _ => return Some((f64::NAN, f64::NAN)),
        };
        let lower = if lo == 0 {
            -1.0
        } else {
            grid_ratio(lo - 1) - 1.0
        };
        let upper = if hi + 1 == GRID_POINTS {
            f64::INFINITY
        } else {
            grid_ratio(hi + 1) - 1.0
        };
        Some((lower, upper))
    }
}

/// The e-processes of every experiment this process evaluates, one per (experiment, metric,
/// variant) whose metric has an anytime-valid harm rule. Kept in memory, and stored by
/// the service with the alert book ([`EvidenceBook::export`], `import`), so a
/// restart continues them.
#[derive(Debug, Clone, Default)]
pub struct EvidenceBook {
    processes: HashMap<(String, usize, usize), HarmProcess>,
    intervals: bool,
}

impl EvidenceBook {
    /// An empty book; `intervals` keeps a confidence sequence per process (the service),
    /// which `plan` does not need.
    pub fn new(intervals: bool) -> EvidenceBook {
        EvidenceBook {
            processes: HashMap::new(),
            intervals,
        }
    }

    /// Fold the totals of `snap` (one look) into its experiment's processes.
    pub fn advance(&mut self, snap: &ExperimentSnapshot) {
        let def = &snap.def;
        let key = def.state_key();
        let c = def.control;
        for (m, metric) in def.metrics.iter().enumerate() {
            let Some(rule) = metric.rules.evidence else {
                continue;
            };
            let stream = match metric.kind {
                MetricKind::Conversion => Stream::Conversion,
                MetricKind::DefectRate(_) => Stream::Defect,
            };
            let totals = |arm: usize| match &snap.metrics[m] {
                MetricTotals::Conversion(t) => ArmTotals {
                    size: t[arm].trials as f64,
                    events: t[arm].successes as f64,
                },
                MetricTotals::Defect(t) => ArmTotals {
                    size: t[arm].exposure,
                    events: t[arm].count as f64,
                },
            };
            for v in (0..def.variants.len()).filter(|&v| v != c) {
                let process = self
                    .processes
                    .entry((key.clone(), m, v))
                    .or_insert_with(|| HarmProcess::new(stream, rule.margin, self.intervals));
                if process.margin != rule.margin || process.stream != stream {
                    // A redefined rule starts a new process: the old one tested another null.
                    *process = HarmProcess::new(stream, rule.margin, self.intervals);
                }
                process.update(
                    [totals(c), totals(v)],
                    [def.variants[c].weight, def.variants[v].weight],
                );
            }
        }
    }

    /// The process of (experiment `key`, metric, variant), if it has one.
    pub fn get(&self, key: &str, metric: usize, variant: usize) -> Option<&HarmProcess> {
        self.processes.get(&(key.to_string(), metric, variant))
    }

    /// A book with only experiment `key`'s processes (for a reader, without holding the
    /// lock of the whole book while it renders).
    pub fn subset(&self, key: &str) -> EvidenceBook {
        EvidenceBook {
            processes: self
                .processes
                .iter()
                .filter(|((k, _, _), _)| k == key)
                .map(|(k, p)| (k.clone(), p.clone()))
                .collect(),
            intervals: self.intervals,
        }
    }

    /// Experiment `key`'s processes as (metric, variant, [`HarmProcess::to_numbers`]),
    /// ordered.
    pub fn export(&self, key: &str) -> Vec<(usize, usize, Vec<f64>)> {
        let mut out: Vec<(usize, usize, Vec<f64>)> = self
            .processes
            .iter()
            .filter(|((k, _, _), _)| k == key)
            .map(|((_, m, v), p)| (*m, *v, p.to_numbers()))
            .collect();
        out.sort_by_key(|(m, v, _)| (*m, *v));
        out
    }

    /// Replace experiment `key`'s processes with those of an [`EvidenceBook::export`]
    /// (handed over by another instance, or stored); entries that describe no process are
    /// skipped.
    pub fn import(&mut self, key: &str, processes: Vec<(usize, usize, Vec<f64>)>) {
        self.forget(key);
        for (m, v, numbers) in processes {
            if let Some(mut p) = HarmProcess::from_numbers(&numbers) {
                if !self.intervals {
                    p.grid.clear();
                }
                self.processes.insert((key.to_string(), m, v), p);
            }
        }
    }

    /// The experiment keys with processes.
    pub fn keys(&self) -> Vec<String> {
        let mut keys: Vec<String> = self.processes.keys().map(|(k, _, _)| k.clone()).collect();
        keys.sort();
        keys.dedup();
        keys
    }

    /// Forget the processes of experiment `key` (deleted or redefined).
    pub fn forget(&mut self, key: &str) {
        self.processes.retain(|(k, _, _), _| k != key);
    }
}

/// The ratio of grid point `j`.
pub fn grid_ratio(j: usize) -> f64 {
    (GRID_LOG_MIN + GRID_STEP * j as f64).exp()
}

/// Predictable estimate of a conversion rate from past totals: (s + ½)/(n + 1), never 0 or 1.
fn estimate(t: ArmTotals) -> f64 {
    (t.events + 0.5) / (t.size + 1.0)
}

/// Predictable estimate of the defect rate ratio λ_v/λ_c from past totals, each rate with half
/// a pseudo-defect so that no data gives ratio 1 (no bet) rather than 0/0.
fn rate_ratio(past: [ArmTotals; 2]) -> f64 {
    if past[0].size <= 0.0 || past[1].size <= 0.0 {
        return 1.0;
    }
    ((past[1].events + 0.5) / past[1].size) / ((past[0].events + 0.5) / past[0].size)
}

/// The variant's share of a block's exposure, when both arms had some.
fn defect_share(dc: ArmTotals, dv: ArmTotals) -> Option<f64> {
    (dc.size > 0.0 && dv.size > 0.0).then(|| dv.size / (dc.size + dv.size))
}

/// The null point r_c on the boundary θ_v = ρ·θ_c for the bet (q_c, q_v) with control share
/// `w` (module docs): the root in (0, min(1, 1/ρ)) of
/// ρ r² − B r + C = 0, B = w(ρ q_c + 1) + (1 − w)(q_v + ρ), C = w q_c + (1 − w) q_v,
/// taken in the cancellation-free form 2C/(B + √(B² − 4ρC)).
pub fn null_point(qc: f64, qv: f64, rho: f64, w: f64) -> f64 {
    let b = w * (rho * qc + 1.0) + (1.0 - w) * (qv + rho);
    let c = w * qc + (1.0 - w) * qv;
    let disc = (b * b - 4.0 * rho * c).max(0.0);
    2.0 * c / (b + disc.sqrt())
}

/// ln of the product of per-unit factors of one block of conversions, for the bet (q_c, q_v)
/// against the null boundary θ_v = ρ·θ_c.
pub fn conversion_log_factor(
    dc: ArmTotals,
    dv: ArmTotals,
    qc: f64,
    qv: f64,
    rho: f64,
    w: f64,
) -> f64 {
    let rc = null_point(qc, qv, rho, w);
    let rv = rho * rc;
    if !(rc > 0.0 && rc < 1.0 && rv > 0.0 && rv < 1.0) {
        return 0.0;
    }
    let term = |d: ArmTotals, q: f64, r: f64| {
        let s = d.events.min(d.size);
        let f = d.size - s;
        let mut x = 0.0;
        if s > 0.0 {
            x += s * (q / r).ln();
        }
        if f > 0.0 {
            x += f * ((1.0 - q) / (1.0 - r)).ln();
        }
        x
    };
    term(dc, qc, rc) + term(dv, qv, rv)
}

/// ln of the conditional-binomial likelihood ratio of one block of defects: the variant's
/// share of the block's defects under the bet ratio `bet` against the null ratio `rho`, with
/// `s` the variant's share of the block's exposure.
pub fn defect_log_factor(dc: ArmTotals, dv: ArmTotals, s: f64, rho: f64, bet: f64) -> f64 {
    let share = |ratio: f64| s * ratio / (s * ratio + 1.0 - s);
    let (p0, q) = (share(rho), share(bet));
    let mut x = 0.0;
    if dv.events > 0.0 {
        x += dv.events * (q / p0).ln();
    }
    if dc.events > 0.0 {
        x += dc.events * ((1.0 - q) / (1.0 - p0)).ln();
    }
    x
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_process_survives_its_numbers() {
        let mut p = HarmProcess::new(Stream::Conversion, 0.05, true);
        p.update(
            [
                ArmTotals {
                    size: 400.0,
                    events: 48.0,
                },
                ArmTotals {
                    size: 410.0,
                    events: 20.0,
                },
            ],
            [0.5, 0.5],
        );
        let back = HarmProcess::from_numbers(&p.to_numbers()).unwrap();
        assert_eq!(back, p);
        assert!(HarmProcess::from_numbers(&[2.0; 11]).is_none());
    }

    fn binom_pmf(n: u64, k: u64, p: f64) -> f64 {
        let mut ln = 0.0;
        for i in 0..k {
            ln += ((n - i) as f64).ln() - ((i + 1) as f64).ln();
        }
        (ln + k as f64 * p.ln() + (n - k) as f64 * (1.0 - p).ln()).exp()
    }

    #[test]
    fn without_a_margin_the_null_point_is_the_weighted_average() {
        // Turner, Ly & Grünwald (2024) §3: for two Bernoulli streams with block sizes n_a,
        // n_b the null point of the optimal e-variable is (n_a θ_a + n_b θ_b)/(n_a + n_b)
        // [from memory]; with shares w, 1 − w the same weighted average.
        for &(qc, qv, w) in &[(0.1, 0.05, 0.5), (0.3, 0.2, 0.4), (0.02, 0.019, 0.7)] {
            let r = null_point(qc, qv, 1.0, w);
            let want = w * qc + (1.0 - w) * qv;
            assert!((r - want).abs() < 1e-15, "{r} vs {want}");
        }
    }

    #[test]
    fn on_the_null_boundary_a_block_has_mean_one_exactly() {
        // The mean of the block factor under a null (θ_c, ρ θ_c), by summing over every
        // outcome of a block split exactly by the weights (weighted AM-GM: ≤ 1, with the
        // per-unit mean exactly 1 on the boundary).
        for &(rho, qc, qv, w, theta) in &[
            (1.0, 0.12, 0.08, 0.5, 0.1),
            (0.9, 0.12, 0.07, 0.5, 0.3),
            (1.3, 0.05, 0.09, 0.4, 0.05),
        ] {
            let rc = null_point(qc, qv, rho, w);
            // Per-unit mean, random assignment.
            let fc = theta * qc / rc + (1.0 - theta) * (1.0 - qc) / (1.0 - rc);
            let fv =
                rho * theta * qv / (rho * rc) + (1.0 - rho * theta) * (1.0 - qv) / (1.0 - rho * rc);
            let unit = w * fc + (1.0 - w) * fv;
            assert!((unit - 1.0).abs() < 1e-12, "per-unit mean {unit}");
            // A block of 10 units split 5/5 (w = 0.5 only) by enumeration.
            if w == 0.5 {
                let mut mean = 0.0;
                for sc in 0..=5u64 {
                    for sv in 0..=5u64 {
                        let p = binom_pmf(5, sc, theta) * binom_pmf(5, sv, rho * theta);
                        let f = conversion_log_factor(
                            ArmTotals {
                                size: 5.0,
                                events: sc as f64,
                            },
                            ArmTotals {
                                size: 5.0,
                                events: sv as f64,
                            },
                            qc,
                            qv,
                            rho,
                            w,
                        );
                        mean += p * f.exp();
                    }
                }
                assert!(mean <= 1.0 + 1e-12, "block mean {mean}");
            }
        }
    }

    #[test]
    fn a_defect_block_has_mean_at_most_one_under_the_null() {
        // Conditional binomial: K = 12 defects, variant exposure share 0.5, null ratio 1.2,
        // bet ratio 1.8; mean over the variant's count at the null share.
        let (s, rho, bet) = (0.5, 1.2, 1.8);
        let p0 = s * rho / (s * rho + 1.0 - s);
        let mut mean = 0.0;
        for kv in 0..=12u64 {
            let f = defect_log_factor(
                ArmTotals {
                    size: 10.0,
                    events: (12 - kv) as f64,
                },
                ArmTotals {
                    size: 10.0,
                    events: kv as f64,
                },
                s,
                rho,
                bet,
            );
            mean += binom_pmf(12, kv, p0) * f.exp();
        }
        assert!((mean - 1.0).abs() < 1e-12, "{mean}");
    }
}

/// A/A simulations with a look after every unit: the alarm rate stays within α (Ville's
/// inequality; Howard et al. 2021, §2 [from memory]). 10 000 runs each; `POSTERIORD_SOAK=1`
/// follows each run ten times longer. The bets are refreshed every [`REFRESH`] units (a
/// predictable choice, as between two looks of the service) and the process is checked after
/// every unit, built from the module's own factor functions; a small xorshift generator keeps
/// 2·10⁷ unit steps within a few seconds of a debug build.
#[cfg(test)]
mod calibration {
    use super::*;

    const RUNS: usize = 10_000;
    /// Units between bet refreshes (conversion).
    const REFRESH: usize = 16;

    fn units_per_run() -> usize {
        if std::env::var_os("POSTERIORD_SOAK").is_some() {
            20_000
        } else {
            2_000
        }
    }

    /// xorshift64* (Vigna 2016): uniform in [0, 1).
    struct Rng(u64);
    impl Rng {
        fn uniform(&mut self) -> f64 {
            self.0 ^= self.0 >> 12;
            self.0 ^= self.0 << 25;
            self.0 ^= self.0 >> 27;
            (self.0.wrapping_mul(0x2545_F491_4F6C_DD1D) >> 11) as f64 / (1u64 << 53) as f64
        }
        /// Poisson by inversion (small means only).
        fn poisson(&mut self, mean: f64) -> f64 {
            let u = self.uniform();
            let (mut k, mut p) = (0.0, (-mean).exp());
            let mut cdf = p;
            while u > cdf && k < 50.0 {
                k += 1.0;
                p *= mean / k;
                cdf += p;
            }
            k
        }
    }

    /// Conversion runs looked at after every unit; returns the share of runs that alarmed
    /// and their mean alarm unit.
    #[allow(clippy::too_many_arguments)]
    fn conversion(
        rates: [f64; 2],
        w_v: f64,
        margin: f64,
        alpha: f64,
        units: usize,
        seed: u64,
        runs: usize,
    ) -> (f64, f64) {
        let mut rng = Rng(seed.wrapping_mul(0x9E37_79B9_7F4A_7C15) | 1);
        let limit = (1.0 / alpha).ln();
        let a = 1.0 - margin;
        let (mut alarms, mut at) = (0usize, 0usize);
        for _ in 0..runs {
            let mut t = [ArmTotals::default(); 2];
            let mut log_e = 0.0;
            // ln factor per (arm, outcome) for the current bet; 0 = no bet.
            let mut table = [[0.0f64; 2]; 2];
            for u in 0..units {
                if u % REFRESH == 0 {
                    let (qc, qv) = (estimate(t[0]), estimate(t[1]));
                    table = [[0.0; 2]; 2];
                    if qv < a * qc {
                        for (arm, row) in table.iter_mut().enumerate() {
                            for (x, cell) in row.iter_mut().enumerate() {
                                let one = ArmTotals {
                                    size: 1.0,
                                    events: x as f64,
                                };
                                let none = ArmTotals::default();
                                let (dc, dv) = if arm == 0 { (one, none) } else { (none, one) };
                                *cell = conversion_log_factor(dc, dv, qc, qv, a, 1.0 - w_v);
                            }
                        }
                    }
                }
                let arm = usize::from(rng.uniform() < w_v);
                let x = usize::from(rng.uniform() < rates[arm]);
                t[arm].size += 1.0;
                t[arm].events += x as f64;
                log_e += table[arm][x];
                if log_e >= limit {
                    alarms += 1;
                    at += u + 1;
                    break;
                }
            }
        }
        (
            alarms as f64 / runs as f64,
            at as f64 / alarms.max(1) as f64,
        )
    }

    /// Defect runs (Poisson defects per unit) through [`HarmProcess`] itself, looked at after
    /// every unit.
    #[allow(clippy::too_many_arguments)]
    fn defects(
        rates: [f64; 2],
        w_v: f64,
        margin: f64,
        alpha: f64,
        units: usize,
        seed: u64,
        runs: usize,
    ) -> (f64, f64) {
        let mut rng = Rng(seed.wrapping_mul(0x9E37_79B9_7F4A_7C15) | 1);
        let (mut alarms, mut at) = (0usize, 0usize);
        for _ in 0..runs {
            let mut p = HarmProcess::new(Stream::Defect, margin, false);
            let mut t = [ArmTotals::default(); 2];
            for u in 0..units {
                let arm = usize::from(rng.uniform() < w_v);
                let k = rng.poisson(rates[arm]);
                t[arm].size += 1.0;
                t[arm].events += k;
                // Only a unit with a defect, or one completing a block, can change the process.
                p.update(t, [1.0 - w_v, w_v]);
                if p.alarmed(alpha) {
                    alarms += 1;
                    at += u + 1;
                    break;
                }
            }
        }
        (
            alarms as f64 / runs as f64,
            at as f64 / alarms.max(1) as f64,
        )
    }

    fn within_alpha(what: &str, share: f64, alpha: f64) {
        let se = (alpha * (1.0 - alpha) / RUNS as f64).sqrt();
        eprintln!(
            "{what}: A/A alarm rate {share:.4} over {RUNS} runs of {} units, looked at after every unit (α = {alpha}, bound α + 3 se = {:.4})",
            units_per_run(),
            alpha + 3.0 * se
        );
        assert!(
            share <= alpha + 3.0 * se,
            "{what}: {share} > {alpha} + 3·{se}"
        );
    }

    #[test]
    fn conversion_aa_alarms_at_most_alpha_at_per_unit_looks() {
        let (share, _) = conversion([0.1, 0.1], 0.5, 0.0, 0.05, units_per_run(), 1, RUNS);
        within_alpha("conversion 10% vs 10%, 50/50", share, 0.05);
        // On the boundary of a margin null: the variant exactly 5% worse, margin 5%.
        let (share, _) = conversion([0.2, 0.19], 0.4, 0.05, 0.05, units_per_run(), 2, RUNS);
        within_alpha("conversion 20% vs 19% with margin 5%, 60/40", share, 0.05);
    }

    #[test]
    fn defect_aa_alarms_at_most_alpha_at_per_unit_looks() {
        let (share, _) = defects([0.05, 0.05], 0.5, 0.0, 0.05, units_per_run(), 3, RUNS);
        within_alpha("defects 0.05 vs 0.05 per unit, 50/50", share, 0.05);
    }

    #[test]
    fn a_clearly_worse_variant_is_caught() {
        // 8% against 10% conversion (20% worse), α = 0.01, 200 runs of 20 000 units.
        let (share, mean_at) = conversion([0.10, 0.08], 0.5, 0.0, 0.01, 20_000, 4, 200);
        eprintln!("20% worse conversion: caught in {share:.3} of runs, mean at unit {mean_at:.0}");
        assert!(share > 0.9, "{share}");
        // Defects 50% more often (0.03 vs 0.02 per unit), runs of 40 000 units.
        let (share, mean_at) = defects([0.02, 0.03], 0.5, 0.0, 0.01, 40_000, 5, 200);
        eprintln!("50% more defects: caught in {share:.3} of runs, mean at unit {mean_at:.0}");
        assert!(share > 0.9, "{share}");
    }
}
