//! `sweep-<label>.svg`: for each sweep of the study, a score (default the ranking metric,
//! `ess_per_second`) on a logarithmic axis against the swept value, one line per cell, so that
//! a reader sees where a configuration stops working as the target grows. A marker is filled
//! where the cell is unbiased on that target and hollow where it is flagged `biased`; a cell
//! without a positive, finite value on a target leaves a gap in its line.
//!
//! The x axis is the sweep's first listed key. A sweep over several keys gets one chart per
//! combination of the values of its other keys, named
//! `sweep-<label>-<key>_<value>[-...].svg` (the label scheme of the expanded targets). The x
//! axis is logarithmic when every swept value is positive and they span a factor of ten or
//! more (e.g. d = 2 ... 50), linear otherwise (e.g. a correlation from 0 to 0.99); its ticks
//! are the swept values themselves.

use super::canvas::{self, Axis, Entry, Frame, Heading, Key, Scale};
use super::palette::{self, Marker};
use super::{Chart, View};
use crate::results::Sweep;
use crate::scores::Metric;

const PLOT_H: f64 = 380.0;
const WIDTH: f64 = 900.0;
const MARKER_R: f64 = 5.0;

/// One chart's targets: header indices with their x value, in expansion order, and the fixed
/// values of the sweep's other keys as `(key, value)` text.
type Panel = (Vec<(usize, f64)>, Vec<(String, serde_json::Value)>);

/// Split a sweep into charts: one per combination of the values of its keys after the first.
fn panels(view: &View, sweep: &Sweep) -> Vec<Panel> {
    let mut out: Vec<Panel> = Vec::new();
    for &ti in &sweep.targets {
        let Some(info) = &view.target(ti).sweep else {
            continue;
        };
        let Some(x) = info.values.first().and_then(|(_, v)| v.as_f64()) else {
            continue;
        };
        let rest: Vec<(String, serde_json::Value)> = info.values[1..].to_vec();
        match out.iter_mut().find(|(_, r)| *r == rest) {
            Some((ts, _)) => ts.push((ti, x)),
            None => out.push((vec![(ti, x)], rest)),
        }
    }
    out
}

/// Draw every sweep chart; `Err` entries and the notes say what was skipped.
pub fn charts(view: &View, score: Option<Metric>) -> (Vec<Result<Chart, String>>, Vec<String>) {
    let sweeps = view.results.header.sweeps();
    let metric = score.unwrap_or(super::DEFAULT_HEATMAP_SCORE);
    let mut out = Vec::new();
    for sweep in &sweeps {
        for (targets, rest) in panels(view, sweep) {
            out.push(chart(view, sweep, &targets, &rest, metric));
        }
    }
    (out, Vec::new())
}

/// The file name of one chart of a sweep: `sweep-<label>[-<key>_<value>...].svg`, numbers in
/// their shortest text as in the expanded targets' labels (which are file-name-safe already;
/// any other character becomes `_`).
pub fn file_name(sweep: &str, rest: &[(String, serde_json::Value)]) -> String {
    let number = |v: &serde_json::Value| match (v.as_i64(), v.as_f64()) {
        (Some(i), _) => i.to_string(),
        (None, Some(f)) => crate::settings::number_text(f),
        _ => super::value_text(v),
    };
    let mut name = format!("sweep-{sweep}");
    for (k, v) in rest {
        name.push_str(&format!("-{k}_{}", number(v)));
    }
    let safe: String = name
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || matches!(c, '-' | '_' | '.') {
                c
            } else {
                '_'
            }
        })
        .collect();
    format!("{safe}.svg")
}

/// One series: a cell's points (x, metric value, biased) over the panel's targets.
struct Series {
    style: usize,
    label: String,
    points: Vec<Option<(f64, f64, bool)>>,
}

