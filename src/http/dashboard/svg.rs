//! Hand-written SVG plots for the dashboard: line and area series, bands, reference lines,
//! interval bars and a rule timeline.
//!
//! Written by hand rather than with a plotting crate because the browser test and any other
//! reader of the DOM need a stable structure: every series is one `<g class="series">` with a
//! `data-variant` attribute and a `data-points` count, every plot an `<svg>` with `data-plot` and
//! `data-metric`, reference lines carry `data-role`. A general-purpose SVG backend emits
//! anonymous elements with none of that, and the plots here need only lines, areas and text.
//!
//! Colour-blind safety: colours come from the Okabe–Ito colour-universal-design set
//! (M. Okabe, K. Ito, "Color Universal Design", 2008), and every variant also has its own dash
//! pattern and marker shape and is named directly (legend or end label), so no reading
//! depends on telling two hues apart.

use std::fmt::Write;

use super::markup::escape;

/// Line colours, in variant order (the control is variant 0 in most experiments, but styles
/// follow the variant index, so a variant keeps its look across every plot).
const COLOURS: [&str; 7] = [
    "#2f3640", // charcoal
    "#0072B2", // blue
    "#E69F00", // orange
    "#CC79A7", // reddish purple
    "#009E73", // bluish green
    "#D55E00", // vermillion
    "#56B4E9", // sky blue
];
/// Dash patterns, cycled more slowly than colours so (colour, dash) pairs stay distinct.
const DASHES: [&str; 5] = ["", "7 3", "2 3", "9 3 2 3", "4 2"];

/// Marker shapes.
#[derive(Clone, Copy)]
enum Marker {
    Circle,
    Square,
    Triangle,
    Diamond,
}
const MARKERS: [Marker; 4] = [
    Marker::Circle,
    Marker::Square,
    Marker::Triangle,
    Marker::Diamond,
];

/// The look of variant `i`: (colour, dash pattern).
pub fn style(i: usize) -> (&'static str, &'static str) {
    (
        COLOURS[i % COLOURS.len()],
        DASHES[(i / COLOURS.len() + i) % DASHES.len()],
    )
}

fn marker(out: &mut String, i: usize, x: f64, y: f64) {
    let (colour, _) = style(i);
    let r = 4.0;
    match MARKERS[i % MARKERS.len()] {
        Marker::Circle => {
            let _ = write!(
                out,
                r#"<circle class="marker" cx="{x:.1}" cy="{y:.1}" r="{r}" fill="{colour}"/>"#
            );
        }
        Marker::Square => {
            let _ = write!(
                out,
                r#"<rect class="marker" x="{:.1}" y="{:.1}" width="{}" height="{}" fill="{colour}"/>"#,
                x - r,
                y - r,
                2.0 * r,
                2.0 * r
            );
        }
        Marker::Triangle => {
            let _ = write!(
                out,
                r#"<path class="marker" d="M{:.1} {:.1}L{:.1} {:.1}L{:.1} {:.1}Z" fill="{colour}"/>"#,
                x,
                y - r - 1.0,
                x + r + 0.5,
                y + r,
                x - r - 0.5,
                y + r
            );
        }
        Marker::Diamond => {
            let _ = write!(
                out,
                r#"<path class="marker" d="M{:.1} {:.1}L{:.1} {:.1}L{:.1} {:.1}L{:.1} {:.1}Z" fill="{colour}"/>"#,
                x,
                y - r - 1.0,
                x + r + 1.0,
                y,
                x,
                y + r + 1.0,
                x - r - 1.0,
                y
            );
        }
    }
}

/// How an axis maps values.
#[derive(Clone, Copy, PartialEq)]
pub enum Scale {
    /// Linear.
    Linear,
    /// Base-10 logarithmic (values must be > 0).
    Log,
    /// Linear in seconds since the epoch, with clock labels.
    Time,
}

/// How tick labels are written.
#[derive(Clone, Copy)]
pub enum Fmt {
    /// Short decimal.
    Plain,
    /// Percent with sign (for lifts).
    SignedPercent,
    /// Percent.
    Percent,
}

/// One axis.
pub struct Axis {
    /// Lower end.
    pub lo: f64,
    /// Upper end.
    pub hi: f64,
    /// Mapping.
    pub scale: Scale,
    /// Label text.
    pub label: String,
    /// Tick label format (not used for `Time` and `Log`).
    pub fmt: Fmt,
}

