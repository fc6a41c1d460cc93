//! Report: one self-contained HTML file (inline SVG drawn with plotters, no
//! scripts, no fonts or files fetched) that draws an evaluation's results.
//! It opens with a summary (AUROC per score and outlier set, the best score
//! per set marked), then the calibrated decision, then the training curves
//! and the candidates the search compared when a log is given, then per score the metric table, histograms on a
//! robust common range and ROC curves.

use crate::calibrate::Calibration;
use crate::error::{Error, Result};
use crate::evaluate::{anomaly, median, roc_curve, Estimate, Evaluated, METRIC_NAMES};
use crate::model::{kind_name, Candidate};
use crate::train::{LogEntry, TrainingLog};
use plotters::prelude::*;
use std::fmt::Write as _;
use std::path::Path;

/// Everything the report shows: an evaluation's results, drawn.
pub struct ReportInput<'a> {
    pub evaluated: &'a Evaluated,
    pub calibration: Option<&'a Calibration>,
    pub log: Option<&'a TrainingLog>,
}

/// Readable names of the metrics in [`METRIC_NAMES`], in the same order.
pub const METRIC_LABELS: [&str; 5] = ["AUROC", "AUPR-In", "AUPR-Out", "FPR at 95% TPR", "Detection error"];

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

fn css(c: RGBColor) -> String {
    format!("rgb({},{},{})", c.0, c.1, c.2)
}

/// A legend beside a chart (outside its plot area): a swatch per series.
fn legend(items: &[(&str, RGBColor)]) -> String {
    let mut s = String::from("<div class=\"legend\">");
    for (name, color) in items {
        let _ =
            write!(s, "<div><span class=\"swatch\" style=\"background:{}\"></span>{}</div>", css(*color), escape(name));
    }
    s.push_str("</div>");
    s
}

/// The value at quantile `q` of sorted `v` (nearest rank).
fn quantile(sorted: &[f64], q: f64) -> f64 {
    sorted[((q * (sorted.len() - 1) as f64).round() as usize).min(sorted.len() - 1)]
}

/// The histogram range of one score: the central 99.5% of the
/// in-distribution values, widened to take in every outlier set's median
/// and the threshold, plus 5% on each side. Far-off values would otherwise
/// squash the in-distribution histogram into one bin.
pub fn robust_range(sets: &[(&str, &[f64])], thresholds: &[f64]) -> Option<(f64, f64)> {
    let finite = |v: &[f64]| {
        let mut f: Vec<f64> = v.iter().copied().filter(|x| x.is_finite()).collect();
        f.sort_by(f64::total_cmp);
        f
    };
    let id = finite(sets.first()?.1);
    if id.is_empty() {
        return None;
    }
    let (mut lo, mut hi) = (quantile(&id, 0.0025), quantile(&id, 0.9975));
    for (_, v) in &sets[1..] {
        let v = finite(v);
        if !v.is_empty() {
            let m = quantile(&v, 0.5);
            lo = lo.min(m);
            hi = hi.max(m);
        }
    }
    for &t in thresholds.iter().filter(|t| t.is_finite()) {
        lo = lo.min(t);
        hi = hi.max(t);
    }
    let pad = 0.05 * (hi - lo).max(f64::EPSILON * hi.abs().max(1.0));
    Some((lo - pad, hi + pad))
}

