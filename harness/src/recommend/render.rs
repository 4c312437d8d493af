//! Rendering a [`Recommendation`]: the "Recommended configuration" markdown section and its
//! JSON object. Formatting only; every decision is in [`super`].

use std::fmt::Write as _;

use serde_json::{Map, Value, json};
use tabled::builder::Builder;
use tabled::settings::Style;

use super::{Candidate, Exclusion, RecommendBy, Recommendation};
use crate::results::{Results, value_text};
use crate::table::fmt_num;

/// At most this many cells are listed with what rules them out.
const MAX_EXCLUDED: usize = 20;

/// The caution printed with every recommendation.
pub const CAUTION: &str = "Caution: a configuration that wins on analytic targets is not proven \
on your model. Validate it on the model itself (several seeds, a long reference run, the \
diagnostics) before relying on its answers.";

/// The settings of a cell on the grid axes with more than one value.
fn describe(results: &Results, settings: &Map<String, Value>) -> String {
    let parts: Vec<String> = results
        .header
        .study
        .grid
        .iter()
        .filter(|(_, v)| v.len() > 1)
        .map(|(k, _)| {
            let v = settings.get(k).map_or_else(|| "?".to_string(), value_text);
            format!("{k} = {v}")
        })
        .collect();
    if parts.is_empty() {
        "the only cell".to_string()
    } else {
        parts.join(", ")
    }
}

/// What the aggregate is called.
fn aggregate_name(by: RecommendBy) -> &'static str {
    match by {
        RecommendBy::Worst => "worst relative efficiency",
        RecommendBy::GeometricMean => "geometric mean of the relative efficiencies",
    }
}

fn reason(e: &Exclusion, metric: &str) -> String {
    let opt = |x: Option<f64>| x.map_or_else(|| "–".to_string(), |v| fmt_num(v, 2));
    match e {
        Exclusion::NoRuns => "no runs".to_string(),
        Exclusion::TooFewRuns { ok } => format!("too few finished runs ({ok})"),
        Exclusion::Biased { bias_p, bias_share } => format!(
            "biased (bias p = {}, share {})",
            opt(*bias_p),
            opt(*bias_share)
        ),
        Exclusion::FailedRuns { failed, total } => format!("{failed} of {total} runs failed"),
        Exclusion::NoValue => format!("no value of `{metric}`"),
    }
}

/// A candidate's per-target table.
fn candidate_table(results: &Results, rec: &Recommendation, c: &Candidate) -> String {
    let metric = rec.metric.name();
    let mut b = Builder::default();
    b.push_record([
        "target".to_string(),
        "relative efficiency".to_string(),
        metric.to_string(),
        format!("best cell on the target ({metric})"),
    ]);
    for t in &c.targets {
        let best = rec.normaliser(&t.target).map_or_else(
            || "–".to_string(),
            |n| {
                if n.settings == c.settings {
                    "this cell".to_string()
                } else {
                    format!(
                        "{} ({})",
                        describe(results, &n.settings),
                        fmt_num(n.value, 3)
                    )
                }
            },
        );
        b.push_record([
            t.target.clone(),
            fmt_num(t.relative, 3),
            fmt_num(t.value, 3),
            best,
        ]);
    }
    let mut table = b.build();
    table.with(Style::markdown());
    table.to_string()
}

/// A candidate's settings, aggregate and per-target table, under a bold `label`.
fn candidate_block(
    o: &mut String,
    label: &str,
    results: &Results,
    rec: &Recommendation,
    c: &Candidate,
) {
    let _ = writeln!(
        o,
        "**{label}:** {} ({} {}).\n\n{}\n",
        describe(results, &c.settings),
        aggregate_name(rec.by),
        fmt_num(c.aggregate, 3),
        candidate_table(results, rec, c)
    );
}

