//! Report: one self-contained HTML file (inline SVG drawn with plotters, no
//! scripts, no fonts or files fetched) with, per score, overlaid histograms
//! of the in-distribution and outlier sets with the calibrated threshold,
//! ROC curves and the metric table; and the training curves when a
//! training log is given.

use crate::calibrate::Calibration;
use crate::error::{Error, Result};
use crate::evaluate::{anomaly, median, roc_curve, Evaluated, METRIC_NAMES};
use crate::train::LogEntry;
use plotters::prelude::*;
use std::fmt::Write as _;
use std::path::Path;

/// Everything the report shows: an evaluation's results, drawn.
pub struct ReportInput<'a> {
    pub evaluated: &'a Evaluated,
    pub calibration: Option<&'a Calibration>,
    pub log: Option<&'a [LogEntry]>,
}

const COLORS: [RGBColor; 6] = [
    RGBColor(31, 119, 180),
    RGBColor(214, 39, 40),
    RGBColor(44, 160, 44),
    RGBColor(148, 103, 189),
    RGBColor(255, 127, 14),
    RGBColor(140, 86, 75),
];

fn plot_error<E: std::fmt::Debug>(e: E) -> Error {
    Error::Invalid(format!("drawing the report failed: {e:?}"))
}

fn escape(s: &str) -> String {
    s.replace('&', "&amp;").replace('<', "&lt;").replace('>', "&gt;").replace('"', "&quot;")
}

/// Overlaid, normalised histograms of one column for every set, with an
/// optional vertical threshold line.
fn histogram_svg(column: &str, sets: &[(&str, &[f64])], threshold: Option<f64>) -> Result<String> {
    let finite: Vec<f64> = sets.iter().flat_map(|s| s.1.iter().copied()).filter(|v| v.is_finite()).collect();
    if finite.is_empty() {
        return Ok(String::new());
    }
    // The view is the in-distribution set's central 99% widened by half its
    // width on each side (and the threshold); values beyond it are counted
    // in the end bins, so far-off outliers show as a spike at the edge
    // instead of squashing the in-distribution histogram.
    let mut id: Vec<f64> = sets[0].1.iter().copied().filter(|v| v.is_finite()).collect();
    if id.is_empty() {
        id = finite.clone();
    }
    id.sort_by(f64::total_cmp);
    let (q_lo, q_hi) = (id[(0.005 * (id.len() - 1) as f64) as usize], id[(0.995 * (id.len() - 1) as f64) as usize]);
    let pad = 0.5 * (q_hi - q_lo).max(f64::EPSILON * q_hi.abs().max(1.0));
    let (all_lo, all_hi) = finite.iter().fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), &v| (a.min(v), b.max(v)));
    let mut lo = (q_lo - pad).max(all_lo);
    let mut hi = (q_hi + pad).min(all_hi);
    if let Some(t) = threshold {
        lo = lo.min(t);
        hi = hi.max(t);
    }
    if hi <= lo {
        hi = lo + 1.0;
    }
    let bins = 40;
    let width = (hi - lo) / bins as f64;
    let densities: Vec<Vec<f64>> = sets
        .iter()
        .map(|(_, v)| {
            let mut counts = vec![0.0; bins];
            let n = v.iter().filter(|x| x.is_finite()).count().max(1) as f64;
            for x in v.iter().filter(|x| x.is_finite()) {
                let b = (((x - lo) / width).floor().max(0.0) as usize).min(bins - 1);
                counts[b] += 1.0 / (n * width);
            }
            counts
        })
        .collect();
    let top = densities.iter().flatten().cloned().fold(0.0, f64::max).max(f64::MIN_POSITIVE) * 1.1;
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, (560, 320)).into_drawing_area();
        root.fill(&WHITE).map_err(plot_error)?;
        let mut chart = ChartBuilder::on(&root)
            .caption(
                format!("{column}: distribution per set (end bins hold values beyond the view)"),
                ("sans-serif", 14),
            )
            .margin(10)
            .x_label_area_size(35)
            .y_label_area_size(55)
            .build_cartesian_2d(lo..hi, 0.0..top)
            .map_err(plot_error)?;
        chart.configure_mesh().x_desc(column).y_desc("density").draw().map_err(plot_error)?;
        for (i, ((name, _), dens)) in sets.iter().zip(&densities).enumerate() {
            let color = COLORS[i % COLORS.len()];
            let mut steps = Vec::with_capacity(2 * bins);
            for (b, d) in dens.iter().enumerate() {
                steps.push((lo + b as f64 * width, *d));
                steps.push((lo + (b + 1) as f64 * width, *d));
            }
            chart
                .draw_series(LineSeries::new(steps, color.stroke_width(2)))
                .map_err(plot_error)?
                .label(*name)
                .legend(move |(x, y)| PathElement::new(vec![(x, y), (x + 18, y)], color.stroke_width(2)));
        }
        if let Some(t) = threshold.filter(|t| *t >= lo && *t <= hi) {
            chart
                .draw_series(LineSeries::new(vec![(t, 0.0), (t, top)], BLACK.stroke_width(1)))
                .map_err(plot_error)?
                .label("calibrated threshold")
                .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 18, y)], BLACK));
        }
        draw_legend(&mut chart, SeriesLabelPosition::UpperRight)?;
        root.present().map_err(plot_error)?;
    }
    Ok(svg)
}