impl Axis {
    fn unit(&self, v: f64) -> f64 {
        match self.scale {
            Scale::Log => {
                let (a, b) = (self.lo.log10(), self.hi.log10());
                (v.max(self.lo).log10() - a) / (b - a)
            }
            _ => (v - self.lo) / (self.hi - self.lo),
        }
    }

    fn ticks(&self) -> Vec<(f64, String)> {
        match self.scale {
            Scale::Linear => nice_ticks(self.lo, self.hi, 5)
                .into_iter()
                .map(|v| (v, fmt_value(v, self.fmt, self.hi - self.lo)))
                .collect(),
            Scale::Log => {
                let (a, b) = (
                    self.lo.log10().ceil() as i32,
                    self.hi.log10().floor() as i32,
                );
                let step = ((b - a) / 5 + 1).max(1);
                (a..=b)
                    .step_by(step as usize)
                    .map(|e| (10f64.powi(e), format!("1e{e}")))
                    .collect()
            }
            Scale::Time => time_ticks(self.lo, self.hi),
        }
    }
}

/// A value as a tick label.
fn fmt_value(v: f64, fmt: Fmt, span: f64) -> String {
    // Enough decimals to tell ticks about a fifth of the span apart.
    let digits = |s: f64| -> usize {
        if s <= 0.0 || !s.is_finite() {
            3
        } else {
            (-(s / 5.0).log10().floor()).clamp(0.0, 8.0) as usize
        }
    };
    match fmt {
        Fmt::Plain => format!("{v:.*}", digits(span)),
        Fmt::Percent => format!("{:.*}%", digits(span * 100.0), v * 100.0),
        Fmt::SignedPercent => format!("{:+.*}%", digits(span * 100.0), v * 100.0),
    }
}

/// Ticks at 1, 2 or 5 × 10^k, about `target` of them.
pub fn nice_ticks(lo: f64, hi: f64, target: usize) -> Vec<f64> {
    let span = hi - lo;
    if !(span > 0.0 && span.is_finite()) {
        return vec![lo];
    }
    let raw = span / target as f64;
    let e = raw.log10().floor() as i32;
    let norm = raw / 10f64.powi(e);
    let unit = if norm < 1.5 {
        1.0
    } else if norm < 3.0 {
        2.0
    } else if norm < 7.0 {
        5.0
    } else {
        10.0
    };
    // k·unit·10^e, formed so that 0.6 is 6/10 (the double nearest 0.6), not 3·0.2.
    let at = |k: f64| {
        if e >= 0 {
            k * unit * 10f64.powi(e)
        } else {
            k * unit / 10f64.powi(-e)
        }
    };
    let step = at(1.0);
    let mut k = (lo / step).ceil();
    let mut out = Vec::new();
    while at(k) <= hi + step * 1e-9 && out.len() < 50 {
        out.push(at(k));
        k += 1.0;
    }
    out
}

fn time_ticks(lo: f64, hi: f64) -> Vec<(f64, String)> {
    const STEPS: [f64; 16] = [
        1.0, 2.0, 5.0, 10.0, 15.0, 30.0, 60.0, 120.0, 300.0, 600.0, 900.0, 1800.0, 3600.0, 7200.0,
        21600.0, 86400.0,
    ];
    let span = (hi - lo).max(1.0);
    let step = STEPS
        .iter()
        .copied()
        .find(|s| span / s <= 5.0)
        .unwrap_or_else(|| (span / 5.0 / 86400.0).ceil() * 86400.0);
    let mut v = (lo / step).ceil() * step;
    let mut out = Vec::new();
    while v <= hi && out.len() < 20 {
        out.push((v, clock(v, span)));
        v += step;
    }
    out
}

/// `HH:MM:SS` (UTC), or `MM-DD HH:MM` for spans over a day.
pub fn clock(secs: f64, span: f64) -> String {
    let Ok(t) = time::OffsetDateTime::from_unix_timestamp(secs as i64) else {
        return String::new();
    };
    if span > 86_400.0 {
        format!(
            "{:02}-{:02} {:02}:{:02}",
            t.month() as u8,
            t.day(),
            t.hour(),
            t.minute()
        )
    } else {
        format!("{:02}:{:02}:{:02}", t.hour(), t.minute(), t.second())
    }
}

