//! `traces.svg`: the per-iteration trace of every cell, one row of panels per target (runs of
//! different targets have different lengths and behaviour, so they are not overlaid).
//!
//! Panels: ESS as a fraction of the particles (raw ESS when a cell's particle count is not
//! known), and, when any run reports them, the temperature of tempered runs and the acceptance
//! rate of Metropolis moves. Each cell is a line at the median over its finished replicates
//! with a band from the 10 % to the 90 % quantile. Adaptive schedules give replicates of
//! different lengths; an iteration is drawn while at least half of the cell's replicates
//! reached it. Cells keep one colour and dash pattern across all panels.

use plotters::style::text_anchor::{HPos, VPos};

use super::canvas::{self, Axis, Entry, Font, Frame, Heading, Key, Scale};
use super::palette;
use super::{CellView, Chart, View, sorted_quantile};
use crate::sampler::TraceRow;

/// File name of the chart.
pub const FILE: &str = "traces.svg";
const PANEL_W: f64 = 360.0;
const PANEL_H: f64 = 240.0;

/// A quantity of the trace.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Quantity {
    Ess,
    Temperature,
    Acceptance,
}

/// Median and 10-90 % band of one quantity of one cell: (iteration, q10, median, q90).
type Summary = Vec<(f64, f64, f64, f64)>;
/// The series of one panel: (cell style, summary).
type PanelSeries = Vec<(usize, Summary)>;

fn value(q: Quantity, row: &TraceRow, particles: Option<usize>) -> Option<f64> {
    let v = match q {
        Quantity::Ess => Some(particles.map_or(row.ess, |n| row.ess / n as f64)),
        Quantity::Temperature => row.temperature,
        Quantity::Acceptance => row.acceptance,
    };
    v.filter(|x| x.is_finite())
}

fn summarise(cell: &CellView, q: Quantity, normalise: bool) -> Summary {
    let traces: Vec<&Vec<TraceRow>> = cell
        .runs
        .iter()
        .filter(|r| r.output.is_ok() && !r.output.trace.is_empty())
        .map(|r| &r.output.trace)
        .collect();
    if traces.is_empty() {
        return Vec::new();
    }
    let need = traces.len().div_ceil(2);
    let particles = if normalise { cell.particles } else { None };
    let longest = traces.iter().map(|t| t.len()).max().unwrap_or(0);
    let mut out = Vec::new();
    for i in 0..longest {
        let reached = traces.iter().filter(|t| t.len() > i).count();
        if reached < need {
            break;
        }
        let mut vals: Vec<f64> = traces
            .iter()
            .filter_map(|t| t.get(i))
            .filter_map(|row| value(q, row, particles))
            .collect();
        if vals.is_empty() {
            continue;
        }
        vals.sort_by(f64::total_cmp);
        let it = traces
            .iter()
            .find_map(|t| t.get(i))
            .map_or(i + 1, |r| r.iteration.max(1)) as f64;
        if let (Some(a), Some(m), Some(b)) = (
            sorted_quantile(&vals, 0.1),
            sorted_quantile(&vals, 0.5),
            sorted_quantile(&vals, 0.9),
        ) {
            out.push((it, a, m, b));
        }
    }
    out
}

