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
//! Every piece of text drawn goes through [`super::html::escape`]. Nothing relies on colour
//! alone: series differ by marker shape too, limits are labelled in words, failing regions are
//! hatched, and exact numbers are printed beside each point.
//!
//! Output is deterministic: coordinates are printed with one decimal.

use super::html::escape;
use super::summary::{MetricSummary, Rate, Summary};
use crate::policy::RegressionRule;
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

/// A named series: colour and marker.
#[derive(Debug, Clone, PartialEq)]
pub struct Series {
    pub name: String,
    /// One word for value labels ("baseline", "candidate").
    pub short: String,
    pub colour: &'static str,
    pub shape: Shape,
    /// Hollow marker (the baseline).
    pub hollow: bool,
}

/// One series' value in a row, with its interval.
#[derive(Debug, Clone, PartialEq)]
pub struct Point {
    /// Index into the chart's series.
    pub series: usize,
    pub value: f64,
    pub lo: Option<f64>,
    pub hi: Option<f64>,
}

/// Which side of a limit fails the check.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum FailSide {
    Below,
    Above,
}

/// A per-row limit (a policy threshold), drawn as a heavy dashed line with the failing side
/// hatched.
#[derive(Debug, Clone, PartialEq)]
pub struct Limit {
    pub value: f64,
    pub fail: FailSide,
}

/// One row of a dot-and-whisker chart.
#[derive(Debug, Clone, PartialEq)]
pub struct Row {
    pub label: String,
    /// Second line under the label (counts, limits, "too few to judge").
    pub note: String,
    /// Bold label (the gate's metric).
    pub strong: bool,
    /// Drawn hollow and dashed, label in italics: results not judged (too few questions).
    pub muted: bool,
    pub points: Vec<Point>,
    pub limit: Option<Limit>,
    /// Shown in the plot area when there are no points.
    pub empty: String,
}

/// Kind of a reference line across all rows.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum LineKind {
    Zero,
    /// A policy bar the gate reads.
    Bar,
    /// A goal that informs but does not gate.
    Target,
}

#[derive(Debug, Clone, PartialEq)]
pub struct RefLine {
    pub value: f64,
    pub label: String,
    pub kind: LineKind,
}

/// A dot-and-whisker chart.
#[derive(Debug, Clone, PartialEq)]
pub struct DotWhisker {
    pub id: String,
    pub title: String,
    pub caption: String,
    pub series: Vec<Series>,
    pub rows: Vec<Row>,
    pub lines: Vec<RefLine>,
    pub fmt: Fmt,
    /// Fixed axis domain (shares: 0 to 1); otherwise fitted to the data and lines.
    pub domain: Option<(f64, f64)>,
}

/// Two drawings of every chart: `Wide` for screens and print (labels left, values right of the
/// plot) and `Narrow` for phone-width screens (labels and values on lines of their own above
/// the plot, so text stays at its natural size). The page shows one or the other by a media
/// query.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Layout {
    Wide,
    Narrow,
}

/// Horizontal geometry of a layout.
struct Geometry {
    width: f64,
    label_x: f64,
    plot_x0: f64,
    plot_x1: f64,
    value_x: f64,
    /// Characters of a row label / note before it is cut.
    label_chars: usize,
    note_chars: usize,
    /// Suffix of element ids, so both drawings can sit in one page.
    suffix: &'static str,
}

impl Layout {
    fn geometry(self) -> Geometry {
        match self {
            Layout::Wide => Geometry {
                width: 720.0,
                label_x: 8.0,
                plot_x0: 214.0,
                plot_x1: 470.0,
                value_x: 484.0,
                label_chars: 27,
                note_chars: 30,
                suffix: "",
            },
            Layout::Narrow => Geometry {
                width: 360.0,
                label_x: 8.0,
                plot_x0: 18.0,
                plot_x1: 342.0,
                value_x: 8.0,
                label_chars: 46,
                note_chars: 52,
                suffix: "-narrow",
            },
        }
    }
}

/// Draws a [`DotWhisker`] spec in both layouts.
pub fn dot_whisker(spec: &DotWhisker) -> Chart {
    Chart {
        id: spec.id.clone(),
        svg: dot_whisker_svg(spec, Layout::Wide),
        svg_narrow: dot_whisker_svg(spec, Layout::Narrow),
        caption: spec.caption.clone(),
    }
}

