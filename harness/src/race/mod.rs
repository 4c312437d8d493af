//! Racing (`[study] race = true`, `assay run --race`): replicates are spent where the choice of
//! a cell is still open. Round 1 runs `race_start` replicates of every cell of every target;
//! after each round, [`decide::decide`] eliminates, per target, the cells that are
//! significantly biased or significantly worse by the ranking metric than the round's best
//! unbiased cell; each later round doubles the replicates of the surviving cells (at most
//! `replicates`), until one cell is left on every target or every survivor has `replicates`.
//!
//! Determinism: every run's seed comes from its identity, so a raced study's run records are
//! the full grid's records of the same runs, bit for bit but for `seconds`. Which runs are made
//! is a function of the records of the completed rounds only (a round's decision reads the
//! replicates below its count, in replicate order), so `--resume` re-derives the rounds from
//! the records in the file and continues exactly where an uninterrupted race would be. With
//! a metric that depends on time (`ess_per_second`, `seconds`) the decisions depend on the
//! recorded `seconds`, and so the set of runs can differ between machines or between an
//! interrupted and an uninterrupted race; with a metric that does not (`variance_ess`,
//! `rmse_mean`, ...) it is the same everywhere.
//!
//! The recommendation clause ([`keep`]): in a race of two targets or more, a cell that can
//! still be the study's recommended configuration is not eliminated as worse on any target,
//! so the cells the recommendation chooses between are measured alike. A target with one cell
//! left is no longer decided on; its last cell runs on to `replicates`, so that the winner's
//! scores and `biased` flag have the full grid's precision.
//!
//! Sharding: shard K of N races the targets t with t mod N = K - 1 on their own, so the
//! shards are independent and `merge` puts their files together. The clause needs every
//! target in one process, so a sharded race runs without it (the header records it off):
//! merged shards make the runs and eliminations of `--shard 1/1`, a whole race without the
//! clause, not those of an unsharded race.

pub mod decide;
pub mod keep;
#[cfg(test)]
mod rates;
mod split;
#[cfg(test)]
mod testkit;

use std::collections::{BTreeMap, HashMap};
use std::sync::Mutex;
use std::time::Instant;

use crate::recommend::RecommendBy;
use crate::results::{
    ELIMINATION_TAG, Elimination, EliminationReason, RaceInfo, RecommendationExit, RunRecord,
    read_results,
};
use crate::scores::{CellRuns, DEFAULT_METRIC, Metric};
use crate::study::runner::{
    Opened, open_results, progress_bar, run_identity, run_wanted, worker_pool,
};
use crate::study::{RunError, RunOptions, RunSummary, Study};
use decide::{Exit, RaceCell, RaceRules, RaceView, decide, round_replicates};

/// What a race did, beyond the runs.
#[derive(Debug, Clone)]
pub struct RaceSummary {
    pub run: RunSummary,
    /// Rounds decided.
    pub rounds: u64,
    /// Run records in the file at the end.
    pub runs_in_file: u64,
    /// Runs of the full grid (of this shard's targets).
    pub full_grid_runs: u64,
    /// Eliminations in the file at the end.
    pub eliminations: u64,
}

/// The race's rules: with the recommendation clause under `recommend` (`None`: cells kept per
/// target only).
pub fn race_rules(metric: Metric, recommend: Option<RecommendBy>) -> RaceRules {
    let rules = RaceRules::with_metric(metric);
    match recommend {
        Some(by) => rules.recommending(by),
        None => rules,
    }
}

/// The record of a cell's leaving the recommendation.
fn exit_record(
    x: &Exit,
    round: u64,
    targets: &[crate::results::TargetInfo],
    cells: &[RaceCell],
) -> RecommendationExit {
    RecommendationExit {
        round,
        reason: x.reason,
        target: x.target.map(|t| targets[t].label.clone()),
        than: x.than.map(|c| cells[c].settings.clone()),
        statistic: x.statistic,
        p: x.p,
        level: x.level,
    }
}

/// The race settings recorded in the header.
pub fn race_info(study: &Study, rules: &RaceRules) -> RaceInfo {
    RaceInfo {
        start: study.race_start.min(study.info.replicates),
        metric: rules.metric.name().to_string(),
        bias_alpha: rules.bias_alpha,
        worse_alpha: rules.worse_alpha,
        resamples: rules.resamples,
        comparison: Some(decide::COMPARISON.to_string()),
        recommend_by: rules.recommend.map(|r| r.by.name().to_string()),
        recommend_alpha: rules.recommend.map(|r| r.alpha),
    }
}

