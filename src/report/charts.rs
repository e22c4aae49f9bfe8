//! Hand-written SVG charts for the HTML pages (report.html, and later pages over several runs).
//!
//! Three general drawings carry every chart:
//! - [`dot_whisker`]: one row per item, a point with its interval whisker per series, shared
//!   reference lines (zero, policy bars) and per-row limits with the failing side shaded;
//! - [`stacked_bars`]: one row per item, counts split into labelled segments;
//! - [`time_series`]: values over ordered runs with interval bands and marked breaks.
//!
//! A chart for the report is one function that maps report data onto one of these specs
//! ([`lift_chart`], [`category_chart`], [`refusal_chart`], [`changes_chart`], [`trend_chart`]).
//! Every chart returns a [`Chart`]: an `<svg>` string with a `<title>` and a `<desc>` (for
//! screen readers) and a one-line caption in plain words for the page.
//!
//! Every piece of text drawn goes through [`super::inert::escape`]. Nothing relies on colour
//! alone: series differ by marker shape too, limits are labelled in words, failing regions are
//! hatched, and exact numbers are printed beside each point.
//!
//! Output is deterministic: coordinates are printed with one decimal.

mod drawings;
mod figures;

pub use drawings::*;
pub use figures::*;

use super::inert::escape;
use std::fmt::Write;

/// One finished chart.
#[derive(Debug, Clone, PartialEq)]
pub struct Chart {
    /// Stable identifier (the page's `data-chart` attribute and the SVG's id prefix).
    pub id: String,
    /// The `<svg>` element for wide screens and print, self-contained, with `<title>` and
    /// `<desc>`.
    pub svg: String,
    /// The same chart drawn for phone-width screens (element ids end in `-narrow`).
    pub svg_narrow: String,
    /// One plain-words sentence saying what the chart shows.
    pub caption: String,
}

// ---------------------------------------------------------------------------------------------
// Palette
// ---------------------------------------------------------------------------------------------

/// Page background; every text colour below keeps WCAG AA contrast (4.5:1) against it (tested).
pub const BACKGROUND: &str = "#ffffff";
/// Body text.
pub const INK: &str = "#1b2631";
/// Secondary text (axis ticks, notes).
pub const INK_SOFT: &str = "#4d5866";
/// Grid lines and faint guides (not text).
pub const GRID: &str = "#d9dee4";
/// The baseline (base model): a slate grey, drawn as a hollow circle.
pub const BASELINE: &str = "#56606c";
/// Per-question changes: better (blue), worse (orange, also hatched), same (light grey).
pub const BETTER: &str = "#1f63a6";
pub const WORSE: &str = "#b4530b";
pub const SAME: &str = "#c5ccd4";

/// Candidate colours, a blue/orange-led set chosen to stay apart under the common colour-vision
/// deficiencies (the blue/orange pair is the usual safe choice; the others differ in lightness).
const CANDIDATE_COLOURS: [&str; 5] = ["#1f63a6", "#b4530b", "#6b4aa0", "#197560", "#a3325f"];
/// Candidate markers, so that series differ by shape as well as colour.
const CANDIDATE_SHAPES: [Shape; 5] = [
    Shape::Diamond,
    Shape::Square,
    Shape::TriangleUp,
    Shape::TriangleDown,
    Shape::Circle,
];

/// The colour of candidate `index` (0 for the first fine-tune), the same in every chart.
pub fn candidate_colour(index: usize) -> &'static str {
    CANDIDATE_COLOURS[index % CANDIDATE_COLOURS.len()]
}

/// The marker of candidate `index`, the same in every chart.
pub fn candidate_shape(index: usize) -> Shape {
    CANDIDATE_SHAPES[index % CANDIDATE_SHAPES.len()]
}

/// The baseline series.
pub fn baseline_series() -> Series {
    Series {
        name: "baseline (base model)".into(),
        short: "baseline".into(),
        colour: BASELINE,
        shape: Shape::Circle,
        hollow: true,
    }
}

