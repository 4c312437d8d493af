//! The race's decision after a round: which cells leave the race on which target, and why.
//! One pure function, [`decide`], of the runs seen so far; no I/O, no clock, no thread.
//!
//! Three rules, each a family of tests per target and round:
//!
//! 1. **biased**: the tests of the table's `biased` flag ([`scores::bias_tests`]: a one-sample
//!    t test per mean coordinate, the E[Z-hat] = Z test of the evidence, Bonferroni inside the
//!    cell, the share rule [`scores::BIAS_MIN_SHARE`]), at the round's level of the bias budget;
//! 2. **worse**: the cell's ranking metric is worse than that of the round's best unbiased cell
//!    (the best point estimate among the cells the `biased` flag does not mark), by a one-sided
//!    two-sample permutation test of the ratio of the two cells' metric ([`super::split`]): the
//!    two cells' runs are pooled and split at random into groups of their sizes, the metric is
//!    recomputed on both groups as the table computes it (ESS per second included), and the
//!    p-value is (1 + #{splits on which the first group is at least as much worse}) / (B + 1)
//!    (Fisher 1935; Phipson & Smyth 2010). It is valid (never above its level) when the two
//!    cells' runs have the same law, at any number of replicates, and approximate when they
//!    have the same metric but runs of different law; it replaced a percentile bootstrap that,
//!    measured, was about twice as liberal as its level at 8 replicates.
//!
//! 3. **failed**: the cell's runs fail significantly more often than half the time (the
//!    one-sided exact binomial test of [`failed_rule`], at the round's level of the metric
//!    budget, its own Holm family): a cell whose runs all fail has no metric, so the metric rule
//!    could never eliminate it.
//!
//! Multiplicity: within a round and target, Holm's step-down procedure (Holm 1979,
//! Scandinavian Journal of Statistics 6(2); [`crate::inference::holm`]); across rounds, alpha
//! spending: round r is given alpha_r = alpha * 2^-r, so the levels of all rounds sum to less
//! than alpha (a Bonferroni bound over the repeated looks, the simplest alpha-spending
//! function; Lan & DeMets 1983, Biometrika 70). The bias rule's family is the cells it tests.
//! The metric rule's family is the cells compared *and the best itself*, with p = 1: the best
//! is selected as the largest of the estimates, so when k cells are equally good any of them
//! can be the one that looks worst, and a one-sided test against the selected best at level a
//! is in effect two-sided (two equal cells: one of them is eliminated with probability 2 a).
//! Counting the best makes the first Holm level alpha_r / m over m cells. With two cells that
//! bounds the chance that either is ever eliminated, when they are equal, by alpha. With more,
//! the union over the m - 1 cells a given equal cell can lose to bounds its chance by alpha at
//! Holm's first step only; after other cells are rejected the later steps test at up to
//! alpha_r / 2, so "at most alpha per cell" is approximate, not proven. Measured in
//! `race/rates.rs`: the bias rule 0.0011 against 0.001; the metric rule 0.036 for either of two
//! equal cells, 0.043 and 0.049 per cell (0.25 for any) of ten equal cells (normal and t_3
//! errors), against 0.05; with runs of different law, see `rates.rs`.
//!
//! The data: [`RaceView`] holds every target of the race at once, with each cell's runs on
//! each target (`None` once the cell is out there), so that the recommendation clause
//! ([`super::keep`]) can look across targets: a cell stays in on every target while it can
//! still be the recommended configuration over all targets. The clause needs every target in
//! one process, so a sharded race runs without it (see the module documentation of
//! [`super`]).

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;
use serde_json::{Map, Value};

use super::keep;
pub use super::keep::{Exit, RECOMMEND_ALPHA, RecommendRule};
use super::split::{Split, as_extreme, permutation_p, worse_ratio};
use crate::inference::holm;
use crate::recommend::RecommendBy;
use crate::results::{EliminationReason, TargetInfo};
use crate::scores::{self, BIAS_MIN_SHARE, CellRuns, CellScores, Metric};
use crate::seed::fnv1a64;

