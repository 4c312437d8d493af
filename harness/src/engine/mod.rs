//! The built-in SMC sampler (Del Moral, Doucet & Jasra 2006, "Sequential Monte Carlo
//! samplers", JRSS B 68(3)).
//!
//! # One run
//!
//! Iteration 1 draws the initial population. On the static path the draws come from
//! q_1 = N(0, s0^2 I) (`initial_scale` = s0) with weights pi / q_1, for every target; on the
//! tempered path they come from the reference (the target's `tempering_reference()` when it
//! has one, otherwise N(0, s0^2 I)) with equal weights, at phi = 0.
//!
//! Every later iteration k:
//! 1. (tempered path) chooses phi_k — by the adaptive CESS bisection or the fixed geometric
//!    schedule, see [`tempering`] — and multiplies the weights by
//!    pi_{phi_k}(x_{k-1}) / pi_{phi_{k-1}}(x_{k-1});
//! 2. moves the particles for the current target pi_k. A random walk multiplies the weights by
//!    pi_k(x_k) L(x_{k-1} | x_k) / (pi_k(x_{k-1}) q(x_k | x_{k-1})); a Metropolis move is
//!    pi_k-invariant and leaves them alone. Steps 1 and 2 together give exactly the update
//!    w_k = w_{k-1} pi_k(x_k) L / (pi_{k-1}(x_{k-1}) q) of the chosen backward kernel (for the
//!    `mcmc` kernel: pi_k(x_{k-1}) / pi_{k-1}(x_{k-1}));
//! 3. records the Kish ESS (Kong 1992) and resamples when ESS < `ess_threshold` * N
//!    (strictly: equality does not resample), or always when `ess_threshold` = 1. The final
//!    iteration never resamples, so the reported estimates use the final weighted population.
//!
//! # Evidence
//!
//! Weights are kept normalised in log space; every reweighting contributes
//! log sum_i W_{k-1,i} w_inc,i to log Z_hat (log-sum-exp), which after resampling (uniform
//! W) is the usual mean of the incremental weights. With fixed kernels this is the unbiased
//! Feynman-Kac estimator of Z (Del Moral 2004, "Feynman-Kac Formulae", Springer, Th. 7.4.2).
//!
//! Every buffer is allocated once per run; the per-iteration loop does not allocate.

#[doc(hidden)]
pub mod bench_api;
pub(crate) mod gaussian_fit;
pub(crate) mod kernels;
pub(crate) mod moves;
pub(crate) mod population;
pub(crate) mod tempering;

use std::time::Instant;

use assay_targets::Target;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use crate::sampler::{RunContext, RunOutput, RunStatus, Sampler, TraceRow};
use crate::settings::{Path, SamplerSettings, Schedule, SettingsError};
use moves::{HALF_LN_2PI, MoveEnv, StepCovariance};
use population::{Population, evaluate, log_bridge};
use tempering::Reference;

/// The built-in SMC sampler, configured by [`SamplerSettings`].
#[derive(Debug, Clone)]
pub struct Smc {
    settings: SamplerSettings,
}

impl Smc {
    /// Validate the settings (every rule is in [`SamplerSettings::validate`], so that a study
    /// reports it before any run) and build the sampler.
    pub fn new(settings: SamplerSettings) -> Result<Self, SettingsError> {
        settings.validate()?;
        Ok(Smc { settings })
    }

    /// The settings in effect.
    pub fn settings(&self) -> &SamplerSettings {
        &self.settings
    }
}

impl Sampler for Smc {
    fn name(&self) -> &str {
        "smc"
    }

