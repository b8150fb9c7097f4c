//! The accuracy statistics of a check ([`crate::stats`]: paired
//! comparison, intervals, escapes and overkill), the images whose class
//! changed between float and int8, and how they read in the Markdown
//! report, the `changed_images.csv` file and the terminal summary.

use super::compare::{argmax_f32, argmax_i8, dequantize};
use super::pipeline::CheckData;
use super::report::CheckReport;
use crate::stats::{self, interval_pct, interval_pp, p_value};
use serde::Serialize;
use std::fmt::Write as _;

/// An image float and int8 put in different classes.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ChangedImage {
    /// Image index in check order.
    pub image: usize,
    /// File name (relative to the image folder), when known.
    pub name: String,
    /// True class, when labelled.
    pub label: Option<String>,
    /// Class the float reference predicts.
    pub float_class: String,
    /// Class the int8 module predicts.
    pub int8_class: String,
    /// Float logits.
    pub float_logits: Vec<f32>,
    /// Int8 logits, dequantized.
    pub int8_logits: Vec<f32>,
}

fn class_name(names: &[String], c: usize) -> String {
    names.get(c).cloned().unwrap_or_else(|| c.to_string())
}

/// Every image whose float and int8 arg-max differ, in image order.
pub fn changed_images(data: &CheckData, int8: &[Vec<i8>]) -> Vec<ChangedImage> {
    let Some(float) = &data.float_outputs else {
        return Vec::new();
    };
    let names = &data.class_names;
    float
        .iter()
        .zip(int8)
        .enumerate()
        .filter(|(_, (f, q))| argmax_f32(f) != argmax_i8(q))
        .map(|(i, (f, q))| ChangedImage {
            image: i,
            name: data.image_names.get(i).cloned().unwrap_or_default(),
            label: data
                .labels
                .as_ref()
                .and_then(|l| l.get(i))
                .map(|&l| class_name(names, l)),
            float_class: class_name(names, argmax_f32(f)),
            int8_class: class_name(names, argmax_i8(q)),
            float_logits: f.clone(),
            int8_logits: dequantize(q, data.output_scale, data.output_zero_point),
        })
        .collect()
}

/// Fills the report's paired comparison, escapes (with good classes) and
/// changed images from the module's outputs.
pub fn add_statistics(report: &mut CheckReport, data: &CheckData, int8: &[Vec<i8>]) {
    report.changed = changed_images(data, int8);
    let (Some(labels), Some(float)) = (&data.labels, &data.float_outputs) else {
        return;
    };
    let fp: Vec<usize> = float.iter().map(|v| argmax_f32(v)).collect();
    let ip: Vec<usize> = int8.iter().map(|v| argmax_i8(v)).collect();
    report.paired = stats::paired_accuracy(&fp, &ip, labels);
    if !data.good_classes.is_empty() {
        report.escapes = Some(stats::escapes(
            &fp,
            &ip,
            labels,
            &data.good_classes,
            &data.class_names,
        ));
    }
}

/// `changed_images.csv`: one row per changed image, logits in class order.
pub fn changed_csv(changed: &[ChangedImage], classes: &[String]) -> String {
    let quote = |s: &str| {
        if s.contains([',', '"', '\n', '\r']) {
            format!("\"{}\"", s.replace('"', "\"\""))
        } else {
            s.to_string()
        }
    };
    let n = changed
        .iter()
        .map(|c| c.float_logits.len())
        .max()
        .unwrap_or(classes.len());
    let mut s = String::from("image,file,true_class,float_class,int8_class");
    for side in ["float", "int8"] {
        for c in 0..n {
            let _ = write!(s, ",{side}_logit_{}", quote(&class_name(classes, c)));
        }
    }
    s.push('\n');
    for c in changed {
        let _ = write!(
            s,
            "{},{},{},{},{}",
            c.image,
            quote(&c.name),
            quote(c.label.as_deref().unwrap_or("")),
            quote(&c.float_class),
            quote(&c.int8_class)
        );
        for v in c.float_logits.iter().chain(&c.int8_logits) {
            let _ = write!(s, ",{v}");
        }
        s.push('\n');
    }
    s
}

