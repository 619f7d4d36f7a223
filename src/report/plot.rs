//! SVG plots drawn with plotters (its SVG backend: text stays text, no font files needed).
//!
//! `complexity`: for every family with an ordered parameter (lambda on a log axis, k, degree),
//! the train and validation score against that parameter, the validation band of plus or minus
//! one standard error across folds, the selected candidate ringed and, under the one-SE rule,
//! the best mean and the threshold it set. Colours are the Okabe-Ito palette, which readers
//! with the common colour-vision deficiencies tell apart (Okabe & Ito 2008, "Color Universal
//! Design"; common practice).
//!
//! Every plotted candidate is also listed in the SVG's `<metadata id="probity-KIND">` (JSON:
//! candidate, values,
//! and the pixel position of its validation point), so tests and other tools can check the
//! drawing against the ledger without reading pixels.

use crate::error::{Error, Result};
use crate::ledger::{CandidateRow, RunDetail};
use plotters::coord::types::RangedCoordf64;
use plotters::prelude::*;
use serde_json::{Value, json};

/// Okabe-Ito: blue, orange, bluish green, vermillion, reddish purple, sky blue, yellow.
const PALETTE: [RGBColor; 7] = [
    RGBColor(0x00, 0x72, 0xB2),
    RGBColor(0xE6, 0x9F, 0x00),
    RGBColor(0x00, 0x9E, 0x73),
    RGBColor(0xD5, 0x5E, 0x00),
    RGBColor(0xCC, 0x79, 0xA7),
    RGBColor(0x56, 0xB4, 0xE9),
    RGBColor(0xF0, 0xE4, 0x42),
];

const WIDTH: u32 = 820;
const PANEL_HEIGHT: u32 = 380;

/// One candidate on a complexity curve.
#[derive(Debug, Clone)]
pub struct CurvePoint {
    pub candidate: i64,
    /// The ordered parameter's value.
    pub x: f64,
    pub train: Option<f64>,
    pub validation: Option<f64>,
    pub validation_se: Option<f64>,
}

/// Candidates of one family that differ only in the ordered parameter.
#[derive(Debug, Clone)]
pub struct Curve {
    /// The other parameters (for example `feature=temp_day`), empty when there are none.
    pub label: String,
    pub points: Vec<CurvePoint>,
}

/// One panel: a family and its ordered parameter.
#[derive(Debug, Clone)]
pub struct Panel {
    pub family: String,
    pub parameter: String,
    pub log_x: bool,
    pub curves: Vec<Curve>,
}

fn text_of(v: &Value) -> String {
    match v {
        Value::String(s) => s.clone(),
        other => other.to_string(),
    }
}

