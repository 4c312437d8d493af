//! Ranking scored cells and rendering the ranked table (markdown, CSV, JSON).
//! Analysis ([`rank`]) and rendering ([`render_markdown`], [`render_csv`], [`render_json`],
//! and the sweep tables in [`sweep`]) are separate: the renderers only format what the ranking
//! decided.

use std::fmt::Write as _;

use serde_json::{Map, Value, json};
use tabled::builder::Builder;
use tabled::settings::Style;

use crate::results::{
    Elimination, EliminationReason, ExitReason, RecommendationExit, Results, SweepInfo, TargetInfo,
    value_text,
};
use crate::scores::{
    CellScores, Metric, OVERCONFIDENCE_FACTOR, ScoredCell, bootstrap_interval, score_results,
};
use crate::settings::SamplerSettings;

pub mod sweep;

pub use crate::scores::DEFAULT_METRIC;

/// The metric a file is ranked by when none is asked: a raced file's own (the one its cells
/// were compared by), else [`DEFAULT_METRIC`].
pub fn default_metric(results: &Results) -> Metric {
    results
        .header
        .study
        .race
        .as_ref()
        .and_then(|r| Metric::parse(&r.metric))
        .unwrap_or(DEFAULT_METRIC)
}

/// Marks that apply to a row.
pub const FLAG_BIASED: &str = "biased";
pub const FLAG_TIE: &str = "tie";
pub const FLAG_OVERCONFIDENT: &str = "overconfident-ess";
pub const FLAG_FAILED_RUNS: &str = "failed-runs";
pub const FLAG_TOO_FEW: &str = "too-few-runs";

/// One ranked row.
#[derive(Debug, Clone)]
pub struct Row {
    pub target: String,
    pub settings: Map<String, Value>,
    pub rank: usize,
    pub flags: Vec<&'static str>,
    pub scores: CellScores,
    /// The ranking metric's value and its 95 % bootstrap interval.
    pub metric_value: Option<f64>,
    pub interval: Option<(f64, f64)>,
    /// In a raced study: why and when the cell left the race (`None`: it survived).
    pub eliminated: Option<Elimination>,
    /// The target's sweep membership, when it is one of a sweep's expanded targets.
    pub sweep: Option<SweepInfo>,
}

/// Which markdown tables to print.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum TableView {
    /// One sweep table per sweep (a row per cell, a column per swept value) and the full
    /// per-target table for every target outside a sweep.
    Auto,
    /// The full per-target table for every target, swept or not.
    Targets,
    /// Only the sweep tables.
    Sweeps,
}

/// A ranked study: rows grouped by target (header order), ranked 1..k within each target.
#[derive(Debug, Clone)]
pub struct Ranking {
    pub metric: Metric,
    pub rows: Vec<Row>,
    /// The study was raced.
    pub raced: bool,
    /// Every cell's scores and runs, as [`score_results`] gave them to the ranking: for the
    /// bootstraps that follow it (the recommendation's ratio), so that a file is scored once.
    pub scored: Vec<ScoredCell>,
}

/// Rank the cells of a results file by `metric`. Within a target, in classes: unbiased cells
/// with a value of the metric, then biased ones, then cells without a value, then cells with
/// fewer than two finished runs (`too-few-runs`: no bias or spread can be judged from one run);
/// by the metric within a class. An unbiased cell whose interval overlaps the interval of the
/// first row, when that row is unbiased, is marked as a tie. In a raced study the cells
/// eliminated from the race rank below the survivors, the latest eliminated first, and are
/// never ties.
pub fn rank(results: &Results, metric: Metric) -> Ranking {
    let cells = score_results(results);
    let mut rows = Vec::with_capacity(cells.len());
    for t in &results.header.targets {
        let mine: Vec<&ScoredCell> = cells.iter().filter(|c| c.target == t.label).collect();
        let out: Vec<&Elimination> = results
            .eliminations
            .iter()
            .filter(|e| e.target == t.label)
            .collect();
        rows.extend(rank_target(t, &mine, metric, &out));
    }
    Ranking {
        metric,
        rows,
        raced: results.header.study.race.is_some(),
        scored: cells,
    }
}

