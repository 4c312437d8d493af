//! The study report: `report.md`, opening with the recommended configuration, then the study's
//! settings, the ranked tables, the flags in words (biased cells, overconfident ESS, failed runs
//! with their error messages, ties) and the charts of [`crate::plot`], written next to it and embedded by relative path.

use std::collections::BTreeMap;
use std::fmt::Write as _;
use std::path::{Path, PathBuf};

use crate::plot::{self, ChartSet, PlotError};
use crate::recommend::{self, DEFAULT_RECOMMEND_BY, RecommendBy};
use crate::results::{Results, value_text};
use crate::scores::{BIAS_ALPHA, BIAS_MIN_SHARE, Metric, OVERCONFIDENCE_FACTOR};
use crate::table::{
    self, DEFAULT_METRIC, FLAG_BIASED, FLAG_OVERCONFIDENT, FLAG_TIE, Ranking, Row, fmt_num,
};

/// File name of the report.
pub const FILE: &str = "report.md";
/// Longest error message quoted in full.
const MAX_MESSAGE: usize = 300;
/// At most this many cells are listed under one flag.
const MAX_LISTED: usize = 40;

/// Write the charts and `report.md` into `dir` (created if missing); returns the report's path
/// and the charts. `metric` ranks the tables (default [`DEFAULT_METRIC`]); `by` is the rule of
/// the recommended configuration that opens the report (default [`DEFAULT_RECOMMEND_BY`]).
pub fn write_report(
    results: &Results,
    dir: &Path,
    metric: Option<Metric>,
    by: Option<RecommendBy>,
) -> Result<(PathBuf, ChartSet), PlotError> {
    let charts = plot::write_charts(results, dir, None)?;
    let text = render(
        results,
        &charts,
        metric.unwrap_or(DEFAULT_METRIC),
        by.unwrap_or(DEFAULT_RECOMMEND_BY),
    );
    let path = dir.join(FILE);
    crate::results::write_atomically(&path, text.as_bytes()).map_err(|e| PlotError {
        path: path.clone(),
        message: format!("cannot write the report: {e}"),
    })?;
    Ok((path, charts))
}

/// Text for a markdown table cell.
fn cell(s: &str) -> String {
    s.replace('|', "\\|").replace(['\n', '\r'], " ")
}

/// Inline code, safe for any text (backticks are replaced, long text is cut).
fn code(s: &str) -> String {
    let mut t: String = s.replace('`', "'").replace(['\n', '\r'], " ");
    if t.chars().count() > MAX_MESSAGE {
        t = t.chars().take(MAX_MESSAGE).collect::<String>() + " …";
    }
    format!("`{t}`")
}