fn dot_whisker_svg(spec: &DotWhisker, layout: Layout) -> String {
    let g = layout.geometry();
    let narrow = layout == Layout::Narrow;
    let id = format!("{}{}", spec.id, g.suffix);
    // Vertical layout of a row: the wide layout puts label and note left of the points; the
    // narrow one stacks label, note, then per point a value line and its whisker.
    let per_point = if narrow { 36.0 } else { 19.0 };
    let head = if narrow { 38.0 } else { 0.0 };
    let row_height = |r: &Row| {
        let points = r.points.len().max(1) as f64 * per_point;
        if narrow {
            head + points + 6.0
        } else {
            (points + 22.0).max(44.0)
        }
    };
    let legend_lines = if spec.series.len() > 1 {
        if narrow {
            spec.series.len()
        } else {
            1
        }
    } else {
        0
    };
    // Room above the plot for the reference lines' labels (two staggered lines).
    let labels = if spec.lines.is_empty() { 12.0 } else { 36.0 };
    let top = labels + 20.0 * legend_lines as f64 + if narrow { 4.0 } else { 0.0 };
    let body: f64 = spec.rows.iter().map(row_height).sum();
    let height = top + body + 34.0;

    let domain = spec.domain.unwrap_or_else(|| {
        nice_domain(
            spec.rows
                .iter()
                .flat_map(|r| {
                    r.points
                        .iter()
                        .flat_map(|p| [Some(p.value), p.lo, p.hi])
                        .chain([r.limit.as_ref().map(|l| l.value)])
                })
                .flatten()
                .chain(spec.lines.iter().map(|l| l.value)),
            5,
        )
    });
    let x = Scale::new(domain, (g.plot_x0, g.plot_x1));
    let mut svg = Svg::new(g.width, height);
    let hatch_id = format!("{id}-fail");
    svg.hatch(&hatch_id, "#e7c9b3", BACKGROUND);

    if legend_lines > 0 {
        if narrow {
            for (k, s) in spec.series.iter().enumerate() {
                svg.legend(g.label_x, 18.0 + 20.0 * k as f64, std::slice::from_ref(s));
            }
        } else {
            svg.legend(g.label_x, 20.0, &spec.series);
        }
    }
    let plot_top = top - 6.0;
    let plot_bottom = top + body;

    // Zebra rows, then the grid and ticks.
    let mut y = top;
    for (i, r) in spec.rows.iter().enumerate() {
        let h = row_height(r);
        if i % 2 == 0 {
            svg.rect(0.0, y, g.width, h, "#f3f5f8", "band-row");
        }
        y += h;
    }
    let (ticks, step) = x.ticks(if narrow { 4 } else { 5 });
    for t in &ticks {
        let px = x.at(*t);
        svg.line(px, plot_top, px, plot_bottom, "grid");
        svg.text(
            px,
            plot_bottom + 16.0,
            "middle",
            "tick",
            &spec.fmt.tick(*t, step),
        );
    }
    svg.line(g.plot_x0, plot_bottom, g.plot_x1, plot_bottom, "axis");

    // Per-row limits with the failing side hatched (in the narrow layout, over the points'
    // part of the row only, so the label stays on a clean background).
    let mut y = top;
    for r in &spec.rows {
        let h = row_height(r);
        if let Some(l) = &r.limit {
            let lx = x.at(l.value);
            let (fx0, fx1) = match l.fail {
                FailSide::Below => (g.plot_x0, lx),
                FailSide::Above => (lx, g.plot_x1),
            };
            let (y0, y1) = if narrow {
                (y + head - 2.0, y + h - 2.0)
            } else {
                (y + 3.0, y + h - 3.0)
            };
            svg.rect(
                fx0,
                y0,
                fx1 - fx0,
                y1 - y0,
                &format!("url(#{hatch_id})"),
                "",
            );
            svg.line(lx, y0 - 1.0, lx, y1 + 1.0, "limit");
        }
        y += h;
    }

    // Reference lines across all rows; labels above the plot, staggered when close.
    let mut lines: Vec<RefLine> = Vec::new();
    for l in &spec.lines {
        match lines.iter_mut().find(|m| (m.value - l.value).abs() < 1e-9) {
            Some(m) => {
                m.label = format!("{} · {}", m.label, l.label);
                if l.kind == LineKind::Zero || m.kind == LineKind::Zero {
                    m.kind = LineKind::Zero;
                }
            }
            None => lines.push(l.clone()),
        }
    }
    lines.sort_by(|a, b| a.value.total_cmp(&b.value));
    let mut last_px = f64::NEG_INFINITY;
    let mut stagger = false;
    for l in &lines {
        if !x.contains(l.value) {
            continue;
        }
        let px = x.at(l.value);
        let class = match l.kind {
            LineKind::Zero => "zero",
            LineKind::Bar => "bar",
            LineKind::Target => "target",
        };
        svg.line(px, plot_top, px, plot_bottom, class);
        stagger = px - last_px < 110.0 && !stagger;
        let ly = plot_top - if stagger { 17.0 } else { 4.0 };
        let anchor = if px < g.plot_x0 + 40.0 {
            "start"
        } else if px > g.plot_x1 - 40.0 {
            "end"
        } else {
            "middle"
        };
        svg.text(px, ly, anchor, "note", &l.label);
        last_px = px;
    }

    // Rows: label, note, points, values.
    let mut y = top;
    for r in &spec.rows {
        let h = row_height(r);
        let class = match (r.strong, r.muted) {
            (true, _) => "strong",
            (false, true) => "muted",
            _ => "",
        };
        svg.text_cut(g.label_x, y + 17.0, "start", class, &r.label, g.label_chars);
        if !r.note.is_empty() {
            svg.text_cut(g.label_x, y + 32.0, "start", "note", &r.note, g.note_chars);
        }
        let points_top = if narrow {
            y + head
        } else {
            y + (h - r.points.len().max(1) as f64 * per_point) / 2.0
        };
        if r.points.is_empty() {
            // Where the value would be written.
            let cy = points_top + if narrow { 11.0 } else { per_point / 2.0 + 4.5 };
            svg.text(g.value_x, cy, "start", "muted", &r.empty);
        }
        for (k, p) in r.points.iter().enumerate() {
            let slot = points_top + k as f64 * per_point;
            let series = &spec.series[p.series.min(spec.series.len() - 1)];
            let lo = p.lo.unwrap_or(p.value);
            let hi = p.hi.unwrap_or(p.value);
            let clipped = !x.contains(lo) || !x.contains(hi);
            let interval = match (p.lo, p.hi) {
                (Some(lo), Some(hi)) => {
                    format!(" ({} to {})", spec.fmt.show(lo), spec.fmt.show(hi))
                }
                _ => String::new(),
            };
            let value = format!(
                "{}{interval}{}",
                spec.fmt.show(p.value),
                if clipped { " ›" } else { "" }
            );
            let text_class = if r.muted { "muted" } else { "" };
            // "baseline: 0.0% (…)" when the row holds several series.
            let named = |name: &str| {
                if r.points.len() > 1 {
                    format!("{name}: {value}")
                } else {
                    value.clone()
                }
            };
            if narrow {
                let text = named(&series.name);
                svg.text(g.value_x, slot + 11.0, "start", text_class, &text);
                let py = slot + 25.0;
                svg.whisker(x.at(lo), x.at(p.value), x.at(hi), py, series, r.muted);
            } else {
                let py = slot + per_point / 2.0;
                svg.whisker(x.at(lo), x.at(p.value), x.at(hi), py, series, r.muted);
                svg.text(
                    g.value_x,
                    py + 4.5,
                    "start",
                    text_class,
                    &named(&series.short),
                );
            }
        }
        y += h;
    }
    svg.finish(&id, &spec.title, &spec.caption)
}

