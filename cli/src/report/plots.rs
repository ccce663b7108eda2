//! SVG plots for the report, drawn with `plotters` (SVG backend, so they embed in the HTML as text).

use plotters::prelude::*;

/// Series colours (one per variant, cycling).
pub const PALETTE: [RGBColor; 8] = [
    RGBColor(0x1f, 0x77, 0xb4),
    RGBColor(0xd6, 0x27, 0x28),
    RGBColor(0x2c, 0xa0, 0x2c),
    RGBColor(0xff, 0x7f, 0x0e),
    RGBColor(0x94, 0x67, 0xbd),
    RGBColor(0x8c, 0x56, 0x4b),
    RGBColor(0xe3, 0x77, 0xc2),
    RGBColor(0x7f, 0x7f, 0x7f),
];

pub fn colour(index: usize) -> RGBColor {
    PALETTE[index % PALETTE.len()]
}

/// CSS form of a series colour.
pub fn css_colour(index: usize) -> String {
    let RGBColor(r, g, b) = colour(index);
    format!("#{r:02x}{g:02x}{b:02x}")
}

fn err<E: std::fmt::Display>(e: E) -> String {
    format!("drawing a plot: {e}")
}

/// A symmetric volts range that holds every value, rounded up to a tidy number.
type LightChart<'a, 'b> = ChartContext<
    'a,
    SVGBackend<'b>,
    Cartesian2d<plotters::coord::types::RangedCoordf64, plotters::coord::types::RangedCoordf64>,
>;

/// White chart with a caption and room for axis labels (the overlay and harmonic plots share it).
fn light_chart<'a, 'b>(
    root: &'a DrawingArea<SVGBackend<'b>, plotters::coord::Shift>,
    title: &str,
    x: std::ops::Range<f64>,
    y: std::ops::Range<f64>,
) -> Result<LightChart<'a, 'b>, String> {
    root.fill(&WHITE).map_err(err)?;
    ChartBuilder::on(root)
        .caption(title, ("sans-serif", 18))
        .margin(12)
        .x_label_area_size(38)
        .y_label_area_size(56)
        .build_cartesian_2d(x, y)
        .map_err(err)
}

/// Legend box in the upper right corner, for the series drawn with labels.
fn draw_legend<'a, 'b: 'a>(chart: &mut LightChart<'a, 'b>) -> Result<(), String> {
    chart
        .configure_series_labels()
        .position(SeriesLabelPosition::UpperRight)
        .background_style(WHITE.mix(0.85))
        .border_style(BLACK)
        .draw()
        .map_err(err)
}

/// Legend sample: a short line in the series colour.
fn swatch(c: RGBColor, width: u32) -> impl Fn((i32, i32)) -> PathElement<(i32, i32)> {
    move |(x, y)| PathElement::new(vec![(x, y), (x + 18, y)], c.stroke_width(width))
}

fn volts_range(values: impl Iterator<Item = f64>) -> f64 {
    let peak = values
        .filter(|v| v.is_finite())
        .fold(0.0f64, |m, v| m.max(v.abs()));
    let steps = [
        0.1, 0.2, 0.5, 1.0, 2.0, 5.0, 10.0, 15.0, 20.0, 25.0, 30.0, 40.0, 50.0, 75.0, 100.0, 150.0,
        200.0,
    ];
    steps
        .into_iter()
        .find(|s| *s >= peak * 1.1)
        .unwrap_or(peak * 1.1)
}

/// One series of a time plot.
pub struct Trace<'a> {
    pub name: &'a str,
    pub samples: &'a [f32],
    pub colour: usize,
}