/// The panels of a run's complexity plot for `metric`: per family, the numeric parameter that
/// takes more than one value (the first by name if several do), the candidates grouped by their
/// other parameters and sorted by it. Families with no such parameter (mean, ols) are left out.
pub fn complexity_panels(d: &RunDetail, metric: &str) -> Vec<Panel> {
    let mut families: Vec<&str> = Vec::new();
    for c in &d.candidates {
        if !families.contains(&c.family.as_str()) {
            families.push(&c.family);
        }
    }
    let mut panels = Vec::new();
    for fam in families {
        let cands: Vec<&CandidateRow> = d
            .candidates
            .iter()
            .filter(|c| c.family == fam && c.failure.is_none())
            .collect();
        let mut names: Vec<String> = cands
            .iter()
            .filter_map(|c| c.params.as_object())
            .flat_map(|m| m.keys().cloned())
            .collect();
        names.sort();
        names.dedup();
        let ordered = names.iter().find(|n| {
            let vals: Vec<f64> = cands
                .iter()
                .filter_map(|c| c.params.get(n.as_str()).and_then(Value::as_f64))
                .collect();
            vals.len() == cands.len() && vals.iter().any(|v| *v != vals[0])
        });
        let Some(param) = ordered else { continue };
        let log_x = param == "lambda"
            && cands
                .iter()
                .all(|c| c.params[param.as_str()].as_f64().is_some_and(|v| v > 0.0));
        let mut curves: Vec<Curve> = Vec::new();
        for c in &cands {
            let label = c
                .params
                .as_object()
                .map(|m| {
                    m.iter()
                        .filter(|(k, _)| *k != param)
                        .map(|(k, v)| format!("{k}={}", text_of(v)))
                        .collect::<Vec<_>>()
                        .join(" ")
                })
                .unwrap_or_default();
            let stat = |part: &std::collections::BTreeMap<String, crate::ledger::Stat>| {
                part.get(metric).copied()
            };
            let point = CurvePoint {
                candidate: c.id,
                x: c.params[param.as_str()].as_f64().unwrap_or(f64::NAN),
                train: stat(&c.train).and_then(|s| s.mean),
                validation: stat(&c.validation).and_then(|s| s.mean),
                validation_se: stat(&c.validation).and_then(|s| s.se),
            };
            match curves.iter_mut().find(|cv| cv.label == label) {
                Some(cv) => cv.points.push(point),
                None => curves.push(Curve {
                    label,
                    points: vec![point],
                }),
            }
        }
        for cv in &mut curves {
            cv.points.sort_by(|a, b| a.x.total_cmp(&b.x));
        }
        panels.push(Panel {
            family: fam.to_string(),
            parameter: param.clone(),
            log_x,
            curves,
        });
    }
    panels
}

fn plot_err(e: impl std::fmt::Display) -> Error {
    Error::Internal(format!("draw the plot: {e}"))
}

/// The x coordinate drawn: log10 of lambda on a log axis.
fn xpos(p: &Panel, x: f64) -> f64 {
    if p.log_x { x.log10() } else { x }
}

/// Padded range of `values`.
fn range_of(values: impl Iterator<Item = f64>) -> (f64, f64) {
    let (lo, hi) = values
        .filter(|v| v.is_finite())
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(l, h), v| {
            (l.min(v), h.max(v))
        });
    if !lo.is_finite() {
        return (0.0, 1.0);
    }
    let pad = if hi > lo {
        (hi - lo) * 0.06
    } else {
        lo.abs().max(1.0) * 0.1
    };
    (lo - pad, hi + pad)
}

