//! Moves: how every particle is moved at each iteration. One file per move; [`build`] is the
//! registry. Both moves use the same Gaussian step x' = x + L z, z ~ N(0, I), whose covariance
//! L L^T is kept by [`StepCovariance`].

use assay_targets::Target;
use rand_chacha::ChaCha8Rng;

use super::gaussian_fit::{add_lower_times, cholesky_regularised, transpose, weighted_moments};
use super::kernels::LKernel;
use super::population::Population;
use super::tempering::Reference;
use crate::settings::{Move, ProposalShape, SamplerSettings};

mod metropolis;
mod random_walk;

pub(crate) use metropolis::Metropolis;
pub(crate) use random_walk::RandomWalk;

/// Fill `out` with standard normal draws (rand_distr's ziggurat), in order.
///
/// Drawn through `sample_iter` rather than one `sample` call per value: measured 11% less wall
/// time on `configs/bench/numpy-proposal.toml` at the default inlining threshold (the
/// per-value call kept six register saves and a spill per draw). With the threshold of
/// `.cargo/config.toml` the whole fast path is inlined here. Same draws, same bits.
#[inline]
pub(crate) fn fill_normals(rng: &mut ChaCha8Rng, out: &mut [f64]) {
    use rand_distr::{Distribution, StandardNormal};
    for (o, v) in out.iter_mut().zip(StandardNormal.sample_iter(rng)) {
        *o = v;
    }
}

/// ln(2 pi) / 2.
pub(crate) const HALF_LN_2PI: f64 = 0.918_938_533_204_672_8;

/// What the driver gives a move besides the population.
pub(crate) struct MoveEnv<'a> {
    pub target: &'a dyn Target,
    /// The reference of a tempered path (None on the static path).
    pub reference: Option<&'a Reference>,
    /// Temperature of the current target (1 on the static path).
    pub phi: f64,
    pub step: &'a StepCovariance,
    pub rng: &'a mut ChaCha8Rng,
    pub evaluations: &'a mut u64,
    /// The run's deadline: a move of many steps checks it after every step (sweep).
    pub deadline: Option<std::time::Instant>,
}

impl MoveEnv<'_> {
    /// True when the run's deadline has passed.
    pub fn expired(&self) -> bool {
        self.deadline
            .is_some_and(|d| std::time::Instant::now() >= d)
    }
}

/// What a move reports.
#[derive(Debug, Clone, Copy, Default)]
pub(crate) struct MoveReport {
    /// Metropolis acceptance rate, for moves with an accept/reject step.
    pub acceptance: Option<f64>,
    /// Ridge added by the backward kernel's covariance fit.
    pub ridge: f64,
    /// True when the move left incremental log weights in `Population::log_inc` that the
    /// driver must apply (proposal moves); false for target-invariant moves (weight 1).
    pub reweight: bool,
}

/// A move of the whole population for the current target pi_phi.
pub(crate) trait Mover {
    /// Move every particle. Proposal moves also fill `pop.log_inc` with the incremental log
    /// weights log pi(x_k) + log L(x_{k-1} | x_k) - log pi(x_{k-1}) - log q(x_k | x_{k-1}).
    fn advance(
        &mut self,
        pop: &mut Population,
        kernel: &mut dyn LKernel,
        env: &mut MoveEnv<'_>,
    ) -> Result<MoveReport, String>;
}

/// The registry: the move of a setting, with its buffers for N particles in dimension d.
pub(crate) fn build(settings: &SamplerSettings, n: usize, d: usize) -> Box<dyn Mover> {
    match settings.move_kind {
        Move::RandomWalk => Box::new(RandomWalk::new(n, d)),
        Move::Metropolis => Box::new(Metropolis::new(n, d, settings.move_steps)),
    }
}

/// Covariance of the Gaussian step: `proposal_scale^2 I`, or `proposal_scale^2` times the
/// weighted covariance of the current population (regularised by a ridge when singular).
#[derive(Debug, Clone)]
pub(crate) struct StepCovariance {
    d: usize,
    scale: f64,
    shape: ProposalShape,
    /// Lower Cholesky factor L of the step covariance, row-major d x d.
    chol: Vec<f64>,
    /// L transposed (`chol_t[j * d + i] = L[i][j]`), the layout `add_lower_times` wants.
    chol_t: Vec<f64>,
    /// sum ln diag(chol) = ln det(cov) / 2.
    pub half_log_det: f64,
    mean: Vec<f64>,
    cov: Vec<f64>,
}

impl StepCovariance {
    pub fn new(settings: &SamplerSettings, d: usize) -> Self {
        let s = settings.proposal_scale;
        let mut chol = vec![0.0; d * d];
        for i in 0..d {
            chol[i * d + i] = s;
        }
        StepCovariance {
            d,
            scale: s,
            shape: settings.proposal_shape,
            chol_t: chol.clone(),
            chol,
            half_log_det: d as f64 * s.ln(),
            mean: vec![0.0; d],
            cov: vec![0.0; d * d],
        }
    }

    /// Refit to the population (particle-covariance shape only); returns the ridge added to
    /// the scaled covariance.
    pub fn update(&mut self, pop: &mut Population) -> Result<f64, String> {
        if self.shape == ProposalShape::Identity {
            return Ok(0.0);
        }
        let d = self.d;
        weighted_moments(&pop.x, d, &pop.w, &mut self.mean, &mut self.cov);
        let s2 = self.scale * self.scale;
        self.cov.iter_mut().for_each(|c| *c *= s2);
        let ridge = cholesky_regularised(&self.cov, d, &mut self.chol).ok_or_else(|| {
            "could not factorise the particle covariance of the step even with a ridge \
             (non-finite positions?); use proposal_shape = \"identity\" or a smaller \
             proposal_scale"
                .to_string()
        })?;
        self.half_log_det = super::gaussian_fit::log_diag_sum(&self.chol, d, 0, d);
        transpose(&self.chol, d, &mut self.chol_t);
        Ok(ridge)
    }

    /// The step of every particle: row i of `out` = row i of `x` + L (row i of `z`), for
    /// N x d row-major `x`, `z`, `out`.
    pub fn step_all(&self, x: &[f64], z: &[f64], out: &mut [f64]) {
        if self.shape == ProposalShape::Identity {
            let s = self.scale;
            for ((o, xi), zi) in out.iter_mut().zip(x).zip(z) {
                *o = xi + s * zi;
            }
        } else {
            let d = self.d;
            for ((o, xi), zi) in out
                .chunks_exact_mut(d)
                .zip(x.chunks_exact(d))
                .zip(z.chunks_exact(d))
            {
                add_lower_times(&self.chol_t, d, xi, zi, o);
            }
        }
    }
}
