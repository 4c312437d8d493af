//! The [`Sampler`] trait and the record of one run.

use std::time::Instant;

use assay_targets::Target;
use serde::{Deserialize, Serialize};

/// What a sampler is given besides the target: its seed and an optional deadline.
#[derive(Debug, Clone)]
pub struct RunContext {
    /// Seed of this run's random stream (< 2^53, so it survives a trip through JSON).
    pub seed: u64,
    /// The run must stop (and report a failure) once this instant has passed.
    pub deadline: Option<Instant>,
}

impl RunContext {
    /// A context with the given seed and no deadline.
    pub fn with_seed(seed: u64) -> Self {
        RunContext {
            seed,
            deadline: None,
        }
    }

    /// True when the deadline has passed.
    pub fn expired(&self) -> bool {
        self.deadline.is_some_and(|d| Instant::now() >= d)
    }
}

/// Whether a run finished.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum RunStatus {
    Ok,
    Failed,
}

/// One row of the per-iteration trace.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, Default)]
pub struct TraceRow {
    /// Iteration number, 1-based (iteration 1 is the initial draw).
    pub iteration: usize,
    /// Kish ESS of the weights after reweighting, before any resampling at this iteration.
    pub ess: f64,
    /// Whether the population was resampled at this iteration.
    pub resampled: bool,
    /// Temperature phi of this iteration's target (tempered path only).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub temperature: Option<f64>,
    /// Metropolis acceptance rate of this iteration's moves (Metropolis moves only).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub acceptance: Option<f64>,
    /// Ridge added to a fitted covariance to keep it positive definite (0 when none was needed).
    #[serde(default, skip_serializing_if = "is_zero")]
    pub regularisation: f64,
    /// Set when the trace was thinned (a run of more than [`TRACE_LIMIT`] iterations): this
    /// row stands for `stride` iterations, only every `stride`-th one (1, 1 + stride, ...) and
    /// the last being kept.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub stride: Option<u64>,
}

/// Most rows a run's trace keeps. Past this, the trace is thinned: every other row is dropped
/// and the stride doubles, so that a run of any length keeps at most `TRACE_LIMIT` evenly
/// spaced rows plus its last (about 60 KB of JSON), and says so in each row's `stride`.
pub const TRACE_LIMIT: usize = 1000;

/// Append the row of one iteration to a trace kept within [`TRACE_LIMIT`] rows (plus the last
/// row): rows are kept at iterations 1, 1 + k, 1 + 2k, ... for the current stride k, which
/// doubles whenever the trace is full; the last iteration (`last`) is always kept. Works in
/// place: no allocation once `TRACE_LIMIT + 1` rows are reserved.
pub fn push_bounded(trace: &mut Vec<TraceRow>, mut row: TraceRow, last: bool) {
    let mut stride = trace.last().and_then(|r| r.stride).unwrap_or(1);
    let on_grid = |it: usize, k: u64| (it.saturating_sub(1) as u64).is_multiple_of(k);
    if !last && !on_grid(row.iteration, stride) {
        return;
    }
    if trace.len() >= TRACE_LIMIT && !last {
        halve(trace);
        stride *= 2;
        for r in trace.iter_mut() {
            r.stride = Some(stride);
        }
        if !on_grid(row.iteration, stride) {
            return;
        }
    }
    if stride > 1 {
        row.stride = Some(stride);
    }
    trace.push(row);
}

/// Keep the rows at even positions.
fn halve(trace: &mut Vec<TraceRow>) {
    let len = trace.len();
    for m in (0..len).step_by(2) {
        trace.swap(m / 2, m);
    }
    trace.truncate(len.div_ceil(2));
}

/// Thin a finished trace of any length (e.g. reported by a sampler of one's own) to at most
/// [`TRACE_LIMIT`] rows plus the last, keeping every k-th row for a power of two k, marked in
/// `stride`. A trace within the limit is left alone.
pub fn thin_trace(trace: &mut Vec<TraceRow>) {
    if trace.len() <= TRACE_LIMIT + 1 {
        return;
    }
    let last = trace.pop();
    let mut k = 1u64;
    while trace.len() > TRACE_LIMIT {
        halve(trace);
        k *= 2;
    }
    let base = trace.first().and_then(|r| r.stride).unwrap_or(1);
    for r in trace.iter_mut() {
        r.stride = Some(base * k);
    }
    if let Some(mut l) = last {
        l.stride = Some(base * k);
        trace.push(l);
    }
}

fn is_zero(x: &f64) -> bool {
    *x == 0.0
}