/// The series legend, on a translucent white box with a black border.
fn draw_legend<'a, DB, CT>(chart: &mut ChartContext<'a, DB, CT>, position: SeriesLabelPosition) -> Result<()>
where
    DB: DrawingBackend + 'a,
    CT: CoordTranslate,
{
    chart
        .configure_series_labels()
        .background_style(WHITE.mix(0.85))
        .border_style(BLACK)
        .position(position)
        .draw()
        .map_err(plot_error)
}

/// ROC curves (outliers positive) of one column for every outlier set.
fn roc_svg(column: &str, curves: &[(&str, Vec<(f64, f64, f64)>)]) -> Result<String> {
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, (360, 320)).into_drawing_area();
        root.fill(&WHITE).map_err(plot_error)?;
        let mut chart = ChartBuilder::on(&root)
            .caption(format!("{column}: ROC"), ("sans-serif", 16))
            .margin(10)
            .x_label_area_size(35)
            .y_label_area_size(45)
            .build_cartesian_2d(0.0..1.0, 0.0..1.0)
            .map_err(plot_error)?;
        chart
            .configure_mesh()
            .x_desc("false positive rate (in-distribution flagged)")
            .y_desc("true positive rate (outliers flagged)")
            .draw()
            .map_err(plot_error)?;
        chart.draw_series(LineSeries::new(vec![(0.0, 0.0), (1.0, 1.0)], BLACK.mix(0.3))).map_err(plot_error)?;
        for (i, (name, pts)) in curves.iter().enumerate() {
            let color = COLORS[(i + 1) % COLORS.len()];
            chart
                .draw_series(LineSeries::new(pts.iter().map(|p| (p.0, p.1)), color.stroke_width(2)))
                .map_err(plot_error)?
                .label(*name)
                .legend(move |(x, y)| PathElement::new(vec![(x, y), (x + 18, y)], color.stroke_width(2)));
        }
        draw_legend(&mut chart, SeriesLabelPosition::LowerRight)?;
        root.present().map_err(plot_error)?;
    }
    Ok(svg)
}

/// Train and validation NLL per epoch.
fn training_svg(log: &[LogEntry]) -> Result<String> {
    let xs = 1.0..(log.len().max(2) as f64);
    let values: Vec<f64> = log.iter().flat_map(|e| [e.train_nll, e.val_nll]).filter(|v| v.is_finite()).collect();
    let (lo, hi) = values.iter().fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), &v| (a.min(v), b.max(v)));
    let pad = ((hi - lo) * 0.05).max(1e-6);
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, (560, 320)).into_drawing_area();
        root.fill(&WHITE).map_err(plot_error)?;
        let mut chart = ChartBuilder::on(&root)
            .caption("training", ("sans-serif", 16))
            .margin(10)
            .x_label_area_size(35)
            .y_label_area_size(55)
            .build_cartesian_2d(xs, (lo - pad)..(hi + pad))
            .map_err(plot_error)?;
        chart.configure_mesh().x_desc("epoch").y_desc("NLL (nats per dimension)").draw().map_err(plot_error)?;
        for (i, (name, pick)) in [("train", true), ("validation", false)].into_iter().enumerate() {
            let color = COLORS[i];
            let pts = log.iter().map(move |e| (e.epoch as f64, if pick { e.train_nll } else { e.val_nll }));
            chart
                .draw_series(LineSeries::new(pts, color.stroke_width(2)))
                .map_err(plot_error)?
                .label(name)
                .legend(move |(x, y)| PathElement::new(vec![(x, y), (x + 18, y)], color.stroke_width(2)));
        }
        draw_legend(&mut chart, SeriesLabelPosition::MiddleRight)?;
        root.present().map_err(plot_error)?;
    }
    Ok(svg)
}

