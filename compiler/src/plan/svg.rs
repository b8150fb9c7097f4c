//! A picture of the plan: time (position in the order) across, arena offset
//! up, one rectangle per buffer from its first write to its last read.
//!
//! A concatenation region is one pale rectangle; its members are drawn
//! inside as bands whose height is their share of the region's channels
//! (a member of `c` of `C` channels takes `c/C` of the height, at its channel
//! position), from the member's write to the region's end, so a dense
//! block's region is seen filling up. The peak step is a dashed red line.
//!
//! A map streamed as a ring (row streaming, [`super::stream`]) is drawn
//! as its ring: a rectangle of its ring bytes cut into one slot per
//! stored row, labelled `ring R/H rows`, alive over its pipeline's time;
//! the unfused lower bound is then a dotted grey line.

use super::Plan;
use crate::lower::QGraph;
use plotters::prelude::*;
use std::fmt::Write as _;

const PALETTE: [RGBColor; 8] = [
    RGBColor(76, 114, 176),
    RGBColor(221, 132, 82),
    RGBColor(85, 168, 104),
    RGBColor(196, 78, 82),
    RGBColor(129, 114, 179),
    RGBColor(147, 120, 96),
    RGBColor(218, 139, 195),
    RGBColor(140, 140, 140),
];

/// The drawing library refused the picture (its message).
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub struct SvgError(String);

/// Renders the plan as an SVG document.
pub fn render(q: &QGraph, plan: &Plan) -> Result<String, SvgError> {
    let mut out = String::new();
    draw(q, plan, &mut out).map_err(|e| SvgError(e.to_string()))?;
    Ok(out)
}

