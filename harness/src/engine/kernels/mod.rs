//! Backward kernels L(x_{k-1} | x_k) of the weight update
//! w_k = w_{k-1} pi_k(x_k) L(x_{k-1} | x_k) / (pi_{k-1}(x_{k-1}) q(x_k | x_{k-1}))
//! (Del Moral, Doucet & Jasra 2006). One file per kernel; [`build`] is the registry.

use crate::settings::BackwardKernel;

mod gaussian_optimal;
mod mcmc;
mod proposal;

pub(crate) use gaussian_optimal::GaussianOptimal;
pub(crate) use mcmc::McmcReversal;
pub(crate) use proposal::ProposalReversal;

/// A backward kernel for a proposal (non-invariant) move.
pub(crate) trait LKernel {
    /// Add log L(old_i | new_i) - log q(new_i | old_i) to `log_inc[i]` for every particle i
    /// (`old`, `new`: N x d row-major positions before and after the move; `log_q`: the log
    /// forward density of each step). Returns the ridge added to a fitted covariance (0 when
    /// none was needed).
    fn add_correction(
        &mut self,
        old: &[f64],
        new: &[f64],
        log_q: &[f64],
        d: usize,
        log_inc: &mut [f64],
    ) -> Result<f64, String>;

    /// Whether [`add_correction`](LKernel::add_correction) reads `log_q`; a move need not
    /// compute the forward densities for a kernel that ignores them.
    fn uses_log_q(&self) -> bool {
        true
    }
}

/// The registry: the kernel of a setting, with its buffers for N particles in dimension d.
pub(crate) fn build(kind: BackwardKernel, n: usize, d: usize) -> Box<dyn LKernel> {
    match kind {
        BackwardKernel::Proposal => Box::new(ProposalReversal),
        BackwardKernel::GaussianOptimal => Box::new(GaussianOptimal::new(n, d, false)),
        BackwardKernel::GaussianOptimalCrossfit => Box::new(GaussianOptimal::new(n, d, true)),
        BackwardKernel::Mcmc => Box::new(McmcReversal),
    }
}
