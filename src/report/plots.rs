//! SVG plots, returned as strings (no file I/O): the shift diagnostics (overlap of the
//! classifier's probabilities, distribution of the weights, feature balance before and
//! after weighting), the level curve, and the selection itself (prediction against weight).
//!
//! Drawn with plotters' SVG backend only (no bitmap backend, no font files): text goes into
//! the SVG as `<text>` elements and the viewer's fonts render it; plotters only estimates
//! label widths for layout.
//!
//! Text size: every plot is drawn at the width it is shown at in the report (720 px, the
//! `width` attribute equals the `viewBox` width, and the page does not scale plots down on
//! screen), so an SVG font size is the size on screen at 100% zoom. Every text is at least
//! [`MIN_TEXT_PX`] px.

use plotters::coord::Shift;
use plotters::prelude::*;

use crate::shift::diagnostics::Overlap;
use crate::shift::FeatureBalance;

/// Colour of the labeled set.
const LABELED: RGBColor = RGBColor(31, 119, 180);
/// Colour of the pool.
const POOL: RGBColor = RGBColor(214, 96, 39);
const FONT: &str = "sans-serif";
/// Width of every plot in px: drawn 1:1 in the report; about the text width of an A4 page
/// at 96 dpi, so that a printed plot shrinks little.
pub const PLOT_WIDTH: u32 = 720;
/// The smallest font size of any text in a plot, in SVG px (the report checks it).
pub const MIN_TEXT_PX: f64 = 11.0;
/// Font sizes asked of plotters. Its SVG backend writes `size / 1.24` as the font-size
/// attribute (plotters-svg 0.3.7, `svg.rs`), so these give about 13.7 px (tick labels and
/// legends), 14.5 px (axis names) and 17.7 px (titles); the unit tests check the written
/// sizes against [`MIN_TEXT_PX`], not this factor.
const TICK_SIZE: f64 = 17.0;
const DESC_SIZE: f64 = 18.0;
const CAPTION_SIZE: f64 = 22.0;
const LEGEND_SIZE: f64 = 17.0;

/// A plot could not be drawn.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum PlotError {
    /// The input has nothing to draw.
    #[error("plot `{plot}` has no data: {reason}")]
    Empty {
        plot: &'static str,
        reason: &'static str,
    },
    /// plotters reported an error.
    #[error("plot `{plot}` failed in the SVG backend: {message}")]
    Backend { plot: &'static str, message: String },
}

fn backend<E: std::fmt::Display>(plot: &'static str) -> impl Fn(E) -> PlotError {
    move |e| PlotError::Backend {
        plot,
        message: e.to_string(),
    }
}

fn draw<F>(plot: &'static str, size: (u32, u32), body: F) -> Result<String, PlotError>
where
    F: FnOnce(&DrawingArea<SVGBackend<'_>, Shift>) -> Result<(), PlotError>,
{
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, size).into_drawing_area();
        root.fill(&WHITE).map_err(backend(plot))?;
        body(&root)?;
        root.present().map_err(backend(plot))?;
    }
    Ok(svg)
}

/// Two overlaid histograms of the balanced probability w / (1 + w) (share of each set per
/// bin), labeled set and pool.
///
/// # Errors
/// [`PlotError::Empty`] when there are no bins or both sets are empty; backend failures.
pub fn overlap_svg(overlap: &Overlap) -> Result<String, PlotError> {
    const PLOT: &str = "overlap";
    let bins = overlap.labeled_counts.len();
    let nl: usize = overlap.labeled_counts.iter().sum();
    let np: usize = overlap.pool_counts.iter().sum();
    if bins == 0 || nl + np == 0 {
        return Err(PlotError::Empty {
            plot: PLOT,
            reason: "no rows in the histogram",
        });
    }
    let share = |c: &[usize], total: usize| -> Vec<f64> {
        c.iter().map(|&v| v as f64 / total.max(1) as f64).collect()
    };
    let ls = share(&overlap.labeled_counts, nl);
    let ps = share(&overlap.pool_counts, np);
    let ymax = ls
        .iter()
        .chain(&ps)
        .fold(0.0f64, |a, &b| a.max(b))
        .max(1e-9)
        * 1.1;
    let edges = &overlap.bin_edges;
    draw(PLOT, (PLOT_WIDTH, 440), |root| {
        let mut chart = ChartBuilder::on(root)
            .caption(
                "Overlap: P(pool | x) at equal set sizes",
                (FONT, CAPTION_SIZE),
            )
            .margin(14)
            .x_label_area_size(52)
            .y_label_area_size(72)
            .build_cartesian_2d(0f64..1f64, 0f64..ymax)
            .map_err(backend(PLOT))?;
        chart
            .configure_mesh()
            .label_style((FONT, TICK_SIZE))
            .axis_desc_style((FONT, DESC_SIZE))
            .x_desc("balanced probability w/(1+w)")
            .y_desc("share of set")
            .draw()
            .map_err(backend(PLOT))?;
        for (values, colour, name, count) in
            [(&ls, LABELED, "labeled", nl), (&ps, POOL, "pool", np)]
        {
            chart
                .draw_series(values.iter().enumerate().map(|(i, &v)| {
                    Rectangle::new(
                        [(edges[i], 0.0), (edges[i + 1], v)],
                        colour.mix(0.45).filled(),
                    )
                }))
                .map_err(backend(PLOT))?
                .label(format!("{name} (n = {count})"))
                .legend(move |(x, y)| {
                    Rectangle::new([(x, y - 5), (x + 12, y + 5)], colour.mix(0.45).filled())
                });
        }
        chart
            .configure_series_labels()
            .position(SeriesLabelPosition::UpperMiddle)
            .label_font((FONT, LEGEND_SIZE))
            .border_style(BLACK)
            .background_style(WHITE.mix(0.8))
            .draw()
            .map_err(backend(PLOT))?;
        Ok(())
    })
}

