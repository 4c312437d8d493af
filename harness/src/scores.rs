//! Scores of a results file: per target and cell, accuracy against the exact reference values,
//! spread across replicates and cost. Pure statistics: no I/O and no rendering here.

use std::collections::BTreeMap;

use rand::{RngExt, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde::Serialize;
use serde_json::{Map, Value};

use crate::inference::{self, BiasTest, CellBias};
use crate::results::{Results, RunRecord, TargetInfo};
use crate::seed::fnv1a64;
use crate::stats::{mean, quantile, sd};

/// False-flag rate of the `biased` flag per cell: the probability that a cell of an unbiased
/// sampler is flagged, whatever its number of replicates and its dimension (Bonferroni over the
/// cell's quantities, see [`crate::inference::cell_bias`]).
pub const BIAS_ALPHA: f64 = 1e-3;
/// A significant bias flags a cell only when it explains more than this share of the quantity's
/// mean squared error, bias^2 / (bias^2 + sd^2). Below it the bias changes the cell's MSE, and
/// so its variance ESS, by less than a tenth: negligible against what the ranking resolves.
pub const BIAS_MIN_SHARE: f64 = 0.1;
/// A cell is `overconfident-ess` when its Kish ESS exceeds its variance-implied ESS by this factor.
pub const OVERCONFIDENCE_FACTOR: f64 = 2.0;
/// Bootstrap resamples for the interval of the ranking metric.
pub const BOOTSTRAP_RESAMPLES: usize = 1000;

/// The per-run figures of one cell that the scores are computed from.
#[derive(Debug, Clone, Default)]
pub struct CellRuns {
    /// Posterior-mean estimates of the ok runs.
    pub means: Vec<Vec<f64>>,
    /// Covariance estimates of the ok runs that reported one.
    pub covariances: Vec<Vec<Vec<f64>>>,
    /// log_evidence - log_z of the ok runs that reported an evidence.
    pub log_z_errors: Vec<f64>,
    pub kish_ess: Vec<f64>,
    pub resamples: Vec<f64>,
    pub evaluations: Vec<f64>,
    pub seconds: Vec<f64>,
    pub ok: u64,
    pub failed: u64,
}

impl CellRuns {
    /// Collect the figures of a cell's records against its target's reference values.
    pub fn collect(records: &[&RunRecord], target: &TargetInfo) -> CellRuns {
        let mut c = CellRuns::default();
        for r in records {
            let o = &r.output;
            if !o.is_ok() {
                c.failed += 1;
                continue;
            }
            c.ok += 1;
            if let Some(m) = &o.mean {
                c.means.push(m.clone());
            }
            if let Some(cv) = &o.covariance {
                c.covariances.push(cv.clone());
            }
            if let (Some(le), Some(lz)) = (o.log_evidence, target.log_z) {
                c.log_z_errors.push(le - lz);
            }
            if let Some(k) = o.kish_ess {
                c.kish_ess.push(k);
            }
            c.resamples.push(o.resamples as f64);
            c.evaluations.push(o.evaluations as f64);
            c.seconds.push(o.seconds);
        }
        c
    }

    /// The same cell with runs drawn with replacement (indices into the ok runs).
    pub fn resampled(&self, idx: &[usize]) -> CellRuns {
        let pick = |v: &Vec<f64>| -> Vec<f64> {
            if v.len() == self.ok as usize {
                idx.iter().map(|&i| v[i]).collect()
            } else {
                v.clone()
            }
        };
        CellRuns {
            means: if self.means.len() == self.ok as usize {
                idx.iter().map(|&i| self.means[i].clone()).collect()
            } else {
                self.means.clone()
            },
            covariances: if self.covariances.len() == self.ok as usize {
                idx.iter().map(|&i| self.covariances[i].clone()).collect()
            } else {
                self.covariances.clone()
            },
            log_z_errors: pick(&self.log_z_errors),
            kish_ess: pick(&self.kish_ess),
            resamples: pick(&self.resamples),
            evaluations: pick(&self.evaluations),
            seconds: pick(&self.seconds),
            ok: idx.len() as u64,
            failed: self.failed,
        }
    }

    /// The runs of `self` followed by those of `other`, as one cell's (for a permutation test
    /// of two cells). A figure that either records for only some of its runs has fewer entries
    /// than the pooled runs, so [`CellRuns::resampled`] reads it as a whole, as for one cell.
    pub fn pooled(&self, other: &CellRuns) -> CellRuns {
        let cat = |a: &Vec<f64>, b: &Vec<f64>| -> Vec<f64> { a.iter().chain(b).copied().collect() };
        CellRuns {
            means: self.means.iter().chain(&other.means).cloned().collect(),
            covariances: self
                .covariances
                .iter()
                .chain(&other.covariances)
                .cloned()
                .collect(),
            log_z_errors: cat(&self.log_z_errors, &other.log_z_errors),
            kish_ess: cat(&self.kish_ess, &other.kish_ess),
            resamples: cat(&self.resamples, &other.resamples),
            evaluations: cat(&self.evaluations, &other.evaluations),
            seconds: cat(&self.seconds, &other.seconds),
            ok: self.ok + other.ok,
            failed: self.failed + other.failed,
        }
    }
}

/// Every score of one cell, by its pinned name.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct CellScores {
    pub replicates_ok: u64,
    pub replicates_failed: u64,
    /// sqrt(mean over ok runs and coordinates of (mean_hat_i - mean_i)^2).
    pub rmse_mean: Option<f64>,
    /// max over coordinates of |mean error| / its standard error across replicates.
    pub bias_z: Option<f64>,
    /// The cell's bias p-value: Bonferroni over its mean coordinates and its evidence of each
    /// quantity's two-sided p-value (see [`bias_tests`]).
    pub bias_p: Option<f64>,
    /// The deciding quantity's bias^2 / (bias^2 + sd^2) (see [`inference::cell_bias`]).
    pub bias_share: Option<f64>,
    /// Mean of log_evidence - log_z.
    pub log_z_error_mean: Option<f64>,
    /// Sample standard deviation of log_evidence - log_z.
    pub log_z_error_sd: Option<f64>,
    /// mean + sd^2/2 of the log-evidence errors: the estimated log of E[Z-hat] / Z under a
    /// lognormal Z-hat (see [`inference::evidence_bias`]).
    pub log_z_bias: Option<f64>,
    /// Mean over runs of ||C_hat - C||_F / ||C||_F.
    pub covariance_error: Option<f64>,
    /// Mean final Kish ESS.
    pub kish_ess: Option<f64>,
    /// (sum_i Var_pi(x_i)) / (sum_i MSE_i).
    pub variance_ess: Option<f64>,
    /// variance_ess / mean seconds.
    pub ess_per_second: Option<f64>,
    pub resamples: Option<f64>,
    pub resamples_sd: Option<f64>,
    pub seconds: Option<f64>,
    pub seconds_sd: Option<f64>,
    pub evaluations: Option<f64>,
    pub evaluations_sd: Option<f64>,
    /// The `biased` decision: bias_p <= [`BIAS_ALPHA`] for a quantity whose share exceeds
    /// [`BIAS_MIN_SHARE`].
    #[serde(skip)]
    pub biased: bool,
}