/// One variant's curve.
pub struct Series {
    /// Variant name (the `data-variant` attribute).
    pub variant: String,
    /// Variant index (picks the style).
    pub style: usize,
    /// Points in data coordinates, in x order.
    pub points: Vec<(f64, f64)>,
    /// Shade the area under the curve (densities).
    pub fill: bool,
}

/// A shaded range of x.
pub struct Band {
    /// Lower end.
    pub lo: f64,
    /// Upper end.
    pub hi: f64,
    /// `data-role` attribute.
    pub role: &'static str,
    /// Text shown at its top.
    pub label: String,
}

/// A reference line.
pub struct Mark {
    /// Where.
    pub value: f64,
    /// Horizontal (a y value) or vertical (an x value).
    pub horizontal: bool,
    /// `data-role` attribute.
    pub role: &'static str,
    /// Text beside it.
    pub label: String,
}

/// A credible interval drawn as a bar with end ticks under the curves.
pub struct IntervalBar {
    /// Variant name.
    pub variant: String,
    /// Variant index.
    pub style: usize,
    /// Lower end.
    pub lo: f64,
    /// Upper end.
    pub hi: f64,
}

/// Where the legend goes.
#[derive(Clone, Copy, PartialEq)]
pub enum Labels {
    /// A legend box in the top-right corner.
    Legend,
    /// Names at the end of each line, in the right margin.
    LineEnds,
}

/// One plot.
pub struct Plot {
    /// `data-plot` attribute: what is plotted.
    pub kind: &'static str,
    /// `data-metric` attribute.
    pub metric: String,
    /// Accessible description.
    pub title: String,
    /// Horizontal axis.
    pub x: Axis,
    /// Vertical axis.
    pub y: Axis,
    /// Curves.
    pub series: Vec<Series>,
    /// Shaded ranges of x.
    pub bands: Vec<Band>,
    /// Reference lines.
    pub marks: Vec<Mark>,
    /// Interval bars.
    pub intervals: Vec<IntervalBar>,
    /// Legend or line-end labels.
    pub labels: Labels,
}

const W: f64 = 560.0;
const H: f64 = 290.0;
const LEFT: f64 = 62.0;
const TOP: f64 = 14.0;
const BOTTOM: f64 = 46.0;

impl Plot {
    fn right(&self) -> f64 {
        match self.labels {
            Labels::Legend => 16.0,
            Labels::LineEnds => 112.0,
        }
    }

    fn px(&self, x: f64) -> f64 {
        LEFT + self.x.unit(x) * (W - LEFT - self.right())
    }

    fn py(&self, y: f64) -> f64 {
        let bars = if self.intervals.is_empty() {
            0.0
        } else {
            10.0 * self.intervals.len() as f64 + 6.0
        };
        let bottom = H - BOTTOM - bars;
        bottom - self.y.unit(y) * (bottom - TOP)
    }