/// The complexity plot as SVG text, with the plotted points in its metadata.
pub fn complexity_svg(d: &RunDetail, metric: &str) -> Result<String> {
    let panels = complexity_panels(d, metric);
    if panels.is_empty() {
        return Err(Error::Input(format!(
            "run {} has no family with an ordered parameter (lambda, k, degree) to plot; the complexity plot needs a grid over one",
            d.summary.id
        )));
    }
    let selected = d.summary.selected;
    let best = d.best;
    // The one-SE marks belong to the metric the rule was applied to.
    let one_se = d.rule == "one-se" && metric == d.summary.metric;
    let mut meta = Vec::new();
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, (WIDTH, PANEL_HEIGHT * panels.len() as u32))
            .into_drawing_area();
        root.fill(&WHITE).map_err(plot_err)?;
        let areas = root.split_evenly((panels.len(), 1));
        for (panel, area) in panels.iter().zip(&areas) {
            let xs = panel
                .curves
                .iter()
                .flat_map(|c| c.points.iter().map(|p| xpos(panel, p.x)));
            let (x0, x1) = range_of(xs);
            let ys = panel.curves.iter().flat_map(|c| {
                c.points.iter().flat_map(|p| {
                    let se = p.validation_se.unwrap_or(0.0);
                    [
                        p.train,
                        p.validation.map(|v| v - se),
                        p.validation.map(|v| v + se),
                    ]
                    .into_iter()
                    .flatten()
                })
            });
            let (y0, y1) = range_of(ys);
            let x_desc = if panel.log_x {
                format!("{} (log scale)", panel.parameter)
            } else {
                panel.parameter.clone()
            };
            let mut chart = chart_on(
                area,
                format!(
                    "{}: {metric} by {} (mean over folds; band: validation +/- 1 standard error)",
                    panel.family, panel.parameter
                ),
                x0..x1,
                y0..y1,
            )?;
            let log_x = panel.log_x;
            // Whole-number parameters (k, degree) get ticks at whole numbers only.
            let whole = panel
                .curves
                .iter()
                .flat_map(|c| c.points.iter())
                .all(|p| p.x.fract() == 0.0);
            let fmt_x = move |v: &f64| -> String {
                let on_whole = (v - v.round()).abs() < 1e-9;
                if log_x {
                    if on_whole {
                        tick(10f64.powi(v.round() as i32))
                    } else {
                        String::new()
                    }
                } else if whole && !on_whole {
                    String::new()
                } else {
                    tick(*v)
                }
            };
            draw_mesh(&mut chart, x_desc, metric.to_string(), &fmt_x)?;
            for (ci, curve) in panel.curves.iter().enumerate() {
                let colour = PALETTE[ci % PALETTE.len()];
                let suffix = if curve.label.is_empty() {
                    String::new()
                } else {
                    format!(" ({})", curve.label)
                };
                let band: Vec<(f64, f64)> = {
                    let pts: Vec<(f64, f64, f64)> = curve
                        .points
                        .iter()
                        .filter_map(|p| {
                            Some((
                                xpos(panel, p.x),
                                p.validation?,
                                p.validation_se.unwrap_or(0.0),
                            ))
                        })
                        .collect();
                    pts.iter()
                        .map(|(x, v, s)| (*x, v + s))
                        .chain(pts.iter().rev().map(|(x, v, s)| (*x, v - s)))
                        .collect()
                };
                if band.len() >= 4 {
                    chart
                        .draw_series(std::iter::once(Polygon::new(
                            band,
                            colour.mix(0.18).filled(),
                        )))
                        .map_err(plot_err)?;
                }
                let val: Vec<(f64, f64)> = curve
                    .points
                    .iter()
                    .filter_map(|p| Some((xpos(panel, p.x), p.validation?)))
                    .collect();
                let train: Vec<(f64, f64)> = curve
                    .points
                    .iter()
                    .filter_map(|p| Some((xpos(panel, p.x), p.train?)))
                    .collect();
                chart
                    .draw_series(LineSeries::new(val.clone(), colour.stroke_width(2)))
                    .map_err(plot_err)?
                    .label(format!("validation{suffix}"))
                    .legend(move |(x, y)| {
                        PathElement::new(vec![(x, y), (x + 18, y)], colour.stroke_width(2))
                    });
                chart
                    .draw_series(DashedLineSeries::new(
                        train.clone(),
                        6,
                        4,
                        colour.stroke_width(2),
                    ))
                    .map_err(plot_err)?
                    .label(format!("train{suffix}"))
                    .legend(move |(x, y)| {
                        PathElement::new(vec![(x, y), (x + 6, y)], colour.stroke_width(2))
                    });
                chart
                    .draw_series(val.iter().map(|p| Circle::new(*p, 3, colour.filled())))
                    .map_err(plot_err)?;
                chart
                    .draw_series(
                        train
                            .iter()
                            .map(|p| Circle::new(*p, 3, colour.stroke_width(1))),
                    )
                    .map_err(plot_err)?;
                for p in &curve.points {
                    let (px, py) = p
                        .validation
                        .map(|v| chart.backend_coord(&(xpos(panel, p.x), v)))
                        .map_or((None, None), |(a, b)| (Some(a), Some(b)));
                    meta.push(json!({
                        "family": panel.family,
                        "parameter": panel.parameter,
                        "curve": curve.label,
                        "candidate": p.candidate,
                        "x": p.x,
                        "train": p.train,
                        "validation": p.validation,
                        "validation_se": p.validation_se,
                        "px": px,
                        "py": py,
                    }));
                }
            }
            // The selected candidate, and under the one-SE rule the best mean it was measured
            // against, with the threshold (best mean + its standard error).
            let find = |id: i64| {
                panel
                    .curves
                    .iter()
                    .flat_map(|c| c.points.iter())
                    .find(|p| p.candidate == id)
            };
            if let Some(p) = find(selected)
                && let Some(v) = p.validation
            {
                let at = (xpos(panel, p.x), v);
                chart
                    .draw_series(std::iter::once(Circle::new(at, 8, BLACK.stroke_width(2))))
                    .map_err(plot_err)?
                    .label(format!("selected (candidate {selected})"))
                    .legend(|(x, y)| Circle::new((x + 9, y), 5, BLACK.stroke_width(2)));
            }
            if one_se
                && best != selected
                && let Some(p) = find(best)
                && let Some(v) = p.validation
            {
                let at = (xpos(panel, p.x), v);
                let grey = RGBColor(0x55, 0x55, 0x55);
                chart
                    .draw_series(std::iter::once(Circle::new(at, 8, grey.stroke_width(1))))
                    .map_err(plot_err)?
                    .label(format!("best mean (candidate {best})"))
                    .legend(move |(x, y)| Circle::new((x + 9, y), 5, grey.stroke_width(1)));
                if let Some(se) = p.validation_se {
                    chart
                        .draw_series(DashedLineSeries::new(
                            vec![(x0, v + se), (x1, v + se)],
                            3,
                            3,
                            grey.stroke_width(1),
                        ))
                        .map_err(plot_err)?
                        .label("one-SE threshold")
                        .legend(move |(x, y)| {
                            PathElement::new(vec![(x, y), (x + 18, y)], grey.stroke_width(1))
                        });
                }
            }
            // The legend goes in the corner that hides the fewest points.
            let corner = {
                let pts: Vec<(f64, f64)> = panel
                    .curves
                    .iter()
                    .flat_map(|c| c.points.iter())
                    .flat_map(|p| {
                        let x = xpos(panel, p.x);
                        [p.train, p.validation]
                            .into_iter()
                            .flatten()
                            .map(move |y| (x, y))
                    })
                    .collect();
                let (xm, xw) = (x0, x1 - x0);
                let (ym, yw) = (y0, y1 - y0);
                let hidden = |right: bool, top: bool| {
                    pts.iter()
                        .filter(|(x, y)| {
                            let fx = (x - xm) / xw;
                            let fy = (y - ym) / yw;
                            (if right { fx > 0.55 } else { fx < 0.45 })
                                && (if top { fy > 0.6 } else { fy < 0.4 })
                        })
                        .count()
                };
                [
                    (SeriesLabelPosition::UpperRight, hidden(true, true)),
                    (SeriesLabelPosition::UpperLeft, hidden(false, true)),
                    (SeriesLabelPosition::LowerRight, hidden(true, false)),
                    (SeriesLabelPosition::LowerLeft, hidden(false, false)),
                ]
                .into_iter()
                .min_by_key(|(_, n)| *n)
                .map_or(SeriesLabelPosition::UpperRight, |(pos, _)| pos)
            };
            draw_legend(&mut chart, corner)?;
        }
        root.present().map_err(plot_err)?;
    }
    let doc = json!({
        "run": d.summary.id,
        "kind": "complexity",
        "metric": metric,
        "selected": selected,
        "points": meta,
    });
    Ok(with_metadata(&svg, &doc))
}