/// Overlaid, normalised histograms of one column for every set on
/// [`robust_range`], the thresholds as vertical lines, and a note counting
/// the values of each set outside the range (not drawn).
fn histogram(column: &str, sets: &[(&str, &[f64])], thresholds: &[f64]) -> Result<String> {
    let Some((lo, hi)) = robust_range(sets, thresholds) else { return Ok(String::new()) };
    let bins = 40;
    let width = (hi - lo) / bins as f64;
    let mut outside = Vec::new();
    let densities: Vec<Vec<f64>> = sets
        .iter()
        .map(|(name, v)| {
            let mut counts = vec![0.0; bins];
            let n = v.iter().filter(|x| x.is_finite()).count().max(1) as f64;
            let (mut below, mut above) = (0usize, 0usize);
            for &x in v.iter().filter(|x| x.is_finite()) {
                if x < lo {
                    below += 1;
                } else if x > hi {
                    above += 1;
                } else {
                    counts[(((x - lo) / width) as usize).min(bins - 1)] += 1.0 / (n * width);
                }
            }
            if below + above > 0 {
                outside.push(format!("{}: {below} below, {above} above", escape(name)));
            }
            counts
        })
        .collect();
    let top = densities.iter().flatten().cloned().fold(0.0, f64::max).max(f64::MIN_POSITIVE) * 1.05;
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, (520, 300)).into_drawing_area();
        root.fill(&WHITE).map_err(plot_error)?;
        let mut chart = ChartBuilder::on(&root)
            .caption(format!("{column}: distribution per set"), ("sans-serif", 15))
            .margin(10)
            .x_label_area_size(38)
            .y_label_area_size(60)
            .build_cartesian_2d(lo..hi, 0.0..top)
            .map_err(plot_error)?;
        chart.configure_mesh().x_desc(column).y_desc("density").x_labels(6).draw().map_err(plot_error)?;
        for (i, dens) in densities.iter().enumerate() {
            let color = COLORS[i % COLORS.len()];
            let mut steps = Vec::with_capacity(2 * bins);
            for (b, d) in dens.iter().enumerate() {
                steps.push((lo + b as f64 * width, *d));
                steps.push((lo + (b + 1) as f64 * width, *d));
            }
            chart.draw_series(LineSeries::new(steps, color.stroke_width(2))).map_err(plot_error)?;
        }
        for &t in thresholds {
            chart.draw_series(LineSeries::new(vec![(t, 0.0), (t, top)], BLACK.stroke_width(2))).map_err(plot_error)?;
        }
        root.present().map_err(plot_error)?;
    }
    let mut items: Vec<(&str, RGBColor)> =
        sets.iter().enumerate().map(|(i, (n, _))| (*n, COLORS[i % COLORS.len()])).collect();
    if !thresholds.is_empty() {
        items.push(("calibrated threshold", BLACK));
    }
    let note = if outside.is_empty() {
        String::new()
    } else {
        format!(
            "<p class=\"note\">Outside the plotted range [{lo:.4}, {hi:.4}] (not drawn): {}.</p>",
            outside.join("; ")
        )
    };
    Ok(format!("<figure>{svg}{}{note}</figure>", legend(&items)))
}

/// ROC curves (outliers positive) of one column for every outlier set.
fn roc(column: &str, curves: &[(&str, Vec<(f64, f64, f64)>)]) -> Result<String> {
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, (340, 300)).into_drawing_area();
        root.fill(&WHITE).map_err(plot_error)?;
        let mut chart = ChartBuilder::on(&root)
            .caption(format!("{column}: ROC"), ("sans-serif", 15))
            .margin(10)
            .x_label_area_size(38)
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
        for (i, (_, pts)) in curves.iter().enumerate() {
            let color = COLORS[(i + 1) % COLORS.len()];
            chart
                .draw_series(LineSeries::new(pts.iter().map(|p| (p.0, p.1)), color.stroke_width(2)))
                .map_err(plot_error)?;
        }
        root.present().map_err(plot_error)?;
    }
    let items: Vec<(&str, RGBColor)> =
        curves.iter().enumerate().map(|(i, (n, _))| (*n, COLORS[(i + 1) % COLORS.len()])).collect();
    Ok(format!("<figure>{svg}{}</figure>", legend(&items)))
}

