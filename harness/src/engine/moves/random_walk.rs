//! Gaussian random-walk move without accept/reject: x_k = x_{k-1} + L z. The importance
//! weights correct for it through the backward kernel.

use super::{HALF_LN_2PI, MoveEnv, MoveReport, Mover, fill_normals};
use crate::engine::kernels::LKernel;
use crate::engine::population::{Population, evaluate, log_bridge};

/// Buffers for the proposed population.
pub(crate) struct RandomWalk {
    x_new: Vec<f64>,
    lt_new: Vec<f64>,
    lr_new: Vec<f64>,
    log_q: Vec<f64>,
    /// Standard normal draws of the whole population, N x d row-major.
    z: Vec<f64>,
}

impl RandomWalk {
    pub fn new(n: usize, d: usize) -> Self {
        RandomWalk {
            x_new: vec![0.0; n * d],
            lt_new: vec![0.0; n],
            lr_new: vec![0.0; n],
            log_q: vec![0.0; n],
            z: vec![0.0; n * d],
        }
    }
}

impl Mover for RandomWalk {
    fn advance(
        &mut self,
        pop: &mut Population,
        kernel: &mut dyn LKernel,
        env: &mut MoveEnv<'_>,
    ) -> Result<MoveReport, String> {
        let d = pop.d;
        let log_q_const = -env.step.half_log_det - d as f64 * HALF_LN_2PI;
        // All N * d normals first, in the order the particles use them: a tight loop the
        // compiler keeps the generator's state in registers for, and then step arithmetic
        // that runs over contiguous rows.
        fill_normals(env.rng, &mut self.z);
        env.step.step_all(&pop.x, &self.z, &mut self.x_new);
        if kernel.uses_log_q() {
            for (lq, z) in self.log_q.iter_mut().zip(self.z.chunks_exact(d)) {
                let mut sq = 0.0;
                for zi in z {
                    sq += zi * zi;
                }
                // log N(x_k; x_{k-1}, L L^T) = -|z|^2 / 2 - ln det L - d ln(2 pi) / 2.
                *lq = log_q_const - 0.5 * sq;
            }
        }
        evaluate(env.target, &self.x_new, &mut self.lt_new, env.evaluations)?;
        if let Some(r) = env.reference {
            for (lr, x) in self.lr_new.iter_mut().zip(self.x_new.chunks_exact(d)) {
                *lr = r.log_density(x);
            }
        }
        let phi = env.phi;
        for i in 0..pop.n {
            pop.log_inc[i] = log_bridge(self.lt_new[i], self.lr_new[i], phi)
                - log_bridge(pop.lt[i], pop.lr[i], phi);
        }
        let ridge = kernel.add_correction(&pop.x, &self.x_new, &self.log_q, d, &mut pop.log_inc)?;
        std::mem::swap(&mut pop.x, &mut self.x_new);
        std::mem::swap(&mut pop.lt, &mut self.lt_new);
        std::mem::swap(&mut pop.lr, &mut self.lr_new);
        Ok(MoveReport {
            acceptance: None,
            ridge,
            reweight: true,
        })
    }
}