fn rank_target(
    t: &TargetInfo,
    cells: &[&ScoredCell],
    metric: Metric,
    eliminations: &[&Elimination],
) -> Vec<Row> {
    let mut rows: Vec<(u8, Row)> = cells
        .iter()
        .map(|c| {
            let value = metric.value(&c.scores).filter(|v| !v.is_nan());
            let too_few = c.scores.replicates_ok < 2;
            let biased = !too_few && c.scores.biased;
            let mut flags = Vec::new();
            if too_few {
                flags.push(FLAG_TOO_FEW);
            }
            if biased {
                flags.push(FLAG_BIASED);
            }
            if let (Some(k), Some(v)) = (c.scores.kish_ess, c.scores.variance_ess)
                && k > OVERCONFIDENCE_FACTOR * v
            {
                flags.push(FLAG_OVERCONFIDENT);
            }
            if c.scores.replicates_failed > 0 {
                flags.push(FLAG_FAILED_RUNS);
            }
            let class = match (too_few, value, biased) {
                (true, _, _) => 3,
                (_, None, _) => 2,
                (_, Some(_), true) => 1,
                _ => 0,
            };
            let key = crate::results::cell_key(&c.settings);
            let eliminated = eliminations
                .iter()
                .find(|e| e.cell_key() == key)
                .map(|e| (*e).clone());
            (
                class,
                Row {
                    target: t.label.clone(),
                    settings: c.settings.clone(),
                    rank: 0,
                    flags,
                    scores: c.scores.clone(),
                    metric_value: value,
                    interval: bootstrap_interval(&c.runs, t, metric, &key),
                    eliminated,
                    sweep: t.sweep.clone(),
                },
            )
        })
        .collect();
    let hib = metric.higher_is_better();
    // Survivors first (0), then the eliminated, the latest round first.
    let out_of_race = |r: &Row| r.eliminated.as_ref().map_or(0, |e| u64::MAX - e.round);
    rows.sort_by(|(ca, a), (cb, b)| {
        out_of_race(a)
            .cmp(&out_of_race(b))
            .then(ca.cmp(cb))
            .then_with(|| {
                let (x, y) = (a.metric_value.unwrap_or(0.0), b.metric_value.unwrap_or(0.0));
                if hib {
                    y.total_cmp(&x)
                } else {
                    x.total_cmp(&y)
                }
            })
    });
    let best = rows
        .first()
        .filter(|(c, r)| *c == 0 && r.eliminated.is_none())
        .and_then(|(_, r)| r.interval);
    let mut out = Vec::with_capacity(rows.len());
    for (i, (class, mut row)) in rows.into_iter().enumerate() {
        row.rank = i + 1;
        if i > 0
            && class == 0
            && row.eliminated.is_none()
            && let (Some((blo, bhi)), Some((lo, hi))) = (best, row.interval)
            && lo <= bhi
            && blo <= hi
        {
            row.flags.insert(0, FLAG_TIE);
        }
        out.push(row);
    }
    out
}

/// Format a number with about `sig` significant digits, plainly for moderate magnitudes.
pub fn fmt_num(x: f64, sig: usize) -> String {
    if x.is_nan() {
        return "NaN".to_string();
    }
    if x.is_infinite() {
        return if x > 0.0 { "inf" } else { "-inf" }.to_string();
    }
    if x == 0.0 {
        return "0".to_string();
    }
    let mag = x.abs().log10().floor() as i32;
    if !(-3..6).contains(&mag) {
        return format!("{:.*e}", sig.saturating_sub(1), x);
    }
    let decimals = (sig as i32 - 1 - mag).max(0) as usize;
    format!("{x:.decimals$}")
}

fn opt(x: Option<f64>, sig: usize) -> String {
    x.map_or_else(|| "–".to_string(), |v| fmt_num(v, sig))
}

/// Whether a setting affects runs with these settings (e.g. `cess_target` does not on the static
/// path), so that the table does not state settings that played no part.
fn relevant(s: &SamplerSettings, key: &str) -> bool {
    use crate::settings::{Move, Path, Schedule};
    let tempered = s.path == Path::Tempered;
    let external = s.external.as_ref().is_some_and(|a| !a.is_empty());
    match key {
        "iterations" => !tempered,
        "schedule" => tempered,
        "cess_target" | "max_steps" => tempered && s.schedule == Schedule::Adaptive,
        "steps" => tempered && s.schedule == Schedule::Fixed,
        "move_steps" => s.move_kind == Move::Metropolis,
        "external" => external,
        _ => true,
    }
}