/// Train and validation NLL per epoch, epochs on an integer axis.
fn training(log: &[LogEntry]) -> Result<String> {
    let last = log.iter().map(|e| e.epoch).max().unwrap_or(1).max(2) as u32;
    let values: Vec<f64> = log.iter().flat_map(|e| [e.train_nll, e.val_nll]).filter(|v| v.is_finite()).collect();
    let (lo, hi) = values.iter().fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), &v| (a.min(v), b.max(v)));
    if !lo.is_finite() {
        return Ok(String::new());
    }
    let pad = ((hi - lo) * 0.05).max(1e-6);
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, (520, 300)).into_drawing_area();
        root.fill(&WHITE).map_err(plot_error)?;
        let mut chart = ChartBuilder::on(&root)
            .caption("training", ("sans-serif", 15))
            .margin(10)
            .x_label_area_size(38)
            .y_label_area_size(60)
            .build_cartesian_2d(1u32..last, (lo - pad)..(hi + pad))
            .map_err(plot_error)?;
        chart
            .configure_mesh()
            .x_desc("epoch")
            .y_desc("NLL (nats per dimension)")
            .x_labels((last as usize).min(10))
            .draw()
            .map_err(plot_error)?;
        for (i, pick) in [true, false].into_iter().enumerate() {
            let pts = log.iter().map(move |e| (e.epoch as u32, if pick { e.train_nll } else { e.val_nll }));
            chart.draw_series(LineSeries::new(pts, COLORS[i].stroke_width(2))).map_err(plot_error)?;
        }
        root.present().map_err(plot_error)?;
    }
    Ok(format!("<figure>{svg}{}</figure>", legend(&[("train", COLORS[0]), ("validation", COLORS[1])])))
}

/// The epochs of the density that was kept: a single run's, or those of
/// the chosen flow of a search (none when the search kept another kind).
fn chosen_epochs(log: &TrainingLog) -> Vec<LogEntry> {
    let chosen = log.candidates.iter().find(|c| c.chosen).map(|c| c.name.as_str());
    log.epochs.iter().filter(|e| e.candidate.as_deref() == chosen).cloned().collect()
}

/// The candidates a search compared: a table best first, and the flows'
/// validation NLL after each stage of successive halving beside the other
/// kinds' (flat lines).
fn leaderboard(candidates: &[Candidate]) -> Result<String> {
    let mut order: Vec<&Candidate> = candidates.iter().collect();
    order.sort_by(|a, b| a.validation_nll.total_cmp(&b.validation_nll));
    let mut html = String::from(
        "<h2>Densities compared on the validation rows</h2>\n<table><tr><th>rank</th><th>candidate</th><th>kind</th>\
         <th>validation NLL (nats/vector)</th><th>epochs</th><th>seconds</th><th>stopped</th><th>settings</th></tr>\n",
    );
    for (i, c) in order.iter().enumerate() {
        let mark = if c.chosen { " <b>chosen</b>" } else { "" };
        let _ = writeln!(
            html,
            "<tr><td>{}</td><td class=\"name\">{}{mark}</td><td class=\"name\">{}</td><td>{:.4}</td><td>{}</td>\
             <td>{:.1}</td><td class=\"name\">{}</td><td class=\"name\">{}</td></tr>",
            i + 1,
            escape(&c.name),
            escape(&kind_name(c.kind)),
            c.validation_nll,
            c.epochs,
            c.seconds,
            escape(&c.stopped),
            escape(&c.detail)
        );
    }
    html.push_str("</table>\n");
    let raced: Vec<&Candidate> = candidates.iter().filter(|c| !c.stages.is_empty()).collect();
    if !raced.is_empty() {
        html.push_str(&rounds(candidates, &raced)?);
    }
    Ok(html)
}