/// Overlay of the clamp node volts of every variant over the same passage.
pub fn overlay(title: &str, rate: f64, traces: &[Trace]) -> Result<String, String> {
    let mut svg = String::new();
    let len = traces
        .iter()
        .map(|t| t.samples.len())
        .max()
        .unwrap_or(0)
        .max(2);
    let ms = len as f64 / rate * 1e3;
    let range = volts_range(
        traces
            .iter()
            .flat_map(|t| t.samples.iter().map(|v| *v as f64)),
    );
    {
        let root = SVGBackend::with_string(&mut svg, (900, 380)).into_drawing_area();
        let mut chart = light_chart(&root, title, 0f64..ms, -range..range)?;
        chart
            .configure_mesh()
            .x_desc("time in the passage (ms)")
            .y_desc("clamp node (V)")
            .light_line_style(RGBColor(235, 235, 235))
            .draw()
            .map_err(err)?;
        // Earlier series are drawn wider, so a trace that another one covers exactly still shows at its edges.
        for (i, t) in traces.iter().enumerate() {
            let c = colour(t.colour);
            let width = (traces.len() - i).clamp(1, 4) as u32;
            chart
                .draw_series(LineSeries::new(
                    t.samples
                        .iter()
                        .enumerate()
                        .map(|(n, v)| (n as f64 / rate * 1e3, *v as f64)),
                    ShapeStyle::from(&c).stroke_width(width),
                ))
                .map_err(err)?
                .label(t.name)
                .legend(swatch(c, 3));
        }
        draw_legend(&mut chart)?;
        root.present().map_err(err)?;
    }
    Ok(svg)
}

/// Scope-style view of one variant: dark screen, graticule of 10 x 8 divisions, the trace, and dashed lines
/// at the clamp thresholds.
pub fn scope(
    title: &str,
    rate: f64,
    samples: &[f32],
    thresholds: (Option<f64>, Option<f64>),
    volts_full: f64,
) -> Result<String, String> {
    let mut svg = String::new();
    let len = samples.len().max(2);
    let ms = len as f64 / rate * 1e3;
    let screen = RGBColor(16, 24, 20);
    let grid = RGBColor(60, 90, 70);
    let trace = RGBColor(80, 255, 120);
    {
        let root = SVGBackend::with_string(&mut svg, (440, 300)).into_drawing_area();
        root.fill(&RGBColor(40, 40, 40)).map_err(err)?;
        let mut chart = ChartBuilder::on(&root)
            .caption(title, ("sans-serif", 15).into_font().color(&WHITE))
            .margin(8)
            .x_label_area_size(28)
            .y_label_area_size(44)
            .build_cartesian_2d(0f64..ms, -volts_full..volts_full)
            .map_err(err)?;
        chart.plotting_area().fill(&screen).map_err(err)?;
        chart
            .configure_mesh()
            .x_labels(11)
            .y_labels(9)
            .x_desc("ms")
            .y_desc("V")
            .bold_line_style(grid)
            .light_line_style(screen)
            .axis_style(grid)
            .label_style(
                ("sans-serif", 12)
                    .into_font()
                    .color(&RGBColor(200, 200, 200)),
            )
            .draw()
            .map_err(err)?;
        let threshold = RGBColor(255, 190, 60);
        for level in [thresholds.0, thresholds.1].into_iter().flatten() {
            if level.abs() < volts_full {
                chart
                    .draw_series(DashedLineSeries::new(
                        vec![(0.0, level), (ms, level)],
                        6,
                        4,
                        ShapeStyle::from(&threshold).stroke_width(1),
                    ))
                    .map_err(err)?;
            }
        }
        chart
            .draw_series(LineSeries::new(
                samples
                    .iter()
                    .enumerate()
                    .map(|(n, v)| (n as f64 / rate * 1e3, *v as f64)),
                ShapeStyle::from(&trace).stroke_width(2),
            ))
            .map_err(err)?;
        root.present().map_err(err)?;
    }
    Ok(svg)
}

/// The scale a set of scope views shares, so their traces compare at a glance.
pub fn shared_scope_range(all: &[&[f32]]) -> f64 {
    volts_range(all.iter().flat_map(|s| s.iter().map(|v| *v as f64)))
}

/// One variant's clamp node span on a DI: a bar from the negative to the positive peak, with its thresholds.
pub struct Span<'a> {
    pub name: &'a str,
    pub colour: usize,
    pub negative_peak: f64,
    pub positive_peak: f64,
    pub thresholds: (Option<f64>, Option<f64>),
}