/// Grid axes with more than one value (the columns of the table) and the settings common to
/// every cell, as (key, value) text pairs.
fn axes_and_common(results: &Results) -> (Vec<String>, Vec<(String, String)>) {
    let study = &results.header.study;
    let varying: Vec<String> = study
        .grid
        .iter()
        .filter(|(_, v)| v.len() > 1)
        .map(|(k, _)| k.clone())
        .collect();
    // Effective values of every setting that does not vary: the [sampler] table and
    // single-valued axes applied to the defaults.
    let mut table = study.sampler.clone();
    for (k, v) in &study.grid {
        if v.len() == 1 {
            table.insert(k.clone(), v[0].clone());
        }
    }
    let mut common: Vec<(String, String)> = Vec::new();
    match serde_json::from_value::<SamplerSettings>(Value::Object(table.clone())) {
        Ok(s) => {
            let full = serde_json::to_value(&s).unwrap_or(Value::Null);
            for k in SamplerSettings::KEYS {
                if varying.iter().any(|a| a == k) || !relevant(&s, k) {
                    continue;
                }
                if let Some(v) = full.get(*k) {
                    common.push((k.to_string(), value_text(v)));
                }
            }
        }
        Err(_) => {
            for (k, v) in &table {
                common.push((k.clone(), value_text(v)));
            }
        }
    }
    (varying, common)
}

/// The legend printed under the markdown tables.
pub const LEGEND: &str = "\
Columns: **rank** within the target (biased cells never outrank unbiased ones; cells with \
fewer than two finished runs rank last); **ok/fail** replicates that finished / failed; \
**rmse** root mean squared error of the posterior-mean estimate over replicates and \
coordinates; **bias p** the cell's p-value of no bias (Bonferroni over its mean coordinates \
and its evidence; the evidence is tested for E[Z-hat] = Z, which allows log Z-hat to run low by \
half its variance); **share** the deciding quantity's bias² / (bias² + sd²); **log Z err** \
mean ± sd of log_evidence − log Z; **var ESS** iid sample size with the same mean-squared \
error (sum of target variances / sum of MSEs); **Kish ESS** the sampler's own final ESS; \
**ESS/s** var ESS per second of run time; **95 % CI** percentile bootstrap interval of the \
ranking metric over replicates; **resamples**, **seconds** means per run. Flags: `biased` \
(bias p ≤ 0.001 for a quantity whose share exceeds 0.1: an unbiased cell is flagged with \
probability at most 0.001), `tie` (an unbiased cell whose interval overlaps that of the top \
row), `overconfident-ess` (Kish ESS more than twice var ESS), `failed-runs` (some replicates \
failed), `too-few-runs` (fewer than two finished: nothing can be judged).";

/// Render the ranking as markdown in the [`TableView::Auto`] view: one section per target
/// outside a sweep, one sweep table per sweep.
pub fn render_markdown(results: &Results, ranking: &Ranking) -> String {
    render_markdown_view(results, ranking, TableView::Auto)
}

