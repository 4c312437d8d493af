//! One configuration to deploy across the targets of a study: the analysis behind the
//! "Recommended configuration" section. Pure statistics on a [`Ranking`] (which cells are
//! biased, failed or lack a value, and their ranking metric) and the per-run figures of the
//! results file (for the bootstrap); rendering is in [`render`].
//!
//! The rule, per cell:
//!
//! - a cell is *valid on a target* when it has runs there, at least two of them finished, none
//!   failed, it is not `biased` and it has a value of the ranking metric;
//! - a cell is *eligible* when it is valid on every target of the study;
//! - its *relative efficiency* on a target is its metric divided by the best value among the
//!   cells valid on that target, eligible or not (the inverse ratio for metrics where lower is
//!   better), so that 1 is the best and 0.5 means half as efficient as the best valid cell;
//! - its *aggregate* is the smallest relative efficiency over the targets ([`RecommendBy::Worst`],
//!   the default) or their geometric mean ([`RecommendBy::GeometricMean`]);
//! - the recommended cell has the largest aggregate; ties go to the larger aggregate of the other
//!   rule, then to the smaller canonical cell key (the cell's settings as compact JSON with
//!   sorted keys), so the choice never depends on the order of the records.
//!
//! The normaliser is the best cell valid on the target among *all* cells, not only the
//! eligible ones: a relative efficiency then reads as what deploying the cell costs against the
//! best trustworthy configuration for that target alone, it does not change when another
//! target rules some cell out, and a single eligible cell is not declared perfect everywhere
//! merely for lack of company.

use std::collections::BTreeMap;

use rand::{RngExt, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde_json::{Map, Value};

use crate::results::{Results, cell_key};
use crate::scores::{BOOTSTRAP_RESAMPLES, CellRuns, Metric, MetricResampler, name_of, value_named};
use crate::seed::fnv1a64;
use crate::stats::quantile;
use crate::table::{FLAG_BIASED, FLAG_TOO_FEW, Ranking, Row};

pub mod render;

#[cfg(test)]
mod tests;

/// How a cell's relative efficiencies over the targets are combined into one score.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum RecommendBy {
    /// The smallest relative efficiency over the targets: the maximin choice, which with
    /// regret taken as 1 - relative efficiency is the minimax-regret rule (Savage 1951, "The
    /// theory of statistical decision", JASA 46). A deployed configuration must not collapse
    /// on the target most like the user's model; an average can hide a 10x loss on one target.
    Worst,
    /// The geometric mean of the relative efficiencies.
    GeometricMean,
}

/// The default rule.
pub const DEFAULT_RECOMMEND_BY: RecommendBy = RecommendBy::Worst;

impl RecommendBy {
    /// All rules with their names.
    pub const ALL: &'static [(&'static str, RecommendBy)] = &[
        ("worst", RecommendBy::Worst),
        ("geometric-mean", RecommendBy::GeometricMean),
    ];

    /// Parse a rule name.
    pub fn parse(name: &str) -> Option<RecommendBy> {
        value_named(Self::ALL, name)
    }

    /// The rule's name.
    pub fn name(self) -> &'static str {
        name_of(Self::ALL, self)
    }

    /// The other rule (the first tie-break).
    fn other(self) -> RecommendBy {
        match self {
            RecommendBy::Worst => RecommendBy::GeometricMean,
            RecommendBy::GeometricMean => RecommendBy::Worst,
        }
    }
}

/// Relative efficiency of a cell whose metric is `value` on a target where the best valid cell
/// has `best`: value / best when higher is better, best / value when lower is better, in
/// [0, 1] with 1 for the best (metrics are non-negative; equal values, infinite ones included,
/// give 1; anything undefined gives 0).
pub fn relative_efficiency(value: f64, best: f64, higher_is_better: bool) -> f64 {
    if value == best {
        return 1.0;
    }
    let r = if higher_is_better {
        value / best
    } else {
        best / value
    };
    if r.is_nan() { 0.0 } else { r.clamp(0.0, 1.0) }
}

