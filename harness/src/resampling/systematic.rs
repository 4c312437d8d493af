//! Systematic resampling (Kitagawa 1996, "Monte Carlo filter and smoother for non-Gaussian
//! nonlinear state space models", J. Comput. Graph. Statist. 5(1); Carpenter, Clifford &
//! Fearnhead 1999, "Improved particle filter for nonlinear problems", IEE Proc. Radar, Sonar
//! Navig. 146(1)); compared with the other schemes in Douc, Cappe & Moulines 2005.

use rand::{Rng, RngExt};

use super::{CdfWalk, Resampler};

/// One uniform `V ~ U[0, 1)`; the `M` points `(k + V) / M`, `k = 0..M`, are inverted through
/// the weights' cumulative distribution function.
///
/// In exact arithmetic index `i` gets `floor(M W_i)` or `ceil(M W_i)` offspring on every draw
/// (the points are `1/M` apart, so an interval of length `W_i` holds one of those two counts).
/// In floating point a count can be off by one when a point lands within rounding distance of
/// a cumulative sum, an event of probability of the order of `M * 2^-53` per call.
///
/// O(M + N), one uniform, no allocation. See the module [`super`] for the handling of
/// degenerate weights.
#[derive(Debug, Clone, Copy, Default)]
pub struct Systematic;

impl Resampler for Systematic {
    fn resample(&self, weights: &[f64], rng: &mut dyn Rng, ancestors: &mut [usize]) {
        let Some(mut walk) = CdfWalk::new(weights) else {
            return;
        };
        if ancestors.is_empty() {
            return;
        }
        let m = ancestors.len() as f64;
        let v: f64 = rng.random();
        for (k, a) in ancestors.iter_mut().enumerate() {
            // (k + v) / m is non-decreasing in k (rounding is monotone) and below 1 up to
            // rounding; CdfWalk clamps anything beyond the total.
            *a = walk.locate((k as f64 + v) / m);
        }
    }
}