/// One labelled part of a stacked bar.
#[derive(Debug, Clone, PartialEq)]
pub struct Segment {
    pub label: String,
    pub count: u64,
    pub colour: &'static str,
    /// Hatched (so the part is told apart without colour).
    pub hatched: bool,
}

#[derive(Debug, Clone, PartialEq)]
pub struct BarRow {
    pub label: String,
    pub note: String,
    pub strong: bool,
    pub segments: Vec<Segment>,
}

/// Horizontal stacked bars of counts, each bar the whole of its row.
#[derive(Debug, Clone, PartialEq)]
pub struct StackedBars {
    pub id: String,
    pub title: String,
    pub caption: String,
    pub rows: Vec<BarRow>,
}

/// Draws a [`StackedBars`] spec in both layouts: each segment's count is written inside it
/// when it fits, and always in words beside (wide) or under (narrow) the bar.
pub fn stacked_bars(spec: &StackedBars) -> Chart {
    Chart {
        id: spec.id.clone(),
        svg: stacked_bars_svg(spec, Layout::Wide),
        svg_narrow: stacked_bars_svg(spec, Layout::Narrow),
        caption: spec.caption.clone(),
    }
}

fn stacked_bars_svg(spec: &StackedBars, layout: Layout) -> String {
    let g = layout.geometry();
    let narrow = layout == Layout::Narrow;
    let id = format!("{}{}", spec.id, g.suffix);
    let row_h = if narrow { 78.0 } else { 46.0 };
    let top = 34.0;
    let height = top + row_h * spec.rows.len() as f64 + 10.0;
    let mut svg = Svg::new(g.width, height);
    let hatch_id = format!("{id}-hatch");
    let fill_of = |seg: &Segment| {
        if seg.hatched {
            format!("url(#{hatch_id}-{})", sanitize_id(&seg.label))
        } else {
            seg.colour.to_string()
        }
    };
    // The legend: one swatch per segment kind of the first row.
    let mut lx = g.label_x;
    if let Some(first) = spec.rows.first() {
        for seg in first.segments.iter().filter(|s| s.hatched) {
            let pid = format!("{hatch_id}-{}", sanitize_id(&seg.label));
            svg.hatch(&pid, "#ffffff", seg.colour);
        }
        for seg in &first.segments {
            svg.rect(lx, 8.0, 14.0, 14.0, &fill_of(seg), "");
            svg.text(lx + 19.0, 20.0, "start", "", &seg.label);
            lx += 19.0 + 7.5 * seg.label.chars().count() as f64 + 20.0;
        }
    }
    let (bar_x0, bar_x1) = (g.plot_x0, g.plot_x1);
    for (i, r) in spec.rows.iter().enumerate() {
        let y = top + i as f64 * row_h;
        if i % 2 == 0 {
            svg.rect(0.0, y, g.width, row_h, "#f3f5f8", "band-row");
        }
        let class = if r.strong { "strong" } else { "" };
        let bar_y = if narrow {
            // Label and note on one line above the bar.
            let label = if r.note.is_empty() {
                r.label.clone()
            } else {
                format!("{} · {}", r.label, r.note)
            };
            svg.text_cut(g.label_x, y + 17.0, "start", class, &label, g.label_chars);
            y + 25.0
        } else {
            svg.text_cut(g.label_x, y + 19.0, "start", class, &r.label, g.label_chars);
            if !r.note.is_empty() {
                svg.text_cut(g.label_x, y + 35.0, "start", "note", &r.note, g.note_chars);
            }
            y + 10.0
        };
        let total: u64 = r.segments.iter().map(|s| s.count).sum();
        let scale = Scale::new((0.0, total.max(1) as f64), (bar_x0, bar_x1));
        let mut acc = 0u64;
        let mut words = Vec::new();
        for seg in &r.segments {
            let (sx0, sx1) = (scale.at(acc as f64), scale.at((acc + seg.count) as f64));
            acc += seg.count;
            svg.rect(sx0, bar_y, sx1 - sx0, 26.0, &fill_of(seg), "");
            if seg.count > 0 && sx1 - sx0 >= 26.0 {
                // A white box behind the count keeps it legible on any fill.
                let cx = (sx0 + sx1) / 2.0;
                let digits = seg.count.to_string().len() as f64;
                svg.rect(
                    cx - 4.0 * digits - 3.0,
                    bar_y + 5.0,
                    8.0 * digits + 6.0,
                    16.0,
                    BACKGROUND,
                    "",
                );
                svg.text(cx, bar_y + 17.5, "middle", "", &seg.count.to_string());
            }
            words.push(format!("{} {}", seg.count, seg.label));
        }
        let _ = write!(
            svg.body,
            r#"<rect x="{}" y="{}" width="{}" height="26" fill="none" stroke="{INK_SOFT}" stroke-width="1"/>"#,
            n1(bar_x0),
            n1(bar_y),
            n1(bar_x1 - bar_x0)
        );
        if narrow {
            svg.text(g.label_x, bar_y + 44.0, "start", "note", &words.join(" · "));
        } else {
            svg.text(g.value_x, bar_y + 17.5, "start", "note", &words.join(" · "));
        }
    }
    svg.finish(&id, &spec.title, &spec.caption)
}