/// Errors of the mean estimates against the reference mean, coordinate by coordinate.
fn mean_errors(runs: &CellRuns, t: &TargetInfo) -> Option<Vec<Vec<f64>>> {
    let truth = t.mean.as_ref()?;
    let errs: Vec<Vec<f64>> = runs
        .means
        .iter()
        .filter(|m| m.len() == truth.len())
        .map(|m| m.iter().zip(truth).map(|(a, b)| a - b).collect())
        .collect();
    (!errs.is_empty()).then_some(errs)
}

fn rmse_mean(runs: &CellRuns, t: &TargetInfo) -> Option<f64> {
    let errs = mean_errors(runs, t)?;
    let n: usize = errs.iter().map(Vec::len).sum();
    let ss: f64 = errs.iter().flatten().map(|e| e * e).sum();
    (n > 0).then(|| (ss / n as f64).sqrt())
}

/// The bias test of every quantity of a cell that has a reference value: each mean coordinate
/// (one-sample t, [`inference::mean_bias`]) and the evidence ([`inference::evidence_bias`]).
/// Against a reference run, its own standard error enters each test.
pub fn bias_tests(runs: &CellRuns, t: &TargetInfo) -> Vec<BiasTest> {
    let reference = t.reference_run.as_ref();
    let ref_df = reference.map_or(0.0, |r| r.runs.saturating_sub(1) as f64);
    let mut out = Vec::new();
    if let Some(errs) = mean_errors(runs, t) {
        let ref_se = reference.and_then(|r| r.mean_se.as_ref());
        for i in 0..errs[0].len() {
            let col: Vec<f64> = errs.iter().map(|e| e[i]).collect();
            let r = ref_se.and_then(|v| v.get(i)).copied().unwrap_or(0.0);
            if let Some(b) = inference::mean_bias(&col, r, ref_df) {
                out.push(b);
            }
        }
    }
    let log_z_se = reference.and_then(|r| r.log_z_se).unwrap_or(0.0);
    if let Some(b) = inference::evidence_bias(&runs.log_z_errors, log_z_se) {
        out.push(b);
    }
    out
}