/// Render the ranking as markdown: the study line, then one section per target or per sweep
/// as `view` asks, then the legend.
pub fn render_markdown_view(results: &Results, ranking: &Ranking, view: TableView) -> String {
    let (axes, common) = axes_and_common(results);
    let study = &results.header.study;
    let n_cells = study.grid.iter().map(|(_, v)| v.len()).product::<usize>();
    let metric = ranking.metric;
    let mut out = String::new();
    let raced = study.race.is_some();
    let _ = writeln!(
        out,
        "## Study `{}`: {} target{} × {} cell{} × {}{} replicates{}\n",
        study.name,
        results.header.targets.len(),
        if results.header.targets.len() == 1 {
            ""
        } else {
            "s"
        },
        n_cells,
        if n_cells == 1 { "" } else { "s" },
        if raced { "up to " } else { "" },
        study.replicates,
        if raced {
            format!(
                " (raced: {} of the full grid's {} runs)",
                results.runs.len(),
                results.header.targets.len() * n_cells * study.replicates as usize
            )
        } else {
            String::new()
        }
    );
    let _ = writeln!(
        out,
        "Ranked by `{}` ({} is better). Settings common to every cell: {}.\n",
        metric.name(),
        if metric.higher_is_better() {
            "higher"
        } else {
            "lower"
        },
        common
            .iter()
            .map(|(k, v)| format!("{k} = {v}"))
            .collect::<Vec<_>>()
            .join(", ")
    );
    let sweeps = results.header.sweeps();
    let mut sweep_tables = 0usize;
    for (ti, t) in results.header.targets.iter().enumerate() {
        if view != TableView::Targets {
            match sweeps.iter().find(|s| s.targets.contains(&ti)) {
                Some(s) => {
                    if s.targets.first() == Some(&ti) {
                        out.push_str(&sweep::render_markdown(results, ranking, s, &axes));
                        sweep_tables += 1;
                    }
                    continue;
                }
                None if view == TableView::Sweeps => continue,
                None => {}
            }
        }
        let rows: Vec<&Row> = ranking
            .rows
            .iter()
            .filter(|r| r.target == t.label)
            .collect();
        if rows.is_empty() {
            continue;
        }
        let _ = writeln!(
            out,
            "### {} ({}, d = {}{})\n",
            t.label,
            t.family,
            t.dim,
            t.log_z
                .map_or(String::new(), |z| format!(", log Z = {}", fmt_num(z, 6)))
        );
        if let Some(r) = &t.reference_run {
            let worst = r
                .mean_se
                .as_ref()
                .map(|v| v.iter().copied().fold(0.0, f64::max));
            let _ = writeln!(
                out,
                "Scores are relative to a reference run, not exact values: {} pooled runs of {} \
                 particles (`{}`); its own standard error, up to {} on the mean{}, is included \
                 in bias z.\n",
                r.runs,
                r.particles,
                r.file,
                worst.map_or("–".into(), |w| fmt_num(w, 2)),
                r.log_z_se.map_or(String::new(), |s| format!(
                    " and {} on log Z",
                    fmt_num(s, 2)
                ))
            );
        } else if t.mean.is_none() && t.log_z.is_none() {
            let _ = writeln!(
                out,
                "No reference values are known for this target, so accuracy is not scored; add \
                 a [reference] table to the study to score against a reference run.\n"
            );
        }
        let mut b = Builder::default();
        let mut head: Vec<String> = vec!["rank".into()];
        head.extend(axes.iter().cloned());
        head.extend(
            [
                "ok/fail",
                "rmse",
                "bias p",
                "share",
                "log Z err",
                "var ESS",
                "Kish ESS",
                "ESS/s",
                &format!("95 % CI of {}", metric.name()),
                "resamples",
                "seconds",
                "flags",
            ]
            .map(String::from),
        );
        if raced {
            head.push("race".into());
        }
        b.push_record(head);
        for r in rows {
            let s = &r.scores;
            let mut rec: Vec<String> = vec![r.rank.to_string()];
            for a in &axes {
                rec.push(r.settings.get(a).map_or_else(String::new, value_text));
            }
            let logz = match (s.log_z_error_mean, s.log_z_error_sd) {
                (Some(m), Some(sd)) => format!("{} ± {}", fmt_num(m, 3), fmt_num(sd, 2)),
                (Some(m), None) => fmt_num(m, 3),
                _ => "–".into(),
            };
            let ci = match r.interval {
                Some((lo, hi)) => format!("[{}, {}]", fmt_num(lo, 3), fmt_num(hi, 3)),
                None => "–".into(),
            };
            rec.extend([
                format!("{}/{}", s.replicates_ok, s.replicates_failed),
                opt(s.rmse_mean, 3),
                opt(s.bias_p, 2),
                opt(s.bias_share, 2),
                logz,
                opt(s.variance_ess, 3),
                opt(s.kish_ess, 3),
                opt(s.ess_per_second, 3),
                ci,
                opt(s.resamples, 3),
                opt(s.seconds, 3),
                r.flags.join(", "),
            ]);
            if raced {
                rec.push(
                    r.eliminated
                        .as_ref()
                        .map_or_else(String::new, |e| elimination_text(e, &axes, metric)),
                );
            }
            b.push_record(rec);
        }
        let mut table = b.build();
        table.with(Style::markdown());
        let _ = writeln!(out, "{table}\n");
    }
    if sweep_tables > 0 {
        let _ = writeln!(out, "{}\n", sweep::LEGEND);
    }
    let _ = writeln!(out, "{LEGEND}");
    if raced {
        let _ = writeln!(out, "\n{RACE_LEGEND}");
    }
    out
}