    /// The SVG element.
    pub fn render(&self) -> String {
        let mut s = String::with_capacity(8192);
        let (x0, x1) = (LEFT, W - self.right());
        let (y0, y1) = (TOP, H - BOTTOM);
        let _ = write!(
            s,
            r#"<svg class="plot" viewBox="0 0 {W} {H}" role="img" aria-label="{}" data-plot="{}" data-metric="{}" xmlns="http://www.w3.org/2000/svg">"#,
            escape(&self.title),
            self.kind,
            escape(&self.metric)
        );
        let _ = write!(s, "<title>{}</title>", escape(&self.title));
        // Bands under everything else.
        for b in &self.bands {
            let (a, c) = (self.px(b.lo.max(self.x.lo)), self.px(b.hi.min(self.x.hi)));
            if c > a {
                let _ = write!(
                    s,
                    r#"<g data-role="{}"><rect class="band" x="{a:.1}" y="{y0}" width="{:.1}" height="{:.1}"/><text class="band-label" x="{:.1}" y="{:.1}" text-anchor="middle">{}</text></g>"#,
                    b.role,
                    c - a,
                    y1 - y0,
                    (a + c) / 2.0,
                    y0 + 11.0,
                    escape(&b.label)
                );
            }
        }
        // Grid and ticks.
        s.push_str(r#"<g class="axes">"#);
        let plot_bottom = self.py(self.y.lo);
        for (v, label) in self.y.ticks() {
            let y = self.py(v);
            if !(TOP - 0.5..=plot_bottom + 0.5).contains(&y) {
                continue;
            }
            let _ = write!(
                s,
                r#"<line class="grid" x1="{x0}" x2="{x1:.1}" y1="{y:.1}" y2="{y:.1}"/><text class="tick" x="{:.1}" y="{:.1}" text-anchor="end">{}</text>"#,
                x0 - 6.0,
                y + 4.0,
                escape(&label)
            );
        }
        for (v, label) in self.x.ticks() {
            let x = self.px(v);
            if !(x0 - 0.5..=x1 + 0.5).contains(&x) {
                continue;
            }
            let _ = write!(
                s,
                r#"<line class="grid" x1="{x:.1}" x2="{x:.1}" y1="{y0}" y2="{y1}"/><text class="tick" x="{x:.1}" y="{:.1}" text-anchor="middle">{}</text>"#,
                y1 + 15.0,
                escape(&label)
            );
        }
        let _ = write!(
            s,
            r#"<rect class="frame" x="{x0}" y="{y0}" width="{:.1}" height="{:.1}"/><text class="axis-label" x="{:.1}" y="{:.1}" text-anchor="middle">{}</text><text class="axis-label" transform="translate(14 {:.1}) rotate(-90)" text-anchor="middle">{}</text></g>"#,
            x1 - x0,
            y1 - y0,
            (x0 + x1) / 2.0,
            H - 8.0,
            escape(&self.x.label),
            (y0 + y1) / 2.0,
            escape(&self.y.label)
        );
        // Reference lines.
        for m in &self.marks {
            let (a, b, c, d, tx, ty, anchor) = if m.horizontal {
                let y = self.py(m.value);
                (x0, y, x1, y, x1 - 4.0, y - 5.0, "end")
            } else {
                let x = self.px(m.value);
                (x, y0, x, y1, x + 4.0, self.py(self.y.lo) - 6.0, "start")
            };
            let _ = write!(
                s,
                r#"<g data-role="{}" data-value="{}"><line class="mark" x1="{a:.1}" y1="{b:.1}" x2="{c:.1}" y2="{d:.1}"/><text class="mark-label" x="{tx:.1}" y="{ty:.1}" text-anchor="{anchor}">{}</text></g>"#,
                m.role,
                m.value,
                escape(&m.label)
            );
        }
        // Series.
        let mut ends: Vec<(f64, usize)> = Vec::new();
        for (k, ser) in self.series.iter().enumerate() {
            let (colour, dash) = style(ser.style);
            let _ = write!(
                s,
                r#"<g class="series" data-variant="{}" data-points="{}">"#,
                escape(&ser.variant),
                ser.points.len()
            );
            let mut d = String::with_capacity(ser.points.len() * 14);
            for (i, &(x, y)) in ser.points.iter().enumerate() {
                let _ = write!(
                    d,
                    "{}{:.1} {:.1}",
                    if i == 0 { 'M' } else { 'L' },
                    self.px(x),
                    self.py(y)
                );
            }
            if ser.fill && !ser.points.is_empty() {
                let first = self.px(ser.points[0].0);
                let last = self.px(ser.points[ser.points.len() - 1].0);
                let base = self.py(self.y.lo);
                let _ = write!(
                    s,
                    r#"<path class="area" d="{d}L{last:.1} {base:.1}L{first:.1} {base:.1}Z" fill="{colour}"/>"#
                );
            }
            let dash_attr = if dash.is_empty() {
                String::new()
            } else {
                format!(r#" stroke-dasharray="{dash}""#)
            };
            let _ = write!(
                s,
                r#"<path class="line" d="{d}" stroke="{colour}"{dash_attr}/>"#
            );
            match self.labels {
                Labels::LineEnds => {
                    if let Some(&(x, y)) = ser.points.last() {
                        marker(&mut s, ser.style, self.px(x), self.py(y));
                        ends.push((self.py(y), k));
                    }
                }
                Labels::Legend => {
                    // Mark the peak, so the marker shape also identifies the curve.
                    if let Some(&(x, y)) = ser.points.iter().max_by(|a, b| a.1.total_cmp(&b.1)) {
                        marker(&mut s, ser.style, self.px(x), self.py(y));
                    }
                }
            }
            s.push_str("</g>");
        }
        // Interval bars below the curves.
        for (row, iv) in self.intervals.iter().enumerate() {
            let (colour, _) = style(iv.style);
            let y = H - BOTTOM - 6.0 - 10.0 * row as f64;
            let (a, b) = (self.px(iv.lo.max(self.x.lo)), self.px(iv.hi.min(self.x.hi)));
            let _ = write!(
                s,
                r#"<g data-role="interval" data-variant="{}" data-lower="{}" data-upper="{}"><line class="interval" x1="{a:.1}" x2="{b:.1}" y1="{y:.1}" y2="{y:.1}" stroke="{colour}"/><line class="interval" x1="{a:.1}" x2="{a:.1}" y1="{:.1}" y2="{:.1}" stroke="{colour}"/><line class="interval" x1="{b:.1}" x2="{b:.1}" y1="{:.1}" y2="{:.1}" stroke="{colour}"/></g>"#,
                escape(&iv.variant),
                iv.lo,
                iv.hi,
                y - 4.0,
                y + 4.0,
                y - 4.0,
                y + 4.0
            );
        }
        match self.labels {
            Labels::LineEnds => {
                // Spread end labels apart so they never overlap, keeping their order.
                ends.sort_by(|a, b| a.0.total_cmp(&b.0));
                let mut last = f64::NEG_INFINITY;
                for (y, k) in ends {
                    let y = (y + 4.0).max(last + 13.0);
                    last = y;
                    let ser = &self.series[k];
                    let (colour, _) = style(ser.style);
                    let _ = write!(
                        s,
                        r#"<text class="end-label" x="{:.1}" y="{y:.1}" fill="{colour}" data-variant="{}">{}</text>"#,
                        x1 + 8.0,
                        escape(&ser.variant),
                        escape(&ser.variant)
                    );
                }
            }
            Labels::Legend if !self.series.is_empty() => {
                let lx = x1 - 150.0;
                let n = self.series.len() as f64;
                let _ = write!(
                    s,
                    r#"<g class="legend"><rect class="legend-box" x="{lx:.1}" y="{:.1}" width="144" height="{:.1}"/>"#,
                    y0 + 4.0,
                    8.0 + 15.0 * n
                );
                for (i, ser) in self.series.iter().enumerate() {
                    let (colour, dash) = style(ser.style);
                    let y = y0 + 16.0 + 15.0 * i as f64;
                    let _ = write!(
                        s,
                        r#"<line class="line" x1="{:.1}" x2="{:.1}" y1="{y:.1}" y2="{y:.1}" stroke="{colour}" stroke-dasharray="{dash}"/>"#,
                        lx + 6.0,
                        lx + 34.0
                    );
                    marker(&mut s, ser.style, lx + 20.0, y);
                    let _ = write!(
                        s,
                        r#"<text class="legend-label" x="{:.1}" y="{:.1}">{}</text>"#,
                        lx + 40.0,
                        y + 4.0,
                        escape(&ser.variant)
                    );
                }
                s.push_str("</g>");
            }
            Labels::Legend => {}
        }
        s.push_str("</svg>");
        s
    }
}

/// One lane of the rule timeline: spans during which a rule held.
pub struct Lane {
    /// What the lane is about, e.g. "harm · countdown".
    pub label: String,
    /// `data-rule` attribute.
    pub rule: &'static str,
    /// Spans (start, end) in seconds since the epoch; `end = None` while it still holds.
    pub spans: Vec<(f64, Option<f64>)>,
    /// Variant index for the colour, if the rule is about one variant.
    pub style: Option<usize>,
    /// `rule` (when the rule held at evaluations) or `alert` (from opening to closing).
    pub kind: &'static str,
}

/// The rule timeline over `[lo, hi]` (seconds since the epoch).
pub fn timeline(lanes: &[Lane], lo: f64, hi: f64) -> String {
    let w = 1120.0;
    let left = 270.0;
    let right = 20.0;
    let lane_h = 22.0;
    let h = 40.0 + lane_h * lanes.len().max(1) as f64;
    let hi = if hi > lo { hi } else { lo + 1.0 };
    let px = |t: f64| left + (t.clamp(lo, hi) - lo) / (hi - lo) * (w - left - right);
    let mut s = String::new();
    let _ = write!(
        s,
        r#"<svg class="plot timeline" viewBox="0 0 {w} {h}" role="img" aria-label="when each stopping rule held" data-plot="timeline" xmlns="http://www.w3.org/2000/svg"><title>when each stopping rule held</title>"#
    );
    for (v, label) in time_ticks(lo, hi) {
        let x = px(v);
        let _ = write!(
            s,
            r#"<line class="grid" x1="{x:.1}" x2="{x:.1}" y1="8" y2="{:.1}"/><text class="tick" x="{x:.1}" y="{:.1}" text-anchor="middle">{}</text>"#,
            h - 26.0,
            h - 10.0,
            escape(&label)
        );
    }
    if lanes.is_empty() {
        let _ = write!(
            s,
            r#"<text class="empty" x="{left}" y="26">no stopping rule has held yet</text>"#
        );
    }
    for (i, lane) in lanes.iter().enumerate() {
        let y = 10.0 + lane_h * i as f64;
        let colour = lane.style.map_or("#5b6170", |v| style(v).0);
        let _ = write!(
            s,
            r#"<g class="lane {}" data-rule="{}"><text class="lane-label" x="{:.1}" y="{:.1}" text-anchor="end">{}</text>"#,
            lane.kind,
            lane.rule,
            left - 8.0,
            y + 14.0,
            escape(&lane.label)
        );
        for &(a, b) in &lane.spans {
            let (xa, xb) = (px(a), px(b.unwrap_or(hi)));
            let _ = write!(
                s,
                r#"<rect class="span{}" x="{xa:.1}" y="{:.1}" width="{:.1}" height="14" fill="{colour}"/>"#,
                if b.is_none() { " open" } else { "" },
                y + 3.0,
                (xb - xa).max(3.0)
            );
        }
        s.push_str("</g>");
    }
    s.push_str("</svg>");
    s
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ticks_are_round_numbers_inside_the_range() {
        assert_eq!(nice_ticks(0.0, 1.0, 5), vec![0.0, 0.2, 0.4, 0.6, 0.8, 1.0]);
        let t = nice_ticks(0.1037, 0.1391, 5);
        assert!(t.iter().all(|v| (0.1037..=0.1391).contains(v)));
        assert!(t.len() >= 3 && t.len() <= 8);
        assert_eq!(nice_ticks(2.0, 2.0, 5), vec![2.0]);
    }

    #[test]
    fn every_variant_style_differs_in_more_than_colour_from_its_neighbours() {
        for i in 0..64 {
            let (c, d) = style(i);
            let (c2, d2) = style(i + 1);
            assert!(c != c2 && d != d2, "{i}");
            assert!(
                std::mem::discriminant(&MARKERS[i % 4])
                    != std::mem::discriminant(&MARKERS[(i + 1) % 4])
            );
        }
    }

    #[test]
    fn a_plot_has_one_series_group_per_variant() {
        let p = Plot {
            kind: "density",
            metric: "purchase".into(),
            title: "t".into(),
            x: Axis {
                lo: 0.0,
                hi: 1.0,
                scale: Scale::Linear,
                label: "rate".into(),
                fmt: Fmt::Percent,
            },
            y: Axis {
                lo: 0.0,
                hi: 2.0,
                scale: Scale::Linear,
                label: "density".into(),
                fmt: Fmt::Plain,
            },
            series: ["control", "short-copy"]
                .iter()
                .enumerate()
                .map(|(i, v)| Series {
                    variant: (*v).into(),
                    style: i,
                    points: vec![(0.0, 0.0), (0.5, 1.5), (1.0, 0.0)],
                    fill: true,
                })
                .collect(),
            bands: vec![],
            marks: vec![],
            intervals: vec![],
            labels: Labels::Legend,
        };
        let svg = p.render();
        assert_eq!(svg.matches(r#"<g class="series""#).count(), 2);
        assert!(svg.contains(r#"data-variant="short-copy" data-points="3""#));
        assert!(svg.starts_with("<svg") && svg.ends_with("</svg>"));
    }
}