/// Write the report to `path` (atomically).
pub fn write_report(path: &Path, input: &ReportInput) -> Result<()> {
    let ev = input.evaluated;
    let mut html = String::new();
    html.push_str(
        "<!DOCTYPE html>\n<html><head><meta charset=\"utf-8\"><title>tidemark evaluation</title>\n<style>\
         body{font-family:sans-serif;margin:24px;color:#222}table{border-collapse:collapse;margin:8px 0}\
         td,th{border:1px solid #bbb;padding:3px 8px;text-align:right}th{background:#eee}\
         .plots{display:flex;flex-wrap:wrap;gap:8px}</style></head><body>\n<h1>tidemark evaluation</h1>\n",
    );
    let names: Vec<String> = ev.ood.iter().map(|o| escape(&o.0)).collect();
    let _ = writeln!(
        html,
        "<p>In-distribution: {} ({} vectors). Outlier sets: {}.</p>\n<p>AUROC and AUPR-Out take outliers as positive, \
         AUPR-In takes in-distribution vectors as positive; FPR at 95% TPR is the share of outliers accepted at the \
         threshold that keeps 95% of in-distribution vectors. Brackets: bootstrap 95% intervals.</p>",
        escape(&ev.id.path.display().to_string()),
        ev.id.values.first().map(Vec::len).unwrap_or(0),
        names.join(", ")
    );
    if let Some(log) = input.log.filter(|l| !l.is_empty()) {
        let _ = writeln!(html, "<h2>Training</h2>\n{}", training_svg(log)?);
    }
    for column in &ev.columns {
        let id_raw = ev.id.column(column).expect("checked column");
        let mut sets: Vec<(&str, &[f64])> = vec![("in-distribution", id_raw)];
        sets.extend(ev.ood.iter().map(|(n, t)| (n.as_str(), t.column(column).expect("checked column"))));
        let threshold = input.calibration.filter(|c| &c.score == column).map(|c| c.threshold_raw);
        let centre = median(id_raw);
        let id_anomaly = anomaly(column, id_raw, centre);
        let curves: Vec<(&str, Vec<(f64, f64, f64)>)> = ev
            .ood
            .iter()
            .map(|(n, t)| {
                (n.as_str(), roc_curve(&id_anomaly, &anomaly(column, t.column(column).expect("checked"), centre)))
            })
            .collect();
        let _ = writeln!(html, "<h2>{}</h2>", escape(column));
        if let Some(c) = input.calibration.filter(|c| &c.score == column) {
            let _ = writeln!(
                html,
                "<p>Calibrated threshold {:.6} at false-alarm rate {} (conformal rank {} of {} held-out vectors).</p>",
                c.threshold_raw, c.false_alarm, c.rank, c.rows
            );
        }
        html.push_str("<table><tr><th>outlier set</th>");
        for m in METRIC_NAMES {
            let _ = write!(html, "<th>{m}</th>");
        }
        html.push_str("</tr>\n");
        for (set, per_column) in &ev.results {
            let Some((_, estimates)) = per_column.iter().find(|(c, _)| c == column) else { continue };
            let _ = write!(html, "<tr><td>{}</td>", escape(set));
            for (_, e) in estimates {
                let _ = write!(html, "<td>{:.4} [{:.4}, {:.4}]</td>", e.value, e.ci95[0], e.ci95[1]);
            }
            html.push_str("</tr>\n");
        }
        html.push_str("</table>\n<div class=\"plots\">");
        html.push_str(&histogram_svg(column, &sets, threshold)?);
        html.push_str(&roc_svg(column, &curves)?);
        html.push_str("</div>\n");
    }
    html.push_str(
        "<p>These are statistics of the sets given. Validate any threshold on your own data before it drives a decision.</p>\n</body></html>\n",
    );
    crate::output::write_atomic(path, |w| {
        w.write_all(html.as_bytes()).map_err(|source| Error::Io { path: path.into(), source })
    })
}
