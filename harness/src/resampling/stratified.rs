//! Stratified resampling (Kitagawa 1996, "Monte Carlo filter and smoother for non-Gaussian
//! nonlinear state space models", J. Comput. Graph. Statist. 5(1)); analysed in Douc, Cappe &
//! Moulines 2005, "Comparison of resampling schemes for particle filtering", ISPA.

use rand::{Rng, RngExt};

use super::{CdfWalk, Resampler};

/// One independent uniform per stratum: the points `(k + V_k) / M`, `V_k ~ U[0, 1)`, one in
/// each of the `M` strata `[k/M, (k+1)/M)`, are inverted through the weights' cumulative
/// distribution function. The points are increasing by construction, so no sort is needed.
///
/// O(M + N), M uniforms from the one stream, no allocation. See the module [`super`] for the
/// handling of degenerate weights.
#[derive(Debug, Clone, Copy, Default)]
pub struct Stratified;

impl Resampler for Stratified {
    fn resample(&self, weights: &[f64], rng: &mut dyn Rng, ancestors: &mut [usize]) {
        let Some(mut walk) = CdfWalk::new(weights) else {
            return;
        };
        let m = ancestors.len() as f64;
        for (k, a) in ancestors.iter_mut().enumerate() {
            let v: f64 = rng.random();
            // k + v < k + 1 <= (k + 1) + v' before rounding, and rounding is monotone, so the
            // points never decrease.
            *a = walk.locate((k as f64 + v) / m);
        }
    }
}