/// The cell's bias decision at the table's rates ([`BIAS_ALPHA`], [`BIAS_MIN_SHARE`]).
pub fn cell_bias(runs: &CellRuns, t: &TargetInfo) -> Option<CellBias> {
    cell_bias_of(&bias_tests(runs, t))
}

fn cell_bias_of(tests: &[BiasTest]) -> Option<CellBias> {
    inference::cell_bias(tests, BIAS_ALPHA, BIAS_MIN_SHARE)
}

fn variance_ess(runs: &CellRuns, t: &TargetInfo) -> Option<f64> {
    let errs = mean_errors(runs, t)?;
    let cov = t.covariance.as_ref()?;
    if !square(cov, errs[0].len()) {
        return None;
    }
    let var_sum: f64 = (0..cov.len()).map(|i| cov[i][i]).sum();
    let n = errs.len() as f64;
    let mse_sum: f64 = errs.iter().flatten().map(|e| e * e).sum::<f64>() / n;
    if !(var_sum.is_finite() && var_sum > 0.0) {
        return None;
    }
    Some(if mse_sum > 0.0 {
        var_sum / mse_sum
    } else {
        f64::INFINITY
    })
}

/// True when `m` is a d x d matrix (a hand-edited header may hold anything).
fn square(m: &[Vec<f64>], d: usize) -> bool {
    m.len() == d && m.iter().all(|r| r.len() == d)
}

fn covariance_error(runs: &CellRuns, t: &TargetInfo) -> Option<f64> {
    let truth = t.covariance.as_ref()?;
    if !square(truth, t.dim) {
        return None;
    }
    let norm: f64 = truth.iter().flatten().map(|x| x * x).sum::<f64>().sqrt();
    if norm.is_nan() || norm <= 0.0 {
        return None;
    }
    let errs: Vec<f64> = runs
        .covariances
        .iter()
        .filter(|c| square(c, truth.len()))
        .map(|c| {
            c.iter()
                .flatten()
                .zip(truth.iter().flatten())
                .map(|(a, b)| (a - b) * (a - b))
                .sum::<f64>()
                .sqrt()
                / norm
        })
        .collect();
    mean(&errs)
}

