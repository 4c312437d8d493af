//! Multinomial resampling (Gordon, Salmond & Smith 1993, "Novel approach to nonlinear/
//! non-Gaussian Bayesian state estimation", IEE Proc. F 140(2)), with the sorted uniforms drawn
//! in O(M) by the sequential ("reverse product") method for uniform order statistics (Schucany
//! 1972, "Order statistics in simulation", J. Statist. Comput. Simul. 1; Devroye 1986,
//! "Non-Uniform Random Variate Generation", ch. V). Compared with the other schemes in Douc,
//! Cappe & Moulines 2005, "Comparison of resampling schemes for particle filtering", ISPA.

use rand::{Rng, RngExt};

use super::{CdfWalk, Resampler};

/// `M` independent draws from the weights, i.e. offspring counts ~ Multinomial(M, W).
///
/// Equivalent to inverting `M` i.i.d. uniforms through the weights' cumulative distribution
/// function; the uniforms are generated already sorted by `SortedUniforms` (below), so a single
/// forward walk suffices. O(M + N), M uniforms from the one stream, no allocation. See the
/// module [`super`] for the handling of degenerate weights.
#[derive(Debug, Clone, Copy, Default)]
pub struct Multinomial;

impl Resampler for Multinomial {
    fn resample(&self, weights: &[f64], rng: &mut dyn Rng, ancestors: &mut [usize]) {
        let Some(mut walk) = CdfWalk::new(weights) else {
            return;
        };
        let mut points = SortedUniforms::new(ancestors.len());
        for a in ancestors.iter_mut() {
            // `points` yields exactly `ancestors.len()` values; 1.0 is unreachable and would
            // be clamped by the walk anyway.
            let u = points.next(rng).unwrap_or(1.0);
            *a = walk.locate(u);
        }
    }
}

/// The order statistics `U_(1) <= ... <= U_(n)` of `n` i.i.d. `U[0, 1)` variables, generated
/// in increasing order, one uniform each, in O(1) memory.
///
/// The maximum of `k` uniforms is distributed as `V^(1/k)`, and given the `k`-th largest the
/// remaining ones are i.i.d. uniform below it, so `Y_n = V_n^(1/n)`, `Y_k = Y_{k+1} V_k^(1/k)`
/// are the order statistics in decreasing order (Schucany 1972; Devroye 1986, ch. V). Since
/// `1 - U` is uniform too, `1 - Y_n <= 1 - Y_{n-1} <= ...` are the order statistics in
/// increasing order. The product is kept as a logarithm, `L = ln Y`, and `1 - Y` is computed as
/// `-expm1(L)`, which is accurate near 0 and lies in `[0, 1)`.
pub(super) struct SortedUniforms {
    /// Number of values still to come; the next value uses the exponent `1 / remaining`.
    remaining: usize,
    /// `ln Y` of the last value (0 before the first).
    log_y: f64,
}

impl SortedUniforms {
    pub(super) fn new(n: usize) -> Self {
        SortedUniforms {
            remaining: n,
            log_y: 0.0,
        }
    }

    /// The next order statistic, or `None` after `n` of them.
    #[inline]
    pub(super) fn next(&mut self, rng: &mut dyn Rng) -> Option<f64> {
        if self.remaining == 0 {
            return None;
        }
        // 1 - U[0, 1) is in (0, 1], so the logarithm is finite and <= 0.
        let v = 1.0 - rng.random::<f64>();
        self.log_y += v.ln() / self.remaining as f64;
        self.remaining -= 1;
        Some(-self.log_y.exp_m1())
    }
}