/// Histograms of log10 of the weights for the labeled (calibration) rows and the pool
/// (share of each set per bin).
///
/// # Errors
/// [`PlotError::Empty`] when both slices are empty or `bins` is 0; weights must be > 0 and
/// finite (others are skipped).
pub fn weights_svg(labeled: &[f64], pool: &[f64], bins: usize) -> Result<String, PlotError> {
    const PLOT: &str = "weights";
    let logs = |w: &[f64]| -> Vec<f64> {
        w.iter()
            .filter(|v| v.is_finite() && **v > 0.0)
            .map(|v| v.log10())
            .collect()
    };
    let (ll, pl) = (logs(labeled), logs(pool));
    if bins == 0 || ll.len() + pl.len() == 0 {
        return Err(PlotError::Empty {
            plot: PLOT,
            reason: "no positive finite weights",
        });
    }
    let (mut lo, mut hi) = ll
        .iter()
        .chain(&pl)
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), &v| {
            (a.min(v), b.max(v))
        });
    if hi - lo < 1e-9 {
        lo -= 0.5;
        hi += 0.5;
    }
    let width = (hi - lo) / bins as f64;
    let hist = |v: &[f64]| -> Vec<f64> {
        let mut c = vec![0.0; bins];
        for x in v {
            c[(((x - lo) / width) as usize).min(bins - 1)] += 1.0;
        }
        let total = v.len().max(1) as f64;
        c.iter().map(|x| x / total).collect()
    };
    let (lh, ph) = (hist(&ll), hist(&pl));
    let ymax = lh
        .iter()
        .chain(&ph)
        .fold(0.0f64, |a, &b| a.max(b))
        .max(1e-9)
        * 1.1;
    draw(PLOT, (PLOT_WIDTH, 440), |root| {
        let mut chart = ChartBuilder::on(root)
            .caption(
                "Weights (density ratio pool / labeled)",
                (FONT, CAPTION_SIZE),
            )
            .margin(14)
            .x_label_area_size(52)
            .y_label_area_size(72)
            .build_cartesian_2d(lo..hi, 0f64..ymax)
            .map_err(backend(PLOT))?;
        chart
            .configure_mesh()
            .label_style((FONT, TICK_SIZE))
            .axis_desc_style((FONT, DESC_SIZE))
            .x_desc("log10 weight")
            .y_desc("share of set")
            .draw()
            .map_err(backend(PLOT))?;
        for (values, colour, name, count) in [
            (&lh, LABELED, "labeled", ll.len()),
            (&ph, POOL, "pool", pl.len()),
        ] {
            chart
                .draw_series(values.iter().enumerate().map(|(i, &v)| {
                    let x0 = lo + i as f64 * width;
                    Rectangle::new([(x0, 0.0), (x0 + width, v)], colour.mix(0.45).filled())
                }))
                .map_err(backend(PLOT))?
                .label(format!("{name} (n = {count})"))
                .legend(move |(x, y)| {
                    Rectangle::new([(x, y - 5), (x + 12, y + 5)], colour.mix(0.45).filled())
                });
        }
        chart
            .configure_series_labels()
            .label_font((FONT, LEGEND_SIZE))
            .border_style(BLACK)
            .background_style(WHITE.mix(0.8))
            .draw()
            .map_err(backend(PLOT))?;
        Ok(())
    })
}