/// Everything one run reports. A failed run carries `error` and whatever was known when it
/// stopped; estimates of a failed run are never scored.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct RunOutput {
    pub status: RunStatus,
    /// Reason of a failure.
    pub error: Option<String>,
    /// Weighted mean of the final population.
    pub mean: Option<Vec<f64>>,
    /// Weighted covariance of the final population (row by row).
    pub covariance: Option<Vec<Vec<f64>>>,
    /// Log of the SMC estimate of the normalising constant.
    pub log_evidence: Option<f64>,
    /// Kish ESS (sum w)^2 / sum w^2 of the final weights, before any final resampling.
    pub kish_ess: Option<f64>,
    /// Number of resampling steps.
    pub resamples: u64,
    /// Number of target log-density evaluations.
    pub evaluations: u64,
    /// Wall-clock seconds of the run.
    pub seconds: f64,
    /// Per-iteration trace.
    pub trace: Vec<TraceRow>,
}

impl RunOutput {
    /// A failed run with a reason and no estimates.
    pub fn failed(reason: impl Into<String>) -> Self {
        RunOutput {
            status: RunStatus::Failed,
            error: Some(reason.into()),
            mean: None,
            covariance: None,
            log_evidence: None,
            kish_ess: None,
            resamples: 0,
            evaluations: 0,
            seconds: 0.0,
            trace: Vec::new(),
        }
    }

    /// True when the run finished.
    pub fn is_ok(&self) -> bool {
        self.status == RunStatus::Ok
    }
}

/// A sampler that can be scored by assay: given a target and a context, it produces one run.
///
/// Implementations must be deterministic for a given `ctx.seed` and must never panic on any
/// target: non-finite densities, degenerate weights and expired deadlines end the run as
/// [`RunStatus::Failed`] with a reason.
///
/// # Example
///
/// A (deliberately crude) sampler that reports the mean of exact draws, scored like any other;
/// `harness/examples/custom_sampler.rs` runs a whole study with one.
///
/// ```
/// use assay::targets::{build_target, Target};
/// use assay::{RunContext, RunOutput, RunStatus, Sampler};
/// use rand::SeedableRng;
/// use rand_chacha::ChaCha8Rng;
///
/// struct ExactDraws(usize);
///
/// impl Sampler for ExactDraws {
///     fn name(&self) -> &str { "exact-draws" }
///     fn run(&self, target: &dyn Target, ctx: &RunContext) -> RunOutput {
///         let d = target.dim();
///         let mut rng = ChaCha8Rng::seed_from_u64(ctx.seed);
///         let (mut mean, mut x) = (vec![0.0; d], vec![0.0; d]);
///         for _ in 0..self.0 {
///             if !target.sample(&mut rng, &mut x) {
///                 return RunOutput::failed("the target has no exact sampler");
///             }
///             for (m, v) in mean.iter_mut().zip(&x) {
///                 *m += v / self.0 as f64;
///             }
///         }
///         let mut out = RunOutput::failed("");
///         out.status = RunStatus::Ok;
///         out.error = None;
///         out.mean = Some(mean);
///         out
///     }
/// }
///
/// let spec: toml::Table = "family = \"gaussian\"\ndim = 2\nmean = 3.0".parse().unwrap();
/// let target = build_target(&spec, "g", std::path::Path::new(".")).unwrap();
/// let out = ExactDraws(10_000).run(target.as_ref(), &RunContext::with_seed(1));
/// // 10^4 draws of N(3, 1): the mean is within 5 standard errors (0.05) of 3.
/// assert!((out.mean.unwrap()[0] - 3.0).abs() < 0.05);
/// ```
pub trait Sampler: Send + Sync {
    /// A short name for reports.
    fn name(&self) -> &str;

    /// Run once on `target`.
    fn run(&self, target: &dyn Target, ctx: &RunContext) -> RunOutput;
}

#[cfg(test)]
mod trace_tests {
    use super::*;

    fn row(iteration: usize) -> TraceRow {
        TraceRow {
            iteration,
            ..TraceRow::default()
        }
    }

    #[test]
    fn a_long_trace_is_thinned_evenly_and_keeps_its_last_row() {
        let mut t = Vec::with_capacity(TRACE_LIMIT + 1);
        let n = 10 * TRACE_LIMIT + 7;
        for it in 1..=n {
            push_bounded(&mut t, row(it), it == n);
        }
        assert!(t.len() <= TRACE_LIMIT + 1);
        assert!(t.capacity() <= TRACE_LIMIT + 1, "no reallocation");
        let k = t[0].stride.unwrap() as usize;
        assert_eq!(k, 16);
        for (m, r) in t[..t.len() - 1].iter().enumerate() {
            assert_eq!(r.iteration, 1 + m * k);
        }
        assert_eq!(t.last().unwrap().iteration, n);
        // A short trace is kept whole and unmarked.
        let mut s = Vec::new();
        for it in 1..=50 {
            push_bounded(&mut s, row(it), it == 50);
        }
        assert_eq!(s.len(), 50);
        assert!(s.iter().all(|r| r.stride.is_none()));
        // Thinning after the fact gives the same shape.
        let mut u: Vec<TraceRow> = (1..=n).map(row).collect();
        thin_trace(&mut u);
        assert!(u.len() <= TRACE_LIMIT + 1);
        assert_eq!(u[1].iteration, 1 + u[1].stride.unwrap() as usize);
        assert_eq!(u.last().unwrap().iteration, n);
    }
}