/// Candidate `index`'s series.
pub fn candidate_series(index: usize, name: &str, short: &str) -> Series {
    Series {
        name: name.into(),
        short: short.into(),
        colour: candidate_colour(index),
        shape: candidate_shape(index),
        hollow: false,
    }
}

/// Chart-specific CSS; the page includes it once. Classes only, so colours of series stay
/// inline on the elements.
pub const CSS: &str = "\
.lg-chart{display:block;width:100%;height:auto;font-family:inherit}\
.lg-chart text{fill:#1b2631;font-size:13px;paint-order:stroke;stroke:#fff;stroke-width:3px;stroke-linejoin:round}\
.lg-chart .tick{fill:#4d5866;font-size:11.5px}\
.lg-chart .note{fill:#4d5866;font-size:11.5px}\
.lg-chart .strong{font-weight:700}\
.lg-chart .muted{fill:#4d5866;font-style:italic}\
.lg-chart .grid{stroke:#d9dee4;stroke-width:1}\
.lg-chart .axis{stroke:#4d5866;stroke-width:1}\
.lg-chart .zero{stroke:#1b2631;stroke-width:1.5}\
.lg-chart .bar{stroke:#1b2631;stroke-width:1.5;stroke-dasharray:6 3}\
.lg-chart .target{stroke:#4d5866;stroke-width:1.2;stroke-dasharray:2 3}\
.lg-chart .limit{stroke:#1b2631;stroke-width:2.5;stroke-dasharray:5 2}\
.lg-chart .band-row{fill:#f3f5f8}\
";

// ---------------------------------------------------------------------------------------------
// Primitives: numbers, scales, the SVG builder
// ---------------------------------------------------------------------------------------------

/// How axis ticks and value labels are written.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Fmt {
    /// Signed with this many decimals (lifts): `+0.081`, `−0.027`, `0`.
    Signed(usize),
    /// A share in [0, 1] as a percentage with this many decimals.
    Percent(usize),
    /// Plain with this many decimals (scores).
    Plain(usize),
}

impl Fmt {
    pub fn show(self, v: f64) -> String {
        let s = match self {
            Fmt::Signed(d) if v.abs() < 0.5 * 10f64.powi(-(d as i32)) => "0".to_string(),
            Fmt::Signed(d) => format!("{v:+.d$}"),
            Fmt::Percent(d) => format!("{:.d$}%", 100.0 * v),
            Fmt::Plain(d) => format!("{v:.d$}"),
        };
        // A true minus sign reads better than a hyphen.
        s.replacen('-', "\u{2212}", 1)
    }

    /// Tick labels: as few decimals as the step needs.
    fn tick(self, v: f64, step: f64) -> String {
        let decimals = |scale: f64| {
            let mut d = 0usize;
            while d < 6 && ((step * scale) * 10f64.powi(d as i32)).fract().abs() > 1e-6 {
                d += 1;
            }
            d
        };
        match self {
            Fmt::Signed(_) => Fmt::Signed(decimals(1.0)).show(v),
            Fmt::Percent(_) => Fmt::Percent(decimals(100.0)).show(v),
            Fmt::Plain(_) => Fmt::Plain(decimals(1.0)).show(v),
        }
    }
}

/// A linear map from a data domain to a pixel range, clamped to the range.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Scale {
    d0: f64,
    d1: f64,
    r0: f64,
    r1: f64,
}

impl Scale {
    /// A zero-width domain is widened so the map stays defined.
    pub fn new(domain: (f64, f64), range: (f64, f64)) -> Scale {
        let (mut d0, mut d1) = domain;
        if !(d0.is_finite() && d1.is_finite()) {
            (d0, d1) = (0.0, 1.0);
        }
        if d1 - d0 < 1e-12 {
            d0 -= 0.5;
            d1 += 0.5;
        }
        Scale {
            d0,
            d1,
            r0: range.0,
            r1: range.1,
        }
    }