/// Validation NLL per stage of the successive halving, one line per flow;
/// the kinds fitted once are drawn flat across the rounds.
fn rounds(candidates: &[Candidate], raced: &[&Candidate]) -> Result<String> {
    let last = raced.iter().map(|c| c.first_stage + c.stages.len()).max().unwrap_or(1).max(2) as u32;
    let flat: Vec<&Candidate> =
        candidates.iter().filter(|c| c.stages.is_empty() && c.validation_nll.is_finite()).collect();
    let values: Vec<f64> = raced
        .iter()
        .flat_map(|c| c.stages.iter().copied())
        .chain(flat.iter().map(|c| c.validation_nll))
        .filter(|v| v.is_finite())
        .collect();
    let (lo, hi) = values.iter().fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), &v| (a.min(v), b.max(v)));
    if !lo.is_finite() {
        return Ok(String::new());
    }
    let pad = ((hi - lo) * 0.05).max(1e-6);
    let color = |i: usize| COLORS[i % COLORS.len()];
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, (620, 340)).into_drawing_area();
        root.fill(&WHITE).map_err(plot_error)?;
        let mut chart = ChartBuilder::on(&root)
            .caption("successive halving", ("sans-serif", 15))
            .margin(10)
            .x_label_area_size(38)
            .y_label_area_size(70)
            .build_cartesian_2d(1u32..last, (lo - pad)..(hi + pad))
            .map_err(plot_error)?;
        chart
            .configure_mesh()
            .x_desc("stage of successive halving")
            .y_desc("validation NLL (nats per vector)")
            .x_labels(last as usize)
            .draw()
            .map_err(plot_error)?;
        for (i, c) in raced.iter().enumerate() {
            let pts = c.stages.iter().enumerate().map(|(r, &v)| ((c.first_stage + r) as u32 + 1, v));
            let width = if c.chosen { 3 } else { 1 };
            chart.draw_series(LineSeries::new(pts.clone(), color(i).stroke_width(width))).map_err(plot_error)?;
            // A flow halved out after its first stage is a single point.
            chart.draw_series(pts.map(|p| Circle::new(p, 3, color(i).filled()))).map_err(plot_error)?;
        }
        for (j, c) in flat.iter().enumerate() {
            let v = c.validation_nll;
            let style = color(raced.len() + j).stroke_width(if c.chosen { 3 } else { 1 });
            chart.draw_series(LineSeries::new([(1, v), (last, v)], style)).map_err(plot_error)?;
        }
        root.present().map_err(plot_error)?;
    }
    let names: Vec<String> = raced.iter().chain(&flat).map(|c| c.name.clone()).collect();
    let items: Vec<(&str, RGBColor)> = names.iter().enumerate().map(|(i, n)| (n.as_str(), color(i))).collect();
    Ok(format!(
        "<figure>{svg}{}</figure>\n<p class=\"note\">Each flow's best validation NLL after each stage of successive \
         halving; each stage has half the places of the last, which go by rank (an early-stopped flow on its best), and \
         the flows with a place that still train carry on. Flows that join at a later round race around the best flow \
         so far on a longer schedule. Kinds fitted once are flat lines; the chosen density is drawn thick. Lower is \
         better.</p>\n",
        legend(&items)
    ))
}

/// The AUROC of `column` against outlier set `set`.
fn auroc_of<'a>(ev: &'a Evaluated, set: &str, column: &str) -> Option<&'a Estimate> {
    let (_, per_column) = ev.results.iter().find(|(s, _)| s == set)?;
    let (_, est) = per_column.iter().find(|(c, _)| c == column)?;
    est.iter().find(|(m, _)| m == "auroc").map(|(_, e)| e)
}

/// Background colour of an AUROC cell: white at chance, green towards 1,
/// red towards 0 (a score that ranks the outliers as *more* typical).
fn heat(auroc: f64) -> String {
    let t = ((auroc - 0.5).abs() * 2.0).clamp(0.0, 1.0);
    let fade = |full: f64| (255.0 - t * (255.0 - full)).round() as u8;
    if auroc >= 0.5 {
        format!("rgb({},{},{})", fade(120.0), fade(200.0), fade(120.0))
    } else {
        format!("rgb({},{},{})", fade(230.0), fade(120.0), fade(120.0))
    }
}