    fn run(&self, target: &dyn Target, ctx: &RunContext) -> RunOutput {
        let start = Instant::now();
        let mut run = Run {
            settings: &self.settings,
            trace: Vec::new(),
            evaluations: 0,
            resamples: 0,
            log_z: 0.0,
        };
        let result = run.drive(target, ctx);
        let seconds = start.elapsed().as_secs_f64();
        match result {
            Ok(pop) => {
                let d = pop.d;
                let (mut mean, mut cov) = (vec![0.0; d], vec![0.0; d * d]);
                gaussian_fit::weighted_moments(&pop.x, d, &pop.w, &mut mean, &mut cov);
                RunOutput {
                    status: RunStatus::Ok,
                    error: None,
                    mean: Some(mean),
                    covariance: Some(cov.chunks_exact(d.max(1)).map(<[f64]>::to_vec).collect()),
                    log_evidence: Some(run.log_z),
                    kish_ess: Some(pop.ess()),
                    resamples: run.resamples,
                    evaluations: run.evaluations,
                    seconds,
                    trace: run.trace,
                }
            }
            Err(reason) => RunOutput {
                resamples: run.resamples,
                evaluations: run.evaluations,
                seconds,
                trace: run.trace,
                ..RunOutput::failed(reason)
            },
        }
    }
}

/// The mutable record of one run.
struct Run<'s> {
    settings: &'s SamplerSettings,
    trace: Vec<TraceRow>,
    evaluations: u64,
    resamples: u64,
    log_z: f64,
}