    pub fn domain(&self) -> (f64, f64) {
        (self.d0, self.d1)
    }

    /// Pixel position of `v`; values outside the domain land on its edge.
    pub fn at(&self, v: f64) -> f64 {
        let v = if v.is_finite() { v } else { self.d0 };
        let t = ((v - self.d0) / (self.d1 - self.d0)).clamp(0.0, 1.0);
        self.r0 + t * (self.r1 - self.r0)
    }

    /// Whether `v` lies inside the domain (so a point is not silently drawn on the edge).
    pub fn contains(&self, v: f64) -> bool {
        v >= self.d0 - 1e-12 && v <= self.d1 + 1e-12
    }

    /// About `count` round ticks (steps of 1, 2 or 5 times a power of ten) inside the domain,
    /// with their step.
    pub fn ticks(&self, count: usize) -> (Vec<f64>, f64) {
        let step = nice_step((self.d1 - self.d0) / count.max(1) as f64);
        let first = (self.d0 / step - 1e-9).ceil() as i64;
        let last = (self.d1 / step + 1e-9).floor() as i64;
        let ticks = (first..=last)
            .map(|i| {
                let v = i as f64 * step;
                if v.abs() < step * 1e-9 {
                    0.0
                } else {
                    v
                }
            })
            .collect();
        (ticks, step)
    }
}

/// The round step (1, 2 or 5 × 10^k) nearest above `raw`.
pub fn nice_step(raw: f64) -> f64 {
    if !(raw.is_finite() && raw > 0.0) {
        return 1.0;
    }
    let power = 10f64.powf(raw.log10().floor());
    // A little slack so that rounding error (0.30000000000000004 / 3) does not jump a step.
    let f = raw / power * (1.0 - 1e-9);
    let nice = if f <= 1.0 {
        1.0
    } else if f <= 2.0 {
        2.0
    } else if f <= 5.0 {
        5.0
    } else {
        10.0
    };
    nice * power
}

/// A domain covering every value, padded by 8% and widened to round ticks.
pub fn nice_domain(values: impl IntoIterator<Item = f64>, ticks: usize) -> (f64, f64) {
    let (mut lo, mut hi) = (f64::INFINITY, f64::NEG_INFINITY);
    for v in values.into_iter().filter(|v| v.is_finite()) {
        lo = lo.min(v);
        hi = hi.max(v);
    }
    if lo > hi {
        return (0.0, 1.0);
    }
    if hi - lo < 1e-9 {
        lo -= 0.05;
        hi += 0.05;
    }
    let pad = 0.08 * (hi - lo);
    let step = nice_step((hi - lo + 2.0 * pad) / ticks.max(1) as f64);
    (
        ((lo - pad) / step).floor() * step,
        ((hi + pad) / step).ceil() * step,
    )
}

fn n1(v: f64) -> String {
    let s = format!("{v:.1}");
    if s == "-0.0" {
        "0.0".into()
    } else {
        s
    }
}

/// Marker shapes.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Shape {
    Circle,
    Diamond,
    Square,
    TriangleUp,
    TriangleDown,
}

/// A small SVG builder: elements are appended in order; [`Svg::finish`] wraps them with the
/// root element, `<title>` and `<desc>`.
pub struct Svg {
    width: f64,
    height: f64,
    defs: String,
    body: String,
}

impl Svg {
    pub fn new(width: f64, height: f64) -> Svg {
        Svg {
            width,
            height,
            defs: String::new(),
            body: String::new(),
        }
    }

    pub fn line(&mut self, x1: f64, y1: f64, x2: f64, y2: f64, class: &str) {
        let _ = write!(
            self.body,
            r#"<line class="{class}" x1="{}" y1="{}" x2="{}" y2="{}"/>"#,
            n1(x1),
            n1(y1),
            n1(x2),
            n1(y2)
        );
    }

    /// A line in a given colour and width (series whiskers).
    pub fn stroke(&mut self, x1: f64, y1: f64, x2: f64, y2: f64, colour: &str, width: f64) {
        self.stroke_dashed(x1, y1, x2, y2, colour, width, None);
    }