/// Total level of the bias rule over all rounds, per target: the table's `biased` rate.
pub const BIAS_ALPHA: f64 = scores::BIAS_ALPHA;
/// Total level of the metric rule over all rounds, per target (and of the failure rule).
pub const WORSE_ALPHA: f64 = 0.05;
/// The failure rule's null: a cell fails at most this share of its runs. A configuration that
/// fails more than half its runs is not one to choose, whatever its finished runs score.
pub const FAILED_SHARE: f64 = 0.5;
/// The test of the metric rule and of the recommendation clause, as the header records it.
pub const COMPARISON: &str = "permutation";
/// Fewest random splits of a comparison's permutation test ([`super::split`]). A round with m
/// cells compared at level alpha_r uses B = max(this, 4 m / alpha_r), so that the smallest Holm
/// level alpha_r / m is at least 4 / (B + 1): the smallest p-value of B splits, 1 / (B + 1),
/// never keeps a cell in for want of splits. The other floor is the number of distinct
/// splits: two cells of n runs have C(2n, n) of them, and only the observed one is as extreme
/// as a complete separation, so the p-value is at least about 1 / C(2n, n) + 1 / B; at 8
/// replicates (C(16, 8) = 12 870) about 2e-4, which the first Holm level 0.025 / m passes for
/// up to about 120 cells. A larger grid eliminates nothing as worse in round 1 at
/// `race_start = 8` (at 12, C(24, 12) = 2.7e6, the floor is 1 / B).
pub const RESAMPLES: u64 = 8000;

/// The rules' levels and metric.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct RaceRules {
    /// The ranking metric cells are compared by.
    pub metric: Metric,
    /// Total level of the bias rule over all rounds (per target).
    pub bias_alpha: f64,
    /// Total level of the metric rule over all rounds (per target).
    pub worse_alpha: f64,
    /// Random splits of a comparison's permutation test (the fewest; see [`RESAMPLES`]).
    pub resamples: u64,
    /// The recommendation clause; `None`: cells are kept per target only.
    pub recommend: Option<RecommendRule>,
}

impl RaceRules {
    /// The default rules with the given metric, without the recommendation clause.
    pub fn with_metric(metric: Metric) -> RaceRules {
        RaceRules {
            metric,
            bias_alpha: BIAS_ALPHA,
            worse_alpha: WORSE_ALPHA,
            resamples: RESAMPLES,
            recommend: None,
        }
    }

    /// The same rules with the recommendation clause under `by`, at [`RECOMMEND_ALPHA`].
    pub fn recommending(self, by: RecommendBy) -> RaceRules {
        RaceRules {
            recommend: Some(RecommendRule {
                by,
                alpha: RECOMMEND_ALPHA,
            }),
            ..self
        }
    }
}

/// A cell of the grid: its canonical key and its settings.
#[derive(Debug, Clone, PartialEq)]
pub struct RaceCell {
    pub key: String,
    pub settings: Map<String, Value>,
}

/// What the race knows after a round, for every target at once.
#[derive(Debug, Clone)]
pub struct RaceView<'a> {
    /// The study's targets, in header order.
    pub targets: &'a [TargetInfo],
    /// The grid's cells, in grid order.
    pub cells: &'a [RaceCell],
    /// `runs[t][c]`: cell c's runs on target t, replicates 0 .. the round's count in replicate
    /// order; `None` when the cell is out of the race on t (or t is not raced here).
    pub runs: Vec<Vec<Option<CellRuns>>>,
    /// Whether target t is decided on in this round: raced by this process and with more than
    /// one cell left.
    pub in_round: Vec<bool>,
    /// Whether cell c can still be the recommended configuration (it has not left the
    /// recommendation in an earlier round); read only with the recommendation clause.
    pub in_recommendation: Vec<bool>,
}

/// One cell leaving the race on one target.
#[derive(Debug, Clone, PartialEq)]
pub struct Decision {
    /// Target index.
    pub target: usize,
    /// Cell index.
    pub cell: usize,
    pub reason: EliminationReason,
    /// Biased: the deciding quantity's bias share; worse: the ratio of the metric (best over
    /// the cell when higher is better, the cell over best otherwise: above 1 is worse).
    pub statistic: Option<f64>,
    /// The test's p-value.
    pub p: f64,
    /// The Holm level it passed.
    pub level: f64,
    /// For `worse`: the index of the cell it lost to.
    pub than: Option<usize>,
}

/// The level of round `round` (1-based) of a budget `alpha`: alpha * 2^-round.
pub fn round_alpha(alpha: f64, round: u64) -> f64 {
    alpha * 0.5f64.powi(round.min(1000) as i32)
}

/// Replicates per cell once round `round` (1-based) is done: `start` in round 1, doubled in
/// each later round (each round adds as many replicates as the survivors have), capped at
/// `max`.
pub fn round_replicates(start: u64, max: u64, round: u64) -> u64 {
    let mut n = start.min(max);
    for _ in 1..round {
        n = n.saturating_mul(2).min(max);
    }
    n
}