/// The reveals plot: for one partition, each reveal's test score in reveal order against the
/// development (cross-validated) estimate of the candidate revealed, with a band from the test
/// score to the test score corrected by the optimism estimate shown with it (up for a loss,
/// down for a score where higher is better). Reveals in another metric than `metric` are left
/// out of the picture (and of the metadata).
pub fn reveals_svg(
    partition: &str,
    points: &[crate::ledger::RevealPoint],
    metric: &str,
    higher_is_better: bool,
) -> Result<String> {
    let shown: Vec<(usize, &crate::ledger::RevealPoint)> = points
        .iter()
        .enumerate()
        .filter(|(_, p)| p.reveal.metric == metric && p.test.is_some())
        .map(|(i, p)| (i + 1, p))
        .collect();
    if shown.is_empty() {
        return Err(Error::Input(format!(
            "partition {partition} has no reveal scored in {metric}; `probity reveal RUN` makes one, `probity audit` lists the partitions"
        )));
    }
    let sign = if higher_is_better { -1.0 } else { 1.0 };
    let corrected =
        |p: &crate::ledger::RevealPoint| p.test.map(|t| t + sign * p.optimism.unwrap_or(0.0));
    let (x0, x1) = (
        0.5,
        shown.len().max(shown.last().map_or(1, |s| s.0)) as f64 + 0.5,
    );
    let (y0, y1) = range_of(
        shown
            .iter()
            .flat_map(|(_, p)| [p.test, p.development, corrected(p)].into_iter().flatten()),
    );
    let mut meta = Vec::new();
    let mut svg = String::new();
    {
        let root =
            SVGBackend::with_string(&mut svg, (WIDTH, PANEL_HEIGHT + 40)).into_drawing_area();
        root.fill(&WHITE).map_err(plot_err)?;
        let mut chart = chart_on(
            &root,
            format!(
                "partition {partition}: test {metric} at each reveal against the development estimate"
            ),
            x0..x1,
            y0..y1,
        )?;
        draw_mesh(
            &mut chart,
            "reveal (in the order made)",
            metric,
            &|v: &f64| {
                if (v - v.round()).abs() < 1e-9 && *v >= 1.0 {
                    format!("{}", v.round() as i64)
                } else {
                    String::new()
                }
            },
        )?;
        let (test_c, dev_c, band_c) = (PALETTE[3], PALETTE[0], PALETTE[1]);
        // The optimism band: one bar per reveal from the test score to the corrected score.
        chart
            .draw_series(shown.iter().filter_map(|(i, p)| {
                let (t, c) = (p.test?, corrected(p)?);
                let x = *i as f64;
                Some(Rectangle::new(
                    [(x - 0.18, t.min(c)), (x + 0.18, t.max(c))],
                    band_c.mix(0.35).filled(),
                ))
            }))
            .map_err(plot_err)?
            .label("test score corrected for optimism (band)")
            .legend(move |(x, y)| {
                Rectangle::new([(x, y - 4), (x + 14, y + 4)], band_c.mix(0.35).filled())
            });
        let dev: Vec<(f64, f64)> = shown
            .iter()
            .filter_map(|(i, p)| Some((*i as f64, p.development?)))
            .collect();
        chart
            .draw_series(dev.iter().map(|p| Cross::new(*p, 5, dev_c.stroke_width(2))))
            .map_err(plot_err)?
            .label("development estimate (cross-validated)")
            .legend(move |(x, y)| Cross::new((x + 7, y), 4, dev_c.stroke_width(2)));
        let test: Vec<(f64, f64)> = shown
            .iter()
            .filter_map(|(i, p)| Some((*i as f64, p.test?)))
            .collect();
        line_with_points(&mut chart, &test, test_c, "test score")?;
        for (i, p) in &shown {
            let (px, py) = p
                .test
                .map(|t| chart.backend_coord(&(*i as f64, t)))
                .map_or((None, None), |(a, b)| (Some(a), Some(b)));
            meta.push(json!({
                "reveal": p.reveal.id,
                "order": i,
                "at": p.reveal.at,
                "user": p.reveal.user,
                "run": p.reveal.run,
                "candidate": p.reveal.candidate,
                "test": p.test,
                "development": p.development,
                "optimism": p.optimism,
                "corrected": corrected(p),
                "px": px,
                "py": py,
            }));
        }
        draw_legend(&mut chart, SeriesLabelPosition::UpperLeft)?;
        root.present().map_err(plot_err)?;
    }
    let doc = json!({
        "kind": "reveals",
        "partition": partition,
        "metric": metric,
        "points": meta,
    });
    Ok(with_metadata(&svg, &doc))
}