/// Compute every score of a cell.
pub fn score_cell(runs: &CellRuns, t: &TargetInfo) -> CellScores {
    let variance_ess = variance_ess(runs, t);
    let tests = bias_tests(runs, t);
    let bias = cell_bias_of(&tests);
    // The worst coordinate's |t| (against a reference run, its standard error included), and
    // the evidence test's estimate of log E[Z-hat] / Z.
    let bias_z = tests
        .iter()
        .filter_map(|b| b.z)
        .fold(None, |w: Option<f64>, z| Some(w.map_or(z, |w| w.max(z))));
    let log_z_bias = tests.iter().find(|b| b.z.is_none()).map(|b| b.bias);
    let seconds = mean(&runs.seconds);
    CellScores {
        replicates_ok: runs.ok,
        replicates_failed: runs.failed,
        rmse_mean: rmse_mean(runs, t),
        bias_z,
        bias_p: bias.map(|b| b.p),
        bias_share: bias.map(|b| b.share),
        log_z_error_mean: mean(&runs.log_z_errors),
        log_z_error_sd: sd(&runs.log_z_errors),
        log_z_bias,
        covariance_error: covariance_error(runs, t),
        kish_ess: mean(&runs.kish_ess),
        variance_ess,
        ess_per_second: match (variance_ess, seconds) {
            (Some(v), Some(s)) if s > 0.0 => Some(v / s),
            _ => None,
        },
        resamples: mean(&runs.resamples),
        resamples_sd: sd(&runs.resamples),
        seconds,
        seconds_sd: sd(&runs.seconds),
        evaluations: mean(&runs.evaluations),
        evaluations_sd: sd(&runs.evaluations),
        biased: bias.is_some_and(|b| b.biased),
    }
}