/// Letters, digits and dashes only (for ids built from labels we wrote).
fn sanitize_id(s: &str) -> String {
    s.chars()
        .map(|c| if c.is_ascii_alphanumeric() { c } else { '-' })
        .collect()
}

/// One run in a series over time.
#[derive(Debug, Clone, PartialEq)]
pub struct TrendPoint {
    /// The run's short label (a date or directory name).
    pub label: String,
    /// The measured value; `None` leaves a gap.
    pub value: Option<f64>,
    pub ci_low: Option<f64>,
    pub ci_high: Option<f64>,
    /// The question set differs from the previous run's: values either side of the mark are not
    /// directly comparable.
    pub set_changed: bool,
}

/// What a [`time_series`] draws besides its points.
#[derive(Debug, Clone, PartialEq)]
pub struct TimeSeries<'a> {
    pub id: &'a str,
    pub title: &'a str,
    pub caption: &'a str,
    pub points: &'a [TrendPoint],
    pub fmt: Fmt,
    /// A policy bar: value and label.
    pub bar: Option<(f64, &'a str)>,
    pub series: &'a Series,
}

/// Values over ordered runs, in both layouts: a line through the values, a band for the
/// intervals (broken where an interval is missing or the set changed), a zero line, an
/// optional policy bar, and a dashed mark where the question set changed.
pub fn time_series(spec: &TimeSeries) -> Chart {
    Chart {
        id: spec.id.into(),
        svg: time_series_svg(spec, Layout::Wide),
        svg_narrow: time_series_svg(spec, Layout::Narrow),
        caption: spec.caption.into(),
    }
}

fn time_series_svg(spec: &TimeSeries, layout: Layout) -> String {
    let g = layout.geometry();
    let narrow = layout == Layout::Narrow;
    let id = format!("{}{}", spec.id, g.suffix);
    let points = spec.points;
    let series = spec.series;
    let (x0, x1, top, bottom) = (
        if narrow { 50.0 } else { 64.0 },
        g.width - 16.0,
        30.0,
        210.0,
    );
    let height = bottom + 34.0;
    let domain = nice_domain(
        points
            .iter()
            .flat_map(|p| [p.value, p.ci_low, p.ci_high])
            .flatten()
            .chain([0.0])
            .chain(spec.bar.map(|b| b.0)),
        5,
    );
    let y = Scale::new(domain, (bottom, top));
    let n = points.len();
    let px = |i: usize| {
        if n <= 1 {
            (x0 + x1) / 2.0
        } else {
            x0 + 12.0 + (x1 - x0 - 24.0) * i as f64 / (n - 1) as f64
        }
    };
    let mut svg = Svg::new(g.width, height);
    let (ticks, step) = y.ticks(5);
    for t in &ticks {
        let py = y.at(*t);
        svg.line(x0, py, x1, py, "grid");
        svg.text(x0 - 6.0, py + 4.0, "end", "tick", &spec.fmt.tick(*t, step));
    }
    svg.line(x0, bottom, x1, bottom, "axis");
    if y.contains(0.0) {
        let p0 = y.at(0.0);
        svg.line(x0, p0, x1, p0, "zero");
    }
    if let Some((v, label)) = spec.bar {
        if y.contains(v) {
            let pb = y.at(v);
            svg.line(x0, pb, x1, pb, "bar");
            svg.text(x1, pb - 5.0, "end", "note", label);
        }
    }
    // Set changes: a dashed vertical mark half-way to the previous run.
    for (i, p) in points.iter().enumerate() {
        if p.set_changed && i > 0 {
            let mx = (px(i - 1) + px(i)) / 2.0;
            svg.stroke_dashed(mx, top - 6.0, mx, bottom, INK, 1.5, Some("3 3"));
            svg.text(mx, top - 10.0, "middle", "note", "set changed");
        }
    }
    // Bands over runs of consecutive points with intervals, not across a set change.
    let mut segments: Vec<Vec<usize>> = Vec::new();
    for (i, p) in points.iter().enumerate() {
        let has = p.ci_low.is_some() && p.ci_high.is_some();
        let continues = has
            && !p.set_changed
            && segments
                .last()
                .and_then(|s| s.last())
                .is_some_and(|&j| j + 1 == i);
        match (has, continues) {
            (true, true) => segments.last_mut().unwrap().push(i),
            (true, false) => segments.push(vec![i]),
            _ => {}
        }
    }
    for seg in &segments {
        let lo = |i: usize| y.at(points[i].ci_low.unwrap_or(0.0));
        let hi = |i: usize| y.at(points[i].ci_high.unwrap_or(0.0));
        if seg.len() == 1 {
            let i = seg[0];
            svg.stroke(px(i), lo(i), px(i), hi(i), series.colour, 2.0);
            continue;
        }
        let mut d = String::new();
        for (k, &i) in seg.iter().enumerate() {
            let _ = write!(
                d,
                "{}{} {}",
                if k == 0 { "M" } else { "L" },
                n1(px(i)),
                n1(hi(i))
            );
        }
        for &i in seg.iter().rev() {
            let _ = write!(d, "L{} {}", n1(px(i)), n1(lo(i)));
        }
        d.push('Z');
        svg.path(&d, series.colour, "none", 0.0, 0.18);
    }
    // The line through the values, broken at gaps and set changes.
    let mut d = String::new();
    let mut pen_down = false;
    for (i, p) in points.iter().enumerate() {
        match p.value {
            Some(v) => {
                let cmd = if pen_down && !p.set_changed { "L" } else { "M" };
                let _ = write!(d, "{cmd}{} {}", n1(px(i)), n1(y.at(v)));
                pen_down = true;
            }
            None => pen_down = false,
        }
    }
    if !d.is_empty() {
        svg.path(&d, "none", series.colour, 2.0, 0.0);
    }
    for (i, p) in points.iter().enumerate() {
        if let Some(v) = p.value {
            svg.marker(
                series.shape,
                px(i),
                y.at(v),
                10.0,
                series.colour,
                series.hollow,
            );
        }
    }
    // Run labels: every k-th so they do not collide.
    let room = if narrow { 4.0 } else { 8.0 };
    let every = (n as f64 / room).ceil().max(1.0) as usize;
    for (i, p) in points.iter().enumerate() {
        if i % every == 0 || i + 1 == n {
            svg.text_cut(px(i), bottom + 18.0, "middle", "tick", &p.label, 12);
        }
    }
    if n == 0 {
        svg.text(
            (x0 + x1) / 2.0,
            (top + bottom) / 2.0,
            "middle",
            "muted",
            "no runs yet",
        );
    }
    svg.finish(&id, spec.title, spec.caption)
}

