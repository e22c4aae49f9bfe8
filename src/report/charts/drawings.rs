//! The general drawings every chart is made of: dot-and-whisker rows, stacked bars and time
//! series, each drawn wide (desktop, print) and narrow (phone).

use super::*;
use std::fmt::Write;

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
pub(in crate::report) struct Geometry {
    pub(in crate::report) width: f64,
    pub(in crate::report) label_x: f64,
    pub(in crate::report) plot_x0: f64,
    pub(in crate::report) plot_x1: f64,
    pub(in crate::report) value_x: f64,
    /// Characters of a row label / note before it is cut.
    pub(in crate::report) label_chars: usize,
    pub(in crate::report) note_chars: usize,
    /// Suffix of element ids, so both drawings can sit in one page.
    pub(in crate::report) suffix: &'static str,
}

impl Layout {
    pub(in crate::report) fn geometry(self) -> Geometry {
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
pub(super) fn sanitize_id(s: &str) -> String {
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