/// The legend of a raced study's tables.
pub const RACE_LEGEND: &str = "\
**race**: the study was raced, so cells have different numbers of replicates: the cells still \
in the race after the last round rank first; below them the cells eliminated after a round, \
with the reason: `biased` (the `biased` flag's tests at that round's level), `failed runs` (more \
than half of its runs fail, by a one-sided binomial test at that round's level) or worse by the \
ranking metric than the round's best unbiased cell (a one-sided permutation test of the ratio \
of the two cells' metric, at that round's level; in files raced before the header recorded a \
`comparison`, a percentile bootstrap); levels are alpha × 2^-round with Holm over the cells of \
a target and round. With the recommendation clause (a race of two targets or more, \
not sharded) a cell that can still be the recommended configuration is not eliminated as \
worse on any target; it leaves the recommendation when it is eliminated as biased or has \
failed runs on a target, or when its worst-case (or geometric-mean) relative efficiency is \
significantly below the leading cell's (a one-sided permutation test at that round's level).";

/// A cell's settings in words, by the study's axes: `proposal_scale = 0.5, resampling = ..`.
fn settings_text(s: &serde_json::Map<String, Value>, axes: &[String]) -> String {
    let parts: Vec<String> = axes
        .iter()
        .filter_map(|a| s.get(a).map(|v| format!("{a} = {}", value_text(v))))
        .collect();
    if parts.is_empty() {
        crate::results::cell_key(s)
    } else {
        parts.join(", ")
    }
}

/// A cell's elimination in words: `eliminated in round 2: biased (p = 1.2e-5)`, or
/// `eliminated in round 1: slower than proposal_scale = 0.5 (p = 1.2e-4)`; in a race with the
/// recommendation clause, followed by [`exit_text`].
pub fn elimination_text(e: &Elimination, axes: &[String], metric: Metric) -> String {
    let mut text = elimination_reason_text(e, axes, metric);
    if let Some(x) = &e.left_recommendation {
        text.push_str("; ");
        text.push_str(&exit_text(x, axes));
    }
    text
}

/// The elimination itself in words, without the recommendation clause's part.
pub fn elimination_reason_text(e: &Elimination, axes: &[String], metric: Metric) -> String {
    let what = match (e.reason, &e.than) {
        (EliminationReason::Biased, _) => "biased".to_string(),
        (EliminationReason::Failed, _) => match e.statistic {
            Some(share) => format!(
                "failed runs ({} of {} failed)",
                (share * e.replicates as f64).round(),
                e.replicates
            ),
            None => "failed runs".to_string(),
        },
        (EliminationReason::Worse, than) => {
            let cell = than
                .as_ref()
                .map_or_else(String::new, |s| settings_text(s, axes));
            if metric == Metric::EssPerSecond {
                format!("slower than {cell}")
            } else {
                format!("worse {} than {cell}", metric.name())
            }
        }
    };
    format!(
        "eliminated in round {} at {} replicates: {what} (p = {})",
        e.round,
        e.replicates,
        fmt_num(e.p, 2)
    )
}

/// When and why a cell stopped being a possible recommendation, in words: `out of the
/// recommendation after round 1: behind proposal_scale = 0.5 (p = 2.0e-4)`.
pub fn exit_text(x: &RecommendationExit, axes: &[String]) -> String {
    let on = || x.target.as_deref().unwrap_or("?").to_string();
    let why = match x.reason {
        ExitReason::Biased => format!("biased on {}", on()),
        ExitReason::Failed => format!("failed runs on {}", on()),
        ExitReason::Behind => format!(
            "behind {} (p = {})",
            x.than
                .as_ref()
                .map_or_else(String::new, |s| settings_text(s, axes)),
            x.p.map_or_else(|| "?".to_string(), |p| fmt_num(p, 2))
        ),
    };
    format!("out of the recommendation after round {}: {why}", x.round)
}

