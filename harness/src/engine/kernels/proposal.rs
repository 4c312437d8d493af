//! L = the forward proposal: L(x_{k-1} | x_k) = q(x_{k-1} | x_k).
//!
//! Both moves use a symmetric Gaussian step with a covariance fixed during the iteration, so
//! q(x_{k-1} | x_k) = q(x_k | x_{k-1}) and the two terms cancel: the incremental weight is
//! pi_k(x_k) / pi_{k-1}(x_{k-1}).
//!
//! With `move = "metropolis"` the forward kernel K is the Metropolis kernel itself. It is
//! pi_k-reversible, so L = K gives pi_k(x_k) K(x_k, x_{k-1}) / (pi_{k-1}(x_{k-1}) K(x_{k-1}, x_k))
//! = pi_k(x_{k-1}) / pi_{k-1}(x_{k-1}): exactly the `mcmc` reversal (Del Moral, Doucet &
//! Jasra 2006, "Sequential Monte Carlo samplers", JRSS B 68(3), Section 3.3.2). The engine
//! therefore treats `proposal` and `mcmc` identically for Metropolis moves.
//!
//! Caveat: with the random walk, L = q has full support, so on a target with a restricted
//! support (log density -inf or NaN on part of the space) the weights violate the support
//! condition of the L-kernel construction (L(x_{k-1} | x_k) must vanish where pi_{k-1} does)
//! and the estimates are biased. Metropolis moves have no such problem.

use super::LKernel;

/// The proposal reversal (its correction term is zero).
#[derive(Debug, Clone, Copy, Default)]
pub(crate) struct ProposalReversal;

impl LKernel for ProposalReversal {
    fn add_correction(
        &mut self,
        _old: &[f64],
        _new: &[f64],
        _log_q: &[f64],
        _d: usize,
        _log_inc: &mut [f64],
    ) -> Result<f64, String> {
        Ok(0.0)
    }

    fn uses_log_q(&self) -> bool {
        false
    }
}