/// [`relative_efficiency`] target by target: `values[t]` against `bests[t]`.
pub fn relative_efficiencies(values: &[f64], bests: &[f64], higher_is_better: bool) -> Vec<f64> {
    values
        .iter()
        .zip(bests)
        .map(|(&v, &b)| relative_efficiency(v, b, higher_is_better))
        .collect()
}

/// The best of some metric values (NaN ignored); `None` when there is none.
pub fn best_value(values: impl IntoIterator<Item = f64>, higher_is_better: bool) -> Option<f64> {
    values.into_iter().filter(|v| !v.is_nan()).reduce(|a, b| {
        if (higher_is_better && b > a) || (!higher_is_better && b < a) {
            b
        } else {
            a
        }
    })
}

/// Combine relative efficiencies (each in [0, 1]) into a cell's aggregate score; `None` for
/// no targets.
pub fn aggregate(by: RecommendBy, relative: &[f64]) -> Option<f64> {
    if relative.is_empty() {
        return None;
    }
    Some(match by {
        RecommendBy::Worst => relative.iter().copied().fold(f64::INFINITY, f64::min),
        RecommendBy::GeometricMean => {
            (relative.iter().map(|r| r.ln()).sum::<f64>() / relative.len() as f64).exp()
        }
    })
}

/// Ratio of two aggregate scores (1 when they are equal, zeros included).
fn ratio(a: f64, b: f64) -> f64 {
    if a == b { 1.0 } else { a / b }
}

/// Why a cell is not valid on one target.
#[derive(Debug, Clone, PartialEq)]
pub enum Exclusion {
    /// The results file has no run of the cell on the target.
    NoRuns,
    /// Fewer than two runs finished (`too-few-runs`).
    TooFewRuns { ok: u64 },
    /// The cell is flagged `biased` there.
    Biased {
        bias_p: Option<f64>,
        bias_share: Option<f64>,
    },
    /// Some of its runs failed.
    FailedRuns { failed: u64, total: u64 },
    /// The ranking metric has no value (e.g. the target has no reference values).
    NoValue,
}

/// Everything that keeps the cell of `row` from being valid on its target (`None`: the cell
/// has no runs there); empty when it is valid. Usable on its own, e.g. to decide whether a
/// cell can still be recommended while a study is running.
pub fn exclusions(row: Option<&Row>) -> Vec<Exclusion> {
    let Some(r) = row else {
        return vec![Exclusion::NoRuns];
    };
    let mut out = Vec::new();
    let too_few = r.flags.contains(&FLAG_TOO_FEW);
    if too_few {
        out.push(Exclusion::TooFewRuns {
            ok: r.scores.replicates_ok,
        });
    }
    if r.flags.contains(&FLAG_BIASED) {
        out.push(Exclusion::Biased {
            bias_p: r.scores.bias_p,
            bias_share: r.scores.bias_share,
        });
    }
    if r.scores.replicates_failed > 0 {
        out.push(Exclusion::FailedRuns {
            failed: r.scores.replicates_failed,
            total: r.scores.replicates_ok + r.scores.replicates_failed,
        });
    }
    if !too_few && r.metric_value.is_none() {
        out.push(Exclusion::NoValue);
    }
    out
}

/// The best valid cell of one target: the normaliser of the relative efficiencies there.
#[derive(Debug, Clone, PartialEq)]
pub struct Normaliser {
    pub target: String,
    pub settings: Map<String, Value>,
    pub value: f64,
}

/// A cell's standing on one target.
#[derive(Debug, Clone, PartialEq)]
pub struct TargetEfficiency {
    pub target: String,
    /// The ranking metric's value.
    pub value: f64,
    /// The relative efficiency against the target's [`Normaliser`].
    pub relative: f64,
}

/// An eligible cell.
#[derive(Debug, Clone, PartialEq)]
pub struct Candidate {
    pub settings: Map<String, Value>,
    /// Canonical key of the settings (the last tie-break).
    pub key: String,
    /// One entry per target, in header order.
    pub targets: Vec<TargetEfficiency>,
    /// The aggregate score under the recommendation's rule.
    pub aggregate: f64,
}