/// The value called `name` in a list of (name, value) pairs.
pub(crate) fn value_named<T: Copy>(all: &[(&'static str, T)], name: &str) -> Option<T> {
    all.iter().find(|(n, _)| *n == name).map(|(_, v)| *v)
}

/// The name of `value` in a list of (name, value) pairs (`?` when it is not listed).
pub(crate) fn name_of<T: PartialEq>(all: &[(&'static str, T)], value: T) -> &'static str {
    all.iter()
        .find(|(_, v)| *v == value)
        .map_or("?", |(n, _)| n)
}

/// The default ranking metric (of the table and of a race).
pub const DEFAULT_METRIC: Metric = Metric::EssPerSecond;

/// A score that cells can be ranked by.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Metric {
    EssPerSecond,
    VarianceEss,
    RmseMean,
    LogZErrorSd,
    LogZErrorAbs,
    CovarianceError,
    KishEss,
    Seconds,
}

impl Metric {
    /// All metrics with their names.
    pub const ALL: &'static [(&'static str, Metric)] = &[
        ("ess_per_second", Metric::EssPerSecond),
        ("variance_ess", Metric::VarianceEss),
        ("rmse_mean", Metric::RmseMean),
        ("log_z_error_sd", Metric::LogZErrorSd),
        ("log_z_error_abs", Metric::LogZErrorAbs),
        ("covariance_error", Metric::CovarianceError),
        ("kish_ess", Metric::KishEss),
        ("seconds", Metric::Seconds),
    ];

    /// Parse a metric name.
    pub fn parse(name: &str) -> Option<Metric> {
        value_named(Self::ALL, name)
    }

    /// The metric's name.
    pub fn name(self) -> &'static str {
        name_of(Self::ALL, self)
    }

    /// Whether larger values are better.
    pub fn higher_is_better(self) -> bool {
        matches!(
            self,
            Metric::EssPerSecond | Metric::VarianceEss | Metric::KishEss
        )
    }

    /// The metric's value from a cell's scores.
    pub fn value(self, s: &CellScores) -> Option<f64> {
        match self {
            Metric::EssPerSecond => s.ess_per_second,
            Metric::VarianceEss => s.variance_ess,
            Metric::RmseMean => s.rmse_mean,
            Metric::LogZErrorSd => s.log_z_error_sd,
            Metric::LogZErrorAbs => s.log_z_error_mean.map(f64::abs),
            Metric::CovarianceError => s.covariance_error,
            Metric::KishEss => s.kish_ess,
            Metric::Seconds => s.seconds,
        }
    }

    /// The metric computed directly from runs (used by the bootstraps).
    pub fn of_runs(self, runs: &CellRuns, t: &TargetInfo) -> Option<f64> {
        match self {
            Metric::EssPerSecond => match (variance_ess(runs, t), mean(&runs.seconds)) {
                (Some(v), Some(s)) if s > 0.0 => Some(v / s),
                _ => None,
            },
            Metric::VarianceEss => variance_ess(runs, t),
            Metric::RmseMean => rmse_mean(runs, t),
            Metric::LogZErrorSd => sd(&runs.log_z_errors),
            Metric::LogZErrorAbs => mean(&runs.log_z_errors).map(f64::abs),
            Metric::CovarianceError => covariance_error(runs, t),
            Metric::KishEss => mean(&runs.kish_ess),
            Metric::Seconds => mean(&runs.seconds),
        }
    }
}

/// A cell's per-run figures that a metric of the mean error is a function of, so that a
/// bootstrap which resamples runs many times recomputes the metric from one number per run
/// (the run's sum over coordinates of the squared mean error, and its seconds) instead of
/// copying every estimate. Only for `variance_ess`, `rmse_mean` and `ess_per_second`; equal to
/// [`Metric::of_runs`] on the same runs up to rounding (unit test).
#[derive(Debug, Clone)]
pub struct ErrorFigures {
    metric: Metric,
    /// Sum over coordinates of the squared error of each ok run's mean.
    squared_errors: Vec<f64>,
    /// Seconds of the same runs.
    seconds: Vec<f64>,
    /// Sum of the target's variances.
    var_sum: f64,
    dim: usize,
}

impl ErrorFigures {
    /// The figures of `runs` for `metric`; `None` when the metric is not one of the three or
    /// the runs do not give it (no means, no covariance, a mean of another length).
    pub fn of(metric: Metric, runs: &CellRuns, t: &TargetInfo) -> Option<ErrorFigures> {
        if !matches!(
            metric,
            Metric::VarianceEss | Metric::RmseMean | Metric::EssPerSecond
        ) {
            return None;
        }
        let errs = mean_errors(runs, t)?;
        if errs.len() != runs.ok as usize || runs.seconds.len() != errs.len() {
            return None;
        }
        let var_sum = match &t.covariance {
            Some(c) if square(c, errs[0].len()) => (0..c.len()).map(|i| c[i][i]).sum(),
            _ if metric == Metric::RmseMean => 1.0,
            _ => return None,
        };
        Some(ErrorFigures {
            metric,
            squared_errors: errs.iter().map(|e| e.iter().map(|x| x * x).sum()).collect(),
            seconds: runs.seconds.clone(),
            var_sum,
            dim: errs[0].len(),
        })
    }

    /// Number of runs.
    pub fn len(&self) -> usize {
        self.squared_errors.len()
    }

    /// True when there are no runs.
    pub fn is_empty(&self) -> bool {
        self.squared_errors.is_empty()
    }

    /// The metric on the runs `idx` (indices into the runs, with repeats).
    pub fn value(&self, idx: &[usize]) -> Option<f64> {
        if idx.is_empty() || self.dim == 0 {
            return None;
        }
        let n = idx.len() as f64;
        let mse: f64 = idx.iter().map(|&i| self.squared_errors[i]).sum::<f64>() / n;
        let ess = || {
            if !(self.var_sum.is_finite() && self.var_sum > 0.0) {
                None
            } else if mse > 0.0 {
                Some(self.var_sum / mse)
            } else {
                Some(f64::INFINITY)
            }
        };
        match self.metric {
            Metric::RmseMean => Some((mse / self.dim as f64).sqrt()),
            Metric::VarianceEss => ess(),
            _ => {
                let s = idx.iter().map(|&i| self.seconds[i]).sum::<f64>() / n;
                ess().filter(|_| s > 0.0).map(|v| v / s)
            }
        }
    }
}

/// One cell's runs on one target, ready to be resampled many times: [`MetricResampler::value`]
/// recomputes the ranking metric on the runs drawn by a list of indices, from one figure per
/// run where [`ErrorFigures`] serves the metric, else as [`Metric::of_runs`] on a copy of the
/// drawn runs (without the covariance estimates unless the metric reads them). The one
/// resampling path of every bootstrap (the table's intervals, the recommendation's ratio and
/// the race's tests), so all three recompute the metric alike.
#[derive(Debug, Clone)]
pub struct MetricResampler<'a> {
    fast: Option<ErrorFigures>,
    runs: CellRuns,
    target: &'a TargetInfo,
    metric: Metric,
    n: usize,
}