/// Most points the residuals plot draws (evenly spaced over the rows beyond that; the
/// metadata says how many were shown).
pub const MAX_POINTS: usize = 4000;

/// Residuals (observed minus predicted) against the out-of-fold predictions of one candidate.
pub fn residuals_svg(run: i64, candidate: i64, oof: &crate::runner::OutOfFold) -> Result<String> {
    let n = oof.rows.len();
    if n == 0 {
        return Err(Error::Input(format!(
            "run {run} has no held-out rows to draw"
        )));
    }
    let pick: Vec<usize> = if n > MAX_POINTS {
        (0..MAX_POINTS).map(|i| i * n / MAX_POINTS).collect()
    } else {
        (0..n).collect()
    };
    let pts: Vec<(usize, usize, f64, f64)> = pick
        .iter()
        .map(|&k| {
            let (fold, row, y, p) = &oof.rows[k];
            (*fold, *row, p[0], y - p[0])
        })
        .collect();
    let (x0, x1) = range_of(pts.iter().map(|p| p.2));
    let (y0, y1) = {
        let (lo, hi) = range_of(pts.iter().map(|p| p.3));
        let m = lo.abs().max(hi.abs());
        (-m, m)
    };
    let mut meta = Vec::new();
    let mut svg = String::new();
    {
        let root =
            SVGBackend::with_string(&mut svg, (WIDTH, PANEL_HEIGHT + 80)).into_drawing_area();
        root.fill(&WHITE).map_err(plot_err)?;
        let shown = if pts.len() < n {
            format!(", {} of {n} rows evenly spaced", pts.len())
        } else {
            String::new()
        };
        let mut chart = chart_on(
            &root,
            format!(
                "run {run}, candidate {candidate}: out-of-fold residuals on the development rows{shown}"
            ),
            x0..x1,
            y0..y1,
        )?;
        draw_mesh(
            &mut chart,
            "prediction (target units)",
            "residual = observed - predicted",
            &|v: &f64| tick(*v),
        )?;
        chart
            .draw_series(std::iter::once(PathElement::new(
                vec![(x0, 0.0), (x1, 0.0)],
                BLACK.mix(0.6).stroke_width(1),
            )))
            .map_err(plot_err)?;
        let colour = PALETTE[0];
        chart
            .draw_series(
                pts.iter()
                    .map(|p| Circle::new((p.2, p.3), 2, colour.mix(0.55).filled())),
            )
            .map_err(plot_err)?;
        for p in &pts {
            let (px, py) = chart.backend_coord(&(p.2, p.3));
            meta.push(json!({"fold": p.0, "row": p.1, "prediction": p.2, "residual": p.3, "px": px, "py": py}));
        }
        root.present().map_err(plot_err)?;
    }
    let doc = json!({
        "kind": "residuals",
        "run": run,
        "candidate": candidate,
        "rows": n,
        "shown": meta.len(),
        "points": meta,
    });
    Ok(with_metadata(&svg, &doc))
}