/// What one round decides: the eliminations, target by target in index order, each target's
/// in cell order, and the cells that leave the recommendation (the clause of [`keep`], when
/// the rules have one), in cell order.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct RoundDecision {
    pub eliminated: Vec<Decision>,
    pub left_recommendation: Vec<Exit>,
}

/// The decisions after round `round` (1-based). Deterministic: a function of `view`, `round`
/// and `rules` alone (every permutation test's generator is seeded by the target or targets,
/// the cells compared and the round).
///
/// Order of the rules: the bias rule on every target first; then the recommendation clause
/// (a cell eliminated as biased anywhere can no longer be recommended); then the metric rule,
/// whose eliminations are carried out only for cells that can no longer be recommended (a
/// cell the clause keeps stays in on that target, and is tested again in the next round).
pub fn decide(view: &RaceView<'_>, round: u64, rules: &RaceRules) -> RoundDecision {
    let nt = view.targets.len();
    let in_round = |t: usize| view.in_round.get(t).copied().unwrap_or(false);
    let row = |t: usize| view.runs.get(t).map(Vec::as_slice).unwrap_or(&[]);
    // Every cell's scores, once, for the metric rule (targets in the round) and the clause
    // (every target).
    let scored: Vec<Vec<Option<CellScores>>> = (0..nt)
        .into_par_iter()
        .map(|t| {
            if !(in_round(t) || rules.recommend.is_some()) {
                return Vec::new();
            }
            row(t)
                .iter()
                .map(|r| r.as_ref().map(|r| scores::score_cell(r, &view.targets[t])))
                .collect()
        })
        .collect();
    let biased: Vec<Vec<Decision>> = (0..nt)
        .map(|t| {
            if in_round(t) {
                bias_rule(&view.targets[t], row(t), t, round, rules)
            } else {
                Vec::new()
            }
        })
        .collect();
    let failed: Vec<Vec<Decision>> = (0..nt)
        .map(|t| {
            if in_round(t) {
                let gone: Vec<usize> = biased[t].iter().map(|d| d.cell).collect();
                failed_rule(row(t), &gone, t, round, rules)
            } else {
                Vec::new()
            }
        })
        .collect();
    let left = match &rules.recommend {
        Some(rule) => keep::exits(
            view,
            &scored,
            round,
            rules.metric,
            rules.resamples,
            rule,
            &biased,
        ),
        None => Vec::new(),
    };
    let mut in_rec: Vec<bool> = (0..view.cells.len())
        .map(|c| {
            rules.recommend.is_some() && view.in_recommendation.get(c).copied().unwrap_or(false)
        })
        .collect();
    for e in &left {
        in_rec[e.cell] = false;
    }
    let mut out = RoundDecision {
        eliminated: Vec::new(),
        left_recommendation: left,
    };
    for (t, (mut mine, failed)) in biased.into_iter().zip(failed).enumerate() {
        if !in_round(t) {
            continue;
        }
        mine.extend(failed);
        let flagged: Vec<usize> = mine.iter().map(|d| d.cell).collect();
        mine.extend(
            worse_rule(
                view.cells,
                &view.targets[t],
                row(t),
                &scored[t],
                &flagged,
                &in_rec,
                t,
                round,
                rules,
            )
            .into_iter()
            .filter(|d| !in_rec[d.cell]),
        );
        mine.sort_by_key(|d| d.cell);
        out.eliminated.extend(mine);
    }
    out
}

/// Rule 1 on one target: the cells significantly biased at the round's level.
fn bias_rule(
    target: &TargetInfo,
    row: &[Option<CellRuns>],
    t: usize,
    round: u64,
    rules: &RaceRules,
) -> Vec<Decision> {
    let mut out = Vec::new();
    // The cell's p-value is its Bonferroni p (as `bias_p` in the table); Holm over the cells
    // that have a test; a rejected cell leaves when the flag's share rule also holds at the
    // level it was held to.
    let tested: Vec<(usize, Vec<crate::inference::BiasTest>)> = alive(row)
        .into_iter()
        .filter(|(_, r)| r.ok >= 2)
        .map(|(c, r)| (c, scores::bias_tests(r, target)))
        .filter(|(_, tests)| !tests.is_empty())
        .collect();
    let ps: Vec<f64> = tested
        .iter()
        .map(|(_, tests)| {
            let m = tests.len() as f64;
            let min = tests.iter().map(|b| b.p).fold(1.0, f64::min);
            (m * min).min(1.0)
        })
        .collect();
    for ((c, tests), v) in tested
        .iter()
        .zip(holm(&ps, round_alpha(rules.bias_alpha, round)))
    {
        if !v.rejected {
            continue;
        }
        if let Some(b) = crate::inference::cell_bias(tests, v.threshold, BIAS_MIN_SHARE)
            && b.biased
        {
            out.push(Decision {
                target: t,
                cell: *c,
                reason: EliminationReason::Biased,
                statistic: Some(b.share),
                p: b.p,
                level: v.threshold,
                than: None,
            });
        }
    }
    out
}