impl<'a> MetricResampler<'a> {
    pub fn new(runs: &CellRuns, target: &'a TargetInfo, metric: Metric) -> MetricResampler<'a> {
        let fast = ErrorFigures::of(metric, runs, target);
        let copy = if fast.is_some() {
            CellRuns::default()
        } else {
            let mut r = runs.clone();
            if metric != Metric::CovarianceError {
                r.covariances.clear();
            }
            r
        };
        MetricResampler {
            fast,
            runs: copy,
            target,
            metric,
            n: runs.ok as usize,
        }
    }

    /// Finished runs (indices run over 0 .. this).
    pub fn len(&self) -> usize {
        self.n
    }

    /// True when the cell has no finished run.
    pub fn is_empty(&self) -> bool {
        self.n == 0
    }

    /// The metric on the runs `idx` (indices into the finished runs, with repeats); `None`
    /// when it is undefined there, NaN included.
    pub fn value(&self, idx: &[usize]) -> Option<f64> {
        if self.n == 0 {
            return None;
        }
        let v = match &self.fast {
            Some(f) => f.value(idx),
            None => self.metric.of_runs(&self.runs.resampled(idx), self.target),
        };
        v.filter(|v| !v.is_nan())
    }
}

/// Percentile bootstrap 95 % interval of a metric over the cell's replicates (Efron &
/// Tibshirani 1993, An Introduction to the Bootstrap, ch. 13), with a seed fixed by the cell so
/// that a table is reproducible. `None` when fewer than 2 ok runs or the metric is undefined.
pub fn bootstrap_interval(
    runs: &CellRuns,
    t: &TargetInfo,
    metric: Metric,
    cell_key: &str,
) -> Option<(f64, f64)> {
    let n = runs.ok as usize;
    if n < 2 {
        return None;
    }
    let mut rng = ChaCha8Rng::seed_from_u64(fnv1a64(format!("{}\0{cell_key}", t.label).as_bytes()));
    let draws = MetricResampler::new(runs, t, metric);
    let mut idx = vec![0usize; n];
    let mut values = Vec::with_capacity(BOOTSTRAP_RESAMPLES);
    for _ in 0..BOOTSTRAP_RESAMPLES {
        for i in idx.iter_mut() {
            *i = rng.random_range(0..n);
        }
        if let Some(v) = draws.value(&idx)
            && v.is_finite()
        {
            values.push(v);
        }
    }
    if values.len() < BOOTSTRAP_RESAMPLES / 2 {
        return None;
    }
    Some((quantile(&values, 0.025)?, quantile(&values, 0.975)?))
}

/// One scored cell.
#[derive(Debug, Clone)]
pub struct ScoredCell {
    pub target: String,
    pub settings: Map<String, Value>,
    pub scores: CellScores,
    pub runs: CellRuns,
}

/// The settings of a cell and its records.
type CellGroup<'a> = (Map<String, Value>, Vec<&'a RunRecord>);