fn chart(
    view: &View,
    sweep: &Sweep,
    targets: &[(usize, f64)],
    rest: &[(String, serde_json::Value)],
    metric: Metric,
) -> Result<Chart, String> {
    let file = file_name(&sweep.label, rest);
    let key = &sweep.keys[0];
    // One series per distinct cell (style), in grid order.
    let mut series: Vec<Series> = Vec::new();
    for c in view
        .cells
        .iter()
        .filter(|c| targets.iter().any(|(t, _)| *t == c.target))
    {
        if !series.iter().any(|s| s.style == c.style) {
            series.push(Series {
                style: c.style,
                label: c.label.clone(),
                points: vec![None; targets.len()],
            });
        }
        let Some(s) = series.iter_mut().find(|s| s.style == c.style) else {
            continue;
        };
        let Some(k) = targets.iter().position(|(t, _)| *t == c.target) else {
            continue;
        };
        if let Some(v) = metric
            .value(&c.scores)
            .filter(|v| v.is_finite() && *v > 0.0)
        {
            // As the table ranks: a cell with fewer than two finished runs is not judged.
            let biased = c.scores.biased && c.scores.replicates_ok >= 2;
            s.points[k] = Some((targets[k].1, v, biased));
        }
    }
    series.sort_by_key(|s| s.style);
    let values: Vec<f64> = series
        .iter()
        .flat_map(|s| s.points.iter().flatten().map(|p| p.1))
        .collect();
    let fixed = rest
        .iter()
        .map(|(k, v)| format!("{k} = {}", super::value_text(v)))
        .collect::<Vec<_>>()
        .join(", ");
    let at = if fixed.is_empty() {
        String::new()
    } else {
        format!(" at {fixed}")
    };
    if values.is_empty() {
        return Err(format!(
            "{file} skipped: no cell has a positive, finite `{}` on the sweep `{}`{at}.",
            metric.name(),
            sweep.label
        ));
    }
    let title = format!("Sweep {}: {} against {key}{at}", sweep.label, metric.name());
    let width = WIDTH.max(Heading::min_width(&title));
    let mut sub = vec![format!(
        "One line per cell: {} ({}, log scale; {} is better) on each target of the sweep, \
         against its `{key}`. Filled markers: the cell is not flagged biased on that target; \
         hollow markers: it is flagged `biased`. A gap: no positive, finite value there.",
        metric.name(),
        super::metric_description(metric),
        if metric.higher_is_better() {
            "higher"
        } else {
            "lower"
        }
    )];
    if let Some(k) = view.abbreviation_key() {
        sub.push(k);
    }
    let heading = Heading::new(&title, &sub, width);
    let mut legend: Vec<Entry> = series
        .iter()
        .map(|s| {
            let (c, d) = palette::line_style(s.style);
            Entry {
                key: Key::Line(c, d),
                label: s.label.clone(),
            }
        })
        .collect();
    legend.push(Entry {
        key: Key::Point(palette::MUTED, Marker::Circle),
        label: "not biased".into(),
    });
    legend.push(Entry {
        key: Key::Ring(palette::MUTED),
        label: "biased".into(),
    });
    let (_, legend_h) = canvas::legend_layout(&legend, width - 2.0 * canvas::PAD);

    let top = heading.height() + legend_h + 10.0;
    let bottom = top + PLOT_H;
    let y = Axis::new(
        canvas::log_range(values.iter().copied()),
        Scale::Log,
        bottom,
        top,
    );
    let y_ticks = y.ticks(40.0);
    let left = canvas::PAD + canvas::y_gutter(&y_ticks);
    let right = width - canvas::PAD - 12.0;
    let xs: Vec<f64> = targets.iter().map(|(_, x)| *x).collect();
    let (lo, hi) = xs
        .iter()
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), &x| {
            (a.min(x), b.max(x))
        });
    let log_x = lo > 0.0 && hi / lo >= 10.0;
    let x = if log_x {
        // A margin of 6 % of the span on each side, on the log scale.
        let f = ((hi / lo).ln() * 0.06).exp();
        Axis::new((lo / f, hi * f), Scale::Log, left, right)
    } else {
        Axis::new(
            canvas::linear_range(xs.iter().copied(), 0.06),
            Scale::Linear,
            left,
            right,
        )
    };
    let frame = Frame { x, y };
    let x_ticks: Vec<(f64, String)> = xs.iter().map(|&v| (v, canvas::tick_label(v))).collect();
    let notes_top = bottom + canvas::x_gutter() + 6.0;
    let height = notes_top + canvas::PAD;
    let x_title = format!("{key}{}", if log_x { " (log scale)" } else { "" });
    let y_title = format!("{} (log scale)", metric.name());
    let svg = canvas::render(width, height, &title, |area| {
        canvas::draw_heading_and_legend(area, &heading, &legend, width)?;
        canvas::draw_frame(area, &frame, Some(&x_ticks), &y_ticks, &x_title, &y_title)?;
        for s in &series {
            let (c, d) = palette::line_style(s.style);
            // Lines between neighbouring points only: a missing value leaves a gap.
            let mut run: Vec<(f64, f64)> = Vec::new();
            for p in &s.points {
                match p {
                    Some((px, py, _)) => run.push((frame.x.map(*px), frame.y.map(*py))),
                    None => {
                        canvas::polyline(area, &run, c, 2, d)?;
                        run.clear();
                    }
                }
            }
            canvas::polyline(area, &run, c, 2, d)?;
        }
        for s in &series {
            let (c, _) = palette::line_style(s.style);
            for &(px, py, biased) in s.points.iter().flatten() {
                let (cx, cy) = (frame.x.map(px), frame.y.map(py));
                if biased {
                    canvas::ring(area, cx, cy, MARKER_R, c)?;
                } else {
                    canvas::marker(area, Marker::Circle, cx, cy, MARKER_R, c)?;
                }
            }
        }
        Ok(())
    })?;
    Ok(Chart {
        file,
        caption: format!(
            "{} of each cell against `{key}` on the targets of the sweep `{}`{at}; hollow \
             markers are cells flagged biased on that target.",
            metric.name(),
            sweep.label
        ),
        title,
        svg,
    })
}