/// The Markdown sections on escapes, the paired comparison and changed
/// images (escapes first: with a good class they are what matters most).
pub fn markdown(r: &CheckReport) -> String {
    let mut s = String::new();
    if let Some(e) = &r.escapes {
        let _ = writeln!(
            s,
            "## Escapes and overkill (good: {})\n",
            e.good_classes.join(", ")
        );
        let _ = writeln!(
            s,
            "An escape is a defect predicted as good; overkill is a good part predicted as a defect. Rates with 95% Wilson intervals (Wilson 1927).\n"
        );
        let _ = writeln!(s, "| | float | int8 |\n|---|---|---|");
        let row = |k: u64, n: u64, rate: f64, i| {
            format!("{k} of {n} ({:.2}%, {})", 100.0 * rate, interval_pct(i))
        };
        let _ = writeln!(
            s,
            "| escapes | {} | {} |",
            row(
                e.float.escapes,
                e.float.defects,
                e.float.escape_rate,
                e.float.escape_interval
            ),
            row(
                e.int8.escapes,
                e.int8.defects,
                e.int8.escape_rate,
                e.int8.escape_interval
            )
        );
        let _ = writeln!(
            s,
            "| overkill | {} | {} |",
            row(
                e.float.overkill,
                e.float.good,
                e.float.overkill_rate,
                e.float.overkill_interval
            ),
            row(
                e.int8.overkill,
                e.int8.good,
                e.int8.overkill_rate,
                e.int8.overkill_interval
            )
        );
        for (f, i) in e.float.per_class.iter().zip(&e.int8.per_class) {
            let _ = writeln!(
                s,
                "| escapes of `{}` | {} | {} |",
                f.class,
                row(f.escapes, f.images, f.rate, f.interval),
                row(i.escapes, i.images, i.rate, i.interval)
            );
        }
        let _ = writeln!(
            s,
            "\nInt8 added {} escape(s) and removed {}; it added {} overkill and removed {}.\n",
            e.added_escapes, e.removed_escapes, e.added_overkill, e.removed_overkill
        );
    }
    if let Some(p) = &r.paired {
        let _ = writeln!(s, "## Is the drop real? (paired comparison)\n");
        let _ = writeln!(s, "| figure | value |\n|---|---|");
        let _ = writeln!(
            s,
            "| float accuracy (95% Wilson interval) | {:.2}% ({}) |",
            100.0 * p.float_accuracy,
            interval_pct(Some(p.float_interval))
        );
        let _ = writeln!(
            s,
            "| int8 accuracy (95% Wilson interval) | {:.2}% ({}) |",
            100.0 * p.int8_accuracy,
            interval_pct(Some(p.int8_interval))
        );
        let _ = writeln!(
            s,
            "| drop (95% interval, Newcombe 1998 method 10) | {:.2} pp ({}) |",
            p.drop_pp,
            interval_pp(p.drop_interval_pp)
        );
        let _ = writeln!(
            s,
            "| images right in float only (b) / in int8 only (c) | {} / {} |",
            p.float_only, p.int8_only
        );
        let _ = writeln!(
            s,
            "| exact McNemar test, two-sided p | {} |",
            p_value(p.mcnemar_p, p.mcnemar_log10_p)
        );
        let _ = writeln!(
            s,
            "| labelled images for a ±1 pp / ±0.5 pp interval | {} / {} |\n",
            p.images_for_1pp, p.images_for_half_pp
        );
        let _ = writeln!(
            s,
            "Only the {} images the two models classify differently carry evidence about the drop. The p-value is the chance of a split at least as uneven as {} to {} if int8 were as accurate as float. The image counts assume the discordance rate stays at {:.2}%{}.\n",
            p.float_only + p.int8_only,
            p.float_only,
            p.int8_only,
            100.0 * p.planning_discordance,
            if p.float_only + p.int8_only == 0 {
                " (the 95% upper end, since no image was discordant)"
            } else {
                ""
            }
        );
        if let Some(a) = r.thresholds.max_drop_pp.and_then(|m| p.advice(m)) {
            let _ = writeln!(s, "**Not settled:** {a}.\n");
        }
    }
    if !r.changed.is_empty() {
        let _ = writeln!(s, "## Images whose class changed ({})\n", r.changed.len());
        let _ = writeln!(
            s,
            "| image | file | true | float | int8 |\n|---|---|---|---|---|"
        );
        for c in r.changed.iter().take(50) {
            let _ = writeln!(
                s,
                "| {} | {} | {} | {} | {} |",
                c.image,
                c.name,
                c.label.as_deref().unwrap_or(crate::util::MISSING),
                c.float_class,
                c.int8_class
            );
        }
        if r.changed.len() > 50 {
            let _ = writeln!(s, "\n({} more)", r.changed.len() - 50);
        }
        let _ = writeln!(s, "\nAll of them, with logits: `changed_images.csv`.\n");
    }
    s
}