/// Bins of the calibration plot.
pub const BINS: usize = 10;

/// A calibration (reliability) plot of out-of-fold probabilities: for two classes the predicted
/// probability of the positive (second) class in 10 equal bins against the observed share of
/// that class; for more, the probability of the predicted class against the share predicted
/// right. The diagonal is perfect calibration.
pub fn calibration_svg(run: i64, candidate: i64, oof: &crate::runner::OutOfFold) -> Result<String> {
    let nc = oof.classes.len();
    let binary = nc == 2;
    // (probability, hit) per row.
    let obs: Vec<(f64, bool)> = oof
        .rows
        .iter()
        .map(|(_, _, y, p)| {
            if binary {
                (p[1], *y as usize == 1)
            } else {
                let (best, pb) =
                    p.iter()
                        .enumerate()
                        .fold((0, f64::NEG_INFINITY), |(bi, bp), (i, &v)| {
                            if v > bp { (i, v) } else { (bi, bp) }
                        });
                (pb, best == *y as usize)
            }
        })
        .collect();
    let mut bins = vec![(0usize, 0.0f64, 0usize); BINS];
    for (p, hit) in &obs {
        let b = ((p * BINS as f64).floor() as usize).min(BINS - 1);
        bins[b].0 += 1;
        bins[b].1 += p;
        bins[b].2 += usize::from(*hit);
    }
    let what = if binary {
        format!("share of class '{}'", oof.classes[1])
    } else {
        "share predicted right".to_string()
    };
    let x_desc = if binary {
        format!("predicted probability of '{}'", oof.classes[1])
    } else {
        "predicted probability of the predicted class".to_string()
    };
    let mut meta = Vec::new();
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, (WIDTH, WIDTH - 120)).into_drawing_area();
        root.fill(&WHITE).map_err(plot_err)?;
        let mut chart = chart_on(
            &root,
            format!(
                "run {run}, candidate {candidate}: calibration of out-of-fold probabilities ({} rows)",
                obs.len()
            ),
            0.0f64..1.0,
            0.0f64..1.0,
        )?;
        draw_mesh(
            &mut chart,
            x_desc,
            format!("observed {what}"),
            &|v: &f64| tick(*v),
        )?;
        chart
            .draw_series(DashedLineSeries::new(
                vec![(0.0, 0.0), (1.0, 1.0)],
                5,
                4,
                BLACK.mix(0.5).stroke_width(1),
            ))
            .map_err(plot_err)?
            .label("perfect calibration")
            .legend(|(x, y)| {
                PathElement::new(vec![(x, y), (x + 18, y)], BLACK.mix(0.5).stroke_width(1))
            });
        let colour = PALETTE[3];
        let line: Vec<(f64, f64)> = bins
            .iter()
            .filter(|b| b.0 > 0)
            .map(|b| (b.1 / b.0 as f64, b.2 as f64 / b.0 as f64))
            .collect();
        line_with_points(
            &mut chart,
            &line,
            colour,
            "bins of 0.1: mean predicted against observed (numbers: rows)",
        )?;
        for (i, b) in bins.iter().enumerate() {
            if b.0 == 0 {
                continue;
            }
            let at = (b.1 / b.0 as f64, b.2 as f64 / b.0 as f64);
            chart
                .draw_series(std::iter::once(Text::new(
                    format!("{}", b.0),
                    (at.0, (at.1 + 0.03).min(0.98)),
                    ("sans-serif", 11),
                )))
                .map_err(plot_err)?;
            let (px, py) = chart.backend_coord(&at);
            meta.push(json!({
                "bin": i, "low": i as f64 / BINS as f64, "high": (i + 1) as f64 / BINS as f64,
                "rows": b.0, "mean_predicted": at.0, "observed": at.1, "px": px, "py": py,
            }));
        }
        draw_legend(&mut chart, SeriesLabelPosition::UpperLeft)?;
        root.present().map_err(plot_err)?;
    }
    // The rows behind the bins (evenly spaced beyond MAX_POINTS), so the picture can be checked.
    let n = oof.rows.len();
    let points: Vec<Value> = (0..n.min(MAX_POINTS))
        .map(|i| {
            let (fold, row, y, p) = &oof.rows[if n > MAX_POINTS {
                i * n / MAX_POINTS
            } else {
                i
            }];
            json!({"fold": fold, "row": row, "class": *y as usize, "probabilities": p})
        })
        .collect();
    let doc = json!({
        "kind": "calibration",
        "run": run,
        "candidate": candidate,
        "rows": obs.len(),
        "classes": oof.classes,
        "bins": meta,
        "points": points,
    });
    Ok(with_metadata(&svg, &doc))
}