    #[allow(clippy::too_many_arguments)]
    pub fn stroke_dashed(
        &mut self,
        x1: f64,
        y1: f64,
        x2: f64,
        y2: f64,
        colour: &str,
        width: f64,
        dash: Option<&str>,
    ) {
        let dash = dash
            .map(|d| format!(r#" stroke-dasharray="{d}""#))
            .unwrap_or_default();
        let _ = write!(
            self.body,
            r#"<line x1="{}" y1="{}" x2="{}" y2="{}" stroke="{colour}" stroke-width="{width}"{dash}/>"#,
            n1(x1),
            n1(y1),
            n1(x2),
            n1(y2)
        );
    }

    /// A rectangle filled with `fill` (a colour or `url(#…)`), optional class.
    pub fn rect(&mut self, x: f64, y: f64, w: f64, h: f64, fill: &str, class: &str) {
        let class = if class.is_empty() {
            String::new()
        } else {
            format!(r#" class="{class}""#)
        };
        let _ = write!(
            self.body,
            r#"<rect{class} x="{}" y="{}" width="{}" height="{}" fill="{fill}"/>"#,
            n1(x),
            n1(y),
            n1(w.max(0.0)),
            n1(h.max(0.0))
        );
    }

    /// A filled path (bands, polygons) or a stroked one (`fill` = "none").
    pub fn path(&mut self, d: &str, fill: &str, stroke: &str, width: f64, opacity: f64) {
        let _ = write!(
            self.body,
            r#"<path d="{d}" fill="{fill}" fill-opacity="{opacity}" stroke="{stroke}" stroke-width="{width}"/>"#
        );
    }

    /// Text, escaped; `anchor` is start, middle or end.
    pub fn text(&mut self, x: f64, y: f64, anchor: &str, class: &str, text: &str) {
        let class = if class.is_empty() {
            String::new()
        } else {
            format!(r#" class="{class}""#)
        };
        let _ = write!(
            self.body,
            r#"<text{class} x="{}" y="{}" text-anchor="{anchor}">{}</text>"#,
            n1(x),
            n1(y),
            escape(text)
        );
    }

    /// Text cut to `max_chars` characters (with "…"); the whole text stays available as a
    /// tooltip (`<title>`).
    #[allow(clippy::too_many_arguments)]
    pub fn text_cut(
        &mut self,
        x: f64,
        y: f64,
        anchor: &str,
        class: &str,
        text: &str,
        max_chars: usize,
    ) {
        if text.chars().count() <= max_chars {
            self.text(x, y, anchor, class, text);
            return;
        }
        let short: String = text.chars().take(max_chars.saturating_sub(1)).collect();
        let class = if class.is_empty() {
            String::new()
        } else {
            format!(r#" class="{class}""#)
        };
        let _ = write!(
            self.body,
            r#"<text{class} x="{}" y="{}" text-anchor="{anchor}"><title>{}</title>{}…</text>"#,
            n1(x),
            n1(y),
            escape(text),
            escape(&short)
        );
    }

    /// A marker centred on (x, y), `size` across.
    pub fn marker(&mut self, shape: Shape, x: f64, y: f64, size: f64, colour: &str, hollow: bool) {
        let fill = if hollow { BACKGROUND } else { colour };
        let r = size / 2.0;
        let attrs = format!(r#"fill="{fill}" stroke="{colour}" stroke-width="2""#);
        let _ = match shape {
            Shape::Circle => write!(
                self.body,
                r#"<circle cx="{}" cy="{}" r="{}" {attrs}/>"#,
                n1(x),
                n1(y),
                n1(r)
            ),
            Shape::Square => write!(
                self.body,
                r#"<rect x="{}" y="{}" width="{}" height="{}" {attrs}/>"#,
                n1(x - r * 0.85),
                n1(y - r * 0.85),
                n1(1.7 * r),
                n1(1.7 * r)
            ),
            Shape::Diamond => write!(
                self.body,
                r#"<path d="M{} {}L{} {}L{} {}L{} {}Z" {attrs}/>"#,
                n1(x),
                n1(y - 1.15 * r),
                n1(x + 1.15 * r),
                n1(y),
                n1(x),
                n1(y + 1.15 * r),
                n1(x - 1.15 * r),
                n1(y)
            ),
            Shape::TriangleUp => write!(
                self.body,
                r#"<path d="M{} {}L{} {}L{} {}Z" {attrs}/>"#,
                n1(x),
                n1(y - 1.2 * r),
                n1(x + 1.1 * r),
                n1(y + 0.8 * r),
                n1(x - 1.1 * r),
                n1(y + 0.8 * r)
            ),
            Shape::TriangleDown => write!(
                self.body,
                r#"<path d="M{} {}L{} {}L{} {}Z" {attrs}/>"#,
                n1(x),
                n1(y + 1.2 * r),
                n1(x + 1.1 * r),
                n1(y - 0.8 * r),
                n1(x - 1.1 * r),
                n1(y - 0.8 * r)
            ),
        };
    }

    /// A point with its interval: a whisker from `lo` to `hi` with end caps, the marker on
    /// top. `dashed` draws the whisker dashed (results too small to be judged).
    #[allow(clippy::too_many_arguments)]
    pub fn whisker(&mut self, x_lo: f64, x: f64, x_hi: f64, y: f64, series: &Series, dashed: bool) {
        let dash = dashed.then_some("4 3");
        self.stroke_dashed(x_lo, y, x_hi, y, series.colour, 2.0, dash);
        for xe in [x_lo, x_hi] {
            self.stroke(xe, y - 5.0, xe, y + 5.0, series.colour, 2.0);
        }
        self.marker(
            series.shape,
            x,
            y,
            11.0,
            series.colour,
            series.hollow || dashed,
        );
    }

    /// A diagonal hatch pattern usable as `fill="url(#id)"`.
    pub fn hatch(&mut self, id: &str, colour: &str, background: &str) {
        let _ = write!(
            self.defs,
            r#"<pattern id="{id}" width="6" height="6" patternUnits="userSpaceOnUse" patternTransform="rotate(45)"><rect width="6" height="6" fill="{background}"/><line x1="0" y1="0" x2="0" y2="6" stroke="{colour}" stroke-width="2.5"/></pattern>"#
        );
    }

    /// The legend: one marker and name per series, in a row from (x, y).
    pub fn legend(&mut self, x: f64, y: f64, series: &[Series]) {
        let mut cx = x;
        for s in series {
            self.marker(s.shape, cx + 6.0, y - 4.0, 11.0, s.colour, s.hollow);
            self.text(cx + 16.0, y, "start", "", &s.name);
            cx += 16.0 + 7.0 * s.name.chars().count() as f64 + 22.0;
        }
    }

    /// The root element with `<title>` and `<desc>`; `id` prefixes nothing else (pattern ids
    /// are chosen by the chart functions, prefixed with the chart id).
    pub fn finish(self, id: &str, title: &str, caption: &str) -> String {
        let mut o = String::new();
        let _ = write!(
            o,
            r#"<svg xmlns="http://www.w3.org/2000/svg" class="lg-chart" id="{id}-svg" viewBox="0 0 {} {}" role="img" aria-labelledby="{id}-title {id}-desc"><title id="{id}-title">{}</title><desc id="{id}-desc">{}</desc>"#,
            n1(self.width),
            n1(self.height),
            escape(title),
            escape(caption)
        );
        if !self.defs.is_empty() {
            let _ = write!(o, "<defs>{}</defs>", self.defs);
        }
        o.push_str(&self.body);
        o.push_str("</svg>");
        o
    }
}

// ---------------------------------------------------------------------------------------------
// General charts
// ---------------------------------------------------------------------------------------------

#[cfg(test)]
#[path = "charts_tests.rs"]
mod tests;