/// The summary: AUROC per score (rows) and outlier set (columns), the best
/// score of each set marked.
fn summary(ev: &Evaluated) -> String {
    let mut html =
        String::from("<h2>Summary: AUROC per score and outlier set</h2>\n<table class=\"summary\"><tr><th>score</th>");
    for (set, _) in &ev.results {
        let _ = write!(html, "<th>{}</th>", escape(set));
    }
    html.push_str("</tr>\n");
    // The best AUROC per set; every score that reaches it is marked.
    let best: Vec<f64> = ev
        .results
        .iter()
        .map(|(set, _)| {
            ev.columns.iter().filter_map(|c| auroc_of(ev, set, c)).map(|e| e.value).fold(f64::NEG_INFINITY, f64::max)
        })
        .collect();
    for column in &ev.columns {
        let _ = write!(html, "<tr><td class=\"name\">{}</td>", escape(column));
        for ((set, _), best) in ev.results.iter().zip(&best) {
            match auroc_of(ev, set, column) {
                Some(e) => {
                    // Compared as shown (three decimals), so equal-looking cells agree.
                    let shown = |v: f64| (v * 1000.0).round();
                    let mark = if shown(e.value) == shown(*best) { " <b>&#9733; best</b>" } else { "" };
                    let _ = write!(
                        html,
                        "<td style=\"background:{}\">{:.3} <small>[{:.3}, {:.3}]</small>{mark}</td>",
                        heat(e.value),
                        e.value,
                        e.ci95[0],
                        e.ci95[1]
                    );
                }
                None => html.push_str("<td></td>"),
            }
        }
        html.push_str("</tr>\n");
    }
    html.push_str(
        "</table>\n<p class=\"note\">1 = every outlier scored more anomalous than every in-distribution vector, 0.5 = chance, \
         below 0.5 = the outliers look <i>more</i> typical than in-distribution vectors on that score. Brackets: bootstrap 95% intervals. \
         &#9733; marks the best score per outlier set (every score that reaches it to three decimals).</p>\n",
    );
    for note in &ev.notes {
        let _ = writeln!(html, "<p class=\"note\">{}</p>", escape(note));
    }
    html
}

/// The calibrated decision: threshold, false-alarm rate on the held-out
/// in-distribution rows, share of each outlier set flagged.
fn decision(ev: &Evaluated, calibration: Option<&Calibration>) -> String {
    let mut html = String::from("<h2>Calibrated decision</h2>\n");
    if let Some(c) = calibration {
        let _ = writeln!(
            html,
            "<p>Flag a vector when <b>{}</b> {} <b>{:.6}</b>: conformal rank {} of {} held-out calibration vectors, \
             target false-alarm rate {}.</p>",
            escape(&c.score),
            match c.direction {
                crate::score::Direction::Higher => "is above",
                crate::score::Direction::Lower => "is below",
                crate::score::Direction::TwoSided => "is this far from its calibration median or further:",
            },
            c.threshold_raw,
            c.rank,
            c.rows,
            c.false_alarm
        );
    }
    match &ev.decision {
        Some(d) => {
            html.push_str("<table><tr><th>set</th><th>flagged</th><th>share</th></tr>\n");
            let _ = writeln!(
                html,
                "<tr><td class=\"name\">in-distribution (false alarms)</td><td>{} of {}</td><td>{:.2}%</td></tr>",
                d.false_alarm.flagged,
                d.false_alarm.rows,
                100.0 * d.false_alarm.share()
            );
            for (set, r) in &d.detection {
                let _ = writeln!(
                    html,
                    "<tr><td class=\"name\">{} (detected)</td><td>{} of {}</td><td>{:.2}%</td></tr>",
                    escape(set),
                    r.flagged,
                    r.rows,
                    100.0 * r.share()
                );
            }
            let _ = writeln!(html, "</table>\n<p class=\"note\">Flags from {}.</p>", escape(&d.source));
        }
        None => html.push_str(
            "<p class=\"note\">No calibrated decision: pass <code>--calibration</code> (from <code>tidemark calibrate</code>) \
             to see its false-alarm and detection rates here.</p>\n",
        ),
    }
    html
}

