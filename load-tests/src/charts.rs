//! The report's charts, drawn as SVG text with plotters: line charts (latency CDFs, throughput
//! and p99 against the number of adapters, memory over time) and a histogram with logarithmic
//! bins (swap times). A logarithmic axis is drawn as log10 of the values on a linear axis, with
//! labels written back in the values' own units.

use anyhow::anyhow;
pub use plotters::chart::SeriesLabelPosition;
use plotters::prelude::*;

use crate::stats::Bin;

const SIZE: (u32, u32) = (760, 420);

/// One line of a chart.
#[derive(Debug, Clone, PartialEq)]
pub struct Series {
    pub label: String,
    pub points: Vec<(f64, f64)>,
}

/// How a chart's x axis is laid out.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Axis {
    Linear,
    Log,
}

fn chart_error(e: impl std::fmt::Display) -> anyhow::Error {
    anyhow!("drawing a chart: {e}")
}

/// Tick label of a log10 position: the value itself, to two or three significant digits.
fn log_label(v: f64) -> String {
    let x = 10f64.powf(v);
    if x >= 10.0 {
        format!("{x:.0}")
    } else if x >= 1.0 {
        format!("{x:.1}")
    } else if x >= 0.01 {
        format!("{x:.2}")
    } else {
        format!("{x:.3}")
    }
}

/// Line colours that stay apart on white (no yellow).
const COLORS: [RGBColor; 8] = [
    RGBColor(31, 119, 180),
    RGBColor(214, 39, 40),
    RGBColor(44, 160, 44),
    RGBColor(148, 103, 189),
    RGBColor(255, 127, 14),
    RGBColor(23, 190, 207),
    RGBColor(140, 86, 75),
    RGBColor(227, 119, 194),
];

fn color(i: usize) -> RGBColor {
    COLORS[i % COLORS.len()]
}

fn span(values: impl Iterator<Item = f64>) -> (f64, f64) {
    let (lo, hi) = values.fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), v| {
        (lo.min(v), hi.max(v))
    });
    if !lo.is_finite() {
        return (0.0, 1.0);
    }
    if hi - lo < 1e-9 {
        return (lo - 0.5, hi + 0.5);
    }
    let pad = (hi - lo) * 0.04;
    (lo - pad, hi + pad)
}

/// A chart of lines (with a marker at each point when `markers`); with `Axis::Log` the x
/// values must be positive.
pub fn line_chart(
    title: &str,
    x_desc: &str,
    y_desc: &str,
    x_axis: Axis,
    series: &[Series],
    markers: bool,
    legend: SeriesLabelPosition,
) -> anyhow::Result<String> {
    let tx = |x: f64| match x_axis {
        Axis::Linear => x,
        Axis::Log => x.max(1e-6).log10(),
    };
    let (x0, x1) = span(series.iter().flat_map(|s| s.points.iter().map(|p| tx(p.0))));
    let (_, y1) = span(series.iter().flat_map(|s| s.points.iter().map(|p| p.1)));
    let y1 = y1.max(1e-9);
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, SIZE).into_drawing_area();
        root.fill(&WHITE).map_err(chart_error)?;
        let mut chart = ChartBuilder::on(&root)
            .caption(title, ("sans-serif", 18))
            .margin(12)
            .x_label_area_size(40)
            .y_label_area_size(64)
            .build_cartesian_2d(x0..x1, 0.0..y1)
            .map_err(chart_error)?;
        let log_fmt = |v: &f64| log_label(*v);
        let lin_fmt = |v: &f64| format!("{v}");
        let x_fmt: &dyn Fn(&f64) -> String = match x_axis {
            Axis::Log => &log_fmt,
            Axis::Linear => &lin_fmt,
        };
        chart
            .configure_mesh()
            .x_desc(x_desc)
            .y_desc(y_desc)
            .x_label_formatter(x_fmt)
            .light_line_style(WHITE.mix(0.0))
            .draw()
            .map_err(chart_error)?;
        for (i, s) in series.iter().enumerate() {
            let color = color(i);
            let points: Vec<(f64, f64)> = s.points.iter().map(|&(x, y)| (tx(x), y)).collect();
            chart
                .draw_series(LineSeries::new(points.clone(), color.stroke_width(2)))
                .map_err(chart_error)?
                .label(s.label.clone())
                .legend(move |(x, y)| PathElement::new(vec![(x, y), (x + 18, y)], color));
            if markers {
                chart
                    .draw_series(points.iter().map(|&p| Circle::new(p, 3, color.filled())))
                    .map_err(chart_error)?;
            }
        }
        if series.len() > 1 || series.iter().any(|s| !s.label.is_empty()) {
            chart
                .configure_series_labels()
                .position(legend)
                .background_style(WHITE.mix(0.85))
                .border_style(BLACK.mix(0.4))
                .draw()
                .map_err(chart_error)?;
        }
        root.present().map_err(chart_error)?;
    }
    Ok(svg)
}