// ---------------------------------------------------------------------------------------------
// The report's charts: one function each
// ---------------------------------------------------------------------------------------------

/// The candidates of a summary with their series (one today; the list is general so several
/// fine-tunes get consistent colours).
fn candidates(_s: &Summary) -> Vec<Series> {
    vec![candidate_series(0, "candidate (fine-tuned)", "candidate")]
}

fn conf(s: &Summary) -> String {
    format!("{:.0}%", 100.0 * s.settings.confidence)
}

/// The lift of each metric with its interval, the zero line, the gate's bar and the target.
pub fn lift_chart(s: &Summary) -> Chart {
    let gate = s.policy.lift.metric;
    let cands = candidates(s);
    let metrics: [(&str, &str, &MetricSummary); 3] = [
        ("exact_match", "exact match", &s.metrics.exact_match),
        ("token_f1", "token F1", &s.metrics.token_f1),
        ("rouge_l", "ROUGE-L", &s.metrics.rouge_l),
    ];
    let rows = metrics
        .iter()
        .map(|(key, label, m)| {
            let is_gate = *key == gate.as_str();
            Row {
                label: if is_gate {
                    format!("{label} (gate)")
                } else {
                    label.to_string()
                },
                note: match (m.baseline, m.candidate) {
                    (Some(b), Some(c)) => format!("{b:.3} → {c:.3}, n = {}", m.n),
                    _ => format!("n = {}", m.n),
                },
                strong: is_gate,
                muted: false,
                points: m
                    .lift
                    .map(|v| Point {
                        series: 0,
                        value: v,
                        lo: m.ci_low,
                        hi: m.ci_high,
                    })
                    .into_iter()
                    .collect(),
                limit: None,
                empty: "no questions to compare".into(),
            }
        })
        .collect();
    let bar = s.policy.lift.min_ci_low;
    let lines = vec![
        RefLine {
            value: 0.0,
            label: "no change".into(),
            kind: LineKind::Zero,
        },
        RefLine {
            value: bar,
            label: "gate bar".into(),
            kind: LineKind::Bar,
        },
        RefLine {
            value: s.policy.lift.target,
            label: format!("target {}", Fmt::Signed(3).show(s.policy.lift.target)),
            kind: LineKind::Target,
        },
    ];
    let caption = format!(
        "How much each score changed from the base model to the fine-tune (candidate minus baseline), with {} intervals; the gate needs the whole {} interval to the right of {}.",
        conf(s),
        gate.label(),
        Fmt::Signed(3).show(bar)
    );
    dot_whisker(&DotWhisker {
        id: "chart-lift".into(),
        title: "Lift per metric".into(),
        caption,
        series: cands,
        rows,
        lines,
        fmt: Fmt::Signed(3),
        domain: None,
    })
}

