//! Unit tests of `charts`.
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