/// A named line of points in one colour.
type Series = (Vec<(f64, f64)>, RGBColor, &'static str);

/// Level curve: conditional calibration's expected shortlist size and BH's count
/// (randomized weighted p-values) against the FDR level.
///
/// # Errors
/// [`PlotError::Empty`] for an empty curve.
pub fn level_curve_svg(
    curve: &[crate::selection::level_curve::LevelPoint],
) -> Result<String, PlotError> {
    const PLOT: &str = "level curve";
    if curve.is_empty() {
        return Err(PlotError::Empty {
            plot: PLOT,
            reason: "no levels",
        });
    }
    let xmax = curve.iter().map(|p| p.fdr).fold(0.0f64, f64::max) * 1.05;
    let ymax = curve
        .iter()
        .map(|p| p.conditional_expected_count.max(p.bh_count as f64))
        .fold(1.0f64, f64::max)
        * 1.1;
    draw(PLOT, (PLOT_WIDTH, 440), |root| {
        let mut chart = ChartBuilder::on(root)
            .caption("Shortlist size by FDR level", (FONT, CAPTION_SIZE))
            .margin(14)
            .x_label_area_size(52)
            .y_label_area_size(80)
            .build_cartesian_2d(0f64..xmax, 0f64..ymax)
            .map_err(backend(PLOT))?;
        chart
            .configure_mesh()
            .label_style((FONT, TICK_SIZE))
            .axis_desc_style((FONT, DESC_SIZE))
            .x_desc("FDR level q")
            .y_desc("units selected")
            .y_label_formatter(&|v| format!("{v:.0}"))
            .draw()
            .map_err(backend(PLOT))?;
        let series: [Series; 2] = [
            (
                curve
                    .iter()
                    .map(|p| (p.fdr, p.conditional_expected_count))
                    .collect(),
                POOL,
                "conditional calibration (expected over the draw)",
            ),
            (
                curve.iter().map(|p| (p.fdr, p.bh_count as f64)).collect(),
                LABELED,
                "BH on randomized weighted p-values",
            ),
        ];
        for (points, colour, name) in series {
            chart
                .draw_series(LineSeries::new(points.clone(), colour.stroke_width(2)))
                .map_err(backend(PLOT))?
                .label(name)
                .legend(move |(x, y)| {
                    PathElement::new(vec![(x, y), (x + 16, y)], colour.stroke_width(2))
                });
            chart
                .draw_series(
                    points
                        .iter()
                        .map(|&(x, y)| Circle::new((x, y), 4, colour.filled())),
                )
                .map_err(backend(PLOT))?;
        }
        chart
            .configure_series_labels()
            .position(SeriesLabelPosition::UpperLeft)
            .label_font((FONT, LEGEND_SIZE))
            .border_style(BLACK)
            .background_style(WHITE.mix(0.8))
            .draw()
            .map_err(backend(PLOT))?;
        Ok(())
    })
}

/// Balance plot: |SMD| per feature before (open circle) and after (filled circle)
/// weighting, with the 0.1 line of Austin (2009). Infinite SMDs are drawn at 0.
///
/// # Errors
/// [`PlotError::Empty`] for an empty `balance`.
pub fn balance_svg(balance: &[FeatureBalance]) -> Result<String, PlotError> {
    const PLOT: &str = "balance";
    if balance.is_empty() {
        return Err(PlotError::Empty {
            plot: PLOT,
            reason: "no features",
        });
    }
    let n = balance.len();
    let finite = |v: f64| if v.is_finite() { v.abs() } else { 0.0 };
    let xmax = balance
        .iter()
        .map(|b| finite(b.smd_unweighted).max(finite(b.smd_weighted)))
        .fold(0.12f64, f64::max)
        * 1.1;
    let names: Vec<String> = balance.iter().map(|b| b.feature.clone()).collect();
    let longest = names.iter().map(String::len).max().unwrap_or(1) as u32;
    let height = 140 + 26 * n as u32;
    draw(PLOT, (PLOT_WIDTH, height), |root| {
        let mut chart = ChartBuilder::on(root)
            .caption(
                "|SMD| pool vs labeled: open = unweighted, filled = weighted",
                (FONT, CAPTION_SIZE * 0.9),
            )
            .margin(14)
            .x_label_area_size(52)
            .y_label_area_size((9 * longest + 20).min(300))
            .build_cartesian_2d(0f64..xmax, (0..n).into_segmented())
            .map_err(backend(PLOT))?;
        chart
            .configure_mesh()
            .label_style((FONT, TICK_SIZE))
            .axis_desc_style((FONT, DESC_SIZE))
            .x_desc("|standardized mean difference|")
            .y_labels(n)
            .y_label_formatter(&|v| match v {
                SegmentValue::CenterOf(i) => names.get(*i).cloned().unwrap_or_default(),
                _ => String::new(),
            })
            .draw()
            .map_err(backend(PLOT))?;
        chart
            .draw_series(std::iter::once(PathElement::new(
                vec![(0.1, SegmentValue::Exact(0)), (0.1, SegmentValue::Last)],
                BLACK.stroke_width(1),
            )))
            .map_err(backend(PLOT))?;
        chart
            .draw_series(balance.iter().enumerate().map(|(i, b)| {
                Circle::new(
                    (finite(b.smd_unweighted), SegmentValue::CenterOf(i)),
                    5,
                    POOL.stroke_width(2),
                )
            }))
            .map_err(backend(PLOT))?;
        chart
            .draw_series(balance.iter().enumerate().map(|(i, b)| {
                Circle::new(
                    (finite(b.smd_weighted), SegmentValue::CenterOf(i)),
                    5,
                    LABELED.filled(),
                )
            }))
            .map_err(backend(PLOT))?;
        Ok(())
    })
}

/// The most marks the selection plot draws; above it, a documented subsample
/// ([`selection_marks`]).
pub const SELECTION_PLOT_MARKS: usize = 3000;

/// What the selection plot shows of each pool unit.
#[derive(Clone, Copy, Debug)]
pub struct SelectionPlot<'a> {
    /// The model's prediction per pool unit (the y axis).
    pub predictions: &'a [f64],
    /// Pool weights (the x axis, log scale, when they vary).
    pub weights: &'a [f64],
    /// The run's p-values (the x axis, log scale, when every weight is the same).
    pub p_values: &'a [f64],
    pub selected: &'a [bool],
    /// Conditional calibration: passed the first step.
    pub first_step: Option<&'a [bool]>,
    /// The outcome threshold when it is one value for every unit (a horizontal line).
    pub threshold: Option<f64>,
    /// The weight above which a unit can never be selected, `q W / (1 - q)` (a vertical line).
    pub unreachable_above: Option<f64>,
}