/// Every score of a row as (name, value) pairs, in a fixed order.
fn score_fields(s: &CellScores) -> Vec<(&'static str, Value)> {
    let f = |x: Option<f64>| x.map_or(Value::Null, |v| json!(v));
    vec![
        ("replicates_ok", json!(s.replicates_ok)),
        ("replicates_failed", json!(s.replicates_failed)),
        ("rmse_mean", f(s.rmse_mean)),
        ("bias_z", f(s.bias_z)),
        ("bias_p", f(s.bias_p)),
        ("bias_share", f(s.bias_share)),
        ("log_z_error_mean", f(s.log_z_error_mean)),
        ("log_z_error_sd", f(s.log_z_error_sd)),
        ("log_z_bias", f(s.log_z_bias)),
        ("covariance_error", f(s.covariance_error)),
        ("kish_ess", f(s.kish_ess)),
        ("variance_ess", f(s.variance_ess)),
        ("ess_per_second", f(s.ess_per_second)),
        ("resamples", f(s.resamples)),
        ("resamples_sd", f(s.resamples_sd)),
        ("seconds", f(s.seconds)),
        ("seconds_sd", f(s.seconds_sd)),
        ("evaluations", f(s.evaluations)),
        ("evaluations_sd", f(s.evaluations_sd)),
    ]
}

/// Render the ranking as `{ "rank_by": .., "rows": [ {target, settings, rank, flags, scores..} ] }`
/// (and, for a raced study, `eliminated` in every row: `null` or the elimination).
pub fn render_json(ranking: &Ranking) -> Value {
    let raced = ranking.raced;
    let rows: Vec<Value> = ranking
        .rows
        .iter()
        .map(|r| {
            let mut o = Map::new();
            o.insert("target".into(), json!(r.target));
            o.insert("settings".into(), Value::Object(r.settings.clone()));
            o.insert("rank".into(), json!(r.rank));
            o.insert("flags".into(), json!(r.flags));
            for (k, v) in score_fields(&r.scores) {
                o.insert(k.into(), v);
            }
            o.insert(
                "rank_interval".into(),
                r.interval.map_or(Value::Null, |(lo, hi)| json!([lo, hi])),
            );
            if raced {
                o.insert(
                    "eliminated".into(),
                    r.eliminated.as_ref().map_or(Value::Null, |e| {
                        json!({"round": e.round, "replicates": e.replicates,
                               "reason": e.reason, "statistic": e.statistic, "p": e.p,
                               "level": e.level, "than": e.than,
                               "left_recommendation": e.left_recommendation})
                    }),
                );
            }
            if let Some(sw) = &r.sweep {
                let values: Map<String, Value> = sw.values.iter().cloned().collect();
                o.insert(
                    "sweep".into(),
                    json!({ "label": sw.label, "values": values }),
                );
            }
            Value::Object(o)
        })
        .collect();
    json!({ "rank_by": ranking.metric.name(), "rows": rows })
}

fn csv_field(s: &str) -> String {
    if s.contains([',', '"', '\n']) {
        format!("\"{}\"", s.replace('"', "\"\""))
    } else {
        s.to_string()
    }
}

