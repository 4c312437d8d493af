//! `error-vs-cost.svg`: a score against mean seconds per run, log-log, one point per cell,
//! with each target's Pareto front (the cells that no cheaper-or-equal cell beats) drawn as a
//! step line and its cells labelled with their grid settings.
//!
//! Labels are placed greedily (Imhof 1975, "Positioning names on maps", *The American
//! Cartographer* 2(2), lists the preferred candidate positions around a point): each front
//! cell tries eight positions around its marker and takes the first that stays inside the
//! frame and clears every marker, every step line and every label placed before it. A cell
//! for which no position is free gets a bracketed number and its label is listed under the
//! chart instead.

use plotters::style::text_anchor::{HPos, VPos};

use super::canvas::{self, Axis, Entry, Font, Frame, Heading, Key, Scale};
use super::palette;
use super::{Chart, View};
use crate::scores::Metric;

/// File name of the chart.
pub const FILE: &str = "error-vs-cost.svg";

/// Plot height for up to [`CROWD`] cells; larger studies get more room, up to the caps.
const PLOT_H: f64 = 430.0;
const CROWD: usize = 30;
const MAX_PLOT_H: f64 = 720.0;
const MAX_WIDTH: f64 = 1600.0;
const MARKER_R: f64 = 5.5;

/// A plotted cell.
#[derive(Debug, Clone)]
struct Dot {
    cell: usize,
    target: usize,
    cost: f64,
    score: f64,
}

/// The Pareto front of `dots` (indices into it) in order of increasing cost: a dot is on the
/// front when every cheaper or equally cheap dot has a worse score.
fn pareto(dots: &[&Dot], higher_is_better: bool) -> Vec<usize> {
    let mut idx: Vec<usize> = (0..dots.len()).collect();
    let better = |a: f64, b: f64| if higher_is_better { a > b } else { a < b };
    idx.sort_by(|&i, &j| {
        dots[i].cost.total_cmp(&dots[j].cost).then_with(|| {
            if higher_is_better {
                dots[j].score.total_cmp(&dots[i].score)
            } else {
                dots[i].score.total_cmp(&dots[j].score)
            }
        })
    });
    let mut front = Vec::new();
    let mut best: Option<f64> = None;
    for i in idx {
        if best.is_none_or(|b| better(dots[i].score, b)) {
            best = Some(dots[i].score);
            front.push(i);
        }
    }
    front
}

/// Axis-aligned box (x0, y0, x1, y1) in pixels.
type Bx = (f64, f64, f64, f64);

fn overlaps(a: &Bx, b: &Bx) -> bool {
    a.0 < b.2 && b.0 < a.2 && a.1 < b.3 && b.1 < a.3
}

/// Candidate label boxes around a point, in order of preference, with the anchor to draw at.
fn candidates(x: f64, y: f64, w: f64, h: f64) -> Vec<(Bx, (f64, f64, HPos))> {
    let d = MARKER_R + 4.0;
    let mut out = Vec::new();
    let mut push = |x0: f64, y0: f64, anchor_x: f64, h_pos: HPos| {
        out.push(((x0, y0, x0 + w, y0 + h), (anchor_x, y0 + h / 2.0, h_pos)));
    };
    push(x + d, y - h / 2.0, x + d, HPos::Left); // right
    push(x + d * 0.7, y - d * 0.7 - h, x + d * 0.7, HPos::Left); // up-right
    push(x + d * 0.7, y + d * 0.7, x + d * 0.7, HPos::Left); // down-right
    push(x - d - w, y - h / 2.0, x - d, HPos::Right); // left
    push(x - w / 2.0, y - d - h, x, HPos::Center); // above
    push(x - w / 2.0, y + d, x, HPos::Center); // below
    push(x - d * 0.7 - w, y - d * 0.7 - h, x - d * 0.7, HPos::Right); // up-left
    push(x - d * 0.7 - w, y + d * 0.7, x - d * 0.7, HPos::Right); // down-left
    // Further out, for crowded fronts.
    push(x + d, y - d - h, x + d, HPos::Left);
    push(x + d, y + d, x + d, HPos::Left);
    push(x - d - w, y - d - h, x - d, HPos::Right);
    push(x - d - w, y + d, x - d, HPos::Right);
    push(x - w / 2.0, y - 2.0 * d - h, x, HPos::Center);
    push(x - w / 2.0, y + 2.0 * d, x, HPos::Center);
    out
}

/// Where a label goes: its box, anchor point, horizontal anchor, text.
type Placement = (Bx, f64, f64, HPos, String);