/// Draw the chart and return notes; `Err` is a note on why it was skipped.
pub fn chart(view: &View) -> (Result<Chart, String>, Vec<String>) {
    let mut notes = Vec::new();
    let normalise = view.cells.iter().all(|c| c.particles.is_some());
    let present = |q: Quantity| {
        view.cells.iter().any(|c| {
            c.runs.iter().any(|r| {
                r.output.is_ok()
                    && r.output
                        .trace
                        .iter()
                        .any(|row| value(q, row, None).is_some())
            })
        })
    };
    let mut quantities = vec![Quantity::Ess];
    if present(Quantity::Temperature) {
        quantities.push(Quantity::Temperature);
    }
    if present(Quantity::Acceptance) {
        quantities.push(Quantity::Acceptance);
    }
    let shown: Vec<&CellView> = view
        .cells
        .iter()
        .filter(|c| c.style < palette::LINE_STYLES)
        .collect();
    if view.styles > palette::LINE_STYLES {
        notes.push(format!(
            "{FILE}: only the first {} of {} cells are drawn (there are no more distinct line styles).",
            palette::LINE_STYLES,
            view.styles
        ));
    }
    // Summaries per (target row, quantity).
    let targets = view.targets_with_cells();
    let mut rows: Vec<(usize, Vec<PanelSeries>)> = Vec::new();
    for &t in &targets {
        let per_q: Vec<PanelSeries> = quantities
            .iter()
            .map(|&q| {
                shown
                    .iter()
                    .filter(|c| c.target == t)
                    .map(|c| (c.style, summarise(c, q, normalise)))
                    .filter(|(_, s)| !s.is_empty())
                    .collect()
            })
            .collect();
        if per_q[0].is_empty() {
            continue;
        }
        rows.push((t, per_q));
    }
    let no_trace: usize = view
        .cells
        .iter()
        .filter(|c| {
            !c.runs
                .iter()
                .any(|r| r.output.is_ok() && !r.output.trace.is_empty())
        })
        .count();
    if no_trace > 0 && !rows.is_empty() {
        notes.push(format!(
            "{no_trace} cell{} no finished run with a trace and {} not drawn.",
            if no_trace == 1 { " has" } else { "s have" },
            if no_trace == 1 { "is" } else { "are" }
        ));
    }
    if rows.is_empty() {
        return (
            Err(format!(
                "{FILE} skipped: no finished run has a per-iteration trace."
            )),
            notes,
        );
    }

    // Legend: one entry per drawn cell style (the same settings on every target).
    let mut legend: Vec<(usize, Entry)> = Vec::new();
    for c in &shown {
        if !legend.iter().any(|(s, _)| *s == c.style) {
            let (col, dash) = palette::line_style(c.style);
            legend.push((
                c.style,
                Entry {
                    key: Key::Band(col, dash),
                    label: c.label.clone(),
                },
            ));
        }
    }
    legend.sort_by_key(|(s, _)| *s);
    let legend: Vec<Entry> = legend.into_iter().map(|(_, e)| e).collect();
    let legend_w = canvas::legend_column_width(&legend);

    // Axis titles, in a shorter form when the long one would not fit along the panel.
    let titles = |q: Quantity| {
        let (long, short) = match (q, normalise) {
            (Quantity::Ess, true) => ("ESS / N (fraction of particles)", "ESS / N"),
            (Quantity::Ess, false) => ("ESS (particles)", "ESS"),
            (Quantity::Temperature, _) => ("temperature of tempered runs", "temperature"),
            (Quantity::Acceptance, _) => ("Metropolis acceptance rate", "acceptance rate"),
        };
        if canvas::text_width(long, canvas::LABEL_PX) <= PANEL_H {
            long
        } else {
            short
        }
    };
    let ess_max = if normalise {
        1.0
    } else {
        rows.iter()
            .flat_map(|(_, p)| p[0].iter().flat_map(|(_, s)| s.iter().map(|x| x.3)))
            .fold(1.0, f64::max)
    };
    let y_range = |q: Quantity| match q {
        Quantity::Ess => (0.0, ess_max * 1.04),
        _ => (0.0, 1.04),
    };
    let gutter = canvas::y_gutter(
        &Axis::new(y_range(Quantity::Ess), Scale::Linear, PANEL_H, 0.0).ticks(36.0),
    )
    .max(canvas::y_gutter(
        &Axis::new((0.0, 1.04), Scale::Linear, PANEL_H, 0.0).ticks(36.0),
    ));
    let panel_span = gutter + PANEL_W + 14.0;
    let title = "Per-iteration traces: median over replicates with 10-90 % band".to_string();
    let plots_w = canvas::PAD + quantities.len() as f64 * panel_span;
    let width = (plots_w + 12.0 + legend_w + canvas::PAD).max(Heading::min_width(&title));
    let mut sub = vec![format!(
        "One line per cell: the median over finished replicates at each iteration, the band spans the 10 % to 90 % quantiles. \
         {}Iterations reached by fewer than half of a cell's replicates are not drawn.",
        if normalise {
            "ESS is divided by the cell's particle count N. "
        } else {
            ""
        }
    )];
    if let Some(k) = view.abbreviation_key() {
        sub.push(k);
    }
    let heading = Heading::new(&title, &sub, width);

    let row_h = canvas::line_height(canvas::LABEL_PX) + 8.0 + PANEL_H + canvas::x_gutter() + 18.0;
    let top = heading.height();
    let legend_h = canvas::legend_layout(&legend, legend_w).1;
    let notes_top = (top + rows.len() as f64 * row_h).max(top + legend_h + 30.0);
    let height = notes_top + canvas::notes_height(&notes, width) + canvas::PAD;

    let svg = canvas::render(width, height, &title, |area| {
        heading.draw(area)?;
        let lx = plots_w + 12.0;
        canvas::text(
            area,
            "cells",
            lx,
            top,
            Font::new(canvas::LABEL_PX)
                .bold()
                .anchor(HPos::Left, VPos::Top),
        )?;
        canvas::draw_legend(
            area,
            &legend,
            lx,
            top + canvas::line_height(canvas::LABEL_PX) + 4.0,
            legend_w,
        )?;
        for (ri, (t, per_q)) in rows.iter().enumerate() {
            let y0 = top + ri as f64 * row_h;
            canvas::text(
                area,
                &view.target(*t).label,
                canvas::PAD,
                y0,
                Font::new(canvas::LABEL_PX)
                    .bold()
                    .anchor(HPos::Left, VPos::Top),
            )?;
            let ptop = y0 + canvas::line_height(canvas::LABEL_PX) + 8.0;
            for (qi, (&q, series)) in quantities.iter().zip(per_q).enumerate() {
                let max_it = series
                    .iter()
                    .flat_map(|(_, v)| v.iter().map(|x| x.0))
                    .fold(1.0, f64::max);
                let left = canvas::PAD + qi as f64 * panel_span + gutter;
                let frame = Frame {
                    x: Axis::new((1.0, max_it.max(2.0)), Scale::Linear, left, left + PANEL_W),
                    y: Axis::new(y_range(q), Scale::Linear, ptop + PANEL_H, ptop),
                };
                let x_ticks: Vec<(f64, String)> = frame
                    .x
                    .ticks(60.0)
                    .into_iter()
                    .filter(|(v, _)| v.fract() == 0.0)
                    .collect();
                let y_ticks = frame.y.ticks(36.0);
                canvas::draw_frame(
                    area,
                    &frame,
                    Some(&x_ticks),
                    &y_ticks,
                    "iteration",
                    titles(q),
                )?;
                if series.is_empty() {
                    canvas::text(
                        area,
                        "no run reports this",
                        (frame.left() + frame.right()) / 2.0,
                        ptop + PANEL_H / 2.0,
                        Font::new(canvas::TICK_PX)
                            .colour(palette::MUTED)
                            .anchor(HPos::Center, VPos::Center),
                    )?;
                    continue;
                }
                for (style, s) in series {
                    let (col, _) = palette::line_style(*style);
                    let mut band: Vec<(f64, f64)> = s
                        .iter()
                        .map(|p| (frame.x.map(p.0), frame.y.map(p.3)))
                        .collect();
                    band.extend(s.iter().rev().map(|p| (frame.x.map(p.0), frame.y.map(p.1))));
                    canvas::polygon(area, &band, col, 0.12)?;
                }
                for (style, s) in series {
                    let (col, dash) = palette::line_style(*style);
                    let line: Vec<(f64, f64)> = s
                        .iter()
                        .map(|p| (frame.x.map(p.0), frame.y.map(p.2)))
                        .collect();
                    if line.len() == 1 {
                        canvas::marker(
                            area,
                            palette::Marker::Circle,
                            line[0].0,
                            line[0].1,
                            3.0,
                            col,
                        )?;
                    }
                    canvas::polyline(area, &line, col, 2, dash)?;
                }
            }
        }
        canvas::draw_notes(area, &notes, notes_top, width)
    });
    let chart = svg.map(|svg| Chart {
        file: FILE.to_string(),
        title,
        caption: "Per-iteration ESS (and temperature and acceptance rate where reported): median over replicates with a 10-90 % band, one line per cell.".into(),
        svg,
    });
    (chart, notes)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::plot::testkit::{self, check_svg, polylines, texts};

    #[test]
    fn demo_chart_has_all_panels_and_a_line_per_cell() {
        let r = testkit::demo_study();
        let view = View::new(&r);
        let (c, notes) = chart(&view);
        let c = c.unwrap();
        assert!(notes.is_empty(), "{notes:?}");
        check_svg(&c.svg).unwrap();
        let t = texts(&c.svg);
        assert!(t.contains(&c.title));
        for s in [
            "ESS / N",
            "temperature of tempered runs",
            "Metropolis acceptance rate",
            "iteration",
            "corr-gauss-10",
            "banana-2",
        ] {
            assert!(t.iter().any(|x| x == s), "{s}");
        }
        // Legend: one entry per distinct cell.
        for c in view.cells.iter().filter(|c| c.target == 0) {
            assert!(t.contains(&c.label), "{}", c.label);
        }
        // Twelve solid-or-dashed 2 px median lines in the ESS panels at least (7 colours).
        let wide = polylines(&c.svg)
            .into_iter()
            .filter(|(_, w, _)| w == "2")
            .count();
        assert!(wide >= 24, "{wide}");
    }

    #[test]
    fn traces_without_temperature_or_acceptance_have_one_panel() {
        let mut r = testkit::single_cell_study();
        for rec in &mut r.runs {
            for row in &mut rec.output.trace {
                row.acceptance = None;
            }
        }
        let (c, _) = chart(&View::new(&r));
        let c = c.unwrap();
        check_svg(&c.svg).unwrap();
        let t = texts(&c.svg);
        assert!(!t.iter().any(|x| x.contains("acceptance")));
        assert!(t.contains(&"the only cell".to_string()));
    }

    #[test]
    fn failed_and_traceless_studies_degrade() {
        let r = testkit::failed_study();
        let (c, _) = chart(&View::new(&r));
        assert!(c.unwrap_err().contains(FILE));
        let mut r = testkit::demo_study();
        for rec in r.runs.iter_mut().filter(|x| x.target == "banana-2") {
            rec.output.trace.clear();
        }
        for rec in r.runs.iter_mut().take(8) {
            for row in &mut rec.output.trace {
                row.ess = f64::NAN;
            }
        }
        let (c, notes) = chart(&View::new(&r));
        check_svg(&c.unwrap().svg).unwrap();
        assert!(
            notes
                .iter()
                .any(|n| n.contains("12 cells have no finished run with a trace")),
            "{notes:?}"
        );
    }

    #[test]
    fn summary_follows_the_majority_of_replicates() {
        let r = testkit::one_axis_study();
        let view = View::new(&r);
        let s = summarise(&view.cells[0], Quantity::Temperature, true);
        assert!(!s.is_empty());
        assert!(s.iter().all(|p| p.1 <= p.2 && p.2 <= p.3));
        assert_eq!(s[0].2, 0.0);
    }
}