/// Render the ranking as CSV (RFC 4180 quoting), one line per cell. When the study has sweeps,
/// a `sweep` column (the base label, empty outside a sweep) and a `sweep_<key>` column per
/// swept key follow the target.
pub fn render_csv(results: &Results, ranking: &Ranking) -> String {
    let axes: Vec<String> = results
        .header
        .study
        .grid
        .iter()
        .map(|(k, _)| k.clone())
        .collect();
    let sweeps = results.header.sweeps();
    let mut swept: Vec<String> = Vec::new();
    for k in sweeps.iter().flat_map(|s| &s.keys) {
        if !swept.contains(k) {
            swept.push(k.clone());
        }
    }
    let mut out = String::new();
    let mut head: Vec<String> = vec!["target".into()];
    if !sweeps.is_empty() {
        head.push("sweep".into());
        head.extend(swept.iter().map(|k| format!("sweep_{k}")));
    }
    head.extend(axes.iter().cloned());
    head.extend(["rank".to_string(), "flags".to_string()]);
    let names: Vec<&str> = score_fields(&CellScores::empty())
        .iter()
        .map(|(k, _)| *k)
        .collect();
    head.extend(names.iter().map(|s| s.to_string()));
    head.extend([
        "rank_interval_low".to_string(),
        "rank_interval_high".to_string(),
    ]);
    if ranking.raced {
        head.extend(
            [
                "eliminated_round",
                "eliminated_reason",
                "eliminated_p",
                "eliminated_than",
            ]
            .map(String::from),
        );
    }
    out.push_str(&head.join(","));
    out.push('\n');
    for r in &ranking.rows {
        let mut rec: Vec<String> = vec![csv_field(&r.target)];
        if !sweeps.is_empty() {
            rec.push(csv_field(r.sweep.as_ref().map_or("", |s| &s.label)));
            for k in &swept {
                let v = r
                    .sweep
                    .as_ref()
                    .and_then(|s| s.values.iter().find(|(sk, _)| sk == k))
                    .map_or_else(String::new, |(_, v)| v.to_string());
                rec.push(csv_field(&v));
            }
        }
        for a in &axes {
            rec.push(csv_field(
                &r.settings.get(a).map_or_else(String::new, value_text),
            ));
        }
        rec.push(r.rank.to_string());
        rec.push(csv_field(&r.flags.join(";")));
        for (_, v) in score_fields(&r.scores) {
            rec.push(if v.is_null() {
                String::new()
            } else {
                v.to_string()
            });
        }
        let (lo, hi) = r.interval.map_or((String::new(), String::new()), |(a, b)| {
            (a.to_string(), b.to_string())
        });
        rec.extend([lo, hi]);
        if ranking.raced {
            match &r.eliminated {
                None => rec.extend([String::new(), String::new(), String::new(), String::new()]),
                Some(e) => rec.extend([
                    e.round.to_string(),
                    json!(e.reason).as_str().unwrap_or("").to_string(),
                    e.p.to_string(),
                    csv_field(
                        &e.than
                            .as_ref()
                            .map_or_else(String::new, crate::results::cell_key),
                    ),
                ]),
            }
        }
        out.push_str(&rec.join(","));
        out.push('\n');
    }
    out
}

impl CellScores {
    /// Scores of a cell with no runs.
    pub fn empty() -> CellScores {
        CellScores {
            replicates_ok: 0,
            replicates_failed: 0,
            rmse_mean: None,
            bias_z: None,
            bias_p: None,
            bias_share: None,
            log_z_error_mean: None,
            log_z_error_sd: None,
            log_z_bias: None,
            covariance_error: None,
            kish_ess: None,
            variance_ess: None,
            ess_per_second: None,
            resamples: None,
            resamples_sd: None,
            seconds: None,
            seconds_sd: None,
            evaluations: None,
            evaluations_sd: None,
            biased: false,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn number_format() {
        assert_eq!(fmt_num(1234.5678, 3), "1235");
        assert_eq!(fmt_num(0.012345, 3), "0.0123");
        assert_eq!(fmt_num(2.5e-7, 3), "2.50e-7");
        assert_eq!(fmt_num(0.0, 3), "0");
    }

    #[test]
    fn the_legend_states_the_flags_constants() {
        // The legend is a constant string; this keeps it true to the constants it quotes.
        let flag = format!(
            "bias p ≤ {} for a quantity whose share exceeds {}: an unbiased cell is flagged \
             with probability at most {}",
            crate::scores::BIAS_ALPHA,
            crate::scores::BIAS_MIN_SHARE,
            crate::scores::BIAS_ALPHA
        );
        assert!(LEGEND.replace('\n', " ").contains(&flag), "{flag}");
        let twice = if OVERCONFIDENCE_FACTOR == 2.0 {
            "twice".to_string()
        } else {
            format!("{OVERCONFIDENCE_FACTOR} times")
        };
        assert!(LEGEND.contains(&format!("more than {twice} var ESS")));
    }
}