impl Run<'_> {
    fn drive(&mut self, target: &dyn Target, ctx: &RunContext) -> Result<Population, String> {
        let s = self.settings;
        let d = target.dim();
        if d == 0 {
            return Err("the target has dimension 0".into());
        }
        let n = s.particles;
        let tempered = s.path == Path::Tempered;
        let reference = if tempered {
            Some(match target.tempering_reference() {
                Some(g) => Reference::from_target(g, d)?,
                None => Reference::isotropic(d, s.initial_scale),
            })
        } else {
            None
        };
        let max_iterations = match (s.path, s.schedule) {
            (Path::Static, _) => s.iterations,
            (Path::Tempered, Schedule::Fixed) => s.steps + 1,
            (Path::Tempered, Schedule::Adaptive) => s.max_steps + 1,
        };
        self.trace
            .reserve(max_iterations.min(crate::sampler::TRACE_LIMIT + 1));

        let mut rng = ChaCha8Rng::seed_from_u64(ctx.seed);
        let mut pop = Population::new(n, d);
        let mut step = StepCovariance::new(s, d);
        let mut mover = moves::build(s, n, d);
        let mut kernel = kernels::build(s.backward_kernel, n, d);
        let scheme = crate::resampling::scheme(s.resampling);
        let mut b = vec![0.0; n];

        // Iteration 1: the initial population.
        if ctx.expired() {
            return Err(timeout(1));
        }
        let mut phi = if tempered { 0.0 } else { 1.0 };
        match &reference {
            Some(r) => {
                for x in pop.x.chunks_exact_mut(d) {
                    r.sample(&mut rng, x);
                }
                for (lr, x) in pop.lr.iter_mut().zip(pop.x.chunks_exact(d)) {
                    *lr = r.log_density(x);
                }
                evaluate(target, &pop.x, &mut pop.lt, &mut self.evaluations)?;
                if pop.lt.iter().all(|v| *v == f64::NEG_INFINITY) {
                    return Err(all_non_finite(1));
                }
            }
            None => {
                let s0 = s.initial_scale;
                let log_q_const = -(d as f64) * (s0.ln() + HALF_LN_2PI);
                let initial = Reference::isotropic(d, s0);
                for x in pop.x.chunks_exact_mut(d) {
                    initial.sample(&mut rng, x);
                }
                evaluate(target, &pop.x, &mut pop.lt, &mut self.evaluations)?;
                for i in 0..n {
                    let x = &pop.x[i * d..(i + 1) * d];
                    let sq: f64 = x.iter().map(|v| v * v).sum::<f64>() / (s0 * s0);
                    pop.logw[i] = pop.lt[i] - (log_q_const - 0.5 * sq);
                }
                let lse = pop.normalise();
                if !lse.is_finite() {
                    return Err(all_non_finite(1));
                }
                self.log_z = lse - (n as f64).ln();
            }
        }
        self.finish_iteration(
            &mut pop,
            scheme,
            &mut rng,
            1,
            tempered || s.iterations > 1,
            tempered.then_some(phi),
            None,
            0.0,
        );

        let mut k = 1usize;
        loop {
            let last = match (s.path, s.schedule) {
                (Path::Static, _) => k >= s.iterations,
                (Path::Tempered, _) => phi >= 1.0,
            };
            if last {
                break;
            }
            // k - 1 temperatures after phi = 0 have been used.
            if tempered && s.schedule == Schedule::Adaptive && k > s.max_steps {
                return Err(format!(
                    "the adaptive schedule used max_steps = {} temperatures and reached only \
                     phi = {phi:.3e}; raise max_steps or lower cess_target",
                    s.max_steps
                ));
            }
            k += 1;
            if ctx.expired() {
                return Err(timeout(k));
            }
            // 1. Temperature and the tempering reweight.
            if tempered {
                let next = match s.schedule {
                    Schedule::Fixed => tempering::fixed(k - 1, s.steps),
                    Schedule::Adaptive => {
                        for ((bi, lt), lr) in b.iter_mut().zip(&pop.lt).zip(&pop.lr) {
                            *bi = population::clean(lt - lr);
                        }
                        tempering::next_adaptive(&pop.w, &b, phi, s.cess_target)
                    }
                };
                for i in 0..n {
                    pop.log_inc[i] = log_bridge(pop.lt[i], pop.lr[i], next)
                        - log_bridge(pop.lt[i], pop.lr[i], phi);
                }
                phi = next;
                let f = pop.reweight();
                if !f.is_finite() {
                    return Err(all_zero(k));
                }
                self.log_z += f;
            }
            // 2. The move.
            let step_ridge = step.update(&mut pop)?;
            let mut env = MoveEnv {
                deadline: ctx.deadline,
                target,
                reference: reference.as_ref(),
                phi,
                step: &step,
                rng: &mut rng,
                evaluations: &mut self.evaluations,
            };
            let report = mover.advance(&mut pop, kernel.as_mut(), &mut env)?;
            if report.reweight {
                let f = pop.reweight();
                if !f.is_finite() {
                    return Err(all_zero(k));
                }
                self.log_z += f;
            }
            // 3. ESS, trace, resampling.
            let more = match s.path {
                Path::Static => k < s.iterations,
                Path::Tempered => phi < 1.0,
            };
            self.finish_iteration(
                &mut pop,
                scheme,
                &mut rng,
                k,
                more,
                tempered.then_some(phi),
                report.acceptance,
                step_ridge.max(report.ridge),
            );
        }
        Ok(pop)
    }

    /// Record the iteration and resample if the ESS rule says so and iterations follow.
    #[allow(clippy::too_many_arguments)]
    fn finish_iteration(
        &mut self,
        pop: &mut Population,
        scheme: &dyn crate::resampling::Resampler,
        rng: &mut ChaCha8Rng,
        iteration: usize,
        more: bool,
        temperature: Option<f64>,
        acceptance: Option<f64>,
        regularisation: f64,
    ) {
        let ess = pop.ess();
        let tau = self.settings.ess_threshold;
        let resampled = more && (tau >= 1.0 || ess < tau * pop.n as f64);
        if resampled {
            pop.resample(scheme, rng);
            self.resamples += 1;
        }
        let row = TraceRow {
            iteration,
            ess,
            resampled,
            temperature,
            acceptance,
            regularisation,
            stride: None,
        };
        crate::sampler::push_bounded(&mut self.trace, row, !more);
    }
}

fn timeout(k: usize) -> String {
    format!(
        "timeout: the run's deadline passed before iteration {k}; raise the time limit or use \
         fewer particles / iterations"
    )
}

fn all_non_finite(k: usize) -> String {
    format!(
        "the target's log density is non-finite (NaN or -inf) at every particle of iteration \
         {k}; check the target, or move the initial proposal (initial_scale) onto its support"
    )
}

fn all_zero(k: usize) -> String {
    format!(
        "every particle weight became zero at iteration {k} (non-finite or underflowing \
         densities); use a smaller proposal_scale, a higher ess_threshold, or a tempered path"
    )
}