#[cfg(test)]
mod tests {
    use super::super::{View, testkit};
    use super::*;

    fn hex(c: plotters::style::RGBColor) -> String {
        format!("#{:02X}{:02X}{:02X}", c.0, c.1, c.2)
    }

    #[test]
    fn one_chart_per_sweep_with_hollow_biased_points() {
        let r = testkit::sweep_study();
        let view = View::new(&r);
        let (charts, notes) = charts(&view, None);
        assert!(notes.is_empty(), "{notes:?}");
        assert_eq!(charts.len(), 1);
        let c = charts[0].as_ref().unwrap();
        assert_eq!(c.file, "sweep-g.svg");
        testkit::check_svg(&c.svg).unwrap();
        let texts = testkit::texts(&c.svg);
        for t in [
            "2",
            "5",
            "10",
            "scale=0.5",
            "scale=1.0",
            "biased",
            "not biased",
        ] {
            assert!(texts.iter().any(|x| x == t), "{t} missing from {texts:?}");
        }
        // Style 0 (scale 0.5): no value on d = 5 (every run failed), filled points on d = 2 and
        // 10, and the line broken in two single points; style 1 (scale 1.0): biased on d = 10
        // only, so one hollow point of its colour, and the legend's grey ring.
        let (c0, _) = palette::line_style(0);
        let (c1, _) = palette::line_style(1);
        assert_eq!(testkit::rings(&c.svg, &hex(c1)), 1);
        assert_eq!(testkit::rings(&c.svg, &hex(c0)), 0);
        assert_eq!(testkit::rings(&c.svg, &hex(palette::MUTED)), 1);
        assert_eq!(testkit::filled_circles(&c.svg, &hex(c0)), 2);
        assert_eq!(testkit::filled_circles(&c.svg, &hex(c1)), 2);
    }

    #[test]
    fn multi_key_sweeps_get_a_chart_per_value_of_the_other_keys() {
        let mut r = testkit::sweep_study();
        // Make it a dim x ar1 sweep: g-dim_2 and g-dim_10 at ar1 = 0, g-dim_5 at ar1 = 0.5.
        for (t, ar1) in r.header.targets.iter_mut().take(3).zip([0.0, 0.5, 0.0]) {
            if let Some(s) = &mut t.sweep {
                s.values.push(("ar1".into(), serde_json::json!(ar1)));
            }
        }
        let view = View::new(&r);
        let (charts, _) = charts(&view, Some(Metric::RmseMean));
        let files: Vec<String> = charts
            .iter()
            .map(|c| match c {
                Ok(c) => c.file.clone(),
                Err(e) => e.clone(),
            })
            .collect();
        assert_eq!(files.len(), 2, "{files:?}");
        assert_eq!(files[0], "sweep-g-ar1_0.svg");
        // ar1 = 0.5 has only g-dim_5, whose scale-0.5 runs all failed: its scale-1.0 cell
        // still has an rmse.
        assert_eq!(files[1], "sweep-g-ar1_0.5.svg");
    }

    #[test]
    fn a_study_without_sweeps_has_no_sweep_chart() {
        let r = testkit::demo_study();
        let (charts, notes) = charts(&View::new(&r), None);
        assert!(charts.is_empty() && notes.is_empty());
    }
}
