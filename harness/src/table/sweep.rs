//! Rendering of a sweep table: for one sweep, one row per cell and one column per target of
//! the sweep (one swept value, or combination of values), each entry the ranking metric of
//! the cell on that target with its flags, so that a reader sees along the row where a
//! configuration stops working. Only formats what [`super::rank`] decided.

use std::fmt::Write as _;

use serde_json::{Map, Value};
use tabled::builder::Builder;
use tabled::settings::Style;

use super::{FLAG_BIASED, FLAG_TIE, FLAG_TOO_FEW, Ranking, Row, fmt_num};
use crate::results::{Results, Sweep, value_text};

/// The legend printed under the tables when at least one sweep table was printed.
pub const LEGEND: &str = "\
Sweep tables: one row per cell, one column per target of the sweep (its swept values); each \
entry is the cell's ranking metric on that target followed by its flags in brackets, in bold \
where the cell ranks first on that target without being biased; `–` where the metric has no \
value (e.g. every run failed). The `tie` flag is left out (it compares cells within one \
target); `assay table --view targets` prints every target's full table.";

/// The column heading of a target of a sweep: its swept values, e.g. `dim = 10, ar1 = 0.9`.
pub fn column_heading(results: &Results, target: usize) -> String {
    results.header.targets[target]
        .sweep
        .as_ref()
        .map(|s| {
            s.values
                .iter()
                .map(|(k, v)| format!("{k} = {}", value_text(v)))
                .collect::<Vec<_>>()
                .join(", ")
        })
        .unwrap_or_else(|| results.header.targets[target].label.clone())
}

/// Position of a cell's settings in the grid (index of its value on each axis), so that rows
/// come in the study file's order.
fn grid_order(results: &Results, settings: &Map<String, Value>) -> Vec<usize> {
    results
        .header
        .study
        .grid
        .iter()
        .map(|(k, vals)| {
            settings
                .get(k)
                .and_then(|v| vals.iter().position(|x| x == v))
                .unwrap_or(usize::MAX)
        })
        .collect()
}

/// One entry of the table: the metric and the row's flags (without `tie`).
fn entry(row: Option<&Row>) -> String {
    let Some(r) = row else {
        return "(no runs)".to_string();
    };
    let value = r
        .metric_value
        .map_or_else(|| "–".to_string(), |v| fmt_num(v, 3));
    let top = r.rank == 1
        && !r
            .flags
            .iter()
            .any(|f| *f == FLAG_BIASED || *f == FLAG_TOO_FEW);
    let value = if top && r.metric_value.is_some() {
        format!("**{value}**")
    } else {
        value
    };
    let flags: Vec<&str> = r.flags.iter().copied().filter(|f| *f != FLAG_TIE).collect();
    if flags.is_empty() {
        value
    } else {
        format!("{value} ({})", flags.join(", "))
    }
}

/// The markdown section of one sweep. `axes` are the grid axes with more than one value (the
/// row labels).
pub fn render_markdown(
    results: &Results,
    ranking: &Ranking,
    sweep: &Sweep,
    axes: &[String],
) -> String {
    let header = &results.header;
    let labels: Vec<&str> = sweep
        .targets
        .iter()
        .map(|&i| header.targets[i].label.as_str())
        .collect();
    let rows: Vec<&Row> = ranking
        .rows
        .iter()
        .filter(|r| labels.contains(&r.target.as_str()))
        .collect();
    let mut out = String::new();
    let first = &header.targets[sweep.targets[0]];
    let _ = writeln!(
        out,
        "### Sweep {} ({}, {} target{} over {})\n",
        sweep.label,
        first.family,
        sweep.targets.len(),
        if sweep.targets.len() == 1 { "" } else { "s" },
        sweep.keys.join(" × ")
    );
    if rows.is_empty() {
        let _ = writeln!(out, "No runs of this sweep's targets.\n");
        return out;
    }
    let metric = ranking.metric;
    let _ = writeln!(
        out,
        "`{}` of each cell ({} is better) on each target of the sweep, with its flags.\n",
        metric.name(),
        if metric.higher_is_better() {
            "higher"
        } else {
            "lower"
        }
    );
    // Distinct cells in grid order.
    let mut cells: Vec<&Map<String, Value>> = Vec::new();
    for r in &rows {
        if !cells.contains(&&r.settings) {
            cells.push(&r.settings);
        }
    }
    cells.sort_by_key(|s| grid_order(results, s));
    let mut b = Builder::default();
    let mut head: Vec<String> = if axes.is_empty() {
        vec!["cell".to_string()]
    } else {
        axes.to_vec()
    };
    head.extend(sweep.targets.iter().map(|&i| column_heading(results, i)));
    b.push_record(head);
    for settings in cells {
        let mut rec: Vec<String> = if axes.is_empty() {
            vec!["the only cell".to_string()]
        } else {
            axes.iter()
                .map(|a| settings.get(a).map_or_else(String::new, value_text))
                .collect()
        };
        for label in &labels {
            let row = rows
                .iter()
                .find(|r| r.target == *label && r.settings == *settings)
                .copied();
            rec.push(entry(row));
        }
        b.push_record(rec);
    }
    let mut table = b.build();
    table.with(Style::markdown());
    let _ = writeln!(out, "{table}\n");
    out
}