/// Rule 3 on one target: the cells whose runs fail significantly more often than
/// [`FAILED_SHARE`] of the time, by the one-sided exact binomial test (p = P(X >= failed) for X
/// binomial with the cell's runs and the share; Clopper & Pearson 1934, Biometrika 26, for the
/// exact binomial tail), Holm over the cells with failed runs at the round's level of the metric
/// budget. Leaves out the cells in `gone` (eliminated as biased this round). A cell whose every
/// run fails is never a candidate of the metric rule (it has no metric), so without this rule it
/// would run to the maximum; 8 failures of 8 give p = 2^-8 = 0.0039, 16 of 16 p = 1.5e-5.
fn failed_rule(
    row: &[Option<CellRuns>],
    gone: &[usize],
    t: usize,
    round: u64,
    rules: &RaceRules,
) -> Vec<Decision> {
    use statrs::distribution::{Binomial, DiscreteCDF};
    let tested: Vec<(usize, u64, u64)> = alive(row)
        .into_iter()
        .filter(|(c, r)| r.failed > 0 && !gone.contains(c))
        .map(|(c, r)| (c, r.failed, r.ok.saturating_add(r.failed)))
        .collect();
    let ps: Vec<f64> = tested
        .iter()
        .map(|&(_, failed, n)| match Binomial::new(FAILED_SHARE, n) {
            Ok(law) => law.sf(failed - 1).clamp(0.0, 1.0),
            Err(_) => 1.0,
        })
        .collect();
    let mut out = Vec::new();
    for ((&(c, failed, n), verdict), &p) in tested
        .iter()
        .zip(holm(&ps, round_alpha(rules.worse_alpha, round)))
        .zip(&ps)
    {
        if verdict.rejected {
            out.push(Decision {
                target: t,
                cell: c,
                reason: EliminationReason::Failed,
                statistic: Some(failed as f64 / n as f64),
                p,
                level: verdict.threshold,
                than: None,
            });
        }
    }
    out
}

/// The cells still in on a target, with their runs.
fn alive(row: &[Option<CellRuns>]) -> Vec<(usize, &CellRuns)> {
    row.iter()
        .enumerate()
        .filter_map(|(c, r)| r.as_ref().map(|r| (c, r)))
        .collect()
}

