//! Entry points into the engine's hot loops for the criterion benches in `harness/benches`.
//! Not part of the stable API: the driver in `engine/mod.rs` is the only real user of these
//! pieces.

use assay_targets::Target;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use super::kernels::{self, GaussianOptimal, LKernel};
use super::moves::{self, MoveEnv, Mover, StepCovariance};
use super::population::{Population, evaluate};
use super::tempering::Reference;
use crate::settings::SamplerSettings;

/// The approximately optimal L-kernel's fit and score, separately.
pub struct OptimalKernel(GaussianOptimal);

impl OptimalKernel {
    pub fn new(n: usize, d: usize) -> Self {
        OptimalKernel(GaussianOptimal::new(n, d, false))
    }

    /// Fit the joint Gaussian of the pairs (old_i, new_i); returns the ridge.
    pub fn fit(&mut self, old: &[f64], new: &[f64], d: usize) -> Result<f64, String> {
        self.0.fit(0, old, new, d, 0, 1)
    }

    /// Add log L - log q to `log_inc` with the last fit.
    pub fn score(
        &mut self,
        old: &[f64],
        new: &[f64],
        log_q: &[f64],
        d: usize,
        log_inc: &mut [f64],
    ) {
        self.0.score(0, old, new, log_q, d, 0, 1, log_inc);
    }
}

/// One iteration of the static path (move, reweight, ESS, resampling when the ESS rule says
/// so), on a population drawn from N(0, s0^2 I) for `target`.
pub struct StaticIteration {
    settings: SamplerSettings,
    pop: Population,
    step: StepCovariance,
    mover: Box<dyn Mover>,
    kernel: Box<dyn LKernel>,
    rng: ChaCha8Rng,
    evaluations: u64,
}

impl StaticIteration {
    pub fn new(settings: SamplerSettings, target: &dyn Target, seed: u64) -> Self {
        let (n, d) = (settings.particles, target.dim());
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let mut pop = Population::new(n, d);
        let initial = Reference::isotropic(d, settings.initial_scale);
        for x in pop.x.chunks_exact_mut(d) {
            initial.sample(&mut rng, x);
        }
        let mut evaluations = 0;
        evaluate(target, &pop.x, &mut pop.lt, &mut evaluations).unwrap();
        StaticIteration {
            step: StepCovariance::new(&settings, d),
            mover: moves::build(&settings, n, d),
            kernel: kernels::build(settings.backward_kernel, n, d),
            settings,
            pop,
            rng,
            evaluations,
        }
    }

    /// Run one iteration; returns the ESS before resampling.
    pub fn iterate(&mut self, target: &dyn Target) -> f64 {
        self.step.update(&mut self.pop).unwrap();
        let mut env = MoveEnv {
            deadline: None,
            target,
            reference: None,
            phi: 1.0,
            step: &self.step,
            rng: &mut self.rng,
            evaluations: &mut self.evaluations,
        };
        let report = self
            .mover
            .advance(&mut self.pop, self.kernel.as_mut(), &mut env)
            .unwrap();
        if report.reweight && !self.pop.reweight().is_finite() {
            // A degenerate population: start again from uniform weights.
            self.pop.logw.fill(0.0);
            self.pop.normalise();
        }
        let ess = self.pop.ess();
        if ess < self.settings.ess_threshold * self.pop.n as f64 {
            let scheme = crate::resampling::scheme(self.settings.resampling);
            self.pop.resample(scheme, &mut self.rng);
        }
        ess
    }
}
