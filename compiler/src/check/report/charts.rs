//! The charts of the report: per-layer SQNR bars and confusion-matrix
//! heatmaps, drawn with `plotters` into SVG text.

use super::LayerFigures;
use crate::check::{CheckError, Result};
use plotters::prelude::*;

fn plot_err(e: impl std::fmt::Display) -> CheckError {
    CheckError::Format {
        file: "chart".into(),
        detail: e.to_string(),
    }
}

/// Per-layer SQNR as an SVG bar chart (layers without a finite SQNR are
/// drawn at the top of the scale and labelled "exact").
pub fn sqnr_svg(layers: &[LayerFigures]) -> Result<String> {
    let vals: Vec<(String, f64, bool)> = layers
        .iter()
        .filter_map(|l| {
            l.sqnr_db
                .map(|v| (format!("{} {}", l.step, l.name), v, v.is_finite()))
        })
        .collect();
    let finite_max = vals
        .iter()
        .filter(|v| v.2)
        .map(|v| v.1)
        .fold(0.0f64, f64::max);
    let top = (finite_max * 1.15).max(10.0);
    let look = crate::util::bars::Bars {
        caption: ("Per-layer SQNR vs float reference", 18),
        bar_width: 60,
        height: 400,
        x_label_area: 90,
        y_desc: "SQNR (dB)",
        colour: RGBColor(60, 110, 180),
        bar_margin: 6,
        y: 0.0..top,
    };
    let bars: Vec<(String, f64)> = vals
        .into_iter()
        .map(|(name, v, finite)| (name, if finite { v.max(0.0) } else { top }))
        .collect();
    crate::util::bars::svg(&look, &bars).map_err(plot_err)
}

/// A confusion matrix (`[true][predicted]`) as an SVG heatmap with counts.
pub fn confusion_svg(title: &str, m: &[Vec<u64>], labels: &[String]) -> Result<String> {
    let n = m.len().max(1);
    let max = m.iter().flatten().copied().max().unwrap_or(0).max(1);
    let cell = if n > 20 { 20 } else { 40 };
    let side = (cell * n) as u32 + 160;
    let mut svg = String::new();
    {
        let root =
            SVGBackend::with_string(&mut svg, (side.max(360), side.max(360))).into_drawing_area();
        root.fill(&WHITE).map_err(plot_err)?;
        let mut chart = ChartBuilder::on(&root)
            .caption(title, ("sans-serif", 18))
            .margin(12)
            .x_label_area_size(70)
            .y_label_area_size(70)
            .build_cartesian_2d(0..n, 0..n)
            .map_err(plot_err)?;
        let name = |i: usize| labels.get(i).cloned().unwrap_or_else(|| i.to_string());
        chart
            .configure_mesh()
            .disable_mesh()
            .x_labels(n.min(30))
            .y_labels(n.min(30))
            .x_desc("predicted")
            .y_desc("true")
            .x_label_formatter(&|&i| if i < n { name(i) } else { String::new() })
            .y_label_formatter(&|&i| {
                if i < n {
                    name(n - 1 - i)
                } else {
                    String::new()
                }
            })
            .draw()
            .map_err(plot_err)?;
        let cells = m
            .iter()
            .enumerate()
            .flat_map(|(t, row)| row.iter().enumerate().map(move |(p, &v)| (t, p, v)));
        chart
            .draw_series(cells.clone().map(|(t, p, v)| {
                let f = v as f64 / max as f64;
                let shade = (255.0 * (1.0 - 0.85 * f)) as u8;
                let y = n - 1 - t;
                Rectangle::new(
                    [(p, y), (p + 1, y + 1)],
                    RGBColor(shade, shade, 255).filled(),
                )
            }))
            .map_err(plot_err)?;
        if n <= 20 {
            chart
                .draw_series(cells.map(|(t, p, v)| {
                    let y = n - 1 - t;
                    Text::new(v.to_string(), (p, y + 1), ("sans-serif", 12).into_font())
                }))
                .map_err(plot_err)?;
        }
        root.present().map_err(plot_err)?;
    }
    Ok(svg)
}