/// The "Recommended configuration" section, its heading at `level` (2 gives `##`).
pub fn markdown(results: &Results, rec: &Recommendation, level: usize) -> String {
    let mut o = String::new();
    let metric = rec.metric.name();
    let _ = writeln!(
        o,
        "{} Recommended configuration\n",
        "#".repeat(level.max(1))
    );
    if rec.cells == 0 {
        let _ = writeln!(
            o,
            "No cells to recommend from: the results file has no run records.\n"
        );
        return o;
    }
    let n_targets = rec.targets.len();
    let _ = writeln!(
        o,
        "Rule `{}` (`--recommend-by {}`): among the cells that are unbiased, have no failed runs \
         and have a value of `{metric}` on every target ({} of {} cell{}), the one with the \
         largest {} over the {n_targets} target{}. A cell's relative efficiency on a target is \
         {}, so 1 is the best.\n",
        rec.by.name(),
        rec.by.name(),
        rec.eligible.len(),
        rec.cells,
        if rec.cells == 1 { "" } else { "s" },
        aggregate_name(rec.by),
        if n_targets == 1 { "" } else { "s" },
        if rec.metric.higher_is_better() {
            format!("its `{metric}` divided by that of the best such cell on that target")
        } else {
            format!(
                "the `{metric}` of the best such cell on that target divided by its own \
                 (lower is better)"
            )
        },
    );
    let Some(best) = rec.recommended() else {
        let _ = writeln!(
            o,
            "No cell is eligible: every cell is biased, has failed runs, has too few finished \
             runs or lacks a value of `{metric}` on at least one target. What rules out each \
             cell:\n"
        );
        for e in rec.excluded.iter().take(MAX_EXCLUDED) {
            let why: Vec<String> = e
                .ruled_out
                .iter()
                .map(|(t, rs)| {
                    let rs: Vec<String> = rs.iter().map(|r| reason(r, metric)).collect();
                    format!("{t} ({})", rs.join("; "))
                })
                .collect();
            let _ = writeln!(
                o,
                "- {}: {}",
                describe(results, &e.settings),
                why.join(", ")
            );
        }
        if rec.excluded.len() > MAX_EXCLUDED {
            let _ = writeln!(
                o,
                "- … and {} more cells (`assay table --format json` lists every one).",
                rec.excluded.len() - MAX_EXCLUDED
            );
        }
        let _ = writeln!(o);
        return o;
    };
    candidate_block(&mut o, "Recommended", results, rec, best);
    match (rec.runner_up(), &rec.comparison) {
        (Some(second), Some(cmp)) => {
            candidate_block(&mut o, "Runner-up", results, rec, second);
            let verdict = if cmp.distinguishable() {
                "distinguishable".to_string()
            } else {
                "not distinguishable at these replicate counts: run more replicates or treat \
                 them as equivalent"
                    .to_string()
            };
            let interval = match cmp.interval {
                Some((lo, hi)) => format!(
                    "95 % bootstrap interval [{}, {}] ({} resamples of the replicates of every \
                     cell on every target)",
                    fmt_num(lo, 3),
                    fmt_num(hi, 3),
                    cmp.resamples
                ),
                None => "no bootstrap interval (too few resamples gave a finite ratio)".into(),
            };
            let _ = writeln!(
                o,
                "Ratio of the two scores, recommended / runner-up: {}, {interval}: {verdict}.\n",
                fmt_num(cmp.ratio, 3)
            );
        }
        _ => {
            let _ = writeln!(
                o,
                "No runner-up: no other cell is eligible, so there is nothing to compare the \
                 recommended cell with.\n"
            );
        }
    }
    let _ = writeln!(o, "> {CAUTION}\n");
    o
}

fn candidate_json(c: &Candidate) -> Value {
    let targets: Vec<Value> = c
        .targets
        .iter()
        .map(|t| {
            json!({
                "target": t.target,
                "value": t.value,
                "relative_efficiency": t.relative,
            })
        })
        .collect();
    json!({
        "settings": Value::Object(c.settings.clone()),
        "aggregate": c.aggregate,
        "targets": targets,
    })
}

fn exclusion_json(e: &Exclusion) -> Value {
    match e {
        Exclusion::NoRuns => json!({ "reason": "no-runs" }),
        Exclusion::TooFewRuns { ok } => json!({ "reason": "too-few-runs", "ok": ok }),
        Exclusion::Biased { bias_p, bias_share } => {
            json!({ "reason": "biased", "bias_p": bias_p, "bias_share": bias_share })
        }
        Exclusion::FailedRuns { failed, total } => {
            json!({ "reason": "failed-runs", "failed": failed, "total": total })
        }
        Exclusion::NoValue => json!({ "reason": "no-value" }),
    }
}

/// The `recommendation` object of `assay table --format json`.
pub fn json(rec: &Recommendation) -> Value {
    let normalisers: Vec<Value> = rec
        .normalisers
        .iter()
        .map(|n| {
            json!({
                "target": n.target,
                "settings": Value::Object(n.settings.clone()),
                "value": n.value,
            })
        })
        .collect();
    let excluded: Vec<Value> = rec
        .excluded
        .iter()
        .map(|e| {
            let targets: Vec<Value> = e
                .ruled_out
                .iter()
                .map(|(t, rs)| {
                    json!({
                        "target": t,
                        "reasons": rs.iter().map(exclusion_json).collect::<Vec<_>>(),
                    })
                })
                .collect();
            json!({ "settings": Value::Object(e.settings.clone()), "ruled_out_by": targets })
        })
        .collect();
    let comparison = rec.comparison.as_ref().map_or(Value::Null, |c| {
        json!({
            "ratio": c.ratio,
            "interval": c.interval.map_or(Value::Null, |(lo, hi)| json!([lo, hi])),
            "resamples": c.resamples,
            "distinguishable": c.distinguishable(),
        })
    });
    json!({
        "by": rec.by.name(),
        "metric": rec.metric.name(),
        "higher_is_better": rec.metric.higher_is_better(),
        "targets": rec.targets,
        "cells": rec.cells,
        "recommended": rec.recommended().map_or(Value::Null, candidate_json),
        "runner_up": rec.runner_up().map_or(Value::Null, candidate_json),
        "comparison": comparison,
        "eligible": rec.eligible.iter().map(candidate_json).collect::<Vec<_>>(),
        "normalisers": normalisers,
        "excluded": excluded,
    })
}