/// Render the report (no I/O). It opens with the recommended configuration under `by`.
pub fn render(results: &Results, charts: &ChartSet, metric: Metric, by: RecommendBy) -> String {
    let h = &results.header;
    let study = &h.study;
    let mut o = String::new();
    let _ = writeln!(o, "# Study report: `{}`\n", study.name.replace('`', "'"));
    let ok = results.runs.iter().filter(|r| r.output.is_ok()).count();
    let failed = results.runs.len() - ok;
    let _ = writeln!(
        o,
        "Results file {}: {} run record{} ({ok} finished, {failed} failed).{}\n",
        code(&results.path.display().to_string()),
        results.runs.len(),
        if results.runs.len() == 1 { "" } else { "s" },
        if results.torn_tail {
            " The file's last line was cut off by an interrupted write and was skipped."
        } else {
            ""
        }
    );

    let ranking = table::rank(results, metric);
    let rec = recommend::recommend(results, &ranking, by);
    o.push_str(&recommend::render::markdown(results, &rec, 2));

    // Settings.
    let _ = writeln!(o, "## Settings\n");
    let _ = writeln!(o, "| setting | value |\n|---|---|");
    let _ = writeln!(o, "| name | {} |", cell(&study.name));
    let _ = writeln!(o, "| replicates per cell | {} |", study.replicates);
    let _ = writeln!(o, "| master seed | {} |", study.seed);
    let _ = writeln!(
        o,
        "| time limit per run | {} |\n",
        study
            .timeout_s
            .map_or("none".to_string(), |s| format!("{} s", fmt_num(s, 3)))
    );
    let _ = writeln!(
        o,
        "Sampler settings common to every cell (the `[sampler]` table; unset keys take their defaults):\n"
    );
    if study.sampler.is_empty() {
        let _ = writeln!(o, "(empty: every setting at its default)\n");
    } else {
        let _ = writeln!(o, "| key | value |\n|---|---|");
        for (k, v) in &study.sampler {
            let _ = writeln!(o, "| {} | {} |", cell(k), cell(&value_text(v)));
        }
        let _ = writeln!(o);
    }
    let n_cells: usize = study.grid.iter().map(|(_, v)| v.len()).product();
    let _ = writeln!(
        o,
        "Grid ({n_cells} cell{} per target):\n",
        if n_cells == 1 { "" } else { "s" }
    );
    if study.grid.is_empty() {
        let _ = writeln!(o, "(no grid axes: a single cell)\n");
    } else {
        let _ = writeln!(o, "| axis | values |\n|---|---|");
        for (k, vals) in &study.grid {
            let vs: Vec<String> = vals.iter().map(value_text).collect();
            let _ = writeln!(o, "| {} | {} |", cell(k), cell(&vs.join(", ")));
        }
        let _ = writeln!(o);
    }
    let _ = writeln!(
        o,
        "Targets:\n\n| label | family | dimension | log Z |\n|---|---|---|---|"
    );
    for t in &h.targets {
        let _ = writeln!(
            o,
            "| {} | {} | {} | {} |",
            cell(&t.label),
            cell(&t.family),
            t.dim,
            t.log_z.map_or("unknown".to_string(), |z| fmt_num(z, 6))
        );
    }
    let _ = writeln!(o);

    // Ranked tables.
    let _ = writeln!(o, "## Ranking\n");
    if ranking.rows.is_empty() {
        let _ = writeln!(
            o,
            "No cells to rank: the results file has no run records.\n"
        );
    } else {
        // The table's own headings, one level down so that they sit under this section.
        for line in table::render_markdown(results, &ranking).lines() {
            if line.starts_with('#') {
                let _ = writeln!(o, "#{line}");
            } else {
                let _ = writeln!(o, "{line}");
            }
        }
        let _ = writeln!(o);
    }

    if study.race.is_some() {
        racing(&mut o, results, &ranking);
    }

    // Flags in words.
    let _ = writeln!(o, "## Flags\n");
    flags(&mut o, results, &ranking);

    // Charts.
    let _ = writeln!(o, "## Charts\n");
    if charts.charts.is_empty() {
        let _ = writeln!(o, "No charts could be drawn.\n");
    }
    for c in &charts.charts {
        let alt = c.title.replace(['[', ']'], "");
        let _ = writeln!(
            o,
            "### {}\n\n{}\n\n![{alt}]({})\n",
            c.title, c.caption, c.file
        );
    }
    if !charts.notes.is_empty() {
        let _ = writeln!(o, "Notes on the charts:\n");
        for n in &charts.notes {
            let _ = writeln!(o, "- {}", n.replace(['\n', '\r'], " "));
        }
        let _ = writeln!(o);
    }
    o
}

