//! `heatmap-<a>-<b>.svg`: a score over two grid axes, one chart per pair of varying axes (at
//! most [`MAX_PAIRS`]), one panel per target with its own colour scale (scores of different
//! targets are not comparable). Cells that differ only in the other axes are averaged (the
//! arithmetic mean of their finite values); the subtitle names the axes averaged over. Each
//! tile prints its value, so the colour only has to carry the pattern. Colours follow the
//! sequential scale of [`super::palette::sequential`], oriented so that darker is better; a
//! logarithmic colour scale is used when the values span more than a factor of 30.

use plotters::style::text_anchor::{HPos, VPos};

use super::canvas::{self, Font, Heading};
use super::palette;
use super::{Chart, GridAxis, View, file_part, fmt_value, short_value};
use crate::scores::Metric;

/// At most this many axis pairs get a chart.
pub const MAX_PAIRS: usize = 6;
const TILE_H: f64 = 40.0;
const BAR_W: f64 = 16.0;
const LOG_SPAN: f64 = 30.0;

/// The tiles of one target: `values[row][col]` (row: axis b, column: axis a) with the number
/// of cells averaged.
struct Grid {
    target: usize,
    values: Vec<Vec<Option<(f64, usize)>>>,
}

fn tiles(view: &View, t: usize, a: &GridAxis, b: &GridAxis, metric: Metric) -> Grid {
    let mut values = vec![vec![None; a.values.len()]; b.values.len()];
    for (r, vb) in b.values.iter().enumerate() {
        for (c, va) in a.values.iter().enumerate() {
            let vals: Vec<f64> = view
                .cells_of(t)
                .into_iter()
                .filter(|cell| {
                    cell.settings.get(&a.name) == Some(va) && cell.settings.get(&b.name) == Some(vb)
                })
                .filter_map(|cell| metric.value(&cell.scores))
                .filter(|v| v.is_finite())
                .collect();
            if !vals.is_empty() {
                values[r][c] = Some((vals.iter().sum::<f64>() / vals.len() as f64, vals.len()));
            }
        }
    }
    Grid { target: t, values }
}

/// A colour scale over the finite tile values.
#[derive(Debug, Clone, Copy)]
struct ColourScale {
    lo: f64,
    hi: f64,
    log: bool,
    higher_is_better: bool,
}

impl ColourScale {
    fn new(values: &[f64], higher_is_better: bool) -> ColourScale {
        let lo = values.iter().copied().fold(f64::INFINITY, f64::min);
        let hi = values.iter().copied().fold(f64::NEG_INFINITY, f64::max);
        let log = lo > 0.0 && hi / lo > LOG_SPAN;
        ColourScale {
            lo,
            hi,
            log,
            higher_is_better,
        }
    }

    /// Position in [0, 1], 1 = best.
    fn t(&self, v: f64) -> f64 {
        let u = if self.hi.is_nan() || self.lo.is_nan() || self.hi <= self.lo {
            1.0
        } else if self.log {
            (v.ln() - self.lo.ln()) / (self.hi.ln() - self.lo.ln())
        } else {
            (v - self.lo) / (self.hi - self.lo)
        };
        let u = if u.is_finite() {
            u.clamp(0.0, 1.0)
        } else {
            0.5
        };
        let u = if self.higher_is_better { u } else { 1.0 - u };
        // Keep the lightest tiles off pure white so that they read as tiles.
        0.08 + 0.92 * u
    }

    fn colour(&self, v: f64) -> plotters::style::RGBColor {
        palette::sequential(self.t(v))
    }
}

/// Draw every heat map; notes name the pairs or targets left out.
pub fn charts(view: &View, score: Option<Metric>) -> (Vec<Result<Chart, String>>, Vec<String>) {
    let mut notes = Vec::new();
    if view.axes.len() < 2 {
        let n = view.axes.len();
        return (
            vec![Err(format!(
                "No heat map: it needs two grid axes with more than one value, and this study has {}.",
                if n == 0 {
                    "none".to_string()
                } else {
                    format!("only one (`{}`)", view.axes[0].name)
                }
            ))],
            notes,
        );
    }
    let has_values = |m: Metric| view.cells.iter().any(|c| metric_value(m, c).is_some());
    let metric = match score {
        Some(m) => m,
        None if has_values(super::DEFAULT_HEATMAP_SCORE) => super::DEFAULT_HEATMAP_SCORE,
        None => {
            if has_values(super::FALLBACK_HEATMAP_SCORE) {
                notes.push(format!(
                    "Heat maps show `{}`: no cell has a value of `{}`.",
                    super::FALLBACK_HEATMAP_SCORE.name(),
                    super::DEFAULT_HEATMAP_SCORE.name()
                ));
            }
            super::FALLBACK_HEATMAP_SCORE
        }
    };
    if !has_values(metric) {
        return (
            vec![Err(format!(
                "No heat map: no cell has a finite `{}` (cells with only failed runs have no scores).",
                metric.name()
            ))],
            notes,
        );
    }
    let mut pairs = Vec::new();
    for i in 0..view.axes.len() {
        for j in i + 1..view.axes.len() {
            pairs.push((i, j));
        }
    }
    if pairs.len() > MAX_PAIRS {
        notes.push(format!(
            "Heat maps drawn for the first {MAX_PAIRS} of {} pairs of grid axes.",
            pairs.len()
        ));
        pairs.truncate(MAX_PAIRS);
    }
    let out = pairs
        .into_iter()
        .map(|(i, j)| chart(view, i, j, metric))
        .collect();
    (out, notes)
}

