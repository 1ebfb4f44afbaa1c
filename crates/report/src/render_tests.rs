//! The rendering helpers under the reports: escaping, thinning a long
//! series for a chart, and the chart itself (issue 33: the report crate
//! had one unit test).

use crate::charts::Thinned;
use crate::markup::escape;
use crate::svg::{render, thin, Chart, Mark, Series, BLUE_};

#[test]
fn escape_replaces_the_five_markup_characters_and_nothing_else() {
    assert_eq!(
        escape(r#"<a href="x">Tom & 'Jo'</a> °C ±"#),
        "&lt;a href=&quot;x&quot;&gt;Tom &amp; &#39;Jo&#39;&lt;/a&gt; °C ±"
    );
    assert_eq!(escape("plain 12.5 Ah"), "plain 12.5 Ah");
    assert_eq!(escape(""), "");
}

#[test]
fn thin_keeps_at_most_max_points_evenly_with_the_first_and_last() {
    let pts: Vec<(f64, f64)> = (0..1000).map(|k| (k as f64, (k * k) as f64)).collect();
    let t = thin(&pts, 10);
    assert_eq!(t.len(), 10);
    assert_eq!(t[0], pts[0]);
    assert_eq!(*t.last().unwrap(), pts[999]);
    // Evenly spaced: every 1000 / 9 = 111.1 points.
    let xs: Vec<f64> = t.iter().map(|p| p.0).collect();
    assert_eq!(
        &xs[..9],
        &[0.0, 111.0, 222.0, 333.0, 444.0, 555.0, 666.0, 777.0, 888.0]
    );
    // Short enough already, or a max too small to thin to: unchanged.
    assert_eq!(thin(&pts[..10], 10), pts[..10].to_vec());
    assert_eq!(thin(&pts[..50], 1), pts[..50].to_vec());
}

#[test]
fn a_thinned_stream_stays_bounded_in_order_and_keeps_its_last_point() {
    let max = 100;
    let mut t = Thinned::new(max);
    let n = 100_003;
    for k in 0..n {
        t.push((k as f64, 0.0));
    }
    let p = t.points();
    assert_eq!(t.seen(), n);
    // Between max and twice max kept (halved whenever twice max is
    // reached), plus the last.
    assert!(p.len() >= max && p.len() <= 2 * max + 1, "{}", p.len());
    assert!(p.windows(2).all(|w| w[1].0 > w[0].0), "in order");
    assert_eq!(p[0].0, 0.0);
    assert_eq!(p.last().unwrap().0, (n - 1) as f64);
    // Evenly spread: the kept points are every `every`-th seen, so the
    // gaps (but the last) are all equal.
    let gaps: Vec<f64> = p[..p.len() - 1]
        .windows(2)
        .map(|w| w[1].0 - w[0].0)
        .collect();
    assert!(gaps.iter().all(|g| *g == gaps[0]), "{gaps:?}");
    // Worked by hand: the spacing doubles each time 2 × max = 200 points
    // are held, i.e. when 100 · 2^j points have been seen; 100 · 2^9 =
    // 51,200 ≤ 100,003 < 102,400, so the spacing is 2^9 = 512.
    assert_eq!(gaps[0], 512.0);
    // Fewer points than max are all kept.
    let mut few = Thinned::new(max);
    for k in 0..5 {
        few.push((k as f64, 1.0));
    }
    assert_eq!(few.points().len(), 5);
}

#[test]
fn a_chart_draws_its_series_and_escapes_its_text() {
    let mut c = Chart::new("Capacity <fade> & growth", "cycle", "Ah");
    c.series.push(Series {
        name: "pack A".into(),
        points: vec![(0.0, 14.0), (100.0, 13.5), (200.0, 13.1)],
        color: BLUE_,
        mark: Mark::LineAndDots,
    });
    let svg = render(&c);
    assert!(svg.starts_with("<svg"), "{}", &svg[..80]);
    assert!(svg.contains("Capacity &lt;fade&gt; &amp; growth"));
    assert!(svg.contains("pack A"));
    assert!(!svg.contains("no data"));
    // Nothing finite to draw: a short picture that says so.
    let mut empty = Chart::new("Resistance", "cycle", "mΩ");
    empty.series.push(Series {
        name: "none".into(),
        points: vec![(f64::NAN, 1.0)],
        color: BLUE_,
        mark: Mark::Line,
    });
    let svg = render(&empty);
    assert!(svg.contains("Resistance: no data"), "{svg}");
}

/// One point on a date axis: an axis of weeks around its day, not a
/// century (1972 to 2081 before); one at cycle 0: an axis a cycle wide.
#[test]
fn one_point_gets_an_axis_around_it() {
    use crate::svg::{render, Chart, Mark, Series};
    let day = |y: i32, m: u32, d: u32| {
        use chrono::Datelike;
        f64::from(
            chrono::NaiveDate::from_ymd_opt(y, m, d)
                .unwrap()
                .num_days_from_ce(),
        )
    };
    let mut c = Chart::new("SOH", "date", "%");
    c.x_is_date = true;
    c.series.push(Series {
        name: "tests".into(),
        points: vec![(day(2026, 6, 1), 95.0)],
        color: crate::svg::palette(0),
        mark: Mark::Dots,
    });
    let svg = render(&c);
    assert!(svg.contains("2026-0"), "{svg}");
    for far in ["1972", "2081", "2025-", "2027-"] {
        assert!(!svg.contains(far), "{far} on a one-point axis");
    }
    let mut c = Chart::new("SOH", "cycles", "%");
    c.series.push(Series {
        name: "tests".into(),
        points: vec![(0.0, 95.0)],
        color: crate::svg::palette(0),
        mark: Mark::Dots,
    });
    let svg = render(&c);
    // Ticks at ±0.2 and ±0.4 (the axis −0.55 to 0.55), none at a
    // hundredth of a cycle.
    assert!(
        svg.contains("\n0.40\n") && svg.contains("\n-0.40\n"),
        "{svg}"
    );
    assert!(!svg.contains("0.04"), "{svg}");
}