/// A chart on `area` with a caption and room for the axis labels.
fn chart_on<'a, 'b>(
    area: &'a DrawingArea<SVGBackend<'b>, plotters::coord::Shift>,
    caption: impl Into<String>,
    x: std::ops::Range<f64>,
    y: std::ops::Range<f64>,
) -> Result<Chart<'a, 'b>> {
    ChartBuilder::on(area)
        .caption(caption.into(), ("sans-serif", 16))
        .margin(14)
        .x_label_area_size(44)
        .y_label_area_size(70)
        .build_cartesian_2d(x, y)
        .map_err(plot_err)
}

type Chart<'a, 'b> = ChartContext<'a, SVGBackend<'b>, Cartesian2d<RangedCoordf64, RangedCoordf64>>;

/// Axes with their descriptions, light grid lines, short tick labels.
fn draw_mesh(
    chart: &mut Chart,
    x_desc: impl Into<String>,
    y_desc: impl Into<String>,
    fmt_x: &dyn Fn(&f64) -> String,
) -> Result<()> {
    chart
        .configure_mesh()
        .x_desc(x_desc.into())
        .y_desc(y_desc.into())
        .x_label_formatter(fmt_x)
        .y_label_formatter(&|v: &f64| tick(*v))
        .light_line_style(WHITE.mix(0.0))
        .bold_line_style(BLACK.mix(0.08))
        .label_style(("sans-serif", 13))
        .axis_desc_style(("sans-serif", 14))
        .draw()
        .map_err(plot_err)
}