/// The gate metric's lift per category; categories too small to be judged drawn hollow and
/// dashed and labelled so.
pub fn category_chart(s: &Summary) -> Chart {
    let gate = s.policy.lift.metric;
    let min = s.policy.categories.min_questions;
    let rows = s
        .categories
        .iter()
        .map(|(name, c)| {
            let note = if c.judged {
                format!("n = {}", c.n)
            } else if c.n == 0 {
                format!("only out of scope ({})", c.refuse_questions)
            } else {
                format!("n = {}: too few to judge", c.n)
            };
            Row {
                label: name.clone(),
                note,
                strong: false,
                muted: !c.judged,
                points: c
                    .lift
                    .map(|v| Point {
                        series: 0,
                        value: v,
                        lo: c.ci_low,
                        hi: c.ci_high,
                    })
                    .into_iter()
                    .collect(),
                limit: None,
                empty: "no in-scope questions".into(),
            }
        })
        .collect();
    let allowance = s.policy.categories.max_regression;
    let rule = match s.policy.categories.rule {
        RegressionRule::ClearRegression => {
            "a category fails only if its whole interval lies left of the allowed loss"
        }
        RegressionRule::NonInferiority => {
            "a category passes only if its whole interval lies right of the allowed loss"
        }
    };
    let caption = format!(
        "Change in {} per category with {} intervals; {rule}; categories with fewer than {min} in-scope questions are drawn hollow and not judged.",
        gate.label(),
        conf(s)
    );
    dot_whisker(&DotWhisker {
        id: "chart-categories".into(),
        title: format!("{} lift per category", gate.label()),
        caption,
        series: candidates(s),
        rows,
        lines: vec![
            RefLine {
                value: 0.0,
                label: "no change".into(),
                kind: LineKind::Zero,
            },
            RefLine {
                value: -allowance,
                label: format!("allowed loss {}", Fmt::Signed(3).show(-allowance)),
                kind: LineKind::Bar,
            },
        ],
        fmt: Fmt::Signed(3),
        domain: None,
    })
}

/// Refusal shares with Wilson intervals, baseline and candidate, against the policy's limits.
pub fn refusal_chart(s: &Summary) -> Chart {
    let mut series = vec![baseline_series()];
    series.extend(candidates(s));
    let point = |series: usize, r: &Rate| {
        r.share.map(|v| Point {
            series,
            value: v,
            lo: r.ci_low,
            hi: r.ci_high,
        })
    };
    let r = &s.refusal;
    let p = &s.policy.refusal;
    let rows = vec![
        Row {
            label: "out of scope, declined".into(),
            note: format!(
                "n = {}; needs at least {}",
                r.out_of_scope.n,
                Fmt::Percent(0).show(p.min_out_of_scope)
            ),
            strong: false,
            muted: false,
            points: [
                point(0, &r.out_of_scope.baseline),
                point(1, &r.out_of_scope.candidate),
            ]
            .into_iter()
            .flatten()
            .collect(),
            limit: Some(Limit {
                value: p.min_out_of_scope,
                fail: FailSide::Below,
            }),
            empty: "no out-of-scope questions".into(),
        },
        Row {
            label: "in scope, wrongly declined".into(),
            note: format!(
                "n = {}; allows at most {}",
                r.false_refusal.n,
                Fmt::Percent(0).show(p.max_false_refusal)
            ),
            strong: false,
            muted: false,
            points: [
                point(0, &r.false_refusal.baseline),
                point(1, &r.false_refusal.candidate),
            ]
            .into_iter()
            .flatten()
            .collect(),
            limit: Some(Limit {
                value: p.max_false_refusal,
                fail: FailSide::Above,
            }),
            empty: "no in-scope questions".into(),
        },
    ];
    let caption = format!(
        "Share of questions each model declined, with {} Wilson intervals: out-of-scope questions should be declined, in-scope ones answered; the hatched side of each heavy dashed line fails the policy.",
        conf(s)
    );
    dot_whisker(&DotWhisker {
        id: "chart-refusals".into(),
        title: "Refusals against the policy's limits".into(),
        caption,
        series,
        rows,
        lines: vec![],
        fmt: Fmt::Percent(1),
        domain: Some((0.0, 1.0)),
    })
}

/// How many questions scored higher, lower or the same with the fine-tune, per metric.
pub fn changes_chart(s: &Summary) -> Chart {
    let gate = s.policy.lift.metric;
    let metrics: [(&str, &str, &MetricSummary); 3] = [
        ("exact_match", "exact match", &s.metrics.exact_match),
        ("token_f1", "token F1", &s.metrics.token_f1),
        ("rouge_l", "ROUGE-L", &s.metrics.rouge_l),
    ];
    let rows = metrics
        .iter()
        .map(|(key, label, m)| BarRow {
            label: if *key == gate.as_str() {
                format!("{label} (gate)")
            } else {
                label.to_string()
            },
            note: format!("n = {}", m.n),
            strong: *key == gate.as_str(),
            segments: vec![
                Segment {
                    label: "worse".into(),
                    count: m.worse as u64,
                    colour: WORSE,
                    hatched: true,
                },
                Segment {
                    label: "same".into(),
                    count: m.same as u64,
                    colour: SAME,
                    hatched: false,
                },
                Segment {
                    label: "better".into(),
                    count: m.better as u64,
                    colour: BETTER,
                    hatched: false,
                },
            ],
        })
        .collect();
    stacked_bars(&StackedBars {
        id: "chart-changes".into(),
        title: "Per-question changes".into(),
        caption: "How many in-scope questions scored lower, the same or higher with the fine-tune than with the base model, per metric.".into(),
        rows,
    })
}

