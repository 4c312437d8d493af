//! The recommendation clause of a race: a cell stays in on every target while it can still be
//! the study's recommended configuration ([`crate::recommend`]), even where it is already
//! significantly worse than the target's best cell; the metric rule of [`super::decide`]
//! eliminates it on a target only once it has left the recommendation. Without the clause a
//! cell that is second best everywhere, which the worst-case rule may well recommend, would be
//! dropped on every target at a handful of replicates, and the recommendation would be made
//! between cells measured with very different precision.
//!
//! A cell leaves the recommendation, for good, after the round in which:
//!
//! - it is eliminated as biased on some target (a biased cell is never eligible);
//! - some of its runs failed on some target (nor is a cell with failed runs); or
//! - its aggregate relative efficiency (the recommendation's rule, worst case or geometric
//!   mean, [`crate::recommend::aggregate`]) is significantly below that of the *leader*, the
//!   cell with the largest aggregate among those valid on every target (at least two finished
//!   runs, none failed, not flagged `biased`, a value of the metric), ties to the smaller key.
//!
//! The test of the last rule is a one-sided permutation test, as the metric rule's
//! ([`super::split`]): on every target the runs of the cell and of the leader are pooled and
//! split at random into groups of their sizes (independently on each target), both metrics are
//! recomputed, each target is normalised by its best valid value (the larger of the two groups'
//! and of the other cells' best, which stay as observed: the recommendation's rule on the split
//! data), and p = (1 + #{splits on which the leader's aggregate over the cell's is at least the
//! observed ratio}) / (B + 1) (Fisher 1935; Phipson & Smyth 2010). If the two cells' runs have
//! the same law on every target, the test is exact at any number of replicates. Multiplicity as
//! for the metric rule: Holm over the cells tested in a round and the leader itself (p = 1, as
//! the leader is selected as the largest aggregate), round r at alpha * 2^-r with alpha =
//! [`RECOMMEND_ALPHA`], so the chance that the clause ever releases a given cell whose
//! aggregate is not below the leader's is at most about alpha. Measured in `race/rates.rs`
//! (three targets, equal cells): any of two cells leaves in 0.045 of races, and each of five
//! cells in 0.038 (0.14 for any). It replaced a percentile bootstrap that resampled the cell,
//! the leader and the normaliser independently, measured at 0.39 for two equal cells: when the
//! leader is best on every target, that bootstrap's p-value behaves like the product of the
//! per-target ones.

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;

use super::decide::{Decision, RaceView, round_alpha};
use super::split::{Split, as_extreme, permutation_p};
use crate::inference::holm;
use crate::recommend::{RecommendBy, aggregate, best_value, relative_efficiency};
use crate::results::ExitReason;
use crate::scores::{CellScores, Metric};
use crate::seed::fnv1a64;

/// Total level of the clause's test over all rounds.
pub const RECOMMEND_ALPHA: f64 = 0.05;

/// The clause's settings.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct RecommendRule {
    /// How relative efficiencies combine over targets (as `--recommend-by`).
    pub by: RecommendBy,
    /// Total level over all rounds.
    pub alpha: f64,
}

/// A cell leaving the recommendation after a round.
#[derive(Debug, Clone, PartialEq)]
pub struct Exit {
    /// Cell index.
    pub cell: usize,
    pub reason: ExitReason,
    /// For `biased` and `failed`: the target index.
    pub target: Option<usize>,
    /// For `behind`: the leader's cell index.
    pub than: Option<usize>,
    /// For `behind`: the leader's aggregate over the cell's.
    pub statistic: Option<f64>,
    /// For `behind`: the permutation test's p-value and the Holm level it passed.
    pub p: Option<f64>,
    pub level: Option<f64>,
}

impl Exit {
    fn ruled_out(cell: usize, reason: ExitReason, target: usize) -> Exit {
        Exit {
            cell,
            reason,
            target: Some(target),
            than: None,
            statistic: None,
            p: None,
            level: None,
        }
    }
}

/// A cell's point figures on one target: its metric value (`None`: undefined) and whether it
/// is valid there for the recommendation.
#[derive(Debug, Clone, Copy)]
struct Point {
    value: Option<f64>,
    valid: bool,
}

