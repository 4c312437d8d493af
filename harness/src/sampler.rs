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