/// A solid line through `pts` with a dot at each, in the legend as `label`.
fn line_with_points<'a, 'b: 'a>(
    chart: &mut Chart<'a, 'b>,
    pts: &[(f64, f64)],
    colour: RGBColor,
    label: &str,
) -> Result<()> {
    chart
        .draw_series(LineSeries::new(pts.to_vec(), colour.stroke_width(2)))
        .map_err(plot_err)?
        .label(label)
        .legend(move |(x, y)| PathElement::new(vec![(x, y), (x + 18, y)], colour.stroke_width(2)));
    chart
        .draw_series(pts.iter().map(|p| Circle::new(*p, 4, colour.filled())))
        .map_err(plot_err)?;
    Ok(())
}

fn draw_legend<'a, 'b: 'a>(chart: &mut Chart<'a, 'b>, position: SeriesLabelPosition) -> Result<()> {
    chart
        .configure_series_labels()
        .position(position)
        .background_style(WHITE.mix(0.85))
        .border_style(BLACK.mix(0.3))
        .label_font(("sans-serif", 12))
        .draw()
        .map_err(plot_err)
}

/// An axis label: at most 4 significant digits, no trailing zeros.
fn tick(v: f64) -> String {
    if v == 0.0 || !v.is_finite() {
        return if v.is_finite() {
            "0".into()
        } else {
            String::new()
        };
    }
    let mag = v.abs().log10().floor() as i32;
    if !(-4..6).contains(&mag) {
        return format!("{v:.2e}");
    }
    let digits = (3 - mag).max(0) as usize;
    let s = format!("{v:.digits$}");
    if s.contains('.') {
        s.trim_end_matches('0').trim_end_matches('.').to_string()
    } else {
        s
    }
}

/// Insert `doc` as JSON in a `<metadata>` element right after the opening `<svg ...>` tag.
fn with_metadata(svg: &str, doc: &Value) -> String {
    let text = doc
        .to_string()
        .replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;");
    let open = svg
        .find("<svg")
        .and_then(|at| svg[at..].find('>').map(|e| at + e));
    match open {
        Some(end) => format!(
            "{}\n<metadata id=\"probity-{}\">{text}</metadata>{}",
            &svg[..=end],
            doc["kind"].as_str().unwrap_or("plot"),
            &svg[end + 1..]
        ),
        None => svg.to_string(),
    }
}

#[cfg(test)]
mod tests {
    use super::tick;

    #[test]
    fn ticks_are_short() {
        assert_eq!(tick(0.52), "0.52");
        assert_eq!(tick(0.4567891), "0.4568");
        assert_eq!(tick(1000.0), "1000");
        assert_eq!(tick(0.001), "0.001");
        assert_eq!(tick(12.5), "12.5");
        assert_eq!(tick(0.0), "0");
        assert_eq!(tick(2.5e-7), "2.50e-7");
    }
}