/// The racing section: the rules, the runs spent, and round by round what was eliminated and
/// why.
fn racing(o: &mut String, results: &Results, ranking: &Ranking) {
    let Some(race) = &results.header.study.race else {
        return;
    };
    let study = &results.header.study;
    let n_cells: usize = study.grid.iter().map(|(_, v)| v.len()).product();
    let full = results.header.targets.len() * n_cells * study.replicates as usize;
    // Files raced before the permutation test record no comparison: theirs was a bootstrap,
    // whose Holm family did not count the best cell.
    let resamples = race.resamples;
    let (comparison, family) = match race.comparison.as_deref() {
        Some("permutation") => (
            format!(
                "permutation (the two cells' runs pooled and split at random, at least \
                 {resamples} splits)"
            ),
            "the cells of a target and the round's best cell itself",
        ),
        Some(other) => (other.to_string(), "the cells of a target"),
        None => (
            format!("percentile-bootstrap ({resamples} resamples)"),
            "the cells of a target",
        ),
    };
    // The failure rule came with the permutation test.
    let failures = if race.comparison.is_some() {
        ", or when its runs failed significantly more often than half the time (a one-sided \
         binomial test, at the metric's level and with its own Holm family)"
    } else {
        ""
    };
    let _ = writeln!(o, "## Racing\n");
    let _ = writeln!(
        o,
        "The study was raced: round 1 ran {} replicates of every cell; after each round, on \
         each target, a cell was eliminated when it was significantly biased (the `biased` \
         flag's tests, at a total level of {} over all rounds) or when its `{}` was \
         significantly worse than that of the round's best unbiased cell (a one-sided {} \
         test of the ratio of the two cells' metric, at a total level of {}){failures}. Round r is held \
         to alpha × 2^-r, with Holm's procedure over {}, so the levels of all rounds sum to \
         less than alpha. Each later round doubled \
         the survivors' replicates (at most {}); a target with one cell left stopped being \
         decided on, and its last cell ran on to the maximum. It made {} of the full grid's \
         {full} runs ({}).\n",
        race.start,
        fmt_num(race.bias_alpha, 2),
        race.metric,
        comparison,
        fmt_num(race.worse_alpha, 2),
        family,
        study.replicates,
        results.runs.len(),
        if results.runs.is_empty() {
            "none".to_string()
        } else {
            format!(
                "{}× fewer",
                fmt_num(full as f64 / results.runs.len() as f64, 3)
            )
        }
    );
    if let (Some(by), Some(alpha)) = (&race.recommend_by, race.recommend_alpha) {
        let _ = writeln!(
            o,
            "The race kept the recommendation open: a cell that could still be the recommended \
             configuration (by `{by}`) was not eliminated as worse on any target. A cell left \
             the recommendation after the round in which it was eliminated as biased or had \
             failed runs on some target, or in which its `{by}` relative efficiency over the \
             targets was significantly below the leading cell's (a one-sided {comparison} \
             test on every target at once, at a total level of {} over all rounds, alpha × \
             2^-r with Holm in round r); only then could the rule above eliminate it where it \
             was worse.\n",
            fmt_num(alpha, 2)
        );
    }
    let mut rounds: Vec<u64> = results.eliminations.iter().map(|e| e.round).collect();
    rounds.sort_unstable();
    rounds.dedup();
    if rounds.is_empty() {
        let _ = writeln!(o, "No cell was eliminated.\n");
        return;
    }
    let axes: Vec<String> = plot::varying_axes(&study.grid)
        .into_iter()
        .map(|a| a.name)
        .collect();
    let metric = Metric::parse(&race.metric).unwrap_or(DEFAULT_METRIC);
    for r in rounds {
        let mine: Vec<String> = ranking
            .rows
            .iter()
            .filter(|row| row.eliminated.as_ref().is_some_and(|e| e.round == r))
            .map(|row| {
                let e = row.eliminated.as_ref().map(|e| {
                    let ratio = e
                        .statistic
                        .map(|x| match e.reason {
                            crate::results::EliminationReason::Biased => {
                                format!(", bias share {}", fmt_num(x, 2))
                            }
                            crate::results::EliminationReason::Worse => {
                                format!(", {}× worse", fmt_num(x, 3))
                            }
                            // The reason's text already counts the failed runs.
                            crate::results::EliminationReason::Failed => String::new(),
                        })
                        .unwrap_or_default();
                    let exit = e
                        .left_recommendation
                        .as_ref()
                        .map(|x| format!("; {}", table::exit_text(x, &axes)))
                        .unwrap_or_default();
                    format!(
                        "{}{ratio}, held to {}{exit}",
                        table::elimination_reason_text(e, &axes, metric),
                        fmt_num(e.level, 2)
                    )
                });
                format!("{}: {}", describe(results, row), e.unwrap_or_default())
            })
            .collect();
        let _ = writeln!(
            o,
            "**Round {r}** ({} cell{} eliminated):\n",
            mine.len(),
            if mine.len() == 1 { "" } else { "s" }
        );
        list_capped(o, &mine);
    }
}

/// Full description of a row's cell from the varying grid axes.
fn describe(results: &Results, r: &Row) -> String {
    let axes = plot::varying_axes(&results.header.study.grid);
    format!("**{}**, {}", r.target, plot::long_label(&axes, &r.settings))
}

fn opt(x: Option<f64>) -> String {
    x.map_or_else(|| "–".to_string(), |v| fmt_num(v, 3))
}

fn list_capped(o: &mut String, lines: &[String]) {
    for l in lines.iter().take(MAX_LISTED) {
        let _ = writeln!(o, "- {l}");
    }
    if lines.len() > MAX_LISTED {
        let _ = writeln!(
            o,
            "- … and {} more (see the tables above).",
            lines.len() - MAX_LISTED
        );
    }
    let _ = writeln!(o);
}

/// End of a flag's lead-in sentence.
fn lead(empty: bool) -> &'static str {
    if empty { ": none." } else { ":" }
}

