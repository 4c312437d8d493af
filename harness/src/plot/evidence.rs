//! `evidence-error.svg`: log_evidence - log Z of every finished replicate, cell by cell, so
//! that bias (distance of the box from the zero line) and spread (its height) are seen
//! together. One panel per target, since the errors of different targets are not on a common
//! scale; a target with more cells than fit in one row continues in further rows that share
//! its y axis.
//!
//! Each cell shows a box plot after Tukey (1977), *Exploratory Data Analysis*, Addison-Wesley:
//! the box spans the quartiles with a bar at the median and the whiskers reach the furthest
//! replicate within 1.5 interquartile ranges of the box. Every replicate is also drawn as a
//! point, spread sideways by a fixed golden-ratio sequence (jitter that is the same on every
//! run), and the mean is marked. The category axis is labelled with one row per varying grid
//! axis, each holding the cell's (abbreviated) value, so labels never need rotating.

use plotters::style::text_anchor::{HPos, VPos};

use super::canvas::{self, Axis, Entry, Font, Frame, Heading, Key, Scale};
use super::palette::{self, Marker};
use super::{Chart, View, sorted_quantile};

/// File name of the chart.
pub const FILE: &str = "evidence-error.svg";
/// At most this many cells of one target are drawn.
pub const MAX_CELLS: usize = 60;
const PLOT_H: f64 = 210.0;
const MAX_ROW_W: f64 = 1180.0;

/// Tukey box-plot statistics of sorted values: (whisker low, q1, median, q3, whisker high).
pub fn tukey(sorted: &[f64]) -> Option<(f64, f64, f64, f64, f64)> {
    let q1 = sorted_quantile(sorted, 0.25)?;
    let q2 = sorted_quantile(sorted, 0.5)?;
    let q3 = sorted_quantile(sorted, 0.75)?;
    let iqr = q3 - q1;
    let lo = sorted
        .iter()
        .copied()
        .find(|v| *v >= q1 - 1.5 * iqr)
        .unwrap_or(q1);
    let hi = sorted
        .iter()
        .rev()
        .copied()
        .find(|v| *v <= q3 + 1.5 * iqr)
        .unwrap_or(q3);
    Some((lo, q1, q2, q3, hi))
}

/// One row of a panel: its frame, the index of its first column and its column count.
type RowLayout = (Frame, usize, usize);

/// A target's panel.
struct Panel {
    target: usize,
    heading: String,
    /// (cell index, errors sorted, label values per axis)
    cols: Vec<(usize, Vec<f64>, Vec<String>)>,
    range: (f64, f64),
    hidden: usize,
}

