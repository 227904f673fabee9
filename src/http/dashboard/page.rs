//! The dashboard's HTML: the page frame (style sheet and the small refresh script) and the
//! experiment page with its plots, timeline and data-quality checks.

use std::fmt::Write;

use crate::decide::alerts::{Alert, AlertState};
use crate::decide::{Finding, Rule};
use crate::event::Outcome;
use crate::history::{Change, ExperimentHistory};
use crate::stats::{self, ArmSummary, Arms};
use crate::summary::ExperimentSummary;

use super::markup::escape;
use super::svg::{self, Axis, Band, Fmt, IntervalBar, Labels, Lane, Mark, Plot, Scale, Series};

/// Seconds between refreshes of the page's main part.
pub const REFRESH_SECS: u32 = 5;

/// Points along each density curve.
const CURVE_POINTS: usize = 241;

const STYLE: &str = r#"
:root { --paper:#f7f5f0; --card:#fffdf9; --ink:#1f2430; --soft:#5b6170; --rule:#dcd7cc; --accent:#0072B2; }
* { box-sizing:border-box; }
body { margin:0; background:var(--paper); color:var(--ink); font:15px/1.45 system-ui, -apple-system, "Segoe UI", sans-serif; }
header.top { display:flex; align-items:baseline; gap:1.2rem; padding:.8rem 1.6rem; background:var(--ink); color:#f7f5f0; }
header.top a { color:#f7f5f0; text-decoration:none; font-weight:650; letter-spacing:.02em; }
header.top .where { color:#c9c4b8; }
main { padding:1.2rem 1.6rem 3rem; max-width:1240px; }
h1 { font-size:1.45rem; margin:.2rem 0 .4rem; }
h2 { font-size:1.15rem; margin:1.6rem 0 .5rem; border-bottom:2px solid var(--rule); padding-bottom:.2rem; }
h3 { font-size:1rem; margin:.6rem 0 .3rem; }
.caution { border-left:4px solid #E69F00; background:#fff6e3; padding:.5rem .8rem; margin:.6rem 0 1rem; font-size:.92rem; }
.cards { display:grid; grid-template-columns:repeat(auto-fit, minmax(520px, 1fr)); gap:1rem; }
figure.card, section.card { background:var(--card); border:1px solid var(--rule); border-radius:6px; margin:0; padding:.6rem .8rem; }
figcaption { font-weight:600; font-size:.95rem; margin-bottom:.2rem; }
figcaption .hint { font-weight:400; color:var(--soft); font-size:.85rem; display:block; }
svg.plot { width:100%; height:auto; display:block; }
svg .grid { stroke:#ebe7df; stroke-width:1; }
svg .frame { fill:none; stroke:#a8a397; }
svg .tick, svg .axis-label, svg .band-label, svg .mark-label, svg .legend-label, svg .end-label, svg .lane-label, svg .empty { font:11px system-ui, sans-serif; fill:#4a4f5c; }
svg .axis-label { font-size:12px; fill:var(--ink); }
svg .end-label, svg .legend-label { font-size:12px; font-weight:600; }
svg .line { fill:none; stroke-width:2.2; }
svg .area { opacity:.10; stroke:none; }
svg .band { fill:#ece6d6; }
svg .mark { stroke:var(--ink); stroke-width:1.3; stroke-dasharray:5 4; }
svg .interval { stroke-width:2.5; }
svg .legend-box { fill:#fffdf9; stroke:var(--rule); opacity:.92; }
svg .span { opacity:.85; }
svg .span.open { stroke:var(--ink); stroke-width:1; }
svg .lane.alert .span { opacity:.55; }
svg .lane.alert .lane-label { font-style:italic; }
table { border-collapse:collapse; font-size:.9rem; margin:.3rem 0 .6rem; }
th, td { text-align:left; padding:.25rem .7rem .25rem 0; border-bottom:1px solid var(--rule); vertical-align:top; }
th { font-weight:600; color:var(--soft); }
td.num { font-variant-numeric:tabular-nums; text-align:right; }
.chip { display:inline-block; border-radius:3px; padding:0 .45rem; margin:0 .25rem .15rem 0; font-size:.82rem; font-weight:600; border:1px solid; }
.chip::before { margin-right:.3rem; }
.chip.quality { background:#fff1d6; border-color:#E69F00; } .chip.quality::before { content:"⚠"; }
.chip.harm { background:#fbe3d6; border-color:#D55E00; } .chip.harm::before { content:"▼"; }
.chip.ship { background:#dcecf7; border-color:#0072B2; } .chip.ship::before { content:"▲"; }
.chip.same { background:#e8e6f1; border-color:#6b5fa8; } .chip.same::before { content:"="; }
.chip.out-of-time { background:#eeeeee; border-color:#777; } .chip.out-of-time::before { content:"⧗"; }
.chip.gathering { background:#eef3ea; border-color:#5d7a4f; } .chip.gathering::before { content:"…"; }
.chip.idle { background:#f0f0f0; border-color:#999; } .chip.idle::before { content:"○"; }
.swatch { display:inline-block; width:26px; height:0; border-top:3px solid; vertical-align:middle; margin-right:.4rem; }
a { color:var(--accent); }
.muted { color:var(--soft); }
.finding { margin:.2rem 0; }
"#;

/// Re-fetches the main part every few seconds and swaps it in, so the page never reloads and
/// the scroll position stays; a failed fetch keeps what is shown, and so does a form field
/// being typed in.
const SCRIPT: &str = r#"
(function () {
  var main = document.querySelector('main[data-refresh]');
  if (!main || !window.fetch) return;
  var n = 0;
  setInterval(function () {
    var f = document.activeElement;
    if (f && main.contains(f) && /^(INPUT|SELECT|TEXTAREA)$/.test(f.tagName)) return;
    fetch(main.getAttribute('data-refresh'), { cache: 'no-store' })
      .then(function (r) { if (!r.ok) throw new Error(r.status); return r.text(); })
      .then(function (html) {
        main.innerHTML = html;
        n += 1;
        main.setAttribute('data-refreshed', String(n));
      })
      .catch(function () {});
  }, REFRESH_MS);
})();
"#;

/// A whole page: `title`, the main part `body`, refreshed from `refresh` (a URL).
pub fn layout(title: &str, where_: &str, body: &str, refresh: &str) -> String {
    format!(
        r#"<!doctype html>
<html lang="en"><head><meta charset="utf-8"><meta name="viewport" content="width=device-width, initial-scale=1">
<title>{title}</title><style>{STYLE}</style></head>
<body><header class="top"><a href="/">posteriord</a><span class="where">{where_}</span></header>
<main data-refresh="{refresh}" data-refreshed="0">{body}</main>
<script>{script}</script></body></html>
"#,
        title = escape(title),
        where_ = escape(where_),
        refresh = escape(refresh),
        script = SCRIPT.replace("REFRESH_MS", &(REFRESH_SECS * 1000).to_string()),
    )
}

/// The states at a glance, as (css class, words), from the rules that hold now and the
/// alerts that are still open or recorded, so the chips never contradict the alert table: an
/// easing harm alert still shows harm, a recorded decision stays until it is acknowledged.
pub fn glance(
    summary: &ExperimentSummary,
    findings: &[Finding],
    alerts: &[Alert],
) -> Vec<(&'static str, &'static str)> {
    let mut out = Vec::new();
    let live = |r: Rule| {
        alerts.iter().any(|a| {
            a.key.rule == r
                && match a.state {
                    AlertState::Open | AlertState::Easing => true,
                    AlertState::Recorded => a.acknowledged_at.is_none(),
                    AlertState::Closed => false,
                }
        })
    };
    let has = |r: Rule| findings.iter().any(|f| f.rule == r) || live(r);
    if has(Rule::SampleRatio) || has(Rule::Crossovers) {
        out.push(("quality", "check the data first"));
    }
    if has(Rule::Harm) || has(Rule::HarmEvidence) {
        out.push(("harm", "a variant looks worse"));
    }
    if has(Rule::Ship) {
        out.push(("ship", "ready for a shipping review"));
    }
    if has(Rule::Equivalent) {
        out.push(("same", "no practical difference"));
    }
    if has(Rule::Inconclusive) {
        out.push(("out-of-time", "out of time, undecided"));
    }
    if out.is_empty() {
        if summary.snapshot.units.iter().all(|&u| u == 0) {
            out.push(("idle", "waiting for data"));
        } else {
            out.push(("gathering", "still gathering evidence"));
        }
    }
    out
}

fn chips(list: &[(&str, &str)]) -> String {
    list.iter()
        .map(|(class, words)| format!(r#"<span class="chip {class}">{}</span>"#, escape(words)))
        .collect()
}

fn pct(x: f64) -> String {
    if x.is_finite() {
        format!("{:.2}%", x * 100.0)
    } else {
        "—".into()
    }
}

fn prob(x: f64) -> String {
    if !x.is_finite() {
        "—".into()
    } else if x > 0.9999 {
        ">0.9999".into()
    } else if x < 0.0001 {
        "<0.0001".into()
    } else {
        format!("{x:.4}")
    }
}

fn sci(x: f64) -> String {
    if x.is_finite() {
        format!("{x:.2e}")
    } else {
        "—".into()
    }
}

/// A rate as shown: percent for conversion, per unit of exposure for defect rates.
fn rate(x: f64, higher_is_better: bool) -> String {
    if higher_is_better {
        pct(x)
    } else {
        sci(x)
    }
}

/// Everything the experiment page shows.
pub struct ExperimentView {
    /// The experiment now.
    pub summary: std::sync::Arc<ExperimentSummary>,
    /// The rules that hold now.
    pub findings: Vec<Finding>,
    /// Where every rule stands.
    pub standings: Vec<crate::decide::standing::RuleStanding>,
    /// Recorded evaluations (`None` before the first).
    pub history: Option<ExperimentHistory>,
    /// This experiment's alerts.
    pub alerts: Vec<Alert>,
    /// Now, in microseconds since the epoch.
    pub now: i64,
}

fn secs(micros: i64) -> f64 {
    micros as f64 / 1e6
}

/// The main part of `/experiments/{id}`.
pub fn experiment_main(v: &ExperimentView) -> String {
    let snap = &v.summary.snapshot;
    let def = &snap.def;
    let mut s = String::new();
    let _ = write!(
        s,
        r#"<h1 data-experiment="{}">{}</h1><div>{}</div>"#,
        escape(&def.id),
        escape(&def.id),
        chips(&glance(&v.summary, &v.findings, &v.alerts))
    );
    s.push_str(r#"<p class="caution">"#);
    s.push_str(&escape(crate::doc::CAUTION));
    s.push_str("</p>");
    // Variants with their look, so every plot below reads the same way.
    s.push_str(r#"<table data-role="variants"><thead><tr><th>variant</th><th>planned</th><th>units</th></tr></thead><tbody>"#);
    for (i, (var, units)) in def.variants.iter().zip(&snap.units).enumerate() {
        let (colour, dash) = svg::style(i);
        let _ = write!(
            s,
            r#"<tr><td><svg width="34" height="10" aria-hidden="true"><line x1="2" x2="32" y1="5" y2="5" stroke="{colour}" stroke-width="2.5" stroke-dasharray="{dash}"/></svg> {}{}</td><td class="num">{}</td><td class="num">{units}</td></tr>"#,
            escape(&var.name),
            if i == def.control { " (control)" } else { "" },
            pct(var.weight),
        );
    }
    s.push_str("</tbody></table>");

    // What holds now.
    s.push_str("<h2>What holds now</h2>");
    if v.findings.is_empty() {
        s.push_str(r#"<p class="muted">No stopping rule holds. Keep collecting data.</p>"#);
    }
    for f in &v.findings {
        let _ = write!(
            s,
            r#"<p class="finding" data-rule="{}"><strong>{}</strong> — {}</p>"#,
            f.rule.as_str(),
            f.rule.as_str(),
            escape(&f.message)
        );
    }

    standings_section(&mut s, v);
    for m in 0..def.metrics.len() {
        metric_section(&mut s, v, m);
    }
    decisions_section(&mut s, v);
    quality_section(&mut s, v);
    let _ = write!(
        s,
        r#"<p class="muted">Refreshes every {REFRESH_SECS} s. JSON: <a href="/v1/experiments/{id}">/v1/experiments/{id}</a>, history per metric at /v1/experiments/{id}/history?metric=NAME.</p>"#,
        id = escape(&def.id)
    );
    s
}

/// Where each rule stands, one row per rule, metric and variant.
fn standings_section(s: &mut String, v: &ExperimentView) {
    let def = &v.summary.snapshot.def;
    s.push_str(r#"<h2>Where each rule stands</h2><table data-role="rules"><thead><tr><th>rule</th><th>metric</th><th>variant</th><th>state</th><th>why</th></tr></thead><tbody>"#);
    for r in &v.standings {
        let _ = write!(
            s,
            r#"<tr data-rule="{rule}" data-state="{state}"><td>{rule}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td></tr>"#,
            r.metric
                .map_or(String::new(), |m| escape(&def.metrics[m].name)),
            r.variant
                .map_or(String::new(), |x| escape(&def.variants[x].name)),
            r.state.as_str().replace('_', " "),
            escape(&r.detail),
            rule = r.rule.as_str(),
            state = r.state.as_str(),
        );
    }
    s.push_str("</tbody></table>");
}

fn metric_section(s: &mut String, v: &ExperimentView, m: usize) {
    let snap = &v.summary.snapshot;
    let def = &snap.def;
    let metric = &def.metrics[m];
    let ms = &v.summary.metrics[m];
    let higher = metric.kind == crate::experiment::MetricKind::Conversion;
    let role = if m == def.rules.primary {
        " · primary"
    } else if def.rules.guardrails.contains(&m) {
        " · guardrail"
    } else {
        ""
    };
    let _ = write!(
        s,
        r#"<section class="metric" data-metric="{name}"><h2>{name} <span class="muted">({kind}, {dir}{role})</span></h2>"#,
        name = escape(&metric.name),
        kind = metric.kind.as_str(),
        dir = if higher {
            "higher is better"
        } else {
            "lower is better"
        },
    );
    let (posteriors, arms) = match (&ms.posteriors, &ms.arms) {
        (Ok(p), Ok(a)) => (p, a),
        (Err(e), _) | (_, Err(e)) => {
            let _ = write!(
                s,
                r#"<p>No posterior yet: {}</p></section>"#,
                escape(&e.to_string())
            );
            return;
        }
    };
    numbers_table(s, def, &snap.metrics[m], arms, higher);
    s.push_str(r#"<div class="cards">"#);
    figure(
        s,
        "Posterior of each variant",
        "where each arm's rate probably lies; narrower means more data",
        &density_plot(def, &metric.name, posteriors, higher),
    );
    if let Some(p) = lift_plot(def, &metric.name, posteriors, arms, metric.rules.rope) {
        let hint = format!(
            "relative difference θ_v/θ_c − 1 ({}); shaded: the region of practical equivalence (ROPE, ±{}% relative){}; bars: 95% credible intervals",
            if higher {
                "right of zero is better"
            } else {
                "right of zero means more defects, worse"
            },
            metric.rules.rope * 100.0,
            metric.rules.harm.map_or(String::new(), |h| format!(
                "; harm counts from a relative margin of {}%",
                h.margin * 100.0
            ))
        );
        figure(s, "Lift against the control", &hint, &p);
    }
    let series = v.history.as_ref().and_then(|h| h.series(&metric.name));
    let series = series.unwrap_or(&[]);
    figure(
        s,
        "Probability of being best, over time",
        "one line per variant; the lines sum to 1 at every evaluation",
        &time_plot(
            def,
            &metric.name,
            series,
            v.now,
            TimeQuantity::ProbBest,
            None,
        ),
    );
    let caring = metric.rules.ship.map(|r| r.threshold_of_caring);
    figure(
        s,
        "Expected loss of shipping each variant, over time",
        if higher {
            "what choosing the variant would cost on average if it is not the best, an absolute difference of conversion rates (log scale); the dashed line is the threshold of caring, in the same unit"
        } else {
            "what choosing the variant would cost on average if it is not the best, in defects per unit of exposure (log scale); the dashed line is the threshold of caring, in the same unit"
        },
        &time_plot(
            def,
            &metric.name,
            series,
            v.now,
            TimeQuantity::ExpectedLoss,
            caring,
        ),
    );
    s.push_str("</div></section>");
}

fn figure(s: &mut String, title: &str, hint: &str, svg: &str) {
    let _ = write!(
        s,
        r#"<figure class="card"><figcaption>{}<span class="hint">{}</span></figcaption>{svg}</figure>"#,
        escape(title),
        escape(hint)
    );
}

fn numbers_table(
    s: &mut String,
    def: &crate::experiment::ExperimentDef,
    totals: &crate::state::MetricTotals,
    arms: &[ArmSummary],
    higher: bool,
) {
    // One unit convention: conversion rates in %, their differences (expected loss) in
    // percentage points; defect rates and their differences per unit of exposure; lifts in
    // relative %; probabilities as probabilities. Raw counts beside the estimates.
    let (counts, rates, loss) = if higher {
        ("conversions / trials", "", "expected loss (pp)")
    } else {
        (
            "defects / exposure",
            " (per unit of exposure)",
            "expected loss (per unit of exposure)",
        )
    };
    let _ = write!(
        s,
        r#"<table data-role="numbers"><thead><tr><th>variant</th><th>{counts}</th><th>posterior mean{rates}</th><th>95% interval{rates}</th><th>P(best)</th><th>{loss}</th><th>P(better than control)</th><th>lift, relative (95% interval)</th><th>P(practically equivalent)</th><th>P(harm)</th></tr></thead><tbody>"#
    );
    for (i, a) in arms.iter().enumerate() {
        let lift = a.lift.map_or("—".into(), |l| {
            format!(
                "{:+.2}% ({:+.2}% … {:+.2}%)",
                l.mean * 100.0,
                l.interval.lower * 100.0,
                l.interval.upper * 100.0
            )
        });
        let raw = match totals {
            crate::state::MetricTotals::Conversion(t) => t
                .get(i)
                .map_or("—".into(), |t| format!("{} / {}", t.successes, t.trials)),
            crate::state::MetricTotals::Defect(t) => t
                .get(i)
                .map_or("—".into(), |t| format!("{} / {}", t.count, t.exposure)),
        };
        let _ = write!(
            s,
            r#"<tr data-variant="{}"><td>{}</td><td class="num">{raw}</td><td class="num">{}</td><td class="num">{} … {}</td><td class="num">{}</td><td class="num">{}</td><td class="num">{}</td><td class="num">{}</td><td class="num">{}</td><td class="num">{}</td></tr>"#,
            escape(&def.variants[i].name),
            escape(&def.variants[i].name),
            rate(a.mean, higher),
            rate(a.interval.lower, higher),
            rate(a.interval.upper, higher),
            prob(a.prob_best),
            difference(a.expected_loss, higher),
            a.prob_better_than_control.map_or("—".into(), prob),
            lift,
            a.prob_practically_equivalent.map_or("—".into(), prob),
            a.prob_harm.map_or("—".into(), prob),
        );
    }
    s.push_str("</tbody></table>");
}

/// A difference of rates as shown: percentage points for conversion, per unit of exposure
/// for defect rates.
fn difference(x: f64, conversion: bool) -> String {
    if !x.is_finite() {
        "—".into()
    } else if conversion {
        format!("{} pp", short(x * 100.0))
    } else {
        sci(x)
    }
}

/// Three significant digits, without exponent for everyday sizes.
fn short(x: f64) -> String {
    if x == 0.0 {
        "0".into()
    } else if x.abs() >= 1e-3 {
        let digits = (2 - x.abs().log10().floor() as i32).max(0) as usize;
        format!("{x:.digits$}")
    } else {
        format!("{x:.2e}")
    }
}

fn linspace(lo: f64, hi: f64, n: usize) -> Vec<f64> {
    (0..n)
        .map(|i| lo + (hi - lo) * i as f64 / (n - 1) as f64)
        .collect()
}

fn density_plot(
    def: &crate::experiment::ExperimentDef,
    metric: &str,
    arms: &Arms,
    higher: bool,
) -> String {
    let ranges: Vec<(f64, f64)> = (0..arms.len())
        .filter_map(|i| stats::plot_range(arms, i).ok())
        .collect();
    let lo = ranges.iter().map(|r| r.0).fold(f64::INFINITY, f64::min);
    let hi = ranges.iter().map(|r| r.1).fold(f64::NEG_INFINITY, f64::max);
    let (lo, hi) = if lo < hi { (lo, hi) } else { (0.0, 1.0) };
    let pad = 0.04 * (hi - lo);
    let (lo, hi) = (
        (lo - pad).max(0.0),
        if higher {
            (hi + pad).min(1.0)
        } else {
            hi + pad
        },
    );
    let xs = linspace(lo, hi, CURVE_POINTS);
    let mut ymax: f64 = 0.0;
    let series: Vec<Series> = (0..arms.len())
        .map(|i| {
            let d = stats::posterior_density(arms, i, &xs).unwrap_or_default();
            ymax = d.iter().copied().fold(ymax, f64::max);
            Series {
                variant: def.variants[i].name.clone(),
                style: i,
                points: xs.iter().copied().zip(d).collect(),
                fill: true,
            }
        })
        .collect();
    Plot {
        kind: "density",
        metric: metric.into(),
        title: format!("posterior densities of {metric}"),
        x: Axis {
            lo,
            hi,
            scale: Scale::Linear,
            label: if higher {
                "conversion rate".into()
            } else {
                "defects per unit of exposure".into()
            },
            fmt: if higher { Fmt::Percent } else { Fmt::Plain },
        },
        y: density_axis(ymax),
        series,
        bands: vec![],
        marks: vec![],
        intervals: vec![],
        labels: Labels::Legend,
    }
    .render()
}

/// The vertical axis of a density plot whose highest curve reaches `ymax`.
fn density_axis(ymax: f64) -> Axis {
    Axis {
        lo: 0.0,
        hi: if ymax > 0.0 { ymax * 1.08 } else { 1.0 },
        scale: Scale::Linear,
        label: "density".into(),
        fmt: Fmt::Plain,
    }
}

fn lift_plot(
    def: &crate::experiment::ExperimentDef,
    metric: &str,
    arms: &Arms,
    summaries: &[ArmSummary],
    rope: f64,
) -> Option<String> {
    let c = def.control;
    let lifted: Vec<(usize, crate::stats::Lift)> = summaries
        .iter()
        .enumerate()
        .filter_map(|(i, a)| a.lift.map(|l| (i, l)))
        .collect();
    if lifted.is_empty() {
        return None;
    }
    let mut lo = -1.5 * rope;
    let mut hi = 1.5 * rope;
    for (_, l) in &lifted {
        let w = (l.interval.upper - l.interval.lower).max(1e-6);
        lo = lo.min(l.interval.lower - 0.6 * w);
        hi = hi.max(l.interval.upper + 0.6 * w);
    }
    let lo = lo.max(-1.0);
    let xs = linspace(lo, hi, CURVE_POINTS);
    let mut ymax: f64 = 0.0;
    let series: Vec<Series> = lifted
        .iter()
        .map(|(i, _)| {
            let d = stats::lift_density(arms, c, *i, &xs).unwrap_or_default();
            ymax = d.iter().copied().fold(ymax, f64::max);
            Series {
                variant: def.variants[*i].name.clone(),
                style: *i,
                points: xs.iter().copied().zip(d).collect(),
                fill: true,
            }
        })
        .collect();
    let intervals = lifted
        .iter()
        .map(|(i, l)| IntervalBar {
            variant: def.variants[*i].name.clone(),
            style: *i,
            lo: l.interval.lower,
            hi: l.interval.upper,
        })
        .collect();
    Some(
        Plot {
            kind: "lift",
            metric: metric.into(),
            title: format!(
                "lift of each variant against {} on {metric}",
                def.variants[c].name
            ),
            x: Axis {
                lo,
                hi,
                scale: Scale::Linear,
                label: format!("lift against {}", def.variants[c].name),
                fmt: Fmt::SignedPercent,
            },
            y: density_axis(ymax),
            series,
            bands: vec![Band {
                lo: -rope,
                hi: rope,
                role: "rope",
                label: format!("ROPE ±{:.1}%", rope * 100.0),
            }],
            marks: vec![Mark {
                value: 0.0,
                horizontal: false,
                role: "no-change",
                label: "no change".into(),
            }],
            intervals,
            labels: Labels::Legend,
        }
        .render(),
    )
}

#[derive(Clone, Copy, PartialEq)]
enum TimeQuantity {
    ProbBest,
    ExpectedLoss,
}

/// The threshold of caring in the unit of the expected loss it is compared with.
fn threshold_label(t: f64, conversion: bool) -> String {
    if conversion {
        format!("threshold of caring {} ({t})", difference(t, true))
    } else {
        format!("threshold of caring {t} per unit of exposure")
    }
}

fn time_plot(
    def: &crate::experiment::ExperimentDef,
    metric: &str,
    points: &[crate::history::Point],
    now: i64,
    q: TimeQuantity,
    threshold: Option<f64>,
) -> String {
    let conversion = def
        .metrics
        .iter()
        .find(|m| m.name == metric)
        .is_some_and(|m| m.kind == crate::experiment::MetricKind::Conversion);
    let (t0, t1) = match (points.first(), points.last()) {
        (Some(a), Some(b)) if b.at > a.since => (secs(a.since), secs(b.at)),
        (Some(a), _) => (secs(a.at) - 1.0, secs(a.at) + 1.0),
        _ => (secs(now) - 60.0, secs(now)),
    };
    let value = |a: &crate::history::ArmPoint| match q {
        TimeQuantity::ProbBest => a.prob_best,
        TimeQuantity::ExpectedLoss => a.expected_loss,
    };
    let (ylo, yhi, scale) = match q {
        TimeQuantity::ProbBest => (0.0, 1.0, Scale::Linear),
        TimeQuantity::ExpectedLoss => {
            let mut lo = f64::INFINITY;
            let mut hi: f64 = 0.0;
            for p in points {
                for a in &p.arms {
                    let l = a.expected_loss;
                    if l > 0.0 && l.is_finite() {
                        lo = lo.min(l);
                        hi = hi.max(l);
                    }
                }
            }
            if let Some(t) = threshold {
                lo = lo.min(t);
                hi = hi.max(t);
            }
            if !(lo.is_finite() && hi > 0.0) {
                (1e-6, 1e-1, Scale::Log)
            } else {
                ((lo / 3.0).max(1e-12), hi * 3.0, Scale::Log)
            }
        }
    };
    let series: Vec<Series> = def
        .variants
        .iter()
        .enumerate()
        .map(|(i, var)| Series {
            variant: var.name.clone(),
            style: i,
            points: points
                .iter()
                .filter_map(|p| p.arms.get(i).map(|a| (secs(p.at), value(a).max(ylo))))
                .collect(),
            fill: false,
        })
        .collect();
    let marks = threshold
        .map(|t| Mark {
            value: t,
            horizontal: true,
            role: "threshold",
            label: threshold_label(t, conversion),
        })
        .into_iter()
        .collect();
    Plot {
        kind: match q {
            TimeQuantity::ProbBest => "prob-best",
            TimeQuantity::ExpectedLoss => "expected-loss",
        },
        metric: metric.into(),
        title: match q {
            TimeQuantity::ProbBest => format!("probability of being best over time, {metric}"),
            TimeQuantity::ExpectedLoss => format!("expected loss over time, {metric}"),
        },
        x: Axis {
            lo: t0,
            hi: t1,
            scale: Scale::Time,
            label: "evaluation time (UTC)".into(),
            fmt: Fmt::Plain,
        },
        y: Axis {
            lo: ylo,
            hi: yhi,
            scale,
            label: match q {
                TimeQuantity::ProbBest => "P(best)".into(),
                TimeQuantity::ExpectedLoss if conversion => {
                    "expected loss (rate difference; 0.01 = 1 pp)".into()
                }
                TimeQuantity::ExpectedLoss => "expected loss (per unit of exposure)".into(),
            },
            fmt: Fmt::Plain,
        },
        series,
        bands: vec![],
        marks,
        intervals: vec![],
        labels: Labels::LineEnds,
    }
    .render()
}

fn rule_label(h: &ExperimentHistory, key: &crate::history::RuleKey) -> String {
    let (rule, m, var) = key;
    let mut s = rule.as_str().to_string();
    if let Some(name) = m.and_then(|m| h.metrics().get(m)) {
        s.push_str(" · ");
        s.push_str(name);
    }
    if let Some(name) = var.and_then(|v| h.variants().get(v)) {
        s.push_str(" · ");
        s.push_str(name);
    }
    s
}

fn decisions_section(s: &mut String, v: &ExperimentView) {
    s.push_str(
        r#"<h2>Decisions and alerts over time</h2><section class="card" data-role="decisions">"#,
    );
    let lanes: Vec<Lane>;
    let (lo, hi);
    match &v.history {
        None => {
            lanes = Vec::new();
            lo = secs(v.now) - 60.0;
            hi = secs(v.now);
        }
        Some(h) => {
            let start = h
                .quality()
                .first()
                .map(|q| q.at)
                .into_iter()
                .chain(h.transitions().next().map(|t| t.at))
                .min()
                .unwrap_or(v.now);
            lo = secs(start);
            hi = secs(v.now);
            let mut keys: Vec<crate::history::RuleKey> = h.transitions().map(|t| t.key).collect();
            keys.extend(h.holding().map(|(k, _)| *k));
            keys.sort();
            keys.dedup();
            lanes = keys
                .iter()
                .map(|key| {
                    let mut spans = Vec::new();
                    let mut open: Option<f64> = None;
                    for t in h.transitions().filter(|t| t.key == *key) {
                        match t.change {
                            Change::Holds => open = Some(secs(t.at)),
                            // Without its start, the span began before the oldest kept
                            // transition: draw it from the left edge.
                            Change::Ends => {
                                spans.push((open.unwrap_or(lo), Some(secs(t.at))));
                                open = None;
                            }
                        }
                    }
                    if h.holding().any(|(k, _)| k == key) {
                        spans.push((open.unwrap_or(lo), None));
                    }
                    Lane {
                        label: rule_label(h, key),
                        rule: key.0.as_str(),
                        spans,
                        style: key.2,
                        kind: "rule",
                    }
                })
                .collect();
        }
    }
    // Each alert from opening to closing, under the rules.
    let def = &v.summary.snapshot.def;
    let mut lanes = lanes;
    for a in &v.alerts {
        let mut label = format!("alert · {}", a.key.rule.as_str());
        for part in [&a.key.metric, &a.key.variant].into_iter().flatten() {
            label.push_str(" · ");
            label.push_str(part);
        }
        lanes.push(Lane {
            label,
            rule: a.key.rule.as_str(),
            // A recorded final decision is a moment, not a state that lasts.
            spans: vec![(
                secs(a.opened_at).max(lo),
                if a.state == crate::decide::alerts::AlertState::Recorded {
                    Some(secs(a.opened_at).max(lo))
                } else {
                    a.closed_at.map(secs)
                },
            )],
            style: a
                .key
                .variant
                .as_ref()
                .and_then(|n| def.variants.iter().position(|v| v.name == *n)),
            kind: "alert",
        });
    }
    s.push_str(&svg::timeline(&lanes, lo, hi));
    s.push_str(r#"<p class="muted">Rule bars: when a stopping rule held at the evaluations. Alert bars (lighter, names in italics): from an alert's opening to its closing after the hold-down; a recorded final decision is a thin mark. An outlined bar still holds or is still open.</p>"#);
    if v.alerts.is_empty() {
        s.push_str(r#"<p class="muted">No alerts for this experiment.</p>"#);
    } else {
        s.push_str(r#"<table data-role="alerts"><thead><tr><th>alert</th><th>rule</th><th>metric</th><th>variant</th><th>state</th><th>opened</th><th>last held</th><th>closed</th><th>message (numbers as when it last held; what holds now is above)</th></tr></thead><tbody>"#);
        for a in &v.alerts {
            let t = |m: i64| crate::doc::time_text(m).unwrap_or_default();
            let _ = write!(
                s,
                r#"<tr data-rule="{}"><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td></tr>"#,
                a.key.rule.as_str(),
                escape(&a.id),
                a.key.rule.as_str(),
                escape(a.key.metric.as_deref().unwrap_or("—")),
                escape(a.key.variant.as_deref().unwrap_or("—")),
                a.state.as_str(),
                escape(&t(a.opened_at)),
                escape(&t(a.last_held_at)),
                escape(&a.closed_at.map(t).unwrap_or_else(|| "—".into())),
                escape(&a.message_now()),
            );
        }
        s.push_str("</tbody></table>");
    }
    s.push_str("</section>");
}

fn quality_section(s: &mut String, v: &ExperimentView) {
    let snap = &v.summary.snapshot;
    let def = &snap.def;
    s.push_str(
        r#"<h2>Data quality</h2><div class="cards"><section class="card" data-role="quality">"#,
    );
    let total: u64 = snap.units.iter().sum();
    match &v.summary.sample_ratio {
        None => s.push_str("<p>Sample ratio: no units yet.</p>"),
        Some(Err(e)) => {
            let _ = write!(
                s,
                "<p>Sample ratio: cannot test ({}).</p>",
                escape(&e.to_string())
            );
        }
        Some(Ok(r)) => {
            let flagged = r.p_value < def.rules.srm_p;
            let _ = write!(
                s,
                r#"<h3>Sample ratio</h3><p data-check="sample_ratio" data-flagged="{flagged}">χ² = {:.2} on {} degrees of freedom, p = {}: {}</p>"#,
                r.chi2,
                r.df,
                sci(r.p_value),
                if flagged {
                    format!("<strong>mismatch</strong> (p below {}); check assignment and logging before trusting any number", def.rules.srm_p)
                } else {
                    format!(
                        "consistent with the planned weights (flagged below p = {})",
                        def.rules.srm_p
                    )
                }
            );
        }
    }
    s.push_str(r#"<table data-role="allocation"><thead><tr><th>variant</th><th>planned share</th><th>observed share</th><th>units</th></tr></thead><tbody>"#);
    for (var, &u) in def.variants.iter().zip(&snap.units) {
        let _ = write!(
            s,
            r#"<tr><td>{}</td><td class="num">{}</td><td class="num">{}</td><td class="num">{u}</td></tr>"#,
            escape(&var.name),
            pct(var.weight),
            if total > 0 {
                pct(u as f64 / total as f64)
            } else {
                "—".into()
            },
        );
    }
    s.push_str("</tbody></table><h3>Events not applied</h3>");
    let share = |n: u64| {
        if total > 0 {
            format!(" ({} of units)", pct(n as f64 / total as f64))
        } else {
            String::new()
        }
    };
    s.push_str(r#"<table data-role="outcomes"><tbody>"#);
    for (o, what) in [
        (
            Outcome::Crossover,
            "crossovers (unit seen in a second variant; kept in its first)",
        ),
        (Outcome::Orphan, "orphans (outcome of a never-exposed unit)"),
        (Outcome::DuplicateExposure, "duplicate exposures"),
        (Outcome::DuplicateConversion, "duplicate conversions"),
        (Outcome::DuplicateId, "duplicate event ids"),
    ] {
        let n = snap.outcomes.get(o);
        let extra = if matches!(o, Outcome::Crossover | Outcome::Orphan) {
            share(n)
        } else {
            String::new()
        };
        let _ = write!(
            s,
            r#"<tr data-check="{}"><td>{}</td><td class="num">{n}{}</td></tr>"#,
            o.as_str(),
            escape(what),
            escape(&extra)
        );
    }
    s.push_str("</tbody></table></section>");
    // Sample-ratio p-value over time.
    if let Some(h) = &v.history {
        let q = h.quality();
        let pts: Vec<(f64, f64)> = q
            .iter()
            .filter_map(|p| p.sample_ratio_p.map(|x| (secs(p.at), x.max(1e-12))))
            .collect();
        let lo_p = pts.iter().map(|p| p.1).fold(def.rules.srm_p, f64::min) / 3.0;
        let (t0, t1) = match (q.first(), q.last()) {
            (Some(a), Some(b)) if b.at > a.at => (secs(a.at), secs(b.at)),
            (Some(a), _) => (secs(a.at) - 1.0, secs(a.at) + 1.0),
            _ => (secs(v.now) - 60.0, secs(v.now)),
        };
        let plot = Plot {
            kind: "sample-ratio",
            metric: String::new(),
            title: "sample-ratio p-value over time".into(),
            x: Axis {
                lo: t0,
                hi: t1,
                scale: Scale::Time,
                label: "evaluation time (UTC)".into(),
                fmt: Fmt::Plain,
            },
            y: Axis {
                lo: lo_p.max(1e-12),
                hi: 1.0,
                scale: Scale::Log,
                label: "p-value (log scale)".into(),
                fmt: Fmt::Plain,
            },
            series: vec![Series {
                variant: "all variants".into(),
                style: 0,
                points: pts,
                fill: false,
            }],
            bands: vec![],
            marks: vec![Mark {
                value: def.rules.srm_p,
                horizontal: true,
                role: "threshold",
                label: format!("flagged below {}", def.rules.srm_p),
            }],
            intervals: vec![],
            labels: Labels::LineEnds,
        };
        figure(
            s,
            "Sample ratio check over time",
            "chi-square p-value of exposed units against the planned weights; low values mean assignment or logging is off",
            &plot.render(),
        );
    }
    s.push_str("</div>");
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::decide::alerts::AlertKey;

    /// An invented flower-bulb shop's two-arm test with `units` exposed per arm.
    fn summary(units: u64) -> ExperimentSummary {
        let def = crate::config::experiment_from_json(
            "bulb-window",
            &serde_json::json!({
                "variants": [{"name": "control"}, {"name": "clear-window"}],
                "metric": [{"name": "bought", "kind": "conversion"}]
            }),
        )
        .unwrap();
        let engine = crate::state::Engine::new([def]);
        let mut snap = engine.experiments().next().unwrap().snapshot();
        snap.units = vec![units, units];
        crate::summary::summarize(snap, 0.95)
    }

    fn finding(rule: Rule) -> Finding {
        Finding {
            rule,
            metric: None,
            variant: None,
            value: 0.0,
            threshold: 0.0,
            test: "",
            message: String::new(),
            evidence: Default::default(),
        }
    }

    fn alert(rule: Rule, state: AlertState, acknowledged_at: Option<i64>) -> Alert {
        Alert {
            id: "a1".into(),
            key: AlertKey {
                experiment: "bulb-window".into(),
                metric: None,
                variant: None,
                rule,
            },
            state,
            opened_at: 1,
            last_held_at: 1,
            closed_at: (state == AlertState::Closed).then_some(2),
            finding: finding(rule),
            acknowledged_at,
        }
    }

    fn classes(
        summary: &ExperimentSummary,
        findings: &[Finding],
        alerts: &[Alert],
    ) -> Vec<&'static str> {
        glance(summary, findings, alerts)
            .into_iter()
            .map(|(c, _)| c)
            .collect()
    }

    #[test]
    fn the_chips_follow_the_rules_that_hold_and_the_alerts_still_open_or_recorded() {
        let (empty, some) = (summary(0), summary(40));
        assert_eq!(classes(&empty, &[], &[]), ["idle"]);
        assert_eq!(classes(&some, &[], &[]), ["gathering"]);
        assert_eq!(classes(&some, &[finding(Rule::Harm)], &[]), ["harm"]);
        // An easing harm alert still shows harm though the rule no longer holds; a closed
        // one does not.
        let easing = alert(Rule::Harm, AlertState::Easing, None);
        assert_eq!(classes(&some, &[], &[easing]), ["harm"]);
        let closed = alert(Rule::Harm, AlertState::Closed, None);
        assert_eq!(classes(&some, &[], &[closed]), ["gathering"]);
        // A recorded decision stays until someone acknowledges it.
        let recorded = alert(Rule::Ship, AlertState::Recorded, None);
        assert_eq!(classes(&some, &[], &[recorded]), ["ship"]);
        let acknowledged = alert(Rule::Ship, AlertState::Recorded, Some(5));
        assert_eq!(classes(&some, &[], &[acknowledged]), ["gathering"]);
        // Data quality comes first, beside whatever else holds.
        assert_eq!(
            classes(
                &some,
                &[finding(Rule::SampleRatio), finding(Rule::Harm)],
                &[]
            ),
            ["quality", "harm"]
        );
    }
}