fn flags(o: &mut String, results: &Results, ranking: &Ranking) {
    let rows = &ranking.rows;
    // Biased.
    let biased: Vec<String> = rows
        .iter()
        .filter(|r| r.flags.contains(&FLAG_BIASED))
        .map(|r| {
            format!(
                "{}: bias p = {}, share of the error = {} (worst mean coordinate {} standard \
                 errors off; estimated log E[Z-hat]/Z = {})",
                describe(results, r),
                opt(r.scores.bias_p),
                opt(r.scores.bias_share),
                opt(r.scores.bias_z),
                opt(r.scores.log_z_bias)
            )
        })
        .collect();
    let _ = writeln!(
        o,
        "**Biased cells** (a posterior-mean coordinate, or the evidence on the Z scale, is off its reference value with p ≤ {} for the cell, Bonferroni over its quantities, and the bias is more than {} of that quantity's mean squared error; an unbiased cell is flagged with probability at most {}; such cells rank below every unbiased cell){}\n",
        fmt_num(BIAS_ALPHA, 2),
        fmt_num(BIAS_MIN_SHARE, 2),
        fmt_num(BIAS_ALPHA, 2),
        lead(biased.is_empty())
    );
    if !biased.is_empty() {
        list_capped(o, &biased);
    }
    // Overconfident ESS.
    let over: Vec<String> = rows
        .iter()
        .filter(|r| r.flags.contains(&FLAG_OVERCONFIDENT))
        .map(|r| {
            let ratio = match (r.scores.kish_ess, r.scores.variance_ess) {
                (Some(k), Some(v)) if v > 0.0 => format!(" ({}×)", fmt_num(k / v, 2)),
                _ => String::new(),
            };
            format!(
                "{}: Kish ESS {} against a variance-implied ESS of {}{ratio}",
                describe(results, r),
                opt(r.scores.kish_ess),
                opt(r.scores.variance_ess)
            )
        })
        .collect();
    let _ = writeln!(
        o,
        "**Overconfident ESS** (the sampler's own Kish ESS is more than {} times the ESS implied by its actual error across replicates, so its ESS should not be trusted){}\n",
        fmt_num(OVERCONFIDENCE_FACTOR, 2),
        lead(over.is_empty())
    );
    if !over.is_empty() {
        list_capped(o, &over);
    }
    // Failures, with messages deduplicated.
    let failed_rows: Vec<String> = rows
        .iter()
        .filter(|r| r.scores.replicates_failed > 0)
        .map(|r| {
            let n = r.scores.replicates_ok + r.scores.replicates_failed;
            format!(
                "{}: {} of {n} replicates failed{}",
                describe(results, r),
                r.scores.replicates_failed,
                match r.scores.replicates_ok {
                    0 => " (no finished run: the cell is unscored and ranked last)",
                    1 => " (one finished run: too few to judge bias or spread; ranked last, `too-few-runs`)",
                    _ => "",
                }
            )
        })
        .collect();
    let mut messages: BTreeMap<String, (usize, std::collections::BTreeSet<String>)> =
        BTreeMap::new();
    for r in results.runs.iter().filter(|r| !r.output.is_ok()) {
        let m = r
            .output
            .error
            .clone()
            .unwrap_or_else(|| "(no message)".to_string());
        let e = messages.entry(m).or_default();
        e.0 += 1;
        e.1.insert(format!("{}\0{}", r.target, r.cell_key()));
    }
    let _ = writeln!(
        o,
        "**Failed runs** (replicates that stopped with an error; their estimates are never scored){}\n",
        lead(failed_rows.is_empty())
    );
    let all_failed = !rows.is_empty() && rows.iter().all(|r| r.scores.replicates_ok == 0);
    if all_failed {
        let _ = writeln!(
            o,
            "Every run failed: none of the {} cells has a finished run, so nothing could be scored or charted.\n",
            rows.len()
        );
    } else if !failed_rows.is_empty() {
        list_capped(o, &failed_rows);
    }
    if !failed_rows.is_empty() {
        let mut by_count: Vec<(&String, &(usize, std::collections::BTreeSet<String>))> =
            messages.iter().collect();
        by_count.sort_by(|a, b| b.1.0.cmp(&a.1.0).then_with(|| a.0.cmp(b.0)));
        let _ = writeln!(
            o,
            "Error messages, each listed once:\n\n| runs | cells | message |\n|---|---|---|"
        );
        for (m, (n, cells)) in by_count {
            let _ = writeln!(o, "| {n} | {} | {} |", cells.len(), cell(&code(m)));
        }
        let _ = writeln!(o);
    }
    // Ties.
    let ties: Vec<String> = rows
        .iter()
        .filter(|r| r.flags.contains(&FLAG_TIE))
        .map(|r| {
            let best = rows.iter().find(|b| b.target == r.target && b.rank == 1);
            format!(
                "{} (rank {}): its 95 % interval of `{}` overlaps that of the top cell{}",
                describe(results, r),
                r.rank,
                ranking.metric.name(),
                best.map_or(String::new(), |b| format!(
                    " ({})",
                    plot::long_label(&plot::varying_axes(&results.header.study.grid), &b.settings)
                ))
            )
        })
        .collect();
    let _ = writeln!(
        o,
        "**Ties** (cells that cannot be told apart from their target's top cell at this number of replicates){}\n",
        lead(ties.is_empty())
    );
    if !ties.is_empty() {
        list_capped(o, &ties);
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::plot::testkit;

    fn report_of(r: &Results) -> String {
        let charts = plot::render_charts(r, None);
        render(r, &charts, DEFAULT_METRIC, DEFAULT_RECOMMEND_BY)
    }

    #[test]
    fn demo_report_has_settings_tables_flags_and_charts() {
        let r = testkit::demo_study();
        let md = report_of(&r);
        assert!(md.starts_with("# Study report: `demo`"));
        // The recommendation opens the report, before the settings.
        let rec = md
            .find("## Recommended configuration")
            .expect("recommendation");
        assert!(rec < md.find("## Settings").unwrap());
        assert!(md[..rec].lines().all(|l| !l.starts_with("## ")));
        assert!(md.contains("| replicates per cell | 8 |"));
        assert!(md.contains("| master seed | 7 |"));
        assert!(md.contains("| particles | 400 |"), "sampler table");
        assert!(md.contains("| proposal_scale | 0.25, 0.5, 1.0 |"), "grid");
        assert!(md.contains("#### corr-gauss-10"), "ranked table per target");
        assert!(
            md.contains("### Study `demo`"),
            "table headings sit under the ranking section"
        );
        assert!(md.contains("![Accuracy against cost: rmse_mean per cell](error-vs-cost.svg)"));
        assert!(md.contains("(traces.svg)") && md.contains("(evidence-error.svg)"));
        assert!(md.contains("(heatmap-proposal_scale-move.svg)"));
        // Flags in words.
        assert!(md.contains("**Biased cells**"));
        assert!(
            md.contains("**banana-2**, proposal_scale = 1.0, move = random-walk, path = static"),
            "{md}"
        );
        assert!(md.contains("**Overconfident ESS**") && md.contains("Kish ESS"));
        assert!(md.contains("3 of 8 replicates failed"));
        assert!(
            md.contains("| 2 | 1 | `weights degenerate: ESS fell to 0 at iteration 9` |"),
            "{md}"
        );
        assert!(md.contains("| 1 | 1 | `deadline passed after 60 s` |"));
        assert!(md.contains("**Ties**"));
    }

    #[test]
    fn edge_case_reports_do_not_panic() {
        let md = report_of(&testkit::empty_study());
        assert!(md.contains("No cells to rank"));
        assert!(md.contains("No charts could be drawn"));
        let md = report_of(&testkit::failed_study());
        assert!(
            md.contains("| 192 | 24 | `engine not implemented yet` |"),
            "{md}"
        );
        assert!(md.contains("Every run failed: none of the 24 cells"));
        assert!(md.contains("skipped"));
        let md = report_of(&testkit::single_cell_study());
        assert!(md.contains("(no grid axes: a single cell)"));
        assert!(md.contains("No heat map"));
        let md = report_of(&testkit::one_axis_study());
        assert!(md.contains("only one (`particles`)"));
    }

    #[test]
    fn messages_are_made_safe_for_markdown() {
        let mut r = testkit::single_cell_study();
        r.runs[0].output = crate::sampler::RunOutput::failed("bad | pipe `tick`\nnewline");
        let md = report_of(&r);
        assert!(md.contains("`bad \\| pipe 'tick' newline`"), "{md}");
    }

    #[test]
    fn write_report_writes_files_and_names_bad_paths() {
        let r = testkit::demo_study();
        let dir = std::env::temp_dir().join(format!("assay-report-{}", std::process::id()));
        let (path, charts) = write_report(&r, &dir, None, None).unwrap();
        let md = std::fs::read_to_string(&path).unwrap();
        for c in &charts.charts {
            assert!(dir.join(&c.file).exists());
            assert!(md.contains(&format!("]({})", c.file)));
        }
        let blocker = dir.join("report.md");
        let e = write_report(&r, &blocker, None, None).unwrap_err();
        assert!(e.to_string().contains("report.md"), "{e}");
        let _ = std::fs::remove_dir_all(&dir);
    }
}