/// Rule 2 on one target: the cells significantly worse by the metric than the best cell not
/// flagged `biased`, leaving out the cells `flagged` by rule 1 this round; the cells `kept`
/// by the recommendation clause are not tested (p = 1). `scored[c]`: cell c's scores.
#[allow(clippy::too_many_arguments)]
fn worse_rule(
    cells: &[RaceCell],
    target: &TargetInfo,
    row: &[Option<CellRuns>],
    scored: &[Option<CellScores>],
    flagged: &[usize],
    kept: &[bool],
    t: usize,
    round: u64,
    rules: &RaceRules,
) -> Vec<Decision> {
    let mut out = Vec::new();
    // Rule 2: the metric, against the best cell the table's flag does not mark biased.
    let metric = rules.metric;
    let scored: Vec<(usize, &CellRuns, Option<f64>, bool)> = alive(row)
        .into_iter()
        .filter(|(c, _)| !flagged.contains(c))
        .filter_map(|(c, r)| {
            let s = scored.get(c)?.as_ref()?;
            let v = metric.value(s).filter(|v| !v.is_nan());
            Some((c, r, v, s.biased || r.ok < 2))
        })
        .collect();
    let better = |a: f64, b: f64| {
        if metric.higher_is_better() {
            a > b
        } else {
            a < b
        }
    };
    let best = scored
        .iter()
        .filter(|(_, _, v, flagged)| v.is_some() && !flagged)
        .fold(
            None,
            |acc: Option<(usize, &CellRuns, f64)>, &(c, r, v, _)| {
                let v = v.unwrap_or(f64::NAN);
                match acc {
                    Some((_, _, bv)) if !better(v, bv) => acc,
                    _ => Some((c, r, v)),
                }
            },
        );
    let Some((best_c, best_runs, best_v)) = best else {
        return out;
    };
    let candidates: Vec<(usize, &CellRuns, f64)> = scored
        .iter()
        .filter(|(c, r, v, _)| *c != best_c && v.is_some() && r.ok >= 2)
        .map(|&(c, r, v, _)| (c, r, v.unwrap_or(f64::NAN)))
        .collect();
    // Holm over the candidates and the best itself (its p-value is 1): the best is selected
    // as the largest estimate, so with k cells tied for the best any of them may be the one
    // tested; counting it keeps the chance that a given best cell is eliminated within the
    // level (see the module documentation).
    let level = round_alpha(rules.worse_alpha, round);
    let family = candidates.len() + 1;
    let splits = rules
        .resamples
        .max((4.0 * family as f64 / level).ceil().min(1e7) as u64);
    let mut ps: Vec<f64> = candidates
        .par_iter()
        .map(|&(c, r, v)| {
            if !better(best_v, v) || kept.get(c).copied().unwrap_or(false) {
                // Not worse on the point estimate: a one-sided test at a level below 1/2
                // cannot reject. Kept by the recommendation clause: the elimination would not
                // be carried out, so its p-value is not computed and counts as 1, which Holm's
                // procedure, monotone in the p-values, makes conservative for the others.
                return 1.0;
            }
            let seed = fnv1a64(
                format!(
                    "{}\0{}\0{}\0{round}",
                    target.label, cells[c].key, cells[best_c].key
                )
                .as_bytes(),
            );
            worse_p(best_runs, r, target, metric, seed, splits, level)
        })
        .collect();
    ps.push(1.0);
    for ((&(c, _, v), verdict), &p) in candidates.iter().zip(holm(&ps, level)).zip(&ps) {
        if verdict.rejected {
            out.push(Decision {
                target: t,
                cell: c,
                reason: EliminationReason::Worse,
                statistic: worse_ratio(Some(best_v), Some(v), metric).filter(|x| x.is_finite()),
                p,
                level: verdict.threshold,
                than: Some(best_c),
            });
        }
    }
    out
}