/// Run a study as a race. `metric`: the ranking metric (`--rank-by`); when `None`, a resumed
/// file's own metric, else [`DEFAULT_METRIC`]. `by`: the recommendation's rule, which the
/// recommendation clause follows (the clause is on when the race sees every target: not with
/// `--shard`, and only with two targets or more, where the recommendation is more than each
/// target's best cell).
pub fn run_race(
    study: &mut Study,
    opts: &RunOptions,
    metric: Option<Metric>,
    by: RecommendBy,
) -> Result<RaceSummary, RunError> {
    let started = Instant::now();
    if study.info.replicates < 2 {
        return Err(RunError(format!(
            "{}: a race needs `replicates` >= 2 in [study] (it has {}): a race decides on at \
             least two replicates a cell",
            study.file.display(),
            study.info.replicates
        )));
    }
    let n_targets = study.targets.len() as u64;
    if let Some(s) = opts.shard
        && s.count > n_targets
    {
        return Err(RunError(format!(
            "--shard {}/{} is not allowed with a race: a race is sharded by target and the \
             study has {n_targets} target{}; allowed: at most {n_targets} shards",
            s.index,
            s.count,
            if n_targets == 1 { "" } else { "s" }
        )));
    }
    let out = opts.out.clone().unwrap_or_else(|| study.default_output());
    let metric = match metric {
        Some(m) => m,
        None if opts.resume && out.exists() => read_results(&out, true)
            .ok()
            .and_then(|r| r.header.study.race)
            .and_then(|r| Metric::parse(&r.metric))
            .unwrap_or(DEFAULT_METRIC),
        None => DEFAULT_METRIC,
    };
    let clause = opts.shard.is_none() && n_targets >= 2;
    let rules = race_rules(metric, clause.then_some(by));
    study.info.race = Some(race_info(study, &rules));
    let Opened {
        sink,
        threads,
        existing,
        header,
    } = open_results(study, opts)?;

    let cells: Vec<RaceCell> = study
        .cells
        .iter()
        .map(|c| RaceCell {
            key: c.key.clone(),
            settings: c.settings.clone(),
        })
        .collect();
    let (nt, nc) = (study.targets.len(), cells.len());
    let t_of: HashMap<&str, usize> = header
        .targets
        .iter()
        .enumerate()
        .map(|(i, t)| (t.label.as_str(), i))
        .collect();
    let c_of: HashMap<&str, usize> = cells
        .iter()
        .enumerate()
        .map(|(i, c)| (c.key.as_str(), i))
        .collect();
    // The records so far, per target and cell, by replicate (traces dropped: no score reads
    // them).
    let mut store: Vec<Vec<BTreeMap<u64, RunRecord>>> = vec![vec![BTreeMap::new(); nc]; nt];
    let add = |store: &mut Vec<Vec<BTreeMap<u64, RunRecord>>>, mut r: RunRecord| {
        if let (Some(&t), Some(&c)) = (t_of.get(r.target.as_str()), c_of.get(r.cell_key().as_str()))
        {
            r.output.trace.clear();
            store[t][c].insert(r.replicate, r);
        }
    };
    let mut written: HashMap<(String, String), Elimination> = HashMap::new();
    let mut in_file = 0u64;
    if let Some(e) = existing {
        for el in e.eliminations {
            written.insert((el.target.clone(), el.cell_key()), el);
        }
        for r in e.runs {
            add(&mut store, r);
        }
    }

    let raced: Vec<bool> = (0..nt)
        .map(|t| {
            opts.shard
                .is_none_or(|s| (t as u64) % s.count == s.index - 1)
        })
        .collect();
    let mut alive: Vec<Vec<bool>> = raced.iter().map(|&r| vec![r; nc]).collect();
    let mut active: Vec<bool> = raced.iter().map(|&r| r && nc > 1).collect();
    // The recommendation clause's state: when and why each cell stopped being a possible
    // recommendation (`None`: it still is one, when the clause is on).
    let mut exits: Vec<Option<RecommendationExit>> = vec![None; nc];
    let start = study.race_start.min(study.info.replicates);
    let max = study.info.replicates;
    let bar = progress_bar(0, opts.quiet);
    let pool = worker_pool(threads, &sink)?;
    let total = study.total_runs();
    let (mut ran, mut skipped, mut failed, mut round) = (0u64, 0u64, 0u64, 0u64);
    let mut produced: Vec<(String, String)> = Vec::new();
    let mut completed = true;
    loop {
        round += 1;
        let n = round_replicates(start, max, round);
        // Round 1 runs every cell of every raced target (a target with one cell too, so that
        // it has its scores); later rounds only the survivors of targets still undecided.
        let runs_now = |t: usize| if round == 1 { raced[t] } else { active[t] };
        let due = |i: u64| {
            let (t, c, rep) = run_identity(study, i);
            runs_now(t) && alive[t][c] && rep < n
        };
        let missing = |store: &[Vec<BTreeMap<u64, RunRecord>>], i: u64| {
            let (t, c, rep) = run_identity(study, i);
            due(i) && !store[t][c].contains_key(&rep)
        };
        let fresh: Mutex<Vec<RunRecord>> = Mutex::new(Vec::new());
        {
            let wanted = |i: u64| missing(&store, i);
            let todo = (0..total).filter(|&i| wanted(i)).count() as u64;
            skipped += (0..total).filter(|&i| due(i)).count() as u64 - todo;
            bar.inc_length(todo);
            failed += run_wanted(study, &sink, &pool, &wanted, &bar, &|r| {
                if let Ok(mut v) = fresh.lock() {
                    v.push(r.clone());
                }
            });
        }
        let fresh = fresh.into_inner().unwrap_or_default();
        ran += fresh.len() as u64;
        for r in fresh {
            add(&mut store, r);
        }
        if (0..total).any(|i| missing(&store, i)) {
            // A write failed (the sink holds the error): no decision on an incomplete round.
            completed = false;
            break;
        }

        let view = RaceView {
            targets: &header.targets,
            cells: &cells,
            runs: (0..nt)
                .map(|t| {
                    (0..nc)
                        .map(|c| {
                            alive[t][c].then(|| {
                                let recs: Vec<&RunRecord> =
                                    store[t][c].range(..n).map(|(_, r)| r).collect();
                                CellRuns::collect(&recs, &header.targets[t])
                            })
                        })
                        .collect()
                })
                .collect(),
            in_round: (0..nt)
                .map(|t| runs_now(t) && alive[t].iter().filter(|&&a| a).count() > 1)
                .collect(),
            in_recommendation: exits
                .iter()
                .map(|x| rules.recommend.is_some() && x.is_none())
                .collect(),
        };
        let decisions = decide(&view, round, &rules);
        for x in &decisions.left_recommendation {
            exits[x.cell] = Some(exit_record(x, round, &header.targets, &cells));
        }
        for d in decisions.eliminated {
            let e = Elimination {
                record: ELIMINATION_TAG.to_string(),
                round,
                replicates: n,
                target: header.targets[d.target].label.clone(),
                settings: cells[d.cell].settings.clone(),
                reason: d.reason,
                statistic: d.statistic,
                p: d.p,
                level: d.level,
                than: d.than.map(|b| cells[b].settings.clone()),
                left_recommendation: match d.reason {
                    EliminationReason::Worse => exits[d.cell].clone(),
                    EliminationReason::Biased | EliminationReason::Failed => None,
                },
            };
            alive[d.target][d.cell] = false;
            let key = (e.target.clone(), e.cell_key());
            produced.push(key.clone());
            match written.get(&key) {
                Some(old) if *old == e => {}
                Some(_) => {
                    return Err(RunError(format!(
                        "cannot resume {}: its elimination of cell {} on `{}` does not follow \
                         from its run records (written by another version of assay?); use \
                         --replace to start afresh",
                        sink.out().display(),
                        key.1,
                        key.0
                    )));
                }
                None => {
                    let line = serde_json::to_string(&e)
                        .map_err(|err| RunError(format!("cannot encode an elimination: {err}")))?;
                    if !sink.write_line(&(line + "\n")) {
                        completed = false;
                        break;
                    }
                    written.insert(key, e);
                }
            }
        }
        // A target stays in the race while two cells are left on it; its last cell then runs
        // on to the maximum, so that the winner's scores (and its `biased` flag) have the
        // precision of the full grid.
        for t in 0..nt {
            if alive[t].iter().filter(|&&a| a).count() == 0 {
                active[t] = false;
            }
        }
        if !completed {
            break;
        }
        if n >= max || !active.iter().any(|&a| a) {
            break;
        }
    }
    bar.finish_and_clear();
    // Every elimination already in the file must be one the race made again.
    if completed && let Some((t, c)) = written.keys().find(|k| !produced.contains(k)) {
        return Err(RunError(format!(
            "{}: its elimination of cell {c} on `{t}` does not follow from its run records \
             (written by another version of assay?); use --replace to start afresh",
            sink.out().display()
        )));
    }
    for row in &store {
        for cell in row {
            in_file += cell.len() as u64;
        }
    }
    let out = sink.out().to_path_buf();
    sink.finish()?;
    let full_grid_runs = raced.iter().filter(|&&r| r).count() as u64 * nc as u64 * max;
    Ok(RaceSummary {
        run: RunSummary {
            out,
            ran,
            skipped,
            failed,
            seconds: started.elapsed().as_secs_f64(),
        },
        rounds: round,
        runs_in_file: in_file,
        full_grid_runs,
        eliminations: written.len() as u64,
    })
}