/// The three kinds of marks of the selection plot.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum MarkKind {
    Selected,
    /// Passed the first step of conditional calibration, removed by pruning.
    FirstStepOnly,
    NotSelected,
}

impl MarkKind {
    fn of(plot: &SelectionPlot<'_>, j: usize) -> MarkKind {
        if plot.selected[j] {
            MarkKind::Selected
        } else if plot.first_step.is_some_and(|f| f[j]) {
            MarkKind::FirstStepOnly
        } else {
            MarkKind::NotSelected
        }
    }
}

/// Which units the selection plot marks: per kind (selected, first step only, not
/// selected), the number shown and the number there are, and the unit indices shown.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct SelectionMarks {
    pub shown: [usize; 3],
    pub total: [usize; 3],
    pub indices: Vec<usize>,
    /// True when every unit with a finite prediction and a positive x value is marked.
    pub complete: bool,
}

/// The units the selection plot marks. At most [`SELECTION_PLOT_MARKS`] in all: kinds are
/// served smallest first, each taking all its units or an equal share of what is left, and
/// a kind over its share is thinned to evenly spaced units in prediction order (every k-th
/// unit from the best prediction down), so rare kinds (the selected, the pruned) are kept
/// whole when they fit and the spread of predictions is kept.
pub fn selection_marks(plot: &SelectionPlot<'_>, use_weights: bool) -> SelectionMarks {
    let x = |j: usize| {
        if use_weights {
            plot.weights[j]
        } else {
            plot.p_values[j]
        }
    };
    let mut kinds: [Vec<usize>; 3] = Default::default();
    for j in 0..plot.predictions.len() {
        if !(plot.predictions[j].is_finite() && x(j) > 0.0 && x(j).is_finite()) {
            continue;
        }
        let k = match MarkKind::of(plot, j) {
            MarkKind::Selected => 0,
            MarkKind::FirstStepOnly => 1,
            MarkKind::NotSelected => 2,
        };
        kinds[k].push(j);
    }
    let total = [kinds[0].len(), kinds[1].len(), kinds[2].len()];
    let mut order = [0usize, 1, 2];
    order.sort_by_key(|&k| total[k]);
    let mut left = SELECTION_PLOT_MARKS;
    let mut shown = [0usize; 3];
    let mut indices = Vec::new();
    for (served, &k) in order.iter().enumerate() {
        let share = left / (3 - served);
        let take = total[k].min(share);
        let units = &mut kinds[k];
        if take < units.len() {
            units.sort_by(|&a, &b| plot.predictions[b].total_cmp(&plot.predictions[a]));
            indices.extend((0..take).map(|i| units[i * units.len() / take]));
        } else {
            indices.extend(units.iter().copied());
        }
        shown[k] = take;
        left -= take;
    }
    indices.sort_unstable();
    SelectionMarks {
        complete: shown == total && total.iter().sum::<usize>() == plot.predictions.len(),
        shown,
        total,
        indices,
    }
}