/// A bar chart of `bins` on a logarithmic x axis.
pub fn histogram_chart(title: &str, x_desc: &str, bins: &[Bin]) -> anyhow::Result<String> {
    let (x0, x1) = if bins.is_empty() {
        (-2.0, 0.0)
    } else {
        (bins[0].low.log10(), bins[bins.len() - 1].high.log10())
    };
    let top = bins.iter().map(|b| b.count).max().unwrap_or(1).max(1) as f64 * 1.05;
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, SIZE).into_drawing_area();
        root.fill(&WHITE).map_err(chart_error)?;
        let mut chart = ChartBuilder::on(&root)
            .caption(title, ("sans-serif", 18))
            .margin(12)
            .x_label_area_size(40)
            .y_label_area_size(64)
            .build_cartesian_2d(x0..x1, 0.0..top)
            .map_err(chart_error)?;
        chart
            .configure_mesh()
            .x_desc(x_desc)
            .y_desc("requests")
            .x_label_formatter(&|v: &f64| log_label(*v))
            .y_label_formatter(&|v: &f64| format!("{v:.0}"))
            .light_line_style(WHITE.mix(0.0))
            .draw()
            .map_err(chart_error)?;
        let color = color(0);
        chart
            .draw_series(bins.iter().map(|b| {
                Rectangle::new(
                    [(b.low.log10(), 0.0), (b.high.log10(), b.count as f64)],
                    color.filled(),
                )
            }))
            .map_err(chart_error)?;
        root.present().map_err(chart_error)?;
    }
    Ok(svg)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn charts_are_svg_with_their_labels() {
        let svg = line_chart(
            "latency",
            "latency (ms)",
            "share",
            Axis::Log,
            &[
                Series {
                    label: "base".to_owned(),
                    points: vec![(1.0, 0.5), (10.0, 1.0)],
                },
                Series {
                    label: "mixed-10".to_owned(),
                    points: vec![(2.0, 0.5), (20.0, 1.0)],
                },
            ],
            false,
            SeriesLabelPosition::LowerRight,
        )
        .unwrap();
        assert!(svg.starts_with("<svg"), "{}", &svg[..80]);
        assert!(svg.contains("mixed-10") && svg.contains("latency (ms)"));
        let bins = [
            Bin {
                low: 0.01,
                high: 0.1,
                count: 3,
            },
            Bin {
                low: 0.1,
                high: 1.0,
                count: 1,
            },
        ];
        let svg = histogram_chart("swap", "swap (ms)", &bins).unwrap();
        assert!(svg.contains("<rect") && svg.trim_end().ends_with("</svg>"));
        assert_eq!(log_label(1.0), "10");
        assert_eq!(log_label(1.85), "71");
        assert_eq!(log_label(-1.0), "0.10");
        assert_eq!(log_label(-2.5), "0.003");
        assert_eq!(log_label(std::f64::consts::LOG10_2), "2.0");
    }
}