/// Peak swing of the clamp node per variant, with the clamp thresholds marked.
pub fn spans(title: &str, spans: &[Span]) -> Result<String, String> {
    let mut svg = String::new();
    let range = volts_range(spans.iter().flat_map(|s| {
        [
            s.negative_peak,
            s.positive_peak,
            s.thresholds.0.unwrap_or(0.0),
            s.thresholds.1.unwrap_or(0.0),
        ]
    }));
    let count = spans.len().max(1);
    {
        let root = SVGBackend::with_string(&mut svg, (900, 320)).into_drawing_area();
        root.fill(&WHITE).map_err(err)?;
        let mut chart = ChartBuilder::on(&root)
            .caption(title, ("sans-serif", 18))
            .margin(12)
            .x_label_area_size(40)
            .y_label_area_size(56)
            .build_cartesian_2d(0f64..count as f64, -range..range)
            .map_err(err)?;
        let names: Vec<String> = spans.iter().map(|s| s.name.to_string()).collect();
        chart
            .configure_mesh()
            .disable_x_mesh()
            .x_labels(count * 2 + 1)
            .x_label_formatter(&|x| {
                let i = x.floor() as usize;
                if (x - x.floor() - 0.5).abs() < 1e-6 && i < names.len() {
                    names[i].clone()
                } else {
                    String::new()
                }
            })
            .y_desc("clamp node peak (V)")
            .light_line_style(RGBColor(235, 235, 235))
            .draw()
            .map_err(err)?;
        for (i, s) in spans.iter().enumerate() {
            let c = colour(s.colour);
            let x0 = i as f64 + 0.25;
            let x1 = i as f64 + 0.75;
            chart
                .draw_series(std::iter::once(Rectangle::new(
                    [(x0, s.negative_peak), (x1, s.positive_peak)],
                    c.mix(0.6).filled(),
                )))
                .map_err(err)?;
            for level in [s.thresholds.0, s.thresholds.1].into_iter().flatten() {
                chart
                    .draw_series(DashedLineSeries::new(
                        vec![(x0 - 0.12, level), (x1 + 0.12, level)],
                        5,
                        3,
                        ShapeStyle::from(&BLACK).stroke_width(2),
                    ))
                    .map_err(err)?;
            }
        }
        chart
            .draw_series(std::iter::once(PathElement::new(
                vec![(0.0, 0.0), (count as f64, 0.0)],
                ShapeStyle::from(&RGBColor(120, 120, 120)).stroke_width(1),
            )))
            .map_err(err)?;
        root.present().map_err(err)?;
    }
    Ok(svg)
}

/// Harmonic spectrum of the test tone per variant: level of harmonics 1..=N relative to the fundamental.
pub fn harmonics(title: &str, series: &[(&str, usize, &[f64])]) -> Result<String, String> {
    let mut svg = String::new();
    let highest = series.iter().map(|s| s.2.len()).max().unwrap_or(2).max(2);
    let floor = -100.0;
    {
        let root = SVGBackend::with_string(&mut svg, (900, 340)).into_drawing_area();
        let mut chart = light_chart(&root, title, 0.5f64..highest as f64 + 0.5, floor..5.0)?;
        chart
            .configure_mesh()
            .x_labels(highest)
            .x_label_formatter(&|x| format!("{}", x.round() as i64))
            .x_desc("harmonic number")
            .y_desc("level re fundamental (dB)")
            .light_line_style(RGBColor(235, 235, 235))
            .draw()
            .map_err(err)?;
        let n = series.len().max(1) as f64;
        for (k, (name, colour_index, levels)) in series.iter().enumerate() {
            let c = colour(*colour_index);
            let offset = (k as f64 + 0.5) / n * 0.7 - 0.35;
            chart
                .draw_series(levels.iter().enumerate().skip(1).map(|(h, db)| {
                    let x = (h + 1) as f64 + offset;
                    let top = if db.is_finite() { db.max(floor) } else { floor };
                    PathElement::new(vec![(x, floor), (x, top)], c.stroke_width(4))
                }))
                .map_err(err)?
                .label(*name)
                .legend(swatch(c, 4));
        }
        draw_legend(&mut chart)?;
        root.present().map_err(err)?;
    }
    Ok(svg)
}
