//! Line and point charts as inline SVG, drawn with `plotters`: axes
//! labelled with units, a legend, light grid, sizes that print well.
//! Presentation only: every point comes from the caller.

use plotters::prelude::*;
pub use plotters::style::RGBColor;

/// How a series is drawn.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Mark {
    Line,
    Dots,
    LineAndDots,
    /// A bar from the bottom of the chart up to each point, 0.7 of a unit
    /// of x wide (a bar chart over whole-numbered x).
    Bars,
}

/// One data series.
#[derive(Debug, Clone)]
pub struct Series {
    pub name: String,
    pub points: Vec<(f64, f64)>,
    pub color: RGBColor,
    pub mark: Mark,
}

/// A shaded band between two curves sharing their x values.
#[derive(Debug, Clone)]
pub struct Band {
    pub name: String,
    pub upper: Vec<(f64, f64)>,
    pub lower: Vec<(f64, f64)>,
    pub color: RGBColor,
}

/// A horizontal reference line.
#[derive(Debug, Clone)]
pub struct HLine {
    pub y: f64,
    pub name: String,
    pub color: RGBColor,
}

/// A chart to draw.
#[derive(Debug, Clone)]
pub struct Chart {
    pub title: String,
    pub x_label: String,
    pub y_label: String,
    pub series: Vec<Series>,
    pub bands: Vec<Band>,
    pub hlines: Vec<HLine>,
    /// x values are days since the common era; print them as dates.
    pub x_is_date: bool,
    pub width: u32,
    pub height: u32,
    /// The legend in the lower left corner instead of the upper right.
    pub legend_lower_left: bool,
}

impl Chart {
    pub fn new(title: &str, x_label: &str, y_label: &str) -> Chart {
        Chart {
            title: title.into(),
            x_label: x_label.into(),
            y_label: y_label.into(),
            series: Vec::new(),
            bands: Vec::new(),
            hlines: Vec::new(),
            x_is_date: false,
            width: 760,
            height: 340,
            legend_lower_left: false,
        }
    }
}

pub const BLUE_: RGBColor = RGBColor(31, 119, 180);
pub const ORANGE_: RGBColor = RGBColor(214, 95, 14);
pub const GREEN_: RGBColor = RGBColor(44, 140, 44);
pub const RED_: RGBColor = RGBColor(200, 30, 30);
pub const GREY_: RGBColor = RGBColor(110, 110, 110);
pub const PURPLE_: RGBColor = RGBColor(120, 80, 170);

/// A colour per index, for many series.
pub fn palette(i: usize) -> RGBColor {
    const P: [RGBColor; 10] = [
        RGBColor(31, 119, 180),
        RGBColor(214, 95, 14),
        RGBColor(44, 140, 44),
        RGBColor(0, 128, 128),
        RGBColor(120, 80, 170),
        RGBColor(140, 86, 75),
        RGBColor(210, 90, 170),
        RGBColor(100, 100, 100),
        RGBColor(160, 160, 20),
        RGBColor(20, 160, 180),
    ];
    P[i % P.len()]
}

/// Keep at most `max` points, evenly spaced, always the last.
pub fn thin(points: &[(f64, f64)], max: usize) -> Vec<(f64, f64)> {
    if points.len() <= max || max < 2 {
        return points.to_vec();
    }
    let step = points.len() as f64 / (max - 1) as f64;
    let mut out: Vec<(f64, f64)> = (0..max - 1)
        .map(|k| points[(k as f64 * step) as usize])
        .collect();
    if let Some(l) = points.last() {
        out.push(*l);
    }
    out
}

/// The axis range of some values, 5 % padded, at least `min_span` wide
/// (centred on them): one point, or two close together, get an axis of
/// that width around them, not one scaled from their size (a date's day
/// number would give a century).
fn range(values: impl Iterator<Item = f64>, min_span: f64) -> Option<(f64, f64)> {
    let (mut lo, mut hi) = (f64::INFINITY, f64::NEG_INFINITY);
    for v in values.filter(|v| v.is_finite()) {
        lo = lo.min(v);
        hi = hi.max(v);
    }
    if !lo.is_finite() {
        return None;
    }
    // (For y, where no width is given: a tenth of the value, or 1.)
    let span = if min_span > 0.0 {
        min_span
    } else {
        (0.5 * (lo + hi)).abs().max(10.0) * 0.1
    };
    if hi - lo < span {
        let mid = 0.5 * (lo + hi);
        (lo, hi) = (mid - 0.5 * span, mid + 0.5 * span);
    }
    let pad = (hi - lo) * 0.05;
    Some((lo - pad, hi + pad))
}

/// The least width of a chart's x axis: two months of dates, else 1.
fn x_min_span(c: &Chart) -> f64 {
    if c.x_is_date {
        60.0
    } else {
        1.0
    }
}

fn date_label(v: f64) -> String {
    chrono::NaiveDate::from_num_days_from_ce_opt(v.round() as i32)
        .map(|d| d.format("%Y-%m-%d").to_string())
        .unwrap_or_default()
}

fn no_data(c: &Chart) -> String {
    format!(
        "<svg xmlns=\"http://www.w3.org/2000/svg\" width=\"{w}\" height=\"60\" role=\"img\"><text x=\"10\" y=\"35\" font-family=\"sans-serif\" font-size=\"14\">{t}: no data</text></svg>",
        w = c.width,
        t = crate::markup::escape(&c.title)
    )
}