/// True when the pool weights are positive, finite and not all the same (the selection plot
/// then puts them on its x axis).
pub fn weights_vary(weights: &[f64]) -> bool {
    let positive = weights.iter().all(|w| *w > 0.0 && w.is_finite());
    let (lo, hi) = weights
        .iter()
        .fold((f64::INFINITY, 0.0f64), |(a, b), &w| (a.min(w), b.max(w)));
    positive && hi > lo * (1.0 + 1e-9)
}

/// A tick label of a log axis: 1, 10, 0.1, 1e-4 style.
fn log_tick(v: f64) -> String {
    if (1e-3..1e5).contains(&v) {
        let text = format!("{v:.3}");
        text.trim_end_matches('0').trim_end_matches('.').to_string()
    } else {
        format!("{v:.0e}")
    }
}

/// The selection: each pool unit's prediction against its weight (log scale), selected
/// units filled, units that passed conditional calibration's first step but were pruned
/// hollow (a legend entry only when there are any), the rest small and grey; a horizontal line at a constant outcome threshold and a
/// vertical line where units become unreachable. When every weight is the same the x axis
/// is the p-value (log scale) instead. Marks are capped as [`selection_marks`] says.
///
/// # Errors
/// [`PlotError::Empty`] when no unit has a finite prediction and a positive x value (or
/// the slices' lengths differ); backend failures.
pub fn selection_svg(plot: &SelectionPlot<'_>) -> Result<(String, SelectionMarks), PlotError> {
    const PLOT: &str = "selection";
    let m = plot.predictions.len();
    if [plot.weights.len(), plot.p_values.len(), plot.selected.len()] != [m; 3]
        || plot.first_step.is_some_and(|f| f.len() != m)
    {
        return Err(PlotError::Empty {
            plot: PLOT,
            reason: "the per-unit inputs differ in length",
        });
    }
    let use_weights = weights_vary(plot.weights);
    let marks = selection_marks(plot, use_weights);
    if marks.indices.is_empty() {
        return Err(PlotError::Empty {
            plot: PLOT,
            reason: "no unit with a finite prediction",
        });
    }
    let x = |j: usize| {
        if use_weights {
            plot.weights[j]
        } else {
            plot.p_values[j]
        }
    };
    // Ranges over every unit (not only those marked), so that thinning never moves the axes.
    let usable =
        (0..m).filter(|&j| plot.predictions[j].is_finite() && x(j) > 0.0 && x(j).is_finite());
    // Predictions on a log axis when they are all positive and span more than three
    // decades (IC50s in nM, say); a linear axis would squeeze all but the largest into one
    // line.
    let (mut plo, mut phi) = (f64::INFINITY, f64::NEG_INFINITY);
    for j in usable.clone() {
        plo = plo.min(plot.predictions[j]);
        phi = phi.max(plot.predictions[j]);
    }
    let threshold_positive = !matches!(plot.threshold, Some(c) if c.is_finite() && c <= 0.0);
    let ylog = plo > 0.0 && phi / plo > 1e3 && threshold_positive;
    let fy = move |v: f64| if ylog { v.log10() } else { v };
    let (mut xlo, mut xhi, mut ylo, mut yhi) =
        (f64::INFINITY, 0.0f64, f64::INFINITY, f64::NEG_INFINITY);
    for j in usable {
        xlo = xlo.min(x(j));
        xhi = xhi.max(x(j));
        ylo = ylo.min(fy(plot.predictions[j]));
        yhi = yhi.max(fy(plot.predictions[j]));
    }
    if let Some(c) = plot.threshold.filter(|c| c.is_finite()) {
        ylo = ylo.min(fy(c));
        yhi = yhi.max(fy(c));
    }
    let pad = ((yhi - ylo) * 0.04).max(1e-6);
    let (ylo, yhi) = (ylo - pad, yhi + pad);
    let (xlo, xhi) = if xhi > xlo * 1.0001 {
        (xlo / 1.15, xhi * 1.15)
    } else {
        (xlo / 2.0, xhi * 2.0)
    };
    let bound = plot
        .unreachable_above
        .filter(|b| use_weights && *b > xlo && *b < xhi);
    let names = [
        "selected",
        "first step passed, pruned by the draw",
        "not selected",
    ];
    let svg = draw(PLOT, (PLOT_WIDTH, 500), |root| {
        let mut chart = ChartBuilder::on(root)
            .caption(
                if use_weights {
                    "Selection: prediction against weight"
                } else {
                    "Selection: prediction against p-value (all weights equal)"
                },
                (FONT, CAPTION_SIZE),
            )
            .margin(14)
            .x_label_area_size(52)
            .y_label_area_size(72)
            .build_cartesian_2d((xlo..xhi).log_scale(), ylo..yhi)
            .map_err(backend(PLOT))?;
        chart
            .configure_mesh()
            .label_style((FONT, TICK_SIZE))
            .axis_desc_style((FONT, DESC_SIZE))
            .x_desc(if use_weights {
                "weight (density ratio pool / labeled), log scale"
            } else {
                "p-value, log scale"
            })
            .y_desc(if ylog {
                "prediction, log scale"
            } else {
                "prediction"
            })
            .x_label_formatter(&|v| log_tick(*v))
            .y_label_formatter(&|v| {
                if ylog {
                    log_tick(10f64.powf(*v))
                } else {
                    crate::report::summary::shown(*v)
                }
            })
            .light_line_style(TRANSPARENT)
            .draw()
            .map_err(backend(PLOT))?;
        let grey = RGBColor(120, 120, 120);
        let points = |kind: MarkKind| {
            marks
                .indices
                .iter()
                .copied()
                .filter(move |&j| MarkKind::of(plot, j) == kind)
                .map(move |j| (x(j), fy(plot.predictions[j])))
        };
        // Drawn back to front: the many unselected units first.
        chart
            .draw_series(
                points(MarkKind::NotSelected).map(|p| Circle::new(p, 2, grey.mix(0.45).filled())),
            )
            .map_err(backend(PLOT))?
            .label(format!("{} ({})", names[2], marks.total[2]))
            .legend(move |(x, y)| Circle::new((x + 6, y), 3, grey.mix(0.6).filled()));
        if marks.total[1] > 0 {
            chart
                .draw_series(
                    points(MarkKind::FirstStepOnly)
                        .map(|p| Circle::new(p, 4, POOL.stroke_width(2))),
                )
                .map_err(backend(PLOT))?
                .label(format!("{} ({})", names[1], marks.total[1]))
                .legend(move |(x, y)| Circle::new((x + 6, y), 4, POOL.stroke_width(2)));
        }
        chart
            .draw_series(
                points(MarkKind::Selected).map(|p| Circle::new(p, 3, LABELED.mix(0.8).filled())),
            )
            .map_err(backend(PLOT))?
            .label(format!("{} ({})", names[0], marks.total[0]))
            .legend(move |(x, y)| Circle::new((x + 6, y), 4, LABELED.filled()));
        if let Some(c) = plot.threshold.filter(|c| c.is_finite()) {
            chart
                .draw_series(std::iter::once(PathElement::new(
                    vec![(xlo, fy(c)), (xhi, fy(c))],
                    BLACK.stroke_width(1),
                )))
                .map_err(backend(PLOT))?
                .label(format!(
                    "outcome threshold {}",
                    crate::report::summary::shown(c)
                ))
                .legend(|(x, y)| {
                    PathElement::new(vec![(x, y), (x + 14, y)], BLACK.stroke_width(1))
                });
        }
        if let Some(b) = bound {
            let red = RGBColor(190, 30, 45);
            chart
                .draw_series(std::iter::once(PathElement::new(
                    vec![(b, ylo), (b, yhi)],
                    red.stroke_width(2),
                )))
                .map_err(backend(PLOT))?
                .label(format!(
                    "never selectable to the right (weight > {})",
                    crate::report::summary::shown(b)
                ))
                .legend(move |(x, y)| {
                    PathElement::new(vec![(x + 6, y - 6), (x + 6, y + 6)], red.stroke_width(2))
                });
        }
        chart
            .configure_series_labels()
            .position(SeriesLabelPosition::UpperLeft)
            .label_font((FONT, LEGEND_SIZE))
            .border_style(BLACK)
            .background_style(WHITE.mix(0.85))
            .draw()
            .map_err(backend(PLOT))?;
        Ok(())
    })?;
    Ok((svg, marks))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn overlap() -> Overlap {
        Overlap {
            probability: "test".into(),
            bin_edges: vec![0.0, 0.25, 0.5, 0.75, 1.0],
            labeled_counts: vec![5, 10, 3, 0],
            pool_counts: vec![0, 4, 12, 6],
            pool_share_above_0_9: 0.1,
            pool_share_above_0_95: 0.05,
        }
    }

    /// Structural checks: a well-formed SVG document with text as <text> and no embedded
    /// bitmap or font data.
    fn assert_svg(svg: &str, must_contain: &[&str]) {
        assert!(svg.starts_with("<svg"), "{}", &svg[..svg.len().min(80)]);
        assert!(svg.trim_end().ends_with("</svg>"));
        assert!(svg.contains("<text"));
        assert!(!svg.contains("<image") && !svg.contains("@font-face"));
        for s in must_contain {
            assert!(svg.contains(s), "missing {s}");
        }
    }

    /// Every font-size attribute of an SVG, and its width and viewBox width.
    fn font_sizes(svg: &str) -> (Vec<f64>, f64, f64) {
        // The first value of an attribute, or the third of a viewBox (its width).
        let attr = |from: &str, name: &str| -> f64 {
            let at = from.find(&format!("{name}=\"")).unwrap() + name.len() + 2;
            let end = from[at..].find('"').unwrap() + at;
            let values: Vec<&str> = from[at..end].split_whitespace().collect();
            let value = if name == "viewBox" {
                values[2]
            } else {
                values[0]
            };
            value.parse().unwrap()
        };
        let head = &svg[..svg.find('>').unwrap()];
        let sizes = svg
            .match_indices("font-size=\"")
            .map(|(at, _)| attr(&svg[at..], "font-size"))
            .collect();
        (sizes, attr(head, "width"), attr(head, "viewBox"))
    }

    /// Text is readable: at least MIN_TEXT_PX px, and the plot is not scaled in itself
    /// (width = viewBox width), so that is the size on screen at 100% zoom in the report
    /// (which does not shrink plots on screen; see html.rs). Source: issue 12 item 8 asks
    /// for at least 11 px.
    #[test]
    fn every_plot_has_text_of_at_least_11_px_at_its_drawn_size() {
        let curve = vec![crate::selection::level_curve::LevelPoint {
            fdr: 0.1,
            conditional_expected_count: 3.0,
            conditional_empty_probability: 0.1,
            conditional_fixed: false,
            bh_count: 4,
        }];
        let balance = vec![FeatureBalance {
            feature: "logP".into(),
            smd_unweighted: 0.8,
            smd_weighted: 0.05,
        }];
        let (predictions, weights, p, selected, first) = plot_inputs(50);
        let selection = SelectionPlot {
            predictions: &predictions,
            weights: &weights,
            p_values: &p,
            selected: &selected,
            first_step: Some(&first),
            threshold: Some(0.5),
            unreachable_above: Some(20.0),
        };
        for svg in [
            overlap_svg(&overlap()).unwrap(),
            weights_svg(&[0.5, 1.0, 2.0], &[1.0, 4.0], 10).unwrap(),
            balance_svg(&balance).unwrap(),
            level_curve_svg(&curve).unwrap(),
            selection_svg(&selection).unwrap().0,
        ] {
            let (sizes, width, view) = font_sizes(&svg);
            assert!(!sizes.is_empty());
            assert_eq!(width, view, "the plot is drawn at its own size");
            assert_eq!(width, f64::from(PLOT_WIDTH));
            for s in sizes {
                assert!(s >= MIN_TEXT_PX, "font-size {s} in {}", &svg[..200]);
            }
        }
    }

    /// `m` units: prediction j / m, weight growing with j, p-values falling; units with
    /// j >= 0.8 m selected, 0.7 m .. 0.8 m passed the first step only.
    type PlotInputs = (Vec<f64>, Vec<f64>, Vec<f64>, Vec<bool>, Vec<bool>);

    fn plot_inputs(m: usize) -> PlotInputs {
        let predictions = (0..m).map(|j| j as f64 / m as f64).collect();
        let weights = (0..m).map(|j| 1.0 + j as f64 / 2.0).collect();
        let p = (0..m).map(|j| 1.0 - j as f64 / (m as f64 + 1.0)).collect();
        let selected = (0..m).map(|j| j * 10 >= 8 * m).collect();
        let first = (0..m).map(|j| j * 10 >= 7 * m).collect();
        (predictions, weights, p, selected, first)
    }

    /// One mark per unit under the cap; above it, the small groups whole and the large one
    /// thinned, SELECTION_PLOT_MARKS in all. The SVG has one circle per mark plus one per
    /// legend entry.
    #[test]
    fn selection_plot_marks_every_unit_or_a_stated_sample() {
        for m in [200, 20_000] {
            let (predictions, weights, p, selected, first) = plot_inputs(m);
            let plot = SelectionPlot {
                predictions: &predictions,
                weights: &weights,
                p_values: &p,
                selected: &selected,
                first_step: Some(&first),
                threshold: Some(0.5),
                unreachable_above: None,
            };
            let (svg, marks) = selection_svg(&plot).unwrap();
            let total = [m / 5, m / 10, m - m / 5 - m / 10];
            assert_eq!(marks.total, total);
            let shown: usize = marks.shown.iter().sum();
            assert_eq!(marks.indices.len(), shown);
            assert_eq!(
                svg.matches("<circle").count(),
                shown + 3,
                "legend has 3 circles"
            );
            assert!(svg.contains("outcome threshold 0.5"));
            if m == 200 {
                assert!(marks.complete);
                assert_eq!(marks.shown, total);
            } else {
                assert!(!marks.complete);
                assert_eq!(shown, SELECTION_PLOT_MARKS);
                // 2,000 first-step-only units fit in their third of the cap; the rest is
                // split between the two larger groups.
                assert_eq!(marks.shown[1], 1000);
                assert_eq!(marks.shown[0], 1000);
                assert_eq!(marks.shown[2], 1000);
                // Evenly spaced in prediction order: the best unselected unit is shown.
                assert!(marks.indices.contains(&(7 * m / 10 - 1)));
            }
        }
        // Equal weights: p-values on the x axis.
        let (predictions, _, p, selected, _) = plot_inputs(100);
        let ones = vec![1.0; 100];
        let plot = SelectionPlot {
            predictions: &predictions,
            weights: &ones,
            p_values: &p,
            selected: &selected,
            first_step: None,
            threshold: None,
            unreachable_above: None,
        };
        let (svg, marks) = selection_svg(&plot).unwrap();
        assert!(svg.contains("p-value, log scale"));
        assert_eq!(svg.matches("<circle").count(), 100 + 2);
        assert!(marks.complete);
    }

    #[test]
    fn predictions_spanning_decades_go_on_a_log_axis() {
        // IC50-like predictions from 0.01 to 1e7 (nine decades): log axis; the same
        // shape within one decade, or with a value <= 0: linear (common practice: a log
        // axis for positive values over several orders of magnitude).
        let (base, weights, p, selected, _) = plot_inputs(200);
        let decades: Vec<f64> = (0..200)
            .map(|i| 10f64.powf(-2.0 + 9.0 * i as f64 / 199.0))
            .collect();
        let narrow: Vec<f64> = (0..200).map(|i| 1.0 + i as f64 / 40.0).collect();
        let signed: Vec<f64> = decades.iter().map(|v| v - 1.0).collect();
        for (predictions, log) in [
            (&decades, true),
            (&narrow, false),
            (&signed, false),
            (&base, false),
        ] {
            let plot = SelectionPlot {
                predictions,
                weights: &weights,
                p_values: &p,
                selected: &selected,
                first_step: None,
                threshold: Some(300.0),
                unreachable_above: None,
            };
            let svg = selection_svg(&plot).unwrap().0;
            assert_eq!(svg.contains("prediction, log scale"), log);
        }
    }

    #[test]
    fn overlap_plot_has_bars_and_legend() {
        let svg = overlap_svg(&overlap()).unwrap();
        assert_svg(&svg, &["labeled (n = 18)", "pool (n = 22)", "<rect"]);
    }

    #[test]
    fn weights_plot_draws_both_sets() {
        let svg = weights_svg(&[0.5, 1.0, 2.0], &[1.0, 4.0, 8.0, 16.0], 10).unwrap();
        assert_svg(&svg, &["labeled (n = 3)", "pool (n = 4)", "log10 weight"]);
        assert!(matches!(
            weights_svg(&[], &[], 10),
            Err(PlotError::Empty { .. })
        ));
    }

    #[test]
    fn balance_plot_names_features() {
        let b = vec![
            FeatureBalance {
                feature: "logP".into(),
                smd_unweighted: 0.8,
                smd_weighted: 0.05,
            },
            FeatureBalance {
                feature: "mass".into(),
                smd_unweighted: -0.3,
                smd_weighted: f64::INFINITY,
            },
        ];
        let svg = balance_svg(&b).unwrap();
        assert_svg(&svg, &["logP", "mass", "<circle"]);
        assert!(balance_svg(&[]).is_err());
    }
}