fn metric_value(m: Metric, c: &super::CellView) -> Option<f64> {
    m.value(&c.scores).filter(|v| v.is_finite())
}

fn chart(view: &View, i: usize, j: usize, metric: Metric) -> Result<Chart, String> {
    let (a, b) = (&view.axes[i], &view.axes[j]);
    let file = format!("heatmap-{}-{}.svg", file_part(&a.name), file_part(&b.name));
    let (grids, empty): (Vec<Grid>, Vec<Grid>) = view
        .targets_with_cells()
        .into_iter()
        .map(|t| tiles(view, t, a, b, metric))
        .partition(|g| g.values.iter().flatten().any(Option::is_some));
    let empty: Vec<String> = empty
        .iter()
        .map(|g| view.target(g.target).label.clone())
        .collect();
    if grids.is_empty() {
        return Err(format!(
            "{file} skipped: no tile has a finite `{}`.",
            metric.name()
        ));
    }
    let others: Vec<String> = view
        .axes
        .iter()
        .enumerate()
        .filter(|(k, _)| *k != i && *k != j)
        .map(|(_, ax)| format!("{} ({} values)", ax.name, ax.values.len()))
        .collect();
    let hib = metric.higher_is_better();

    // Tile and label sizes from the texts they must hold.
    let col_labels: Vec<String> = a.values.iter().map(short_value).collect();
    let row_labels: Vec<String> = b.values.iter().map(short_value).collect();
    let widest_value = grids
        .iter()
        .flat_map(|g| g.values.iter().flatten().flatten())
        .map(|(v, _)| canvas::text_width(&fmt_value(*v), canvas::LABEL_PX))
        .fold(canvas::text_width("–", canvas::LABEL_PX), f64::max);
    let widest_col = col_labels
        .iter()
        .map(|s| canvas::text_width(s, canvas::TICK_PX))
        .fold(0.0, f64::max);
    let tile_w = (widest_value + 18.0).max(widest_col + 12.0).max(72.0);
    let row_w = row_labels
        .iter()
        .map(|s| canvas::text_width(s, canvas::TICK_PX))
        .fold(0.0, f64::max);
    let left = canvas::PAD + canvas::line_height(canvas::LABEL_PX) + 8.0 + row_w + 8.0;
    let tiles_w = a.values.len() as f64 * tile_w;
    let tiles_h = b.values.len() as f64 * TILE_H;
    let bar_h = tiles_h.max(100.0);
    let scale_label_w = 110.0;
    let title = format!("{} over {} and {}", metric.name(), a.name, b.name);
    let width = (left + tiles_w + 24.0 + BAR_W + 8.0 + scale_label_w + canvas::PAD)
        .max(Heading::min_width(&title))
        .max(640.0);
    let mut sub = vec![format!(
        "{}: {} ({} is better). Darker tiles are better; each target has its own colour scale.",
        metric.name(),
        super::metric_description(metric),
        if hib { "higher" } else { "lower" }
    )];
    sub.push(if others.is_empty() {
        "Each tile is one cell.".to_string()
    } else {
        format!(
            "Each tile is the mean over the cells that share its two settings, averaged over {}; cells without a finite value are left out of the mean.",
            others.join(" and ")
        )
    });
    if !empty.is_empty() {
        sub.push(format!(
            "No finite `{}` for {}: not shown.",
            metric.name(),
            empty.join(", ")
        ));
    }
    if let Some(k) = super::abbreviation_key(&[a, b], false) {
        sub.push(k);
    }
    let heading = Heading::new(&title, &sub, width);
    let panel_h = canvas::line_height(canvas::LABEL_PX)
        + 10.0
        + bar_h.max(tiles_h)
        + 8.0
        + canvas::line_height(canvas::TICK_PX)
        + 4.0
        + canvas::line_height(canvas::LABEL_PX)
        + 16.0;
    let top = heading.height();
    let height = top + grids.len() as f64 * panel_h + canvas::PAD;

    let svg = canvas::render(width, height, &title, |area| {
        heading.draw(area)?;
        for (gi, g) in grids.iter().enumerate() {
            let y0 = top + gi as f64 * panel_h;
            let info = view.target(g.target);
            canvas::text(
                area,
                &info.label,
                canvas::PAD,
                y0,
                Font::new(canvas::LABEL_PX)
                    .bold()
                    .anchor(HPos::Left, VPos::Top),
            )?;
            let ty = y0 + canvas::line_height(canvas::LABEL_PX) + 10.0;
            let finite: Vec<f64> = g
                .values
                .iter()
                .flatten()
                .flatten()
                .map(|(v, _)| *v)
                .collect();
            let scale = ColourScale::new(&finite, hib);
            for (r, row) in g.values.iter().enumerate() {
                let y = ty + r as f64 * TILE_H;
                canvas::text(
                    area,
                    &row_labels[r],
                    left - 8.0,
                    y + TILE_H / 2.0,
                    Font::new(canvas::TICK_PX).anchor(HPos::Right, VPos::Center),
                )?;
                for (c, v) in row.iter().enumerate() {
                    let x = left + c as f64 * tile_w;
                    match v {
                        Some((v, _)) => {
                            let fill = scale.colour(*v);
                            canvas::rect(
                                area,
                                x,
                                y,
                                x + tile_w,
                                y + TILE_H,
                                Some((fill, 1.0)),
                                Some(palette::WHITE),
                            )?;
                            canvas::text(
                                area,
                                &fmt_value(*v),
                                x + tile_w / 2.0,
                                y + TILE_H / 2.0,
                                Font::new(canvas::LABEL_PX)
                                    .colour(palette::text_on(fill))
                                    .anchor(HPos::Center, VPos::Center),
                            )?;
                        }
                        None => {
                            canvas::rect(
                                area,
                                x,
                                y,
                                x + tile_w,
                                y + TILE_H,
                                Some((palette::GRID, 1.0)),
                                Some(palette::WHITE),
                            )?;
                            canvas::text(
                                area,
                                "–",
                                x + tile_w / 2.0,
                                y + TILE_H / 2.0,
                                Font::new(canvas::LABEL_PX)
                                    .colour(palette::MUTED)
                                    .anchor(HPos::Center, VPos::Center),
                            )?;
                        }
                    }
                }
            }
            // Axis labels: column values under the tiles, axis names below and to the left.
            let by = ty + tiles_h + 6.0;
            for (c, l) in col_labels.iter().enumerate() {
                canvas::text(
                    area,
                    l,
                    left + (c as f64 + 0.5) * tile_w,
                    by,
                    Font::new(canvas::TICK_PX).anchor(HPos::Center, VPos::Top),
                )?;
            }
            canvas::text(
                area,
                &a.name,
                left + tiles_w / 2.0,
                by + canvas::line_height(canvas::TICK_PX) + 4.0,
                Font::new(canvas::LABEL_PX).anchor(HPos::Center, VPos::Top),
            )?;
            canvas::text(
                area,
                &b.name,
                canvas::PAD + canvas::line_height(canvas::LABEL_PX) / 2.0,
                ty + tiles_h / 2.0,
                Font::new(canvas::LABEL_PX)
                    .upright()
                    .anchor(HPos::Center, VPos::Center),
            )?;
            // Colour bar: best at the top.
            let bx = left + tiles_w + 24.0;
            let steps = 48;
            for k in 0..steps {
                let t1 = 1.0 - k as f64 / steps as f64;
                let y = ty + k as f64 * bar_h / steps as f64;
                canvas::rect(
                    area,
                    bx,
                    y,
                    bx + BAR_W,
                    y + bar_h / steps as f64 + 1.0,
                    Some((palette::sequential(0.08 + 0.92 * t1), 1.0)),
                    None,
                )?;
            }
            canvas::rect(
                area,
                bx,
                ty,
                bx + BAR_W,
                ty + bar_h,
                None,
                Some(palette::FRAME),
            )?;
            let (best, worst) = if hib {
                (scale.hi, scale.lo)
            } else {
                (scale.lo, scale.hi)
            };
            let f = Font::new(canvas::TICK_PX).anchor(HPos::Left, VPos::Center);
            canvas::text(
                area,
                &format!("{} (best)", fmt_value(best)),
                bx + BAR_W + 6.0,
                ty + 6.0,
                f,
            )?;
            canvas::text(
                area,
                &fmt_value(worst),
                bx + BAR_W + 6.0,
                ty + bar_h - 6.0,
                f,
            )?;
            if scale.hi > scale.lo {
                let mid = if scale.log {
                    (scale.lo * scale.hi).sqrt()
                } else {
                    0.5 * (scale.lo + scale.hi)
                };
                canvas::text(area, &fmt_value(mid), bx + BAR_W + 6.0, ty + bar_h / 2.0, f)?;
            }
            if scale.log {
                canvas::text(
                    area,
                    "log scale",
                    bx + BAR_W + 6.0,
                    ty + bar_h + 10.0,
                    f.colour(palette::MUTED),
                )?;
            }
        }
        Ok(())
    })?;
    Ok(Chart {
        caption: format!(
            "`{}` per target over {} and {}{}.",
            metric.name(),
            a.name,
            b.name,
            if others.is_empty() {
                String::new()
            } else {
                format!(", averaged over {}", others.join(" and "))
            }
        ),
        file,
        title,
        svg,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::plot::testkit::{self, check_svg, texts};

    #[test]
    fn demo_has_three_maps_with_values_in_tiles_and_a_scale() {
        let r = testkit::demo_study();
        let view = View::new(&r);
        let (maps, notes) = charts(&view, None);
        assert!(notes.is_empty(), "{notes:?}");
        let maps: Vec<Chart> = maps.into_iter().map(Result::unwrap).collect();
        let files: Vec<&str> = maps.iter().map(|c| c.file.as_str()).collect();
        assert_eq!(
            files,
            [
                "heatmap-proposal_scale-move.svg",
                "heatmap-proposal_scale-path.svg",
                "heatmap-move-path.svg"
            ]
        );
        let c = &maps[0];
        check_svg(&c.svg).unwrap();
        let t = texts(&c.svg);
        assert!(t.contains(&c.title));
        assert!(
            t.contains(&"proposal_scale".to_string()) && t.contains(&"move".to_string()),
            "axis labels"
        );
        assert!(
            t.iter().any(|s| s.ends_with("(best)")),
            "colour scale legend"
        );
        let joined = t.join(" ");
        assert!(joined.contains("averaged over path (2 values)"), "{joined}");
        // One printed value per tile: 3 x 2 tiles per target, two targets.
        let g = tiles(&view, 0, &view.axes[0], &view.axes[1], Metric::EssPerSecond);
        for row in &g.values {
            for (v, n) in row.iter().flatten() {
                assert_eq!(*n, 2);
                assert!(t.contains(&fmt_value(*v)), "{v}");
            }
        }
    }

    #[test]
    fn one_axis_and_single_cell_studies_get_a_note() {
        for r in [testkit::one_axis_study(), testkit::single_cell_study()] {
            let (maps, _) = charts(&View::new(&r), None);
            assert_eq!(maps.len(), 1);
            assert!(maps[0].as_ref().unwrap_err().starts_with("No heat map"));
        }
    }

    #[test]
    fn falls_back_to_rmse_and_survives_failures_and_infinities() {
        let mut r = testkit::demo_study();
        for rec in &mut r.runs {
            rec.output.seconds = 0.0;
        }
        let (maps, notes) = charts(&View::new(&r), None);
        assert!(notes[0].contains("rmse_mean"), "{notes:?}");
        check_svg(&maps[0].as_ref().unwrap().svg).unwrap();
        let r = testkit::failed_study();
        let (maps, _) = charts(&View::new(&r), None);
        assert!(maps[0].is_err());
        let mut r = testkit::demo_study();
        // Exact means give an infinite variance ESS: in one column of banana-2 and everywhere
        // in corr-gauss-10.
        for rec in &mut r.runs {
            let d = if rec.target == "banana-2" { 2 } else { 10 };
            if rec.target == "corr-gauss-10" || rec.settings["proposal_scale"] == 0.25 {
                rec.output.mean = Some(vec![0.0; d]);
            }
        }
        let (maps, _) = charts(&View::new(&r), Some(Metric::VarianceEss));
        let c = maps[0].as_ref().unwrap();
        check_svg(&c.svg).unwrap();
        let t = texts(&c.svg);
        assert_eq!(
            t.iter().filter(|s| *s == "–").count(),
            2,
            "tiles with only infinite values show a dash"
        );
        assert!(
            t.join(" ")
                .contains("No finite `variance_ess` for corr-gauss-10"),
            "{t:?}"
        );
    }
}