fn draw(q: &QGraph, plan: &Plan, out: &mut String) -> Result<(), Box<dyn std::error::Error>> {
    let n = plan.order.len().max(1);
    let kib = |b: usize| b as f64 / 1024.0;
    let top = kib(plan.arena_bytes.max(1)) * 1.04;
    let width = (640 + 4 * n as u32).min(1800);
    let root = SVGBackend::with_string(out, (width, 620)).into_drawing_area();
    root.fill(&WHITE)?;
    let mut title = format!(
        "{}: arena {:.1} KiB, lower bound {:.1} KiB, ratio {:.3}",
        q.name,
        kib(plan.arena_bytes),
        kib(plan.lower_bound),
        plan.ratio()
    );
    let streams = !plan.pipelines.is_empty();
    if streams {
        let _ = write!(title, ", unfused {:.1} KiB", kib(plan.unfused_bound));
    }
    let top = if streams {
        top.max(kib(plan.unfused_bound) * 1.04)
    } else {
        top
    };
    let mut chart = ChartBuilder::on(&root)
        .caption(title, ("sans-serif", 20))
        .margin(12)
        .x_label_area_size(40)
        .y_label_area_size(70)
        .build_cartesian_2d(0f64..n as f64, 0f64..top)?;
    chart
        .configure_mesh()
        .disable_x_mesh()
        .x_desc("step (position in execution order)")
        .y_desc("arena offset (KiB)")
        .label_style(("sans-serif", 13))
        .draw()?;
    let pos = plan.positions();
    let mut def = vec![0usize; q.maps.len()];
    for (s, st) in q.steps.iter().enumerate() {
        def[st.output.index()] = pos[s];
    }
    for (i, b) in plan.buffers.iter().enumerate() {
        let c = PALETTE[i % PALETTE.len()];
        let (x0, x1) = (b.first as f64, b.last as f64 + 1.0);
        let (y0, y1) = (kib(b.offset), kib(b.offset + b.padded));
        let fill = if b.region { c.mix(0.18) } else { c.mix(0.55) };
        chart.draw_series(std::iter::once(Rectangle::new(
            [(x0, y0), (x1, y1)],
            fill.filled(),
        )))?;
        if b.region {
            let total = plan.map_views[b.maps[0].index()].stride.max(1) as f64;
            let base = plan.map_views[b.maps[0].index()].offset;
            let h = y1 - y0;
            // Members written by a kernel (not the concatenations, which
            // are prefixes of the region) as bands.
            let producers = q.producers();
            for (k, &m) in b.maps.iter().enumerate().skip(1) {
                if producers[m.index()]
                    .is_some_and(|s| matches!(q.step(s).kernel, crate::lower::QKernel::Concat))
                {
                    continue;
                }
                let v = plan.map_views[m.index()];
                let ch = q.map(m).shape.c as f64;
                let c0 = (v.offset - base) as f64;
                let ya = y0 + h * c0 / total;
                let yb = y0 + h * (c0 + ch) / total;
                let band = PALETTE[(i + k) % PALETTE.len()].mix(0.35);
                chart.draw_series(std::iter::once(Rectangle::new(
                    [(def[m.index()] as f64, ya), (x1, yb)],
                    band.filled(),
                )))?;
            }
        }
        if let Some(rows) = b.ring_rows {
            // One slot per stored row.
            let h = q.map(b.maps[0]).shape.h;
            let slot = (y1 - y0) * (b.bytes as f64 / b.padded.max(1) as f64) / rows as f64;
            let lines = (1..rows).map(|r| {
                let y = y0 + slot * r as f64;
                PathElement::new(vec![(x0, y), (x1, y)], c.stroke_width(1))
            });
            chart.draw_series(lines)?;
            chart.draw_series(std::iter::once(Text::new(
                format!("ring {rows}/{h} rows"),
                (x0, y1 + top / 120.0),
                ("sans-serif", 11).into_font().color(&BLACK),
            )))?;
        }
        chart.draw_series(std::iter::once(Rectangle::new(
            [(x0, y0), (x1, y1)],
            c.stroke_width(1),
        )))?;
    }
    if streams {
        let ub = kib(plan.unfused_bound);
        let dots = (0..n * 2).map(|k| {
            let a = k as f64 / 2.0;
            PathElement::new(
                vec![(a, ub), (a + 0.25, ub)],
                BLACK.mix(0.5).stroke_width(1),
            )
        });
        chart
            .draw_series(dots)?
            .label(format!("unfused lower bound {ub:.1} KiB"))
            .legend(|(x, y)| {
                PathElement::new(vec![(x, y), (x + 16, y)], BLACK.mix(0.5).stroke_width(1))
            });
    }
    let peak = plan.peak_step as f64 + 0.5;
    let dashes = (0..40).map(|k| {
        let a = top * k as f64 / 40.0;
        PathElement::new(vec![(peak, a), (peak, a + top / 80.0)], RED.stroke_width(2))
    });
    chart
        .draw_series(dashes)?
        .label(format!("peak at step {}", plan.peak_step))
        .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 16, y)], RED.stroke_width(2)));
    chart
        .draw_series(std::iter::once(PathElement::new(
            vec![
                (0.0, kib(plan.lower_bound)),
                (n as f64, kib(plan.lower_bound)),
            ],
            BLACK.stroke_width(1),
        )))?
        .label(format!("lower bound {:.1} KiB", kib(plan.lower_bound)))
        .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 16, y)], BLACK.stroke_width(1)));
    chart
        .draw_series(std::iter::once(Rectangle::new(
            [(0.0, 0.0), (0.0, 0.0)],
            PALETTE[0].mix(0.18).filled(),
        )))?
        .label("concat region (bands: members by channel share)")
        .legend(|(x, y)| {
            Rectangle::new([(x, y - 5), (x + 16, y + 5)], PALETTE[0].mix(0.18).filled())
        });
    chart
        .configure_series_labels()
        .position(SeriesLabelPosition::UpperRight)
        .background_style(WHITE.mix(0.85))
        .border_style(BLACK)
        .label_font(("sans-serif", 13))
        .draw()?;
    root.present()?;
    Ok(())
}