/// The permutation p-value of "the cell is not worse than the best" ([`super::split`]): the
/// share of random splits of the two cells' pooled runs on which the first group is at least as
/// much worse than the second as the cell is than the best. Stops early, returning a lower
/// bound, once the p-value is certain to exceed `give_up_above`.
fn worse_p(
    best: &CellRuns,
    cell: &CellRuns,
    target: &TargetInfo,
    metric: Metric,
    seed: u64,
    splits: u64,
    give_up_above: f64,
) -> f64 {
    let mut split = Split::new(cell, best, target, metric);
    let (nc, nb) = split.sizes();
    if nc < 2 || nb < 2 || splits == 0 {
        return 1.0;
    }
    let (c, b) = split.observed();
    let Some(observed) = worse_ratio(b, c, metric) else {
        return 1.0;
    };
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    permutation_p(splits, give_up_above, || {
        let (c, b) = split.draw(&mut rng);
        as_extreme(worse_ratio(b, c, metric).unwrap_or(f64::NAN), observed)
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::results::ExitReason;
    use rand_distr::{Distribution, StandardNormal};

    use crate::race::testkit::{cells, runs_of};

    /// A 2-d standard Gaussian target (mean 0, covariance I, no evidence).
    fn target() -> TargetInfo {
        crate::race::testkit::target("t")
    }

    /// `n` runs whose mean estimates are N(bias, sd^2 I): an unbiased cell of variance ESS
    /// 1 / sd^2 when bias is 0 (variance_ess = sum Var / sum MSE = 2 / (2 sd^2)).
    fn cell(n: usize, sd: f64, bias: f64, seed: u64) -> CellRuns {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let means: Vec<[f64; 2]> = (0..n)
            .map(|_| {
                let z: [f64; 2] = [
                    StandardNormal.sample(&mut rng),
                    StandardNormal.sample(&mut rng),
                ];
                [bias + sd * z[0], bias + sd * z[1]]
            })
            .collect();
        runs_of(&means)
    }

    fn view<'a>(
        targets: &'a [TargetInfo],
        cells: &'a [RaceCell],
        runs: Vec<CellRuns>,
    ) -> RaceView<'a> {
        RaceView {
            targets,
            cells,
            runs: vec![runs.into_iter().map(Some).collect()],
            in_round: vec![true],
            in_recommendation: vec![false; cells.len()],
        }
    }

    /// The eliminations of one round.
    fn elims(v: &RaceView<'_>, round: u64, rules: &RaceRules) -> Vec<Decision> {
        decide(v, round, rules).eliminated
    }

    #[test]
    fn schedule_and_spending() {
        // Doubling from 8 to 64 (8, 16, 32, 64), capped at the maximum.
        let n: Vec<u64> = (1..=5).map(|r| round_replicates(8, 64, r)).collect();
        assert_eq!(n, vec![8, 16, 32, 64, 64]);
        assert_eq!(round_replicates(8, 20, 3), 20);
        // alpha * 2^-r sums to below alpha over any number of rounds (geometric series; in
        // floating point the 60-round sum rounds to alpha itself).
        let total: f64 = (1..=60).map(|r| round_alpha(0.05, r)).sum();
        assert!(total <= 0.05 && total > 0.0499, "{total}");
    }

    #[test]
    fn a_large_gap_eliminates_the_hopeless_cells_and_never_the_best() {
        // 20 cells at 8 replicates: cell 0 has variance ESS 1 / 0.1^2 = 100, cells 1..19 have
        // 1 / 0.5^2 = 4, 25 times worse; the sum of squared errors of 8 runs is a scaled
        // chi-squared with 16 df (sd of the log of the mean about sqrt(2/16) = 0.35), so the
        // log ratio log 25 = 3.2 is 6.5 of its sds: almost no split of a hopeless cell's runs
        // with the best's is as extreme as the observed one, so its permutation p-value
        // (Fisher 1935; Phipson & Smyth 2010) is near its floor 1 / (B + 1), below the first
        // Holm level 0.025 / 20 = 1.25e-3 (the family counts the best). Fixed seeds; the best
        // cell is never eliminated, as the rule compares every cell with it.
        let ts = [target()];
        let cs = cells(20);
        let runs: Vec<CellRuns> = (0..20)
            .map(|c| cell(8, if c == 0 { 0.1 } else { 0.5 }, 0.0, 100 + c as u64))
            .collect();
        let rules = RaceRules::with_metric(Metric::VarianceEss);
        let d = elims(&view(&ts, &cs, runs), 1, &rules);
        assert_eq!(d.len(), 19, "{d:?}");
        assert!(d.iter().all(|x| x.cell != 0 && x.than == Some(0)));
        assert!(
            d.iter()
                .all(|x| x.reason == EliminationReason::Worse && x.p <= x.level)
        );
        // The same decision with rmse_mean (lower is better): the same order of cells.
        let runs: Vec<CellRuns> = (0..20)
            .map(|c| cell(8, if c == 0 { 0.1 } else { 0.5 }, 0.0, 100 + c as u64))
            .collect();
        let d = elims(
            &view(&ts, &cs, runs),
            1,
            &RaceRules::with_metric(Metric::RmseMean),
        );
        assert_eq!(d.len(), 19);
        assert!(d.iter().all(|x| x.cell != 0));
    }

    #[test]
    fn equal_cells_stay_in() {
        // 10 cells of the same law (variance ESS 25): no cell is significantly worse, and the
        // chance that the rule eliminates any is at most 0.025 in round 1 (Holm); these fixed
        // seeds give none. Nor is any biased (the mean is exact).
        let ts = [target()];
        let cs = cells(10);
        let runs: Vec<CellRuns> = (0..10).map(|c| cell(16, 0.2, 0.0, 7 + c as u64)).collect();
        let d = elims(
            &view(&ts, &cs, runs),
            1,
            &RaceRules::with_metric(Metric::VarianceEss),
        );
        assert!(d.is_empty(), "{d:?}");
    }

    #[test]
    fn a_biased_cell_is_eliminated_as_biased_even_when_it_is_best_on_the_metric() {
        // Cell 1's means are off by 3 sds (bias 0.3, sd 0.1, share 0.9) at 32 replicates: its t
        // is about 17, p far below the round-1 level 1e-3 / 2 (Student t). Its variance ESS
        // (2 / (2 (0.01 + 0.09)) = 10) is below cell 0's 100 anyway; the bias rule takes it
        // first. Cell 0 is unbiased and stays.
        let ts = [target()];
        let cs = cells(2);
        let runs = vec![cell(32, 0.1, 0.0, 1), cell(32, 0.1, 0.3, 2)];
        let d = elims(
            &view(&ts, &cs, runs),
            1,
            &RaceRules::with_metric(Metric::VarianceEss),
        );
        assert_eq!(d.len(), 1, "{d:?}");
        assert_eq!((d[0].cell, d[0].reason), (1, EliminationReason::Biased));
        assert!(d[0].statistic.is_some_and(|s| s > 0.8));
    }

    #[test]
    fn a_cell_whose_runs_fail_is_eliminated_as_failed() {
        // Round 2, 16 replicates: cells 0..3 finish every run; cell 4 fails 4 of 16; cell 5
        // fails all 16. Exact binomial tails under a failure share of 1/2 (closed forms):
        // P(X >= 16) = 2^-16 = 1.53e-5, below the round-2 Holm level 0.0125 / 2;
        // P(X >= 4) = 1 - (1 + 16 + 120 + 560) / 2^16 = 0.98936, far above it.
        let ts = [target()];
        let cs = cells(6);
        let mut runs: Vec<CellRuns> = (0..5).map(|c| cell(16, 0.2, 0.0, 60 + c)).collect();
        runs[4] = cell(12, 0.2, 0.0, 64);
        runs[4].failed = 4;
        runs.push(CellRuns {
            failed: 16,
            ..CellRuns::default()
        });
        let rules = RaceRules::with_metric(Metric::VarianceEss);
        let d = elims(&view(&ts, &cs, runs), 2, &rules);
        let failed: Vec<&Decision> = d
            .iter()
            .filter(|x| x.reason == EliminationReason::Failed)
            .collect();
        assert_eq!(failed.len(), 1, "{d:?}");
        assert_eq!(failed[0].cell, 5);
        approx::assert_relative_eq!(failed[0].p, 0.5f64.powi(16), max_relative = 1e-9);
        assert_eq!(failed[0].statistic, Some(1.0));
        assert!(failed[0].than.is_none());
        // The failing cell is never the best the others are compared with.
        assert!(d.iter().all(|x| x.than != Some(5)));
    }

    #[test]
    fn the_decision_is_a_function_of_its_inputs() {
        // Same view, same round: same decisions, bit for bit (each permutation test is seeded
        // by the target, the cells and the round; rayon's order does not enter).
        let ts = [target()];
        let cs = cells(6);
        let mk = || -> Vec<CellRuns> {
            (0..6)
                .map(|c| cell(8, 0.1 + 0.1 * c as f64, 0.0, 50 + c as u64))
                .collect()
        };
        let rules = RaceRules::with_metric(Metric::VarianceEss);
        let a = elims(&view(&ts, &cs, mk()), 2, &rules);
        let b = elims(&view(&ts, &cs, mk()), 2, &rules);
        assert_eq!(a, b);
        assert!(!a.is_empty());
    }

    #[test]
    fn error_figures_give_the_metric_of_the_runs() {
        // The fast path of the resampled metric equals Metric::of_runs on the same runs (up to
        // the order of summation).
        let t = target();
        let mut r = cell(9, 0.3, 0.05, 3);
        for (i, s) in r.seconds.iter_mut().enumerate() {
            *s = 0.5 + i as f64 * 0.1;
        }
        let idx: Vec<usize> = (0..9).collect();
        for m in [Metric::VarianceEss, Metric::RmseMean, Metric::EssPerSecond] {
            let f = scores::ErrorFigures::of(m, &r, &t).expect("figures");
            let (a, b) = (f.value(&idx).unwrap(), m.of_runs(&r, &t).unwrap());
            assert!((a - b).abs() <= 1e-12 * b.abs(), "{m:?}: {a} vs {b}");
        }
        assert!(scores::ErrorFigures::of(Metric::KishEss, &r, &t).is_none());
    }

    /// Three targets and three cells built so that the worst-case recommendation and the
    /// per-target winners disagree: cell 0 has variance ESS 100 on targets 0 and 1 and 1 on
    /// target 2; cell 1 the reverse; cell 2 has 30 everywhere (sd 1 / sqrt(30)). Relative
    /// efficiencies (worst case): cells 0 and 1 at 1 / 100, cell 2 at 0.3: cell 2 is the one
    /// to recommend, although it is significantly worse than the best cell on every target.
    fn split_study(n: usize, biased_cell2_on_t0: bool) -> (Vec<TargetInfo>, Vec<Vec<CellRuns>>) {
        let ts: Vec<TargetInfo> = (0..3)
            .map(|i| TargetInfo {
                label: format!("t{i}"),
                ..target()
            })
            .collect();
        let sd_c2 = 1.0 / 30f64.sqrt();
        let runs = (0..3)
            .map(|t| {
                let (a, b) = if t < 2 { (0.1, 1.0) } else { (1.0, 0.1) };
                let bias = if biased_cell2_on_t0 && t == 0 {
                    0.5
                } else {
                    0.0
                };
                vec![
                    cell(n, a, 0.0, 300 + t as u64),
                    cell(n, b, 0.0, 310 + t as u64),
                    cell(n, sd_c2, bias, 320 + t as u64),
                ]
            })
            .collect();
        (ts, runs)
    }

    fn multi_view<'a>(
        ts: &'a [TargetInfo],
        cs: &'a [RaceCell],
        runs: Vec<Vec<CellRuns>>,
        in_recommendation: bool,
    ) -> RaceView<'a> {
        RaceView {
            targets: ts,
            cells: cs,
            runs: runs
                .into_iter()
                .map(|row| row.into_iter().map(Some).collect())
                .collect(),
            in_round: vec![true; ts.len()],
            in_recommendation: vec![in_recommendation; cs.len()],
        }
    }

    #[test]
    fn the_clause_keeps_the_cell_that_is_second_best_everywhere() {
        // At 32 replicates the sum of squared errors is a scaled chi-squared with 64 df (sd of
        // the log of a cell's variance ESS about sqrt(2 / 64) = 0.18), so the log ratio
        // log(100 / 30) = 1.2 is about 4.8 sds of the difference of two cells: per target,
        // cell 2 is significantly worse than the best at the round-1 Holm level 0.025 / 3
        // (permutation test, Fisher 1935; the family counts the best). Without the clause it
        // is eliminated on every target; with it, cells 0 and 1 (worst-case aggregate 0.01 against 0.3, a
        // gap of 30 times) leave the recommendation and cell 2 stays in everywhere, while
        // cells 0 and 1 are still eliminated where they are worse.
        let cs = cells(3);
        let (ts, runs) = split_study(32, false);
        let plain = RaceRules::with_metric(Metric::VarianceEss);
        let d = decide(&multi_view(&ts, &cs, runs.clone(), false), 1, &plain);
        let gone = |d: &RoundDecision, c: usize| {
            let mut t: Vec<usize> = d
                .eliminated
                .iter()
                .filter(|x| x.cell == c)
                .map(|x| x.target)
                .collect();
            t.sort();
            t
        };
        assert_eq!(gone(&d, 2), vec![0, 1, 2], "{d:?}");
        assert!(d.left_recommendation.is_empty());

        let rules = plain.recommending(RecommendBy::Worst);
        let d = decide(&multi_view(&ts, &cs, runs, true), 1, &rules);
        assert!(gone(&d, 2).is_empty(), "{d:?}");
        let left: Vec<(usize, ExitReason, Option<usize>)> = d
            .left_recommendation
            .iter()
            .map(|x| (x.cell, x.reason, x.than))
            .collect();
        assert_eq!(
            left,
            vec![
                (0, ExitReason::Behind, Some(2)),
                (1, ExitReason::Behind, Some(2))
            ]
        );
        assert!(
            d.left_recommendation
                .iter()
                .all(|x| x.p.zip(x.level).is_some_and(|(p, l)| p <= l))
        );
        // Cell 1 is worse than cell 0 on targets 0 and 1, cell 0 than cell 1 on target 2.
        assert_eq!(gone(&d, 0), vec![2]);
        assert_eq!(gone(&d, 1), vec![0, 1]);
    }

    #[test]
    fn a_cell_biased_on_one_target_leaves_the_recommendation() {
        // Cell 2's means on target 0 are off by 0.5 with sd 0.18: t about 15 at 32 replicates
        // (Student t), far below the round-1 bias level. It is eliminated there as biased and
        // leaves the recommendation with that target named; then nothing protects it on the
        // other targets, where it is significantly worse (previous test).
        let cs = cells(3);
        let (ts, runs) = split_study(32, true);
        let rules = RaceRules::with_metric(Metric::VarianceEss).recommending(RecommendBy::Worst);
        let d = decide(&multi_view(&ts, &cs, runs, true), 1, &rules);
        let x = d
            .left_recommendation
            .iter()
            .find(|x| x.cell == 2)
            .expect("cell 2 leaves");
        assert_eq!((x.reason, x.target), (ExitReason::Biased, Some(0)));
        let on: Vec<(usize, EliminationReason)> = d
            .eliminated
            .iter()
            .filter(|x| x.cell == 2)
            .map(|x| (x.target, x.reason))
            .collect();
        assert_eq!(on[0], (0, EliminationReason::Biased), "{d:?}");
    }
}