/// Draw the chart; `Err` is a note on why it was skipped.
pub fn chart(view: &View) -> Result<Chart, String> {
    let mut panels: Vec<Panel> = Vec::new();
    let mut notes: Vec<String> = Vec::new();
    let mut no_log_z: Vec<String> = Vec::new();
    let mut non_finite = 0usize;
    for t in view.targets_with_cells() {
        let info = view.target(t);
        let Some(lz) = info.log_z.filter(|z| z.is_finite()) else {
            no_log_z.push(info.label.clone());
            continue;
        };
        let cells = view.cells_of(t);
        let mut cols = Vec::new();
        for c in cells.iter().take(MAX_CELLS) {
            let mut errs: Vec<f64> = Vec::new();
            for r in &c.runs {
                if let (true, Some(le)) = (r.output.is_ok(), r.output.log_evidence) {
                    let e = le - lz;
                    if e.is_finite() {
                        errs.push(e);
                    } else {
                        non_finite += 1;
                    }
                }
            }
            errs.sort_by(f64::total_cmp);
            let labels: Vec<String> = if view.axes.is_empty() {
                vec!["the only cell".to_string()]
            } else {
                view.axes
                    .iter()
                    .map(|a| {
                        c.settings
                            .get(&a.name)
                            .map_or_else(|| "?".to_string(), super::short_value)
                    })
                    .collect()
            };
            let idx = view
                .cells
                .iter()
                .position(|x| std::ptr::eq(x, *c))
                .unwrap_or(0);
            cols.push((idx, errs, labels));
        }
        if cols.iter().all(|(_, e, _)| e.is_empty()) {
            notes.push(format!(
                "{}: no finished run reported an evidence estimate.",
                info.label
            ));
            continue;
        }
        let range = canvas::linear_range(
            cols.iter()
                .flat_map(|(_, e, _)| e.iter().copied())
                .chain([0.0]),
            0.08,
        );
        panels.push(Panel {
            target: t,
            heading: format!("{} (log Z = {})", info.label, super::fmt_value(lz)),
            cols,
            range,
            hidden: cells.len().saturating_sub(MAX_CELLS),
        });
    }
    if !no_log_z.is_empty() {
        notes.push(format!(
            "No exact log Z for {}; not shown.",
            no_log_z.join(", ")
        ));
    }
    if non_finite > 0 {
        notes.push(format!(
            "{non_finite} non-finite evidence estimate{} left out.",
            if non_finite == 1 { "" } else { "s" }
        ));
    }
    for p in &panels {
        if p.hidden > 0 {
            notes.push(format!(
                "{}: only the first {MAX_CELLS} cells are drawn ({} more are in the results file).",
                view.target(p.target).label,
                p.hidden
            ));
        }
    }
    if panels.is_empty() {
        return Err(format!(
            "{FILE} skipped: no cell has a finished run with an evidence estimate and an exact log Z.{}",
            if notes.is_empty() {
                String::new()
            } else {
                format!(" {}", notes.join(" "))
            }
        ));
    }

    // Column width from the widest category label; row headers from the axis names.
    let row_names: Vec<String> = if view.axes.is_empty() {
        vec![String::new()]
    } else {
        view.axes.iter().map(|a| a.short.clone()).collect()
    };
    let widest_label = panels
        .iter()
        .flat_map(|p| p.cols.iter().flat_map(|(_, _, l)| l.iter()))
        .map(|s| canvas::text_width(s, canvas::TICK_PX))
        .fold(0.0, f64::max);
    let cw = (widest_label + 12.0).max(40.0);
    let row_head = row_names
        .iter()
        .map(|s| canvas::text_width(s, canvas::TICK_PX))
        .fold(0.0, f64::max);
    // The y gutter must also hold the row headers of the category labels.
    let gutters: Vec<f64> = panels
        .iter()
        .map(|p| {
            let probe = Axis::new(p.range, Scale::Linear, PLOT_H, 0.0);
            canvas::y_gutter(&probe.ticks(36.0))
        })
        .collect();
    let gutter = gutters.iter().copied().fold(row_head + 16.0, f64::max);
    let max_cols = panels.iter().map(|p| p.cols.len()).max().unwrap_or(1);
    let per_row = ((MAX_ROW_W / cw).floor() as usize).clamp(1, max_cols.max(1));
    let title = "Log-evidence error per replicate".to_string();
    let plot_w = per_row as f64 * cw;
    let width = (canvas::PAD * 2.0 + gutter + plot_w + 10.0)
        .max(760.0)
        .max(Heading::min_width(&title));
    let mut sub = vec![
        "Each column is a cell; each point a finished replicate's log Z estimate minus the exact log Z (nats). \
         The zero line marks an exact estimate: a box away from it shows bias, a tall box shows spread. \
         Since Z itself is estimated without bias, log Z estimates sit slightly below zero on average."
            .to_string(),
    ];
    if let Some(k) = view.abbreviation_key() {
        sub.push(k);
    }
    let heading = Heading::new(&title, &sub, width);
    let legend = vec![
        Entry {
            key: Key::Point(palette::BLUE, Marker::Circle),
            label: "replicate (spread sideways)".into(),
        },
        Entry {
            key: Key::Point(palette::VERMILLION, Marker::Diamond),
            label: "mean".into(),
        },
        Entry {
            key: Key::BoxOutline,
            label: "quartiles and median; whiskers within 1.5 IQR".into(),
        },
        Entry {
            key: Key::Line(palette::BLACK, &[]),
            label: "zero error (exact log Z)".into(),
        },
    ];
    let (_, legend_h) = canvas::legend_layout(&legend, width - 2.0 * canvas::PAD);

    // Vertical layout: heading, legend, then per panel: heading line, rows of columns.
    let label_rows_h = row_names.len() as f64 * canvas::line_height(canvas::TICK_PX) + 8.0;
    let row_h = PLOT_H + label_rows_h + 14.0;
    let mut y = heading.height() + legend_h + 8.0;
    let mut layout: Vec<(usize, f64, Vec<RowLayout>)> = Vec::new();
    let left = canvas::PAD + gutter;
    for (pi, p) in panels.iter().enumerate() {
        let head_y = y;
        y += canvas::line_height(canvas::LABEL_PX) + 10.0;
        let mut rows = Vec::new();
        // Rows of about equal length rather than full rows and a short last one.
        let n_rows = p.cols.len().div_ceil(per_row).max(1);
        let balanced = p.cols.len().div_ceil(n_rows).max(1);
        for chunk_start in (0..p.cols.len()).step_by(balanced) {
            let n = (p.cols.len() - chunk_start).min(balanced);
            let frame = Frame {
                x: Axis::new(
                    (-0.5, n as f64 - 0.5),
                    Scale::Linear,
                    left,
                    left + n as f64 * cw,
                ),
                y: Axis::new(p.range, Scale::Linear, y + PLOT_H, y),
            };
            rows.push((frame, chunk_start, n));
            y += row_h;
        }
        layout.push((pi, head_y, rows));
    }
    let notes_top = y;
    let height = notes_top + canvas::notes_height(&notes, width) + canvas::PAD;

    let svg = canvas::render(width, height, &title, |area| {
        canvas::draw_heading_and_legend(area, &heading, &legend, width)?;
        for (pi, head_y, rows) in &layout {
            let p = &panels[*pi];
            canvas::text(
                area,
                &p.heading,
                canvas::PAD,
                *head_y,
                Font::new(canvas::LABEL_PX)
                    .bold()
                    .anchor(HPos::Left, VPos::Top),
            )?;
            for (frame, start, n) in rows {
                let y_ticks = frame.y.ticks(36.0);
                canvas::draw_frame(area, frame, None, &y_ticks, "", "error (nats)")?;
                let zero = frame.y.map(0.0);
                canvas::polyline(
                    area,
                    &[(frame.left(), zero), (frame.right(), zero)],
                    palette::BLACK,
                    1,
                    &[],
                )?;
                for k in 0..*n {
                    let (cell, errs, labels) = &p.cols[start + k];
                    let cx = frame.x.map(k as f64);
                    // Category labels, one row per axis.
                    let mut ly = frame.bottom() + 6.0;
                    for (ri, l) in labels.iter().enumerate() {
                        canvas::text(
                            area,
                            l,
                            cx,
                            ly,
                            Font::new(canvas::TICK_PX).anchor(HPos::Center, VPos::Top),
                        )?;
                        if k == 0 {
                            canvas::text(
                                area,
                                &row_names[ri],
                                frame.left() - 8.0,
                                ly,
                                Font::new(canvas::TICK_PX)
                                    .colour(palette::MUTED)
                                    .anchor(HPos::Right, VPos::Top),
                            )?;
                        }
                        ly += canvas::line_height(canvas::TICK_PX);
                    }
                    if errs.is_empty() {
                        let why = if view.cells[*cell].scores.replicates_ok == 0 {
                            "failed"
                        } else {
                            "no Z"
                        };
                        canvas::text(
                            area,
                            why,
                            cx,
                            (frame.top() + frame.bottom()) / 2.0,
                            Font::new(canvas::TICK_PX)
                                .colour(palette::MUTED)
                                .anchor(HPos::Center, VPos::Center),
                        )?;
                        continue;
                    }
                    let half = (cw * 0.3).min(22.0);
                    if errs.len() >= 4
                        && let Some((wlo, q1, q2, q3, whi)) = tukey(errs)
                    {
                        let (y1, y2, y3) = (frame.y.map(q1), frame.y.map(q2), frame.y.map(q3));
                        canvas::polyline(
                            area,
                            &[(cx, frame.y.map(wlo)), (cx, y1)],
                            palette::BLACK,
                            1,
                            &[],
                        )?;
                        canvas::polyline(
                            area,
                            &[(cx, y3), (cx, frame.y.map(whi))],
                            palette::BLACK,
                            1,
                            &[],
                        )?;
                        for w in [wlo, whi] {
                            let wy = frame.y.map(w);
                            canvas::polyline(
                                area,
                                &[(cx - half * 0.4, wy), (cx + half * 0.4, wy)],
                                palette::BLACK,
                                1,
                                &[],
                            )?;
                        }
                        canvas::rect(
                            area,
                            cx - half,
                            y3,
                            cx + half,
                            y1,
                            Some((palette::WHITE, 0.6)),
                            Some(palette::BLACK),
                        )?;
                        canvas::polyline(
                            area,
                            &[(cx - half, y2), (cx + half, y2)],
                            palette::BLACK,
                            2,
                            &[],
                        )?;
                    }
                    for (j, e) in errs.iter().enumerate() {
                        let u = ((j as f64 + 1.0) * 0.618_033_988_75).fract() - 0.5;
                        canvas::marker(
                            area,
                            Marker::Circle,
                            cx + u * 2.0 * half,
                            frame.y.map(*e),
                            3.0,
                            palette::BLUE,
                        )?;
                    }
                    let m = errs.iter().sum::<f64>() / errs.len() as f64;
                    canvas::marker(
                        area,
                        Marker::Diamond,
                        cx + half + 6.0,
                        frame.y.map(m),
                        4.0,
                        palette::VERMILLION,
                    )?;
                }
            }
        }
        canvas::draw_notes(area, &notes, notes_top, width)
    })?;
    Ok(Chart {
        file: FILE.to_string(),
        title,
        caption: "Log-evidence error (estimate minus exact log Z) of every replicate, per cell and target, against a zero line.".into(),
        svg,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::plot::testkit::{self, check_svg, filled_circles, polylines, texts};

    #[test]
    fn tukey_whiskers_stop_at_the_fences() {
        let v = [1.0, 2.0, 3.0, 4.0, 100.0];
        let (lo, q1, q2, q3, hi) = tukey(&v).unwrap();
        assert_eq!((lo, q1, q2, q3, hi), (1.0, 2.0, 3.0, 4.0, 4.0));
        assert!(tukey(&[]).is_none());
    }

    #[test]
    fn demo_chart_has_panels_zero_lines_and_a_point_per_replicate() {
        let r = testkit::demo_study();
        let view = View::new(&r);
        let c = chart(&view).unwrap();
        check_svg(&c.svg).unwrap();
        let t = texts(&c.svg);
        assert!(t.contains(&c.title));
        assert!(t.iter().any(|s| s.starts_with("corr-gauss-10 (log Z")));
        assert!(t.iter().any(|s| s.starts_with("banana-2 (log Z")));
        assert!(t.contains(&"error (nats)".to_string()), "y axis label");
        assert!(
            t.contains(&"zero error (exact log Z)".to_string()),
            "legend entry"
        );
        // Row headers of the category axis and abbreviated values.
        for s in ["scale", "move", "path", "rw", "mh", "temp"] {
            assert!(t.iter().any(|x| x == s), "{s}");
        }
        // One blue point per finished replicate (8 per cell, 5 in the cell with 3 failures),
        // plus the legend key.
        let ok = r.runs.iter().filter(|x| x.output.is_ok()).count();
        assert_eq!(filled_circles(&c.svg, "#0072B2"), ok + 1);
        // A horizontal black zero line per panel row, across the frame.
        let zeros = polylines(&c.svg)
            .into_iter()
            .filter(|(s, w, p)| {
                s == "#000000"
                    && w == "1"
                    && p.len() == 2
                    && p[0].1 == p[1].1
                    && p[1].0 - p[0].0 > 200
            })
            .count();
        assert!(zeros >= 2, "{zeros}");
    }

    #[test]
    fn edge_cases_degrade() {
        let r = testkit::single_cell_study();
        let c = chart(&View::new(&r)).unwrap();
        check_svg(&c.svg).unwrap();
        assert!(texts(&c.svg).contains(&"the only cell".to_string()));
        let r = testkit::failed_study();
        assert!(chart(&View::new(&r)).unwrap_err().contains(FILE));
        let mut r = testkit::demo_study();
        r.header.targets[1].log_z = None;
        for rec in r.runs.iter_mut().take(3) {
            rec.output.log_evidence = Some(f64::INFINITY);
        }
        let c = chart(&View::new(&r)).unwrap();
        check_svg(&c.svg).unwrap();
        let t = texts(&c.svg).join(" ");
        assert!(t.contains("No exact log Z for banana-2"), "{t}");
        assert!(t.contains("non-finite"), "{t}");
    }

    #[test]
    fn many_cells_wrap_into_rows_and_are_capped() {
        let mut r = testkit::one_axis_study();
        let template = r.runs.clone();
        let mut vals = Vec::new();
        for k in 0..70u64 {
            vals.push(serde_json::json!(100 + k));
            for rec in &template {
                let mut x = rec.clone();
                x.settings
                    .insert("particles".into(), serde_json::json!(100 + k));
                r.runs.push(x);
            }
        }
        r.runs.drain(..template.len());
        r.header.study.grid = vec![("particles".into(), vals)];
        let c = chart(&View::new(&r)).unwrap();
        check_svg(&c.svg).unwrap();
        let t = texts(&c.svg).join(" ");
        assert!(t.contains("only the first 60 cells"), "{t}");
    }
}