/// The best value among the cells of a target's row valid for the recommendation, leaving out
/// the cells `except`: the normaliser of the relative efficiencies (`None`: no such cell).
fn best_valid(row: &[Option<Point>], except: &[usize], hib: bool) -> Option<f64> {
    best_value(
        row.iter().enumerate().filter_map(|(c, p)| match p {
            Some(Point {
                value: Some(v),
                valid: true,
            }) if !except.contains(&c) => Some(*v),
            _ => None,
        }),
        hib,
    )
}

/// The cells that leave the recommendation after round `round`, in cell order. `scored[t][c]`:
/// cell c's scores on target t (`None` where it has no runs); `biased[t]`: the bias rule's
/// eliminations of this round on target t.
#[allow(clippy::too_many_arguments)]
pub(super) fn exits(
    view: &RaceView<'_>,
    scored: &[Vec<Option<CellScores>>],
    round: u64,
    metric: Metric,
    min_resamples: u64,
    rule: &RecommendRule,
    biased: &[Vec<Decision>],
) -> Vec<Exit> {
    let (nt, nc) = (view.targets.len(), view.cells.len());
    let runs = |t: usize, c: usize| {
        view.runs
            .get(t)
            .and_then(|row| row.get(c))
            .and_then(Option::as_ref)
    };
    let mut out = Vec::new();
    let mut open = Vec::new();
    for c in 0..nc {
        if !view.in_recommendation.get(c).copied().unwrap_or(false) {
            continue;
        }
        if let Some(t) =
            (0..nt).find(|&t| biased.get(t).is_some_and(|b| b.iter().any(|d| d.cell == c)))
        {
            out.push(Exit::ruled_out(c, ExitReason::Biased, t));
        } else if let Some(t) = (0..nt).find(|&t| runs(t, c).is_some_and(|r| r.failed > 0)) {
            out.push(Exit::ruled_out(c, ExitReason::Failed, t));
        } else if (0..nt).all(|t| runs(t, c).is_some()) {
            open.push(c);
        }
        // A cell still in the recommendation is out of the race on a target only when it was
        // eliminated there as biased, which made it leave; so no other case arises.
    }
    if nt == 0 || open.len() < 2 {
        return out;
    }

    let hib = metric.higher_is_better();
    let point: Vec<Vec<Option<Point>>> = (0..nt)
        .map(|t| {
            (0..nc)
                .map(|c| {
                    let s = scored.get(t)?.get(c)?.as_ref()?;
                    runs(t, c).map(|r| {
                        let value = metric.value(s).filter(|v| !v.is_nan());
                        Point {
                            value,
                            valid: r.ok >= 2 && r.failed == 0 && !s.biased && value.is_some(),
                        }
                    })
                })
                .collect()
        })
        .collect();
    // The normaliser of each target: its best valid value.
    let bests: Vec<Option<f64>> = point.iter().map(|row| best_valid(row, &[], hib)).collect();
    if bests.iter().any(Option::is_none) {
        // No cell is valid on a target yet: there is no leader to measure against.
        return out;
    }
    let agg = |values: &[Option<f64>], bests: &[Option<f64>]| -> f64 {
        let rel: Vec<f64> = values
            .iter()
            .zip(bests)
            .map(|(v, b)| relative_efficiency(v.unwrap_or(f64::NAN), b.unwrap_or(f64::NAN), hib))
            .collect();
        aggregate(rule.by, &rel).unwrap_or(0.0)
    };
    let point_agg = |c: usize| {
        let values: Vec<Option<f64>> = (0..nt).map(|t| point[t][c].and_then(|p| p.value)).collect();
        agg(&values, &bests)
    };
    let aggs: Vec<(usize, f64)> = open.iter().map(|&c| (c, point_agg(c))).collect();
    let leader = aggs
        .iter()
        .filter(|(c, _)| (0..nt).all(|t| point[t][*c].is_some_and(|p| p.valid)))
        .fold(None, |acc: Option<(usize, f64)>, &(c, a)| match acc {
            Some((b, ba)) if ba > a || (ba == a && view.cells[b].key < view.cells[c].key) => acc,
            _ => Some((c, a)),
        });
    let Some((lead, lead_agg)) = leader else {
        return out;
    };
    let tested: Vec<(usize, f64)> = aggs.into_iter().filter(|&(c, _)| c != lead).collect();
    // Holm over the tested cells and the leader itself (p = 1), as in the metric rule: the
    // leader is selected as the largest aggregate.
    let level = round_alpha(rule.alpha, round);
    let family = tested.len() + 1;
    let splits = min_resamples.max((4.0 * family as f64 / level).ceil().min(1e7) as u64);
    let mut ps: Vec<f64> = tested
        .par_iter()
        .map(|&(c, a)| {
            if a >= lead_agg {
                return 1.0;
            }
            let seed = fnv1a64(
                format!(
                    "recommend\0{}\0{}\0{round}",
                    view.cells[c].key, view.cells[lead].key
                )
                .as_bytes(),
            );
            let others: Vec<Option<f64>> = point
                .iter()
                .map(|row| best_valid(row, &[c, lead], hib))
                .collect();
            let c_valid: Vec<bool> = point
                .iter()
                .map(|row| row[c].is_some_and(|p| p.valid))
                .collect();
            behind_p(
                view,
                &others,
                &c_valid,
                (c, lead),
                metric,
                rule.by,
                seed,
                splits,
                level,
            )
        })
        .collect();
    ps.push(1.0);
    for ((&(c, a), verdict), &p) in tested.iter().zip(holm(&ps, level)).zip(&ps) {
        if verdict.rejected {
            out.push(Exit {
                cell: c,
                reason: ExitReason::Behind,
                target: None,
                than: Some(lead),
                statistic: Some(lead_agg / a).filter(|x| x.is_finite()),
                p: Some(p),
                level: Some(verdict.threshold),
            });
        }
    }
    out.sort_by_key(|e| e.cell);
    out
}