/// Terminal lines on escapes (first, when a good class is set) and on
/// how sure the accuracy drop is; `accuracy` is the existing accuracy line,
/// placed after the escapes.
pub fn summary_lines(r: &CheckReport, accuracy: &str) -> String {
    let mut s = String::new();
    if let Some(e) = &r.escapes {
        let _ = writeln!(
            s,
            "  escapes:        int8 {} of {} defects passed as good ({:.2}%, 95% CI {}), float {} ({:.2}%, {}); int8 added {}, removed {}",
            e.int8.escapes,
            e.int8.defects,
            100.0 * e.int8.escape_rate,
            interval_pct(e.int8.escape_interval),
            e.float.escapes,
            100.0 * e.float.escape_rate,
            interval_pct(e.float.escape_interval),
            e.added_escapes,
            e.removed_escapes
        );
        let per: Vec<String> = e
            .int8
            .per_class
            .iter()
            .zip(&e.float.per_class)
            .map(|(i, f)| {
                format!(
                    "{} {}/{} (float {})",
                    i.class, i.escapes, i.images, f.escapes
                )
            })
            .collect();
        let _ = writeln!(s, "  escapes/class:  int8 {}", per.join(", "));
        let _ = writeln!(
            s,
            "  overkill:       int8 {} of {} good parts rejected ({:.2}%, 95% CI {}), float {} ({:.2}%, {}); int8 added {}, removed {}",
            e.int8.overkill,
            e.int8.good,
            100.0 * e.int8.overkill_rate,
            interval_pct(e.int8.overkill_interval),
            e.float.overkill,
            100.0 * e.float.overkill_rate,
            interval_pct(e.float.overkill_interval),
            e.added_overkill,
            e.removed_overkill
        );
    }
    s.push_str(accuracy);
    if let Some(p) = &r.paired {
        let _ = writeln!(
            s,
            "  drop 95% CI:    {} (Newcombe 1998, method 10); float {}, int8 {} (Wilson)",
            interval_pp(p.drop_interval_pp),
            interval_pct(Some(p.float_interval)),
            interval_pct(Some(p.int8_interval))
        );
        let _ = writeln!(
            s,
            "  discordant:     {} images right in float only, {} in int8 only; exact McNemar p = {}",
            p.float_only,
            p.int8_only,
            p_value(p.mcnemar_p, p.mcnemar_log10_p)
        );
        let _ = writeln!(
            s,
            "  images needed:  about {} labelled images for a ±1 pp interval, {} for ±0.5 pp (discordance {:.2}%{})",
            p.images_for_1pp,
            p.images_for_half_pp,
            100.0 * p.planning_discordance,
            if p.float_only + p.int8_only == 0 {
                ", 95% upper end"
            } else {
                ""
            }
        );
        if let Some(a) = r.thresholds.max_drop_pp.and_then(|m| p.advice(m)) {
            let _ = writeln!(s, "  not settled:    {a}");
        }
    }
    if !r.changed.is_empty() {
        let _ = writeln!(
            s,
            "  changed:        {} images classified differently by float and int8{}",
            r.changed.len(),
            if r.paired.is_some() || r.escapes.is_some() {
                " (listed with logits in the report's changed_images.csv)"
            } else {
                ""
            }
        );
    }
    s
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn changed_images_carry_names_classes_and_logits() {
        let data = CheckData {
            class_names: vec!["ok".into(), "pit, deep".into()],
            image_names: vec!["ok/a.png".into(), "pit/b.png".into()],
            labels: Some(vec![0, 1]),
            float_outputs: Some(vec![vec![1.0, 0.0], vec![0.0, 2.0]]),
            output_scale: 0.5,
            output_zero_point: 0,
            ..CheckData::default()
        };
        let int8 = vec![vec![2i8, 0], vec![3, 1]];
        let c = changed_images(&data, &int8);
        assert_eq!(c.len(), 1);
        assert_eq!(c[0].name, "pit/b.png");
        assert_eq!(c[0].label.as_deref(), Some("pit, deep"));
        assert_eq!(
            (c[0].float_class.as_str(), c[0].int8_class.as_str()),
            ("pit, deep", "ok")
        );
        assert_eq!(c[0].int8_logits, vec![1.5, 0.5]);
        let csv = changed_csv(&c, &data.class_names);
        assert_eq!(
            csv,
            "image,file,true_class,float_class,int8_class,float_logit_ok,float_logit_\"pit, deep\",int8_logit_ok,int8_logit_\"pit, deep\"\n\
             1,pit/b.png,\"pit, deep\",\"pit, deep\",ok,0,2,1.5,0.5\n"
        );
        let mut r = CheckReport::default();
        add_statistics(&mut r, &data, &int8);
        let p = r.paired.as_ref().unwrap();
        assert_eq!((p.float_only, p.int8_only), (1, 0));
        assert!(r.escapes.is_none(), "no good class given");
    }
}
