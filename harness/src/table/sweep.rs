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

#[cfg(test)]
mod tests {
    use super::super::{TableView, rank, render_csv, render_json, render_markdown_view};
    use crate::plot::testkit;
    use crate::scores::Metric;

    /// The markdown table rows of the section that starts with `heading`.
    fn section_rows(md: &str, heading: &str) -> Vec<Vec<String>> {
        let start = md
            .find(heading)
            .unwrap_or_else(|| panic!("{heading} in\n{md}"));
        md[start..]
            .lines()
            .skip_while(|l| !l.starts_with('|'))
            .take_while(|l| l.starts_with('|'))
            .map(|l| {
                l.trim_matches('|')
                    .split('|')
                    .map(|c| c.trim().to_string())
                    .collect()
            })
            .collect()
    }

    #[test]
    fn sweep_table_has_a_column_per_swept_value_and_the_flags() {
        let r = testkit::sweep_study();
        let ranking = rank(&r, Metric::EssPerSecond);
        let md = render_markdown_view(&r, &ranking, TableView::Auto);
        let rows = section_rows(&md, "### Sweep g (gaussian, 3 targets over dim)");
        assert_eq!(
            rows[0],
            ["proposal_scale", "dim = 2", "dim = 5", "dim = 10"].map(String::from)
        );
        // rows[1] is the markdown separator; then the cells in grid order.
        assert_eq!(rows.len(), 4);
        assert_eq!(rows[2][0], "0.5");
        assert_eq!(rows[3][0], "1.0");
        // Every run of scale 0.5 on d = 5 failed: no value, both flags.
        assert_eq!(rows[2][2], "– (too-few-runs, failed-runs)");
        // Scale 1.0 is biased on d = 10 only: the fixture shifts one coordinate by 1 where each
        // replicate's estimate has sd 1/sqrt(80) = 0.11, so over 6 replicates z is about 20, far
        // beyond the flag's p <= 0.001; the unshifted cells are flagged with probability at most
        // 0.001 each, and the fixture's seed is fixed.
        assert!(rows[3][3].contains("biased"), "{}", rows[3][3]);
        assert!(!rows[3][1].contains("biased") && !rows[3][2].contains("biased"));
        assert!(!rows[2][3].contains("biased"));
        // The unbiased winner on d = 10 is in bold.
        assert!(rows[2][3].starts_with("**"), "{}", rows[2][3]);
        // Auto: the target outside the sweep keeps its full table; swept ones do not get one.
        assert!(md.contains("### lone (gaussian"), "{md}");
        assert!(!md.contains("### g-dim_2"), "{md}");
        assert!(md.contains(super::LEGEND));

        let targets = render_markdown_view(&r, &ranking, TableView::Targets);
        assert!(targets.contains("### g-dim_2 (gaussian") && !targets.contains("### Sweep"));
        assert!(!targets.contains(super::LEGEND));
        let sweeps = render_markdown_view(&r, &ranking, TableView::Sweeps);
        assert!(sweeps.contains("### Sweep g") && !sweeps.contains("### lone"));
    }

    #[test]
    fn csv_and_json_carry_the_sweep_membership() {
        let r = testkit::sweep_study();
        let ranking = rank(&r, Metric::EssPerSecond);
        let csv = render_csv(&r, &ranking);
        let mut lines = csv.lines();
        let head: Vec<&str> = lines.next().unwrap().split(',').collect();
        assert_eq!(
            &head[..4],
            ["target", "sweep", "sweep_dim", "proposal_scale"]
        );
        let rows: Vec<Vec<&str>> = lines.map(|l| l.split(',').collect()).collect();
        assert!(
            rows.iter()
                .any(|r| r[0] == "g-dim_10" && r[1] == "g" && r[2] == "10")
        );
        assert!(
            rows.iter()
                .any(|r| r[0] == "lone" && r[1].is_empty() && r[2].is_empty())
        );
        let json = render_json(&ranking);
        let rows = json["rows"].as_array().unwrap();
        let swept = rows.iter().find(|r| r["target"] == "g-dim_5").unwrap();
        assert_eq!(swept["sweep"]["label"], "g");
        assert_eq!(swept["sweep"]["values"]["dim"], 5);
        let lone = rows.iter().find(|r| r["target"] == "lone").unwrap();
        assert!(lone.get("sweep").is_none());
        // A study without sweeps keeps its CSV columns.
        let demo = testkit::demo_study();
        let csv = render_csv(&demo, &rank(&demo, Metric::EssPerSecond));
        assert!(!csv.lines().next().unwrap().contains("sweep"));
    }
}
