//! Plots for reports, as SVG text (plotters' SVG backend: no system libraries, no fonts needed,
//! and the report stays one self-contained HTML file).

use plotters::prelude::*;

/// One line of a line chart.
pub struct Series<'a> {
    pub name: &'a str,
    pub x: &'a [f64],
    pub y: &'a [f64],
    /// Dashed lines mark references or approximations.
    pub dashed: bool,
}

const PALETTE: [RGBColor; 6] = [
    RGBColor(31, 119, 180),
    RGBColor(214, 39, 40),
    RGBColor(44, 160, 44),
    RGBColor(255, 127, 14),
    RGBColor(148, 103, 189),
    RGBColor(90, 90, 90),
];

fn span(values: impl Iterator<Item = f64>) -> (f64, f64) {
    let (mut lo, mut hi) = (f64::INFINITY, f64::NEG_INFINITY);
    for v in values.filter(|v| v.is_finite()) {
        lo = lo.min(v);
        hi = hi.max(v);
    }
    if !lo.is_finite() {
        return (0.0, 1.0);
    }
    if hi - lo < 1e-12 {
        return (lo - 0.5, hi + 0.5);
    }
    let pad = 0.05 * (hi - lo);
    (lo - pad, hi + pad)
}

fn draw_err(e: impl std::fmt::Display) -> String {
    format!("<p class=\"plot-error\">plot failed: {e}</p>")
}

/// A line chart of several series.
pub fn line_chart(title: &str, x_label: &str, y_label: &str, series: &[Series]) -> String {
    let mut svg = String::new();
    let result = (|| -> Result<(), Box<dyn std::error::Error + '_>> {
        let root = SVGBackend::with_string(&mut svg, (760, 300)).into_drawing_area();
        root.fill(&WHITE)?;
        let (x0, x1) = span(series.iter().flat_map(|s| s.x.iter().copied()));
        let (y0, y1) = span(series.iter().flat_map(|s| s.y.iter().copied()));
        let mut chart = ChartBuilder::on(&root)
            .caption(title, ("sans-serif", 16))
            .margin(8)
            .x_label_area_size(36)
            .y_label_area_size(56)
            .build_cartesian_2d(x0..x1, y0..y1)?;
        chart
            .configure_mesh()
            .x_desc(x_label)
            .y_desc(y_label)
            .light_line_style(RGBColor(235, 235, 235))
            .draw()?;
        for (k, s) in series.iter().enumerate() {
            let color = PALETTE[k % PALETTE.len()];
            let points: Vec<(f64, f64)> =
                s.x.iter()
                    .zip(s.y)
                    .filter(|(a, b)| a.is_finite() && b.is_finite())
                    .map(|(a, b)| (*a, *b))
                    .collect();
            let style = color.stroke_width(if s.dashed { 1 } else { 2 });
            if s.dashed {
                chart
                    .draw_series(DashedLineSeries::new(points, 6, 4, style))?
                    .label(s.name)
                    .legend(move |(x, y)| PathElement::new(vec![(x, y), (x + 16, y)], color));
            } else {
                chart
                    .draw_series(LineSeries::new(points, style))?
                    .label(s.name)
                    .legend(move |(x, y)| PathElement::new(vec![(x, y), (x + 16, y)], color));
            }
        }
        chart
            .configure_series_labels()
            .background_style(WHITE.mix(0.85))
            .border_style(BLACK)
            .position(SeriesLabelPosition::UpperRight)
            .draw()?;
        root.present()?;
        Ok(())
    })();
    match result {
        Ok(()) => svg,
        Err(e) => draw_err(e),
    }
}