/// The targets that rule out one cell, and why.
#[derive(Debug, Clone, PartialEq)]
pub struct Excluded {
    pub settings: Map<String, Value>,
    pub key: String,
    /// (target, reasons), in header order; only the targets where the cell is not valid.
    pub ruled_out: Vec<(String, Vec<Exclusion>)>,
}

/// The recommended cell against the runner-up.
#[derive(Debug, Clone, PartialEq)]
pub struct Comparison {
    /// aggregate(recommended) / aggregate(runner-up), at least 1.
    pub ratio: f64,
    /// 95 % percentile bootstrap interval of the ratio; `None` when fewer than half of the
    /// resamples gave a finite ratio.
    pub interval: Option<(f64, f64)>,
    /// Resamples drawn.
    pub resamples: usize,
}

impl Comparison {
    /// Whether the interval excludes 1.
    pub fn distinguishable(&self) -> bool {
        self.interval.is_some_and(|(lo, hi)| lo > 1.0 || hi < 1.0)
    }
}

/// The recommended configuration of a study, as data.
#[derive(Debug, Clone, PartialEq)]
pub struct Recommendation {
    pub by: RecommendBy,
    pub metric: Metric,
    /// Target labels in header order.
    pub targets: Vec<String>,
    /// Cells seen in the ranking.
    pub cells: usize,
    /// The best valid cell of each target that has one, in header order.
    pub normalisers: Vec<Normaliser>,
    /// Eligible cells, recommended first.
    pub eligible: Vec<Candidate>,
    /// Cells that are not eligible: fewest ruling targets first, then by key.
    pub excluded: Vec<Excluded>,
    /// Present when there is a runner-up.
    pub comparison: Option<Comparison>,
}

impl Recommendation {
    /// The recommended cell, if any cell is eligible.
    pub fn recommended(&self) -> Option<&Candidate> {
        self.eligible.first()
    }

    /// The second eligible cell.
    pub fn runner_up(&self) -> Option<&Candidate> {
        self.eligible.get(1)
    }

    /// The normaliser of a target.
    pub fn normaliser(&self, target: &str) -> Option<&Normaliser> {
        self.normalisers.iter().find(|n| n.target == target)
    }
}

/// One cell of the ranking with its row on each target.
struct CellRows<'a> {
    key: String,
    settings: Map<String, Value>,
    /// Per target, in header order; `None` where the cell has no runs.
    rows: Vec<Option<&'a Row>>,
}

/// The ranking rearranged by cell.
struct ByCell<'a> {
    targets: Vec<String>,
    /// By key.
    cells: Vec<CellRows<'a>>,
    hib: bool,
}