/// Score every cell of a results file, grouped by target in header order, cells in grid order
/// of first appearance.
pub fn score_results(results: &Results) -> Vec<ScoredCell> {
    let mut groups: BTreeMap<(usize, String), CellGroup<'_>> = BTreeMap::new();
    let order: BTreeMap<&str, usize> = results
        .header
        .targets
        .iter()
        .enumerate()
        .map(|(i, t)| (t.label.as_str(), i))
        .collect();
    for r in &results.runs {
        let Some(&ti) = order.get(r.target.as_str()) else {
            continue;
        };
        groups
            .entry((ti, r.cell_key()))
            .or_insert_with(|| (r.settings.clone(), Vec::new()))
            .1
            .push(r);
    }
    groups
        .into_iter()
        .map(|((ti, _), (settings, mut recs))| {
            // Replicate order, not file order (which depends on the thread count), so that
            // every score and bootstrap interval is the same for the same records.
            recs.sort_by_key(|r| r.replicate);
            let t = &results.header.targets[ti];
            let runs = CellRuns::collect(&recs, t);
            ScoredCell {
                target: t.label.clone(),
                settings,
                scores: score_cell(&runs, t),
                runs,
            }
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use approx::assert_relative_eq;

    fn info() -> TargetInfo {
        TargetInfo {
            label: "t".into(),
            family: "gaussian".into(),
            dim: 2,
            log_z: Some(1.0),
            mean: Some(vec![0.0, 0.0]),
            covariance: Some(vec![vec![1.0, 0.0], vec![0.0, 4.0]]),
            params: Map::new(),
            reference_run: None,
            sweep: None,
        }
    }

    #[test]
    fn hand_computed_scores() {
        // Values worked by hand from the definitions in the study specification.
        let runs = CellRuns {
            means: vec![vec![0.1, -0.2], vec![-0.1, 0.4]],
            covariances: vec![vec![vec![1.0, 0.0], vec![0.0, 4.0]]],
            log_z_errors: vec![0.5, -0.5],
            kish_ess: vec![100.0, 200.0],
            resamples: vec![3.0, 5.0],
            evaluations: vec![10.0, 10.0],
            seconds: vec![0.5, 1.5],
            ok: 2,
            failed: 1,
        };
        let s = score_cell(&runs, &info());
        // rmse = sqrt((0.01 + 0.04 + 0.01 + 0.16) / 4)
        assert_relative_eq!(
            s.rmse_mean.unwrap(),
            (0.22f64 / 4.0).sqrt(),
            max_relative = 1e-12
        );
        // coordinate 2: errors -0.2, 0.4: mean 0.1, sd = sqrt(0.18), se = sd / sqrt 2 = 0.3
        assert_relative_eq!(s.bias_z.unwrap(), 0.1 / 0.3, max_relative = 1e-12);
        // variance_ess = (1 + 4) / ((0.01 + 0.01)/2 + (0.04 + 0.16)/2) = 5 / 0.11
        assert_relative_eq!(s.variance_ess.unwrap(), 5.0 / 0.11, max_relative = 1e-12);
        assert_relative_eq!(s.ess_per_second.unwrap(), 5.0 / 0.11, max_relative = 1e-12);
        assert_relative_eq!(
            s.log_z_error_sd.unwrap(),
            0.5f64.sqrt(),
            max_relative = 1e-12
        );
        assert_eq!(s.covariance_error, Some(0.0));
        assert_eq!(s.replicates_failed, 1);
        assert_relative_eq!(s.seconds_sd.unwrap(), 0.5f64.sqrt(), max_relative = 1e-12);
    }

    #[test]
    fn bootstrap_interval_covers_point_estimate() {
        let mut runs = CellRuns::default();
        for i in 0..30 {
            let x = (i as f64 * 0.37).sin() * 0.1;
            runs.means.push(vec![x, -x]);
            runs.seconds.push(1.0);
            runs.ok += 1;
        }
        let t = info();
        let s = score_cell(&runs, &t);
        let (lo, hi) = bootstrap_interval(&runs, &t, Metric::RmseMean, "k").unwrap();
        let v = s.rmse_mean.unwrap();
        assert!(lo <= v && v <= hi, "{lo} {v} {hi}");
        // Every ranking metric has an interval, the covariance error included.
        for i in 0..30 {
            let e = 0.1 * (i as f64 * 0.71).cos();
            runs.covariances
                .push(vec![vec![1.0 + e, 0.0], vec![0.0, 4.0 - e]]);
        }
        let s = score_cell(&runs, &t);
        let (lo, hi) = bootstrap_interval(&runs, &t, Metric::CovarianceError, "k").unwrap();
        let v = s.covariance_error.unwrap();
        assert!(lo <= v && v <= hi, "{lo} {v} {hi}");
    }
}
