//! Reversal of a target-invariant move (Del Moral, Doucet & Jasra 2006, "Sequential Monte
//! Carlo samplers", JRSS B 68(3), Section 3.3.2):
//! L(x_{k-1} | x_k) = pi_k(x_{k-1}) K(x_{k-1}, x_k) / pi_k(x_k), for which the incremental
//! weight becomes pi_k(x_{k-1}) / pi_{k-1}(x_{k-1}) and does not depend on x_k.
//!
//! The engine applies that weight before the move (the tempering reweight, or 1 on the static
//! path) and the Metropolis move leaves the weights alone, so this kernel is never asked for a
//! correction: with a non-invariant move it would be invalid, and it says so.

use super::LKernel;

/// The MCMC reversal.
#[derive(Debug, Clone, Copy, Default)]
pub(crate) struct McmcReversal;

impl LKernel for McmcReversal {
    fn add_correction(
        &mut self,
        _old: &[f64],
        _new: &[f64],
        _log_q: &[f64],
        _d: usize,
        _log_inc: &mut [f64],
    ) -> Result<f64, String> {
        Err(
            "backward_kernel = \"mcmc\" is valid only with move = \"metropolis\" (a \
             target-invariant move)"
                .into(),
        )
    }
}