impl<'a> ByCell<'a> {
    fn new(targets: Vec<String>, ranking: &'a Ranking) -> ByCell<'a> {
        let mut map: BTreeMap<String, CellRows<'a>> = BTreeMap::new();
        for r in &ranking.rows {
            let Some(ti) = targets.iter().position(|t| *t == r.target) else {
                continue;
            };
            let key = cell_key(&r.settings);
            let e = map.entry(key.clone()).or_insert_with(|| CellRows {
                key,
                settings: r.settings.clone(),
                rows: vec![None; targets.len()],
            });
            e.rows[ti] = Some(r);
        }
        ByCell {
            targets,
            cells: map.into_values().collect(),
            hib: ranking.metric.higher_is_better(),
        }
    }

    /// The metric value of cell `c` on target `t` when the cell is valid there.
    fn valid_value(&self, c: usize, t: usize) -> Option<f64> {
        let row = self.cells[c].rows[t];
        exclusions(row)
            .is_empty()
            .then(|| row.and_then(|r| r.metric_value))?
    }

    /// Index of the best valid cell of target `t` (ties to the smaller key).
    fn best(&self, t: usize) -> Option<(usize, f64)> {
        let mut best: Option<(usize, f64)> = None;
        for c in 0..self.cells.len() {
            if let Some(v) = self.valid_value(c, t)
                && best.is_none_or(|(_, b)| best_value([b, v], self.hib) != Some(b))
            {
                best = Some((c, v));
            }
        }
        best
    }
}

/// Apply the rule to a ranking of the targets `targets` (header order); no bootstrap, so
/// `comparison` is `None`. See the module documentation for the rule.
pub fn select(targets: &[String], ranking: &Ranking, by: RecommendBy) -> Recommendation {
    let grid = ByCell::new(targets.to_vec(), ranking);
    select_on(&grid, ranking.metric, by).0
}

/// The rule on a rearranged ranking; also returns the cell indices of the eligible cells in
/// recommendation order.
fn select_on(grid: &ByCell<'_>, metric: Metric, by: RecommendBy) -> (Recommendation, Vec<usize>) {
    let nt = grid.targets.len();
    let bests: Vec<Option<(usize, f64)>> = (0..nt).map(|t| grid.best(t)).collect();
    let normalisers = bests
        .iter()
        .enumerate()
        .filter_map(|(t, b)| {
            b.map(|(c, v)| Normaliser {
                target: grid.targets[t].clone(),
                settings: grid.cells[c].settings.clone(),
                value: v,
            })
        })
        .collect();
    let mut eligible: Vec<(usize, Candidate, f64)> = Vec::new();
    let mut excluded = Vec::new();
    for (c, cell) in grid.cells.iter().enumerate() {
        let values: Option<Vec<f64>> = (0..nt).map(|t| grid.valid_value(c, t)).collect();
        match values {
            Some(values) if nt > 0 => {
                // A valid cell makes its target's best exist.
                let best: Vec<f64> = bests.iter().map(|b| b.map_or(f64::NAN, |b| b.1)).collect();
                let rel = relative_efficiencies(&values, &best, grid.hib);
                let targets = (0..nt)
                    .map(|t| TargetEfficiency {
                        target: grid.targets[t].clone(),
                        value: values[t],
                        relative: rel[t],
                    })
                    .collect();
                let cand = Candidate {
                    settings: cell.settings.clone(),
                    key: cell.key.clone(),
                    targets,
                    aggregate: aggregate(by, &rel).unwrap_or(0.0),
                };
                eligible.push((c, cand, aggregate(by.other(), &rel).unwrap_or(0.0)));
            }
            _ => {
                let ruled_out = cell
                    .rows
                    .iter()
                    .enumerate()
                    .filter_map(|(t, r)| {
                        let why = exclusions(*r);
                        (!why.is_empty()).then(|| (grid.targets[t].clone(), why))
                    })
                    .collect();
                excluded.push(Excluded {
                    settings: cell.settings.clone(),
                    key: cell.key.clone(),
                    ruled_out,
                });
            }
        }
    }
    eligible.sort_by(|(_, a, a2), (_, b, b2)| {
        b.aggregate
            .total_cmp(&a.aggregate)
            .then_with(|| b2.total_cmp(a2))
            .then_with(|| a.key.cmp(&b.key))
    });
    excluded.sort_by(|a, b| {
        a.ruled_out
            .len()
            .cmp(&b.ruled_out.len())
            .then_with(|| a.key.cmp(&b.key))
    });
    let order = eligible.iter().map(|(c, _, _)| *c).collect();
    let rec = Recommendation {
        by,
        metric,
        targets: grid.targets.clone(),
        cells: grid.cells.len(),
        normalisers,
        eligible: eligible.into_iter().map(|(_, c, _)| c).collect(),
        excluded,
        comparison: None,
    };
    (rec, order)
}

/// The recommended configuration of a results file under `by`, from its `ranking`: the rule of
/// [`select`] and, when there is a runner-up, the bootstrap interval of the ratio of the two
/// aggregate scores, which resamples the ranking's own runs ([`Ranking::scored`]; a ranking
/// built without them gets no interval).
///
/// The interval is a percentile bootstrap (Efron & Tibshirani 1993, An Introduction to the
/// Bootstrap, ch. 13), as for the ranking metric's interval: each resample draws the replicates
/// of every (cell, target) with replacement, independently, recomputes the metric of every
/// cell valid on each target, so the normalisers too (the best value of the resample), and
/// then both cells' aggregates and their ratio; [`BOOTSTRAP_RESAMPLES`] resamples, 95 %. Which
/// cells are valid, and which two are compared, is held at the full data's decision. The seed
/// is fixed by the study's name and master seed, the rule and the metric, so tables are
/// reproducible.
pub fn recommend(results: &Results, ranking: &Ranking, by: RecommendBy) -> Recommendation {
    let targets: Vec<String> = results
        .header
        .targets
        .iter()
        .map(|t| t.label.clone())
        .collect();
    let grid = ByCell::new(targets, ranking);
    let (mut rec, order) = select_on(&grid, ranking.metric, by);
    if let (Some(&a), Some(&b)) = (order.first(), order.get(1)) {
        let study = &results.header.study;
        let seed = fnv1a64(
            format!(
                "recommend\0{}\0{}\0{}\0{}",
                study.name,
                study.seed,
                by.name(),
                ranking.metric.name()
            )
            .as_bytes(),
        );
        rec.comparison = Some(Comparison {
            ratio: ratio(rec.eligible[0].aggregate, rec.eligible[1].aggregate),
            interval: ratio_interval(results, ranking, &grid, by, (a, b), seed),
            resamples: BOOTSTRAP_RESAMPLES,
        });
    }
    rec
}

/// The bootstrap interval of aggregate(cells.0) / aggregate(cells.1) (see [`recommend`]).
/// The runs are the ranking's own ([`Ranking::scored`]).
fn ratio_interval(
    results: &Results,
    ranking: &Ranking,
    grid: &ByCell<'_>,
    by: RecommendBy,
    cells: (usize, usize),
    seed: u64,
) -> Option<(f64, f64)> {
    let metric = ranking.metric;
    let runs: BTreeMap<(&str, String), &CellRuns> = ranking
        .scored
        .iter()
        .map(|c| ((c.target.as_str(), cell_key(&c.settings)), &c.runs))
        .collect();
    // Per target: the (cell, runs ready to resample) of every cell valid there.
    let mut valid: Vec<Vec<(usize, MetricResampler<'_>)>> = Vec::new();
    for (t, label) in grid.targets.iter().enumerate() {
        let info = results.header.targets.iter().find(|i| i.label == *label)?;
        let mine = (0..grid.cells.len())
            .filter(|&c| grid.valid_value(c, t).is_some())
            .filter_map(|c| {
                runs.get(&(label.as_str(), grid.cells[c].key.clone()))
                    .map(|r| (c, MetricResampler::new(r, info, metric)))
            })
            .collect();
        valid.push(mine);
    }
    let hib = metric.higher_is_better();
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut idx = Vec::new();
    let mut ratios = Vec::with_capacity(BOOTSTRAP_RESAMPLES);
    let (mut rel_a, mut rel_b) = (Vec::new(), Vec::new());
    for _ in 0..BOOTSTRAP_RESAMPLES {
        rel_a.clear();
        rel_b.clear();
        for mine in &valid {
            let (mut best, mut va, mut vb) = (None, None, None);
            for (c, r) in mine {
                let n = r.len();
                idx.clear();
                idx.extend((0..n).map(|_| rng.random_range(0..n)));
                let v = r.value(&idx);
                let c = *c;
                if let Some(v) = v {
                    best = best_value(best.into_iter().chain([v]), hib);
                }
                if c == cells.0 {
                    va = v;
                }
                if c == cells.1 {
                    vb = v;
                }
            }
            if let (Some(best), Some(va), Some(vb)) = (best, va, vb) {
                rel_a.push(relative_efficiency(va, best, hib));
                rel_b.push(relative_efficiency(vb, best, hib));
            }
        }
        if rel_a.len() < valid.len() {
            continue;
        }
        if let (Some(a), Some(b)) = (aggregate(by, &rel_a), aggregate(by, &rel_b)) {
            let q = ratio(a, b);
            if q.is_finite() {
                ratios.push(q);
            }
        }
    }
    if ratios.len() < BOOTSTRAP_RESAMPLES / 2 {
        return None;
    }
    Some((quantile(&ratios, 0.025)?, quantile(&ratios, 0.975)?))
}
