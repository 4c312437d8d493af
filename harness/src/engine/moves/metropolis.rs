//! Random-walk Metropolis move (Metropolis et al. 1953; Hastings 1970, Biometrika 57(1)): the
//! Gaussian step is a proposal accepted with probability min(1, pi_phi(x') / pi_phi(x)), so the
//! move leaves the current target pi_phi invariant. Repeated `move_steps` times per iteration.

use rand::RngExt;

use super::{MoveEnv, MoveReport, Mover, fill_normals};
use crate::engine::kernels::LKernel;
use crate::engine::population::{Population, evaluate, log_bridge};

/// Buffers for one round of proposals.
pub(crate) struct Metropolis {
    steps: usize,
    x_new: Vec<f64>,
    lt_new: Vec<f64>,
    lr_new: Vec<f64>,
    /// Standard normal draws of the whole population, N x d row-major.
    z: Vec<f64>,
}

impl Metropolis {
    pub fn new(n: usize, d: usize, steps: usize) -> Self {
        Metropolis {
            steps,
            x_new: vec![0.0; n * d],
            lt_new: vec![0.0; n],
            lr_new: vec![0.0; n],
            z: vec![0.0; n * d],
        }
    }
}

impl Mover for Metropolis {
    /// The weights are not touched: a pi_phi-invariant (indeed reversible) move has incremental
    /// weight 1 under its own reversal (Del Moral, Doucet & Jasra 2006, Section 3.3.2).
    fn advance(
        &mut self,
        pop: &mut Population,
        _kernel: &mut dyn LKernel,
        env: &mut MoveEnv<'_>,
    ) -> Result<MoveReport, String> {
        let d = pop.d;
        let phi = env.phi;
        let mut accepted = 0u64;
        for done in 0..self.steps {
            // A long move (move_steps in the millions) must not outlive the run's deadline:
            // the check costs one clock read per sweep of N particles.
            if done > 0 && env.expired() {
                return Err(format!(
                    "timeout: the run's deadline passed during a Metropolis move, after {done} \
                     of move_steps = {} steps; raise the time limit or use fewer move_steps",
                    self.steps
                ));
            }
            // All N * d normals first, in the order the particles use them (as in the random
            // walk); the uniforms of the accept/reject step follow.
            fill_normals(env.rng, &mut self.z);
            env.step.step_all(&pop.x, &self.z, &mut self.x_new);
            evaluate(env.target, &self.x_new, &mut self.lt_new, env.evaluations)?;
            if let Some(r) = env.reference {
                for (lr, x) in self.lr_new.iter_mut().zip(self.x_new.chunks_exact(d)) {
                    *lr = r.log_density(x);
                }
            }
            for i in 0..pop.n {
                let log_ratio = log_bridge(self.lt_new[i], self.lr_new[i], phi)
                    - log_bridge(pop.lt[i], pop.lr[i], phi);
                let u: f64 = env.rng.random();
                // NaN (-inf - -inf: both outside the support) compares false: rejected.
                if u.ln() < log_ratio {
                    pop.x[i * d..(i + 1) * d].copy_from_slice(&self.x_new[i * d..(i + 1) * d]);
                    pop.lt[i] = self.lt_new[i];
                    pop.lr[i] = self.lr_new[i];
                    accepted += 1;
                }
            }
        }
        let proposals = self.steps as f64 * pop.n as f64;
        Ok(MoveReport {
            acceptance: Some(accepted as f64 / proposals),
            ridge: 0.0,
            reweight: false,
        })
    }
}