/// Write the report to `path` (atomically).
pub fn write_report(path: &Path, input: &ReportInput) -> Result<()> {
    let ev = input.evaluated;
    let mut html = String::new();
    html.push_str(
        "<!DOCTYPE html>\n<html><head><meta charset=\"utf-8\"><title>tidemark evaluation</title>\n<style>\
         body{font-family:sans-serif;margin:24px;color:#222;max-width:1200px}table{border-collapse:collapse;margin:8px 0}\
         td,th{border:1px solid #bbb;padding:3px 8px;text-align:right}th{background:#eee}td.name{text-align:left}\
         .plots{display:flex;flex-wrap:wrap;gap:12px}figure{margin:0}.legend{font-size:13px;margin:2px 0 0 60px}\
         .legend div{display:inline-block;margin-right:14px}.swatch{display:inline-block;width:18px;height:4px;\
         vertical-align:middle;margin-right:5px}.note{color:#555;font-size:13px;max-width:900px}</style></head><body>\n\
         <h1>tidemark evaluation</h1>\n",
    );
    let names: Vec<String> = ev.ood.iter().map(|o| escape(&o.0)).collect();
    let _ = writeln!(
        html,
        "<p>In-distribution: {} ({} vectors). Outlier sets: {}.</p>",
        escape(&ev.id.path.display().to_string()),
        ev.id.values.first().map(Vec::len).unwrap_or(0),
        names.join(", ")
    );
    html.push_str(&summary(ev));
    html.push_str(&decision(ev, input.calibration));
    if let Some(log) = input.log {
        let epochs = chosen_epochs(log);
        if !epochs.is_empty() {
            let _ = writeln!(html, "<h2>Training</h2>\n{}", training(&epochs)?);
        }
        if !log.candidates.is_empty() {
            html.push_str(&leaderboard(&log.candidates)?);
        }
    }
    html.push_str(
        "<h2>Details per score</h2>\n<p class=\"note\">AUROC and AUPR-Out take outliers as positive, AUPR-In takes \
         in-distribution vectors as positive; FPR at 95% TPR is the share of outliers accepted at the threshold that \
         keeps 95% of in-distribution vectors; detection error is the least 0.5 (1 - TPR) + 0.5 FPR over thresholds.</p>\n",
    );
    for column in &ev.columns {
        let id_raw = ev.id.column(column).unwrap_or(&[]);
        let mut sets: Vec<(&str, &[f64])> = vec![("in-distribution", id_raw)];
        sets.extend(ev.ood.iter().map(|(n, t)| (n.as_str(), t.column(column).unwrap_or(&[]))));
        // On the score's own scale: a two-sided threshold is a distance from
        // the calibration median, so it is drawn on both sides of it.
        let thresholds: Vec<f64> = match input.calibration.filter(|c| &c.score == column) {
            Some(c) if c.direction == crate::score::Direction::TwoSided => {
                vec![c.center - c.threshold_raw, c.center + c.threshold_raw]
            }
            Some(c) => vec![c.threshold_raw],
            None => vec![],
        };
        let centre = median(id_raw);
        let id_anomaly = anomaly(column, id_raw, centre);
        let curves: Vec<(&str, Vec<(f64, f64, f64)>)> = ev
            .ood
            .iter()
            .map(|(n, t)| {
                (n.as_str(), roc_curve(&id_anomaly, &anomaly(column, t.column(column).unwrap_or(&[]), centre)))
            })
            .collect();
        let _ = writeln!(html, "<h3>{}</h3>", escape(column));
        html.push_str("<table><tr><th>outlier set</th>");
        for m in METRIC_LABELS {
            let _ = write!(html, "<th>{m}</th>");
        }
        html.push_str("</tr>\n");
        for (set, per_column) in &ev.results {
            let Some((_, estimates)) = per_column.iter().find(|(c, _)| c == column) else { continue };
            let _ = write!(html, "<tr><td class=\"name\">{}</td>", escape(set));
            for name in METRIC_NAMES {
                if let Some((_, e)) = estimates.iter().find(|(m, _)| m == name) {
                    let _ = write!(html, "<td>{:.4} <small>[{:.4}, {:.4}]</small></td>", e.value, e.ci95[0], e.ci95[1]);
                }
            }
            html.push_str("</tr>\n");
        }
        html.push_str("</table>\n<div class=\"plots\">");
        html.push_str(&histogram(column, &sets, &thresholds)?);
        html.push_str(&roc(column, &curves)?);
        html.push_str("</div>\n");
    }
    html.push_str(
        "<p class=\"note\">These are statistics of the sets given. Validate any threshold on your own data before it drives a decision.</p>\n</body></html>\n",
    );
    crate::output::write_atomic(path, |w| {
        w.write_all(html.as_bytes()).map_err(|source| Error::Io { path: path.into(), source })
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::Kind;

    fn raced(name: &str, kind: Kind, stages: &[f64], chosen: bool) -> Candidate {
        Candidate {
            kind,
            name: name.into(),
            detail: format!("{name} <settings>"),
            validation_nll: stages.last().copied().unwrap_or(f64::NAN),
            seconds: 1.0,
            chosen,
            epochs: 10 * stages.len(),
            stopped: "all epochs".into(),
            stages: stages.to_vec(),
            first_stage: 0,
        }
    }

    /// The leaderboard lists the candidates best first, marks the chosen
    /// one, escapes their text, and draws one line per raced flow plus one
    /// per kind fitted once.
    #[test]
    fn leaderboard_ranks_candidates_and_draws_the_rounds() {
        let mut gaussian = raced("gaussian", Kind::Gaussian, &[], false);
        gaussian.validation_nll = 5.0;
        let candidates =
            [gaussian, raced("halved", Kind::Flow, &[4.0], false), raced("kept", Kind::Flow, &[3.0, 2.0, 1.0], true)];
        let html = leaderboard(&candidates).unwrap();
        let (kept, halved, gauss) =
            (html.find(">kept").unwrap(), html.find(">halved").unwrap(), html.find(">gaussian").unwrap());
        assert!(kept < halved && halved < gauss, "{html}");
        assert_eq!(html.matches("<b>chosen</b>").count(), 1);
        assert!(html.contains("kept <b>chosen</b>"));
        assert!(html.contains("&lt;settings&gt;") && !html.contains("<settings>"));
        assert_eq!(html.matches("<svg").count(), 1);
        // Two flows and one flat line in the series colours (the mesh is black),
        // and a marker at each of the four rounds the flows ran.
        let coloured =
            html.matches("<polyline").count() - html.matches("stroke=\"#000000\" stroke-width=\"1\" points").count();
        assert_eq!(coloured, 3, "{html}");
        assert_eq!(html.matches("<circle").count(), 4, "{html}");
    }

    /// A flow of a local round is drawn from the round it joined at: its
    /// first marker sits one round step right of the first round's last,
    /// not over the first round's markers.
    #[test]
    fn local_round_flows_start_where_they_joined() {
        let mut local = raced("local", Kind::Flow, &[0.9, 0.5], false);
        local.first_stage = 3;
        let candidates = [raced("kept", Kind::Flow, &[3.0, 2.0, 1.0], true), local];
        let html = leaderboard(&candidates).unwrap();
        let xs: Vec<f64> =
            html.split("<circle cx=\"").skip(1).map(|s| s[..s.find('"').unwrap()].parse().unwrap()).collect();
        assert_eq!(xs.len(), 5, "{html}");
        let step = xs[1] - xs[0];
        assert!(step > 0.0 && (xs[2] - xs[1] - step).abs() <= 1.0, "{xs:?}");
        assert!((xs[3] - xs[2] - step).abs() <= 1.0 && (xs[4] - xs[3] - step).abs() <= 1.0, "{xs:?}");
    }

    /// The range holds the central 99.5% of the in-distribution values and
    /// every outlier set's median, and not a far-off outlier's extreme.
    #[test]
    fn histogram_range_is_robust_to_far_outliers() {
        let id: Vec<f64> = (0..1000).map(|i| i as f64 / 1000.0).collect();
        let far: Vec<f64> = (0..100).map(|i| if i < 60 { 2.0 } else { 1e6 }).collect();
        let (lo, hi) = robust_range(&[("id", &id), ("far", &far)], &[]).unwrap();
        assert!(lo < 0.003 && lo > -0.2, "{lo}");
        assert!((2.0..2.2).contains(&hi), "{hi}");
        assert_eq!(METRIC_LABELS.len(), METRIC_NAMES.len());
    }
}
