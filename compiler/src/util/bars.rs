//! One labelled bar chart in SVG, for the per-layer figures of reports
//! (the check report's SQNR, the calibration's sensitivity ranking).

use plotters::prelude::*;

/// How a [`svg`] chart looks; the bars' heights are the caller's.
pub(crate) struct Bars<'a> {
    /// Title and its font size.
    pub caption: (&'a str, u32),
    /// Width per bar and height of the picture (at least 480 wide).
    pub bar_width: u32,
    /// Height of the picture.
    pub height: u32,
    /// Room below the axis for the rotated bar names.
    pub x_label_area: u32,
    /// The value axis' name.
    pub y_desc: &'a str,
    /// Fill colour of the bars.
    pub colour: RGBColor,
    /// Gap on either side of a bar.
    pub bar_margin: u32,
    /// The value axis.
    pub y: std::ops::Range<f64>,
}

/// One bar per `(name, height)`, in order, as SVG text.
pub(crate) fn svg(look: &Bars<'_>, bars: &[(String, f64)]) -> Result<String, String> {
    let err = |e: &dyn std::fmt::Display| e.to_string();
    let n = bars.len().max(1);
    let width = 160 + look.bar_width * n as u32;
    let mut svg = String::new();
    {
        let root =
            SVGBackend::with_string(&mut svg, (width.max(480), look.height)).into_drawing_area();
        root.fill(&WHITE).map_err(|e| err(&e))?;
        let mut chart = ChartBuilder::on(&root)
            .caption(look.caption.0, ("sans-serif", look.caption.1))
            .margin(12)
            .x_label_area_size(look.x_label_area)
            .y_label_area_size(55)
            .build_cartesian_2d((0..n).into_segmented(), look.y.clone())
            .map_err(|e| err(&e))?;
        chart
            .configure_mesh()
            .disable_x_mesh()
            .x_labels(n)
            .x_label_style(
                ("sans-serif", 11)
                    .into_font()
                    .transform(FontTransform::Rotate90),
            )
            .x_label_formatter(&|v| match v {
                SegmentValue::CenterOf(i) => bars.get(*i).map(|b| b.0.clone()).unwrap_or_default(),
                _ => String::new(),
            })
            .y_desc(look.y_desc)
            .draw()
            .map_err(|e| err(&e))?;
        chart
            .draw_series(
                Histogram::vertical(&chart)
                    .style(look.colour.filled())
                    .margin(look.bar_margin)
                    .data(bars.iter().enumerate().map(|(i, b)| (i, b.1))),
            )
            .map_err(|e| err(&e))?;
        root.present().map_err(|e| err(&e))?;
    }
    Ok(svg)
}