/// The permutation p-value of "cell `cells.0`'s aggregate is not below the leader `cells.1`'s"
/// (see the module documentation); gives up, with a lower bound, above `give_up_above`.
/// `others[t]`: the best valid value on target t of the cells other than these two (the
/// normaliser when it is neither); `c_valid[t]`: whether the cell is valid on t (the leader is
/// valid everywhere).
#[allow(clippy::too_many_arguments)]
fn behind_p(
    view: &RaceView<'_>,
    others: &[Option<f64>],
    c_valid: &[bool],
    cells: (usize, usize),
    metric: Metric,
    by: RecommendBy,
    seed: u64,
    splits: u64,
    give_up_above: f64,
) -> f64 {
    let hib = metric.higher_is_better();
    let mut per_target = Vec::with_capacity(others.len());
    for t in 0..others.len() {
        let (Some(c), Some(l)) = (
            view.runs[t][cells.0].as_ref(),
            view.runs[t][cells.1].as_ref(),
        ) else {
            return 1.0;
        };
        let split = Split::new(c, l, &view.targets[t], metric);
        let (nc, nl) = split.sizes();
        if nc < 2 || nl < 2 {
            return 1.0;
        }
        per_target.push(split);
    }
    // The two aggregates of one split of every target, each target normalised by the best of
    // the two groups' values (the cell's only where it is valid) and the other cells' best.
    let (mut rel_c, mut rel_l) = (Vec::new(), Vec::new());
    let mut ratio = |values: &mut dyn FnMut(usize) -> (Option<f64>, Option<f64>)| {
        rel_c.clear();
        rel_l.clear();
        for t in 0..others.len() {
            // An undefined value on a target makes the split's statistic undefined, which
            // counts as at least as extreme.
            let (Some(vc), Some(vl)) = values(t) else {
                return f64::NAN;
            };
            let candidates = [others[t], Some(vl), c_valid[t].then_some(vc)];
            let b = best_value(candidates.into_iter().flatten(), hib).unwrap_or(f64::NAN);
            rel_c.push(relative_efficiency(vc, b, hib));
            rel_l.push(relative_efficiency(vl, b, hib));
        }
        match (aggregate(by, &rel_c), aggregate(by, &rel_l)) {
            (Some(a), Some(l)) => l / a,
            _ => f64::NAN,
        }
    };
    let observed = ratio(&mut |t| per_target[t].observed());
    if observed.is_nan() {
        return 1.0;
    }
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    permutation_p(splits, give_up_above, || {
        let r = ratio(&mut |t| per_target[t].draw(&mut rng));
        as_extreme(r, observed)
    })
}
