//! SVG plots of the shift diagnostics, returned as strings (no file I/O): overlap of the
//! classifier's probabilities, distribution of the weights, and feature balance before and
//! after weighting.
//!
//! Drawn with plotters' SVG backend only (no bitmap backend, no font files): text goes into
//! the SVG as `<text>` elements and the viewer's fonts render it; plotters only estimates
//! label widths for layout.

use plotters::coord::Shift;
use plotters::prelude::*;

use crate::shift::diagnostics::Overlap;
use crate::shift::FeatureBalance;

/// Colour of the labeled set.
const LABELED: RGBColor = RGBColor(31, 119, 180);
/// Colour of the pool.
const POOL: RGBColor = RGBColor(214, 96, 39);
const FONT: &str = "sans-serif";

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
    draw(PLOT, (720, 420), |root| {
        let mut chart = ChartBuilder::on(root)
            .caption("Overlap: P(pool | x) at equal set sizes", (FONT, 20))
            .margin(12)
            .x_label_area_size(40)
            .y_label_area_size(56)
            .build_cartesian_2d(0f64..1f64, 0f64..ymax)
            .map_err(backend(PLOT))?;
        chart
            .configure_mesh()
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
    draw(PLOT, (720, 420), |root| {
        let mut chart = ChartBuilder::on(root)
            .caption("Weights (density ratio pool / labeled)", (FONT, 20))
            .margin(12)
            .x_label_area_size(40)
            .y_label_area_size(56)
            .build_cartesian_2d(lo..hi, 0f64..ymax)
            .map_err(backend(PLOT))?;
        chart
            .configure_mesh()
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
    draw(PLOT, (720, 420), |root| {
        let mut chart = ChartBuilder::on(root)
            .caption("Shortlist size by FDR level", (FONT, 20))
            .margin(12)
            .x_label_area_size(40)
            .y_label_area_size(64)
            .build_cartesian_2d(0f64..xmax, 0f64..ymax)
            .map_err(backend(PLOT))?;
        chart
            .configure_mesh()
            .x_desc("FDR level q")
            .y_desc("units selected")
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
    let height = 120 + 22 * n as u32;
    draw(PLOT, (720, height), |root| {
        let mut chart = ChartBuilder::on(root)
            .caption(
                "|SMD| pool vs labeled: open = unweighted, filled = weighted",
                (FONT, 18),
            )
            .margin(12)
            .x_label_area_size(40)
            .y_label_area_size((8 * longest + 16).min(300))
            .build_cartesian_2d(0f64..xmax, (0..n).into_segmented())
            .map_err(backend(PLOT))?;
        chart
            .configure_mesh()
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