/// Draw a chart to an SVG string. Never fails: a chart that cannot be
/// drawn becomes a short "no data" picture.
pub fn render(c: &Chart) -> String {
    let xs = c
        .series
        .iter()
        .flat_map(|s| s.points.iter().map(|p| p.0))
        .chain(
            c.bands
                .iter()
                .flat_map(|b| b.upper.iter().chain(&b.lower).map(|p| p.0)),
        );
    let ys = c
        .series
        .iter()
        .flat_map(|s| s.points.iter().map(|p| p.1))
        .chain(
            c.bands
                .iter()
                .flat_map(|b| b.upper.iter().chain(&b.lower).map(|p| p.1)),
        )
        .chain(c.hlines.iter().map(|h| h.y))
        // Bars stand on zero.
        .chain(
            c.series
                .iter()
                .filter(|s| s.mark == Mark::Bars)
                .map(|_| 0.0),
        );
    let (Some(xr), Some(yr)) = (range(xs, x_min_span(c)), range(ys, 0.0)) else {
        return no_data(c);
    };
    let mut out = String::new();
    let ok = draw(c, xr, yr, &mut out).is_ok();
    if ok {
        out
    } else {
        no_data(c)
    }
}

type DrawResult = Result<(), Box<dyn std::error::Error>>;

fn draw(c: &Chart, xr: (f64, f64), yr: (f64, f64), out: &mut String) -> DrawResult {
    let root = SVGBackend::with_string(out, (c.width, c.height)).into_drawing_area();
    root.fill(&WHITE)?;
    let mut chart = ChartBuilder::on(&root)
        .caption(&c.title, ("sans-serif", 17))
        .margin(12)
        .x_label_area_size(42)
        .y_label_area_size(62)
        .build_cartesian_2d(xr.0..xr.1, yr.0..yr.1)?;
    let date_fmt = |v: &f64| date_label(*v);
    let num_fmt = |v: &f64| {
        let a = v.abs();
        if a < 1e-12 {
            "0".to_string()
        } else if a != 0.0 && !(0.01..1e5).contains(&a) {
            format!("{v:.2e}")
        } else if a >= 100.0 {
            format!("{v:.0}")
        } else if a >= 10.0 {
            format!("{v:.1}")
        } else {
            format!("{v:.2}")
        }
    };
    let mut mesh = chart.configure_mesh();
    mesh.x_desc(c.x_label.as_str())
        .y_desc(c.y_label.as_str())
        .label_style(("sans-serif", 12))
        .axis_desc_style(("sans-serif", 13))
        .light_line_style(RGBColor(235, 235, 235))
        .bold_line_style(RGBColor(210, 210, 210))
        .y_label_formatter(&num_fmt)
        .x_labels(if c.x_is_date { 6 } else { 10 });
    if c.x_is_date {
        mesh.x_label_formatter(&date_fmt);
    } else {
        mesh.x_label_formatter(&num_fmt);
    }
    mesh.draw()?;
    for b in &c.bands {
        let mut poly: Vec<(f64, f64)> = b.upper.clone();
        poly.extend(b.lower.iter().rev());
        let color = b.color;
        chart
            .draw_series(std::iter::once(Polygon::new(
                poly,
                color.mix(0.18).filled(),
            )))?
            .label(b.name.as_str())
            .legend(move |(x, y)| {
                Rectangle::new([(x, y - 5), (x + 18, y + 5)], color.mix(0.3).filled())
            });
    }
    for h in &c.hlines {
        let color = h.color;
        chart
            .draw_series(DashedLineSeries::new(
                vec![(xr.0, h.y), (xr.1, h.y)],
                6,
                4,
                color.stroke_width(2),
            ))?
            .label(h.name.as_str())
            .legend(move |(x, y)| {
                PathElement::new(vec![(x, y), (x + 18, y)], color.stroke_width(2))
            });
    }
    for s in &c.series {
        let color = s.color;
        if matches!(s.mark, Mark::Line | Mark::LineAndDots) {
            let drawn = chart.draw_series(LineSeries::new(
                s.points.iter().copied(),
                color.stroke_width(2),
            ))?;
            // A series with no name has no legend entry.
            if !s.name.is_empty() {
                drawn.label(s.name.as_str()).legend(move |(x, y)| {
                    PathElement::new(vec![(x, y), (x + 18, y)], color.stroke_width(2))
                });
            }
        }
        if s.mark == Mark::Bars {
            let y0 = yr.0;
            chart
                .draw_series(s.points.iter().map(|&(x, y)| {
                    Rectangle::new([(x - 0.35, y0), (x + 0.35, y)], color.mix(0.8).filled())
                }))?
                .label(s.name.as_str())
                .legend(move |(x, y)| {
                    Rectangle::new([(x, y - 5), (x + 18, y + 5)], color.mix(0.8).filled())
                });
        }
        if matches!(s.mark, Mark::Dots | Mark::LineAndDots) {
            let a =
                chart.draw_series(s.points.iter().map(|p| Circle::new(*p, 4, color.filled())))?;
            if s.mark == Mark::Dots {
                a.label(s.name.as_str())
                    .legend(move |(x, y)| Circle::new((x + 9, y), 4, color.filled()));
            }
        }
    }
    let named = c.series.iter().filter(|s| !s.name.is_empty()).count()
        + c.bands.iter().filter(|b| !b.name.is_empty()).count()
        + c.hlines.iter().filter(|h| !h.name.is_empty()).count();
    if named > 0 {
        chart
            .configure_series_labels()
            .position(if c.legend_lower_left {
                SeriesLabelPosition::LowerLeft
            } else {
                SeriesLabelPosition::UpperRight
            })
            .background_style(WHITE.mix(0.85))
            .border_style(RGBColor(190, 190, 190))
            .label_font(("sans-serif", 12))
            .draw()?;
    }
    root.present()?;
    Ok(())
}