/// A heat map of `rows` (each a series over `x`), coloured by value on a symmetric blue–red
/// scale around 0 (for residuals).
pub fn heat_map(title: &str, x: &[f64], row_labels: &[String], rows: &[Vec<f64>]) -> String {
    let mut svg = String::new();
    let result = (|| -> Result<(), Box<dyn std::error::Error + '_>> {
        let root = SVGBackend::with_string(&mut svg, (760, 60 + 14 * rows.len().max(4) as u32))
            .into_drawing_area();
        root.fill(&WHITE)?;
        let (x0, x1) = span(x.iter().copied());
        let n = rows.len().max(1);
        let mut chart = ChartBuilder::on(&root)
            .caption(title, ("sans-serif", 16))
            .margin(8)
            .x_label_area_size(30)
            .y_label_area_size(80)
            .build_cartesian_2d(x0..x1, 0..n)?;
        let labels = row_labels.to_vec();
        chart
            .configure_mesh()
            .disable_mesh()
            .x_desc("t (s)")
            .y_labels(n.min(30))
            .y_label_formatter(&|k| labels.get(*k).cloned().unwrap_or_default())
            .draw()?;
        let scale = rows
            .iter()
            .flatten()
            .filter(|v| v.is_finite())
            .fold(0.0f64, |m, v| m.max(v.abs()))
            .max(1e-12);
        // at most ~400 cells per row: average the samples that share a cell
        let stride = (x.len() / 400).max(1);
        for (r, row) in rows.iter().enumerate() {
            let cells = row.chunks(stride).zip(x.chunks(stride)).map(|(vs, ts)| {
                let v = vs.iter().sum::<f64>() / vs.len() as f64;
                let a = (v / scale).clamp(-1.0, 1.0);
                let color = if a >= 0.0 {
                    RGBColor(255, (255.0 * (1.0 - a)) as u8, (255.0 * (1.0 - a)) as u8)
                } else {
                    RGBColor((255.0 * (1.0 + a)) as u8, (255.0 * (1.0 + a)) as u8, 255)
                };
                let t0 = ts[0];
                let t1 = ts[ts.len() - 1] + (x.get(1).copied().unwrap_or(1.0) - x[0]);
                Rectangle::new([(t0, r), (t1, r + 1)], color.filled())
            });
            chart.draw_series(cells)?;
        }
        root.present()?;
        Ok(())
    })();
    match result {
        Ok(()) => svg,
        Err(e) => draw_err(e),
    }
}

/// Eigenvalues (re, im) in the complex plane with the unit circle.
pub fn eigenvalue_plot(title: &str, eigenvalues: &[(f64, f64)]) -> String {
    let mut svg = String::new();
    let result = (|| -> Result<(), Box<dyn std::error::Error + '_>> {
        let root = SVGBackend::with_string(&mut svg, (420, 420)).into_drawing_area();
        root.fill(&WHITE)?;
        let r = eigenvalues
            .iter()
            .map(|(a, b)| a.hypot(*b))
            .fold(1.0f64, f64::max)
            * 1.1;
        let mut chart = ChartBuilder::on(&root)
            .caption(title, ("sans-serif", 16))
            .margin(8)
            .x_label_area_size(30)
            .y_label_area_size(40)
            .build_cartesian_2d(-r..r, -r..r)?;
        chart.configure_mesh().x_desc("Re").y_desc("Im").draw()?;
        let circle: Vec<(f64, f64)> = (0..=200)
            .map(|k| {
                let a = 2.0 * std::f64::consts::PI * k as f64 / 200.0;
                (a.cos(), a.sin())
            })
            .collect();
        chart.draw_series(LineSeries::new(circle, &PALETTE[5]))?;
        chart.draw_series(
            eigenvalues
                .iter()
                .map(|(a, b)| Circle::new((*a, *b), 4, PALETTE[1].filled())),
        )?;
        root.present()?;
        Ok(())
    })();
    match result {
        Ok(()) => svg,
        Err(e) => draw_err(e),
    }
}

/// Positive values on a log scale, one bar-like point per index (e.g. a Fisher information
/// eigen-spectrum or kept DCT coefficient magnitudes).
pub fn log_spectrum(title: &str, y_label: &str, values: &[f64]) -> String {
    let mut svg = String::new();
    let result = (|| -> Result<(), Box<dyn std::error::Error + '_>> {
        let root = SVGBackend::with_string(&mut svg, (760, 280)).into_drawing_area();
        root.fill(&WHITE)?;
        let positive: Vec<f64> = values.iter().copied().filter(|v| *v > 0.0).collect();
        let lo = positive
            .iter()
            .copied()
            .fold(f64::INFINITY, f64::min)
            .max(1e-300);
        let hi = positive
            .iter()
            .copied()
            .fold(0.0f64, f64::max)
            .max(lo * 10.0);
        let mut chart = ChartBuilder::on(&root)
            .caption(title, ("sans-serif", 16))
            .margin(8)
            .x_label_area_size(30)
            .y_label_area_size(64)
            .build_cartesian_2d(0..values.len().max(1), (lo / 2.0..hi * 2.0).log_scale())?;
        chart
            .configure_mesh()
            .x_desc("index")
            .y_desc(y_label)
            .draw()?;
        chart.draw_series(
            values
                .iter()
                .enumerate()
                .filter(|(_, v)| **v > 0.0)
                .map(|(k, v)| Circle::new((k, *v), 3, PALETTE[0].filled())),
        )?;
        root.present()?;
        Ok(())
    })();
    match result {
        Ok(()) => svg,
        Err(e) => draw_err(e),
    }
}