/// Draw the chart; `Err` is a note on why it was skipped.
pub fn chart(view: &View, metric: Metric) -> Result<Chart, String> {
    let hib = metric.higher_is_better();
    let mut dots: Vec<Dot> = Vec::new();
    let mut unplotted = 0usize;
    for (i, c) in view.cells.iter().enumerate() {
        match (c.scores.seconds, metric.value(&c.scores)) {
            (Some(s), Some(v)) if s.is_finite() && s > 0.0 && v.is_finite() && v > 0.0 => dots
                .push(Dot {
                    cell: i,
                    target: c.target,
                    cost: s,
                    score: v,
                }),
            _ => unplotted += 1,
        }
    }
    if dots.is_empty() {
        return Err(format!(
            "{FILE} skipped: no cell has a positive, finite `{}` and run time (cells with only failed runs have neither).",
            metric.name()
        ));
    }
    let targets = view.targets_with_cells();
    let title = format!("Accuracy against cost: {} per cell", metric.name());
    // Canvas size from the number of cells, so that crowded fronts have room for labels.
    let extra = dots.len().saturating_sub(CROWD) as f64;
    let width = (980.0 + 5.0 * extra)
        .min(MAX_WIDTH)
        .max(Heading::min_width(&title));
    let plot_h = (PLOT_H + 2.5 * extra).min(MAX_PLOT_H);
    let mut sub = vec![format!(
        "One point per cell: {} ({}) against mean wall-clock seconds per run, over finished replicates; both axes logarithmic. \
         Step lines join each target's Pareto front, the cells that no cheaper cell beats ({} is better); front cells are labelled.",
        metric.name(),
        super::metric_description(metric),
        if hib { "higher" } else { "lower" }
    )];
    if let Some(k) = view.abbreviation_key() {
        sub.push(k);
    }
    let heading = Heading::new(&title, &sub, width);

    let mut legend: Vec<Entry> = targets
        .iter()
        .map(|&t| {
            let (c, m) = palette::point_style(t);
            let n = dots.iter().filter(|d| d.target == t).count();
            Entry {
                key: Key::Point(c, m),
                label: format!(
                    "{} ({n} cell{})",
                    view.target(t).label,
                    if n == 1 { "" } else { "s" }
                ),
            }
        })
        .collect();
    legend.push(Entry {
        key: Key::Line(palette::MUTED, &[]),
        label: "Pareto front (in the target's colour)".into(),
    });
    let (_, legend_h) = canvas::legend_layout(&legend, width - 2.0 * canvas::PAD);

    // Axes: ranges from the data, pixel extents from the layout.
    let top = heading.height() + legend_h + 10.0;
    let bottom = top + plot_h;
    let y_probe = Axis::new(
        canvas::log_range(dots.iter().map(|d| d.score)),
        Scale::Log,
        bottom,
        top,
    );
    let y_ticks = y_probe.ticks(40.0);
    let left = canvas::PAD + canvas::y_gutter(&y_ticks);
    let right = width - canvas::PAD - 8.0;
    let frame = Frame {
        x: Axis::new(
            canvas::log_range(dots.iter().map(|d| d.cost)),
            Scale::Log,
            left,
            right,
        ),
        y: y_probe,
    };
    let x_ticks = frame.x.ticks(90.0);

    // Pareto fronts and their step lines (pixel coordinates).
    let mut fronts: Vec<(usize, Vec<&Dot>)> = Vec::new();
    for &t in &targets {
        let mine: Vec<&Dot> = dots.iter().filter(|d| d.target == t).collect();
        let f = pareto(&mine, hib);
        fronts.push((t, f.into_iter().map(|i| mine[i]).collect()));
    }
    let step_line = |front: &[&Dot]| -> Vec<(f64, f64)> {
        let mut pts = Vec::new();
        for (k, d) in front.iter().enumerate() {
            let (x, y) = (frame.x.map(d.cost), frame.y.map(d.score));
            if k > 0 {
                let (_, py) = pts[pts.len() - 1];
                pts.push((x, py));
            }
            pts.push((x, y));
        }
        if let Some(&(_, y)) = pts.last() {
            pts.push((frame.right(), y));
        }
        pts
    };
    let lines: Vec<(usize, Vec<(f64, f64)>)> =
        fronts.iter().map(|(t, f)| (*t, step_line(f))).collect();

    // Label placement.
    let mut obstacles: Vec<Bx> = dots
        .iter()
        .map(|d| {
            let (x, y) = (frame.x.map(d.cost), frame.y.map(d.score));
            (
                x - MARKER_R - 1.0,
                y - MARKER_R - 1.0,
                x + MARKER_R + 1.0,
                y + MARKER_R + 1.0,
            )
        })
        .collect();
    let line_boxes: Vec<Bx> = lines
        .iter()
        .flat_map(|(_, pts)| {
            pts.windows(2).map(|w| {
                let (a, b) = (w[0], w[1]);
                (
                    a.0.min(b.0) - 1.5,
                    a.1.min(b.1) - 1.5,
                    a.0.max(b.0) + 1.5,
                    a.1.max(b.1) + 1.5,
                )
            })
        })
        .collect();
    let inside = |b: &Bx| {
        b.0 >= frame.left() + 2.0
            && b.2 <= frame.right() - 2.0
            && b.1 >= frame.top() + 2.0
            && b.3 <= frame.bottom() - 2.0
    };
    let lh = canvas::line_height(canvas::TICK_PX);
    let mut placements: Vec<(usize, Placement)> = Vec::new();
    let mut footnotes: Vec<String> = Vec::new();
    let try_place = |x: f64, y: f64, w: f64, obstacles: &[Bx], avoid_lines: bool| {
        candidates(x, y, w, lh).into_iter().find(|(b, _)| {
            inside(b)
                && !obstacles.iter().any(|o| overlaps(o, b))
                && (!avoid_lines || !line_boxes.iter().any(|o| overlaps(o, b)))
        })
    };
    // First pass: full labels wherever they clear every marker, line and label.
    let front_dots: Vec<(usize, &Dot)> = fronts
        .iter()
        .flat_map(|(t, f)| f.iter().map(move |d| (*t, *d)))
        .collect();
    let mut unplaced: Vec<(usize, &Dot)> = Vec::new();
    for &(t, d) in &front_dots {
        let (x, y) = (frame.x.map(d.cost), frame.y.map(d.score));
        let label = view.cells[d.cell].label.clone();
        let w = canvas::text_width(&label, canvas::TICK_PX) + 4.0;
        match try_place(x, y, w, &obstacles, true) {
            Some((b, (ax, ay, hp))) => {
                obstacles.push(b);
                placements.push((t, (b, ax, ay, hp, label)));
            }
            None => unplaced.push((t, d)),
        }
    }
    // Then a bracketed number for the rest, its label listed under the chart.
    for (t, d) in unplaced {
        let (x, y) = (frame.x.map(d.cost), frame.y.map(d.score));
        let n = footnotes.len() + 1;
        let tag = format!("[{n}]");
        let tw = canvas::text_width(&tag, canvas::TICK_PX) + 4.0;
        let spot = try_place(x, y, tw, &obstacles, true)
            .or_else(|| try_place(x, y, tw, &obstacles, false))
            .unwrap_or(((x, y, x, y), (x + MARKER_R + 3.0, y, HPos::Left)));
        obstacles.push(spot.0);
        let (ax, ay, hp) = spot.1;
        placements.push((t, (spot.0, ax, ay, hp, tag)));
        footnotes.push(format!(
            "[{n}] {}: {}",
            view.target(t).label,
            view.cells[d.cell].label
        ));
    }

    let mut notes: Vec<String> = Vec::new();
    if !footnotes.is_empty() {
        notes.push(format!(
            "Front cells labelled by number for lack of room: {}.",
            footnotes.join("; ")
        ));
    }
    if unplotted > 0 {
        notes.push(format!(
            "{unplotted} cell{} not shown: no positive, finite `{}` or run time (e.g. only failed runs, or an exact zero error).",
            if unplotted == 1 { " is" } else { "s are" },
            metric.name()
        ));
    }
    let notes_top = bottom + canvas::x_gutter() + 6.0;
    let height = notes_top + canvas::notes_height(&notes, width) + canvas::PAD;
    let x_title = "mean wall-clock time per run (seconds, log scale)";
    let y_title = format!("{} (log scale)", metric.name());

    let svg = canvas::render(width, height, &title, |area| {
        canvas::draw_heading_and_legend(area, &heading, &legend, width)?;
        canvas::draw_frame(area, &frame, Some(&x_ticks), &y_ticks, x_title, &y_title)?;
        for (t, pts) in &lines {
            let (c, _) = palette::point_style(*t);
            canvas::polyline(area, pts, c, 2, &[])?;
        }
        for d in &dots {
            let (c, m) = palette::point_style(d.target);
            canvas::marker(
                area,
                m,
                frame.x.map(d.cost),
                frame.y.map(d.score),
                MARKER_R,
                c,
            )?;
        }
        for (t, (b, ax, ay, hp, s)) in &placements {
            // A light halo keeps a label readable over grid lines.
            canvas::rect(area, b.0, b.1, b.2, b.3, Some((palette::WHITE, 0.8)), None)?;
            let (c, _) = palette::point_style(*t);
            let colour = if c == palette::SKY_BLUE || c == palette::ORANGE {
                palette::BLACK
            } else {
                c
            };
            canvas::text(
                area,
                s,
                *ax,
                *ay,
                Font::new(canvas::TICK_PX)
                    .colour(colour)
                    .anchor(*hp, VPos::Center),
            )?;
        }
        canvas::draw_notes(area, &notes, notes_top, width)
    })?;
    Ok(Chart {
        file: FILE.to_string(),
        title,
        caption: format!(
            "{} against mean seconds per run for every cell (log-log), with each target's Pareto front.",
            metric.name()
        ),
        svg,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::plot::testkit::{self, check_svg, filled_circles, polylines, texts, title};

    #[test]
    fn pareto_front_keeps_the_cheapest_best() {
        let d = |cost: f64, score: f64| Dot {
            cell: 0,
            target: 0,
            cost,
            score,
        };
        let dots = [
            d(1.0, 5.0),
            d(2.0, 3.0),
            d(3.0, 4.0),
            d(4.0, 1.0),
            d(1.0, 6.0),
        ];
        let refs: Vec<&Dot> = dots.iter().collect();
        assert_eq!(pareto(&refs, false), vec![0, 1, 3]);
        assert_eq!(pareto(&refs, true), vec![4]);
    }

    #[test]
    fn demo_chart_has_title_axes_legend_markers_and_fronts() {
        let r = testkit::demo_study();
        let view = View::new(&r);
        let c = chart(&view, Metric::RmseMean).unwrap();
        check_svg(&c.svg).unwrap();
        assert_eq!(title(&c.svg).as_deref(), Some(c.title.as_str()));
        let t = texts(&c.svg);
        assert!(t.contains(&c.title));
        assert!(t.iter().any(|s| s.contains("seconds")), "x axis label");
        assert!(t.iter().any(|s| s.starts_with("rmse_mean")), "y axis label");
        assert!(
            t.iter().any(|s| s.starts_with("corr-gauss-10 (")),
            "legend entry"
        );
        assert!(
            t.iter().any(|s| s.starts_with("banana-2 (")),
            "legend entry"
        );
        assert!(t.iter().any(|s| s.contains("Pareto front")));
        // Target 0 draws circles in blue: one per cell plus the legend key. Its cells with
        // only failed runs have no time or error, but the demo's failing cell still has 5 ok runs.
        assert_eq!(filled_circles(&c.svg, "#0072B2"), 12 + 1);
        // A step line per target in the target's colour, 2 px wide.
        let fronts = polylines(&c.svg)
            .into_iter()
            .filter(|(s, w, p)| w == "2" && p.len() >= 2 && (s == "#0072B2" || s == "#E69F00"))
            .count();
        assert!(fronts >= 2, "{fronts}");
        // Every front cell is labelled (directly or by number).
        assert!(t.iter().any(|s| s.starts_with("scale=")));
    }

    #[test]
    fn single_cell_and_failed_studies_degrade() {
        let r = testkit::single_cell_study();
        let view = View::new(&r);
        let c = chart(&view, Metric::RmseMean).unwrap();
        check_svg(&c.svg).unwrap();
        assert_eq!(filled_circles(&c.svg, "#0072B2"), 2);
        assert!(texts(&c.svg).contains(&"the only cell".to_string()));
        let r = testkit::failed_study();
        let note = chart(&View::new(&r), Metric::RmseMean).unwrap_err();
        assert!(note.contains(FILE));
    }

    #[test]
    fn non_finite_scores_are_left_out_with_a_note() {
        let mut r = testkit::demo_study();
        for rec in r.runs.iter_mut().filter(|x| x.target == "banana-2") {
            rec.output.mean = Some(vec![f64::NAN, 0.0]);
        }
        let view = View::new(&r);
        let c = chart(&view, Metric::RmseMean).unwrap();
        check_svg(&c.svg).unwrap();
        assert!(texts(&c.svg).iter().any(|s| s.contains("not shown")));
        let c = chart(&view, Metric::EssPerSecond).unwrap();
        check_svg(&c.svg).unwrap();
    }
}