/// One metric over runs with interval bands and set changes marked (for a page over the
/// history of runs). `bar` is the policy's bar for this metric, if it has one.
pub fn trend_chart(metric_label: &str, points: &[TrendPoint], bar: Option<f64>) -> Chart {
    let id = format!("chart-trend-{}", sanitize_id(metric_label));
    let caption = format!(
        "Lift in {metric_label} run by run, with its interval as a band; a dashed mark shows where the question set changed, so values either side are not directly comparable."
    );
    let bar_label = bar.map(|b| format!("gate bar {}", Fmt::Signed(3).show(b)));
    time_series(&TimeSeries {
        id: &id,
        title: &format!("{metric_label} lift over runs"),
        caption: &caption,
        points,
        fmt: Fmt::Signed(3),
        bar: bar.zip(bar_label.as_deref()),
        series: &candidate_series(0, "candidate", "candidate"),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// WCAG 2.x relative luminance and contrast ratio (W3C, "Understanding Success Criterion
    /// 1.4.3", definitions of relative luminance and contrast ratio).
    fn luminance(hex: &str) -> f64 {
        let c = |i: usize| {
            let v = u8::from_str_radix(&hex[i..i + 2], 16).unwrap() as f64 / 255.0;
            if v <= 0.04045 {
                v / 12.92
            } else {
                ((v + 0.055) / 1.055).powf(2.4)
            }
        };
        0.2126 * c(1) + 0.7152 * c(3) + 0.0722 * c(5)
    }

    fn contrast(a: &str, b: &str) -> f64 {
        let (la, lb) = (luminance(a), luminance(b));
        (la.max(lb) + 0.05) / (la.min(lb) + 0.05)
    }

    #[test]
    fn contrast_formula_matches_published_values() {
        // Black on white is 21:1, white on white 1:1 (WCAG definition).
        assert!((contrast("#000000", "#ffffff") - 21.0).abs() < 1e-9);
        assert!((contrast("#ffffff", "#ffffff") - 1.0).abs() < 1e-9);
        // #777777 on white is about 4.48:1, just below AA (a commonly quoted example).
        assert!((contrast("#777777", "#ffffff") - 4.48).abs() < 0.01);
    }

    #[test]
    fn text_and_series_colours_meet_wcag_aa_on_the_background() {
        for c in [INK, INK_SOFT, BASELINE, BETTER, WORSE]
            .into_iter()
            .chain(CANDIDATE_COLOURS)
        {
            // 4.5:1 is AA for text; series colours are also used for value text.
            assert!(
                contrast(c, BACKGROUND) >= 4.5,
                "{c}: {}",
                contrast(c, BACKGROUND)
            );
            // The zebra row background too.
            assert!(contrast(c, "#f3f5f8") >= 4.5, "{c} on zebra");
        }
        // Graphics need 3:1 (WCAG 1.4.11); the light "same" segment carries its count in a
        // white box and in words, not by its fill.
        assert!(contrast(GRID, BACKGROUND) < 3.0);
    }

    #[test]
    fn candidate_palette_is_a_function_of_the_index() {
        assert_eq!(candidate_colour(0), candidate_colour(5));
        assert_ne!(candidate_colour(0), candidate_colour(1));
        assert_ne!(candidate_shape(0), candidate_shape(1));
        let names: Vec<_> = (0..5).map(candidate_colour).collect();
        let mut unique = names.clone();
        unique.sort();
        unique.dedup();
        assert_eq!(unique.len(), names.len());
    }

    #[test]
    fn nice_steps_and_ticks() {
        assert_eq!(nice_step(0.013), 0.02);
        assert_eq!(nice_step(0.3), 0.5);
        assert_eq!(nice_step(7.0), 10.0);
        assert_eq!(nice_step(1.0), 1.0);
        let s = Scale::new((-0.1, 0.2), (0.0, 300.0));
        let (t, step) = s.ticks(3);
        assert_eq!(step, 0.1);
        assert_eq!(t.len(), 4);
        assert_eq!(t[1], 0.0);
        assert!((s.at(0.0) - 100.0).abs() < 1e-9);
        // Outside the domain: clamped to the edge, and reported as outside.
        assert_eq!(s.at(5.0), 300.0);
        assert!(!s.contains(5.0));
        // A degenerate domain still maps.
        let d = Scale::new((0.3, 0.3), (0.0, 10.0));
        assert!((d.at(0.3) - 5.0).abs() < 1e-9);
    }

    #[test]
    fn nice_domain_covers_values_with_round_ends() {
        let (lo, hi) = nice_domain([-0.027, 0.117, 0.05], 5);
        assert!(lo <= -0.027 && hi >= 0.117, "{lo} {hi}");
        let step = nice_step((hi - lo) / 5.0);
        assert!(
            ((lo / 0.01).round() - lo / 0.01).abs() < 1e-6,
            "{lo} {step}"
        );
        assert_eq!(nice_domain(std::iter::empty(), 5), (0.0, 1.0));
    }

    #[test]
    fn formats_use_a_true_minus_and_plain_zero() {
        assert_eq!(Fmt::Signed(3).show(-0.027), "\u{2212}0.027");
        assert_eq!(Fmt::Signed(3).show(0.081), "+0.081");
        assert_eq!(Fmt::Signed(3).show(0.0), "0");
        assert_eq!(Fmt::Percent(1).show(0.786), "78.6%");
        assert_eq!(Fmt::Percent(0).tick(0.2, 0.2), "20%");
        assert_eq!(Fmt::Signed(3).tick(-0.05, 0.05), "\u{2212}0.05");
    }

    fn spec(rows: Vec<Row>) -> DotWhisker {
        DotWhisker {
            id: "t".into(),
            title: "T <b>".into(),
            caption: "cap".into(),
            series: vec![baseline_series(), candidate_series(0, "cand", "cand")],
            rows,
            lines: vec![RefLine {
                value: 0.0,
                label: "zero".into(),
                kind: LineKind::Zero,
            }],
            fmt: Fmt::Signed(2),
            domain: None,
        }
    }

    #[test]
    fn dot_whisker_places_points_on_the_scale_and_escapes_labels() {
        let row = Row {
            label: "<script>x</script>".into(),
            note: "n = 3".into(),
            strong: false,
            muted: true,
            points: vec![Point {
                series: 1,
                value: 0.1,
                lo: Some(-0.1),
                hi: Some(0.3),
            }],
            limit: Some(Limit {
                value: -0.05,
                fail: FailSide::Below,
            }),
            empty: String::new(),
        };
        let c = dot_whisker(&spec(vec![row]));
        assert!(c.svg.starts_with("<svg "));
        assert!(c.svg.contains("<title id=\"t-title\">T &lt;b&gt;</title>"));
        assert!(!c.svg.contains("<script>"));
        assert!(c.svg.contains("&lt;script&gt;x&lt;/script&gt;"));
        // The value and interval are written in words beside the point.
        assert!(c.svg.contains("+0.10 (\u{2212}0.10 to +0.30)"), "{}", c.svg);
        // Muted rows are dashed and hollow.
        assert!(c.svg.contains("stroke-dasharray=\"4 3\""));
        // The limit hatch is referenced and defined.
        assert!(c.svg.contains("url(#t-fail)") && c.svg.contains("<pattern id=\"t-fail\""));
        // The point's centre lies where the scale puts 0.1.
        let domain = nice_domain([0.1, -0.1, 0.3, -0.05, 0.0], 5);
        let g = Layout::Wide.geometry();
        let x = Scale::new(domain, (g.plot_x0, g.plot_x1)).at(0.1);
        assert!(c.svg.contains(&format!("M{} ", n1(x))), "{x} in {}", c.svg);
        // The narrow drawing holds the same values, with its own ids, and names the series
        // when a row holds several.
        assert!(c.svg_narrow.contains("id=\"t-narrow-title\""));
        assert!(c.svg_narrow.contains("url(#t-narrow-fail)"));
        assert!(c.svg_narrow.contains("+0.10 (\u{2212}0.10 to +0.30)"));
        assert!(!c.svg_narrow.contains("<script>"));
    }

    #[test]
    fn stacked_bars_split_the_row_by_counts() {
        let c = stacked_bars(&StackedBars {
            id: "s".into(),
            title: "S".into(),
            caption: "c".into(),
            rows: vec![BarRow {
                label: "F1".into(),
                note: String::new(),
                strong: true,
                segments: vec![
                    Segment {
                        label: "worse".into(),
                        count: 1,
                        colour: WORSE,
                        hatched: true,
                    },
                    Segment {
                        label: "better".into(),
                        count: 3,
                        colour: BETTER,
                        hatched: false,
                    },
                ],
            }],
        });
        // 1 of 4 → a quarter of the bar.
        let g = Layout::Wide.geometry();
        let quarter = (g.plot_x1 - g.plot_x0) / 4.0;
        assert!(
            c.svg.contains(&format!("width=\"{}\"", n1(quarter))),
            "{}",
            c.svg
        );
        assert!(c.svg.contains("1 worse · 3 better"));
        assert!(c.svg.contains("url(#s-hatch-worse)"));
    }

    #[test]
    fn trend_chart_draws_bands_values_and_set_changes() {
        let pts = vec![
            TrendPoint {
                label: "2025-01-02".into(),
                value: Some(0.02),
                ci_low: Some(-0.01),
                ci_high: Some(0.05),
                set_changed: false,
            },
            TrendPoint {
                label: "2025-01-09".into(),
                value: Some(0.04),
                ci_low: Some(0.01),
                ci_high: Some(0.07),
                set_changed: false,
            },
            TrendPoint {
                label: "2025-02-01".into(),
                value: Some(0.08),
                ci_low: Some(0.05),
                ci_high: Some(0.11),
                set_changed: true,
            },
            TrendPoint {
                label: "<i>x</i>".into(),
                value: None,
                ci_low: None,
                ci_high: None,
                set_changed: false,
            },
        ];
        let c = trend_chart("token F1", &pts, Some(0.0));
        assert_eq!(c.id, "chart-trend-token-F1");
        assert!(c.svg.contains("<title"));
        assert!(c.caption.contains("question set changed"));
        // One band over the first two runs (the set change breaks it), one plain whisker for
        // the third run, one set-change mark.
        assert_eq!(
            c.svg.matches("fill-opacity=\"0.18\"").count(),
            1,
            "{}",
            c.svg
        );
        assert_eq!(c.svg.matches(">set changed<").count(), 1);
        // The value line restarts after the set change: two M commands.
        let line = c
            .svg
            .split("<path d=\"")
            .find(|p| p.contains("fill=\"none\" fill-opacity=\"0\""))
            .unwrap();
        assert_eq!(line.split('"').next().unwrap().matches('M').count(), 2);
        // Three markers (the fourth run has no value); labels escaped.
        assert!(!c.svg.contains("<i>"));
        assert!(c.svg.contains("&lt;i&gt;x&lt;/i&gt;"));
        // The y positions follow the values: a larger lift is drawn higher (smaller y).
        let dom = nice_domain(
            [
                0.02, -0.01, 0.05, 0.04, 0.01, 0.07, 0.08, 0.05, 0.11, 0.0, 0.0,
            ],
            5,
        );
        let y = Scale::new(dom, (210.0, 30.0));
        assert!(y.at(0.08) < y.at(0.02));
        assert!(c.svg.contains(&n1(y.at(0.08))));
    }

    #[test]
    fn time_series_with_no_runs_says_so() {
        let c = trend_chart("ROUGE-L", &[], None);
        assert!(c.svg.contains("no runs yet"));
    }
}
