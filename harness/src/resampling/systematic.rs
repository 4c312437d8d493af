//! Systematic resampling (Carpenter, Clifford & Fearnhead 1999; Kitagawa 1996).

use rand::{Rng, RngExt};

use super::Resampler;

/// One uniform U ~ U(0, 1/N); the points U + i/N are inverted through the weights' CDF.
#[derive(Debug, Clone, Copy, Default)]
pub struct Systematic;

impl Resampler for Systematic {
    fn resample(&self, weights: &[f64], rng: &mut dyn Rng, ancestors: &mut [usize]) {
        let n = ancestors.len();
        if n == 0 || weights.is_empty() {
            return;
        }
        let step = 1.0 / n as f64;
        let u0: f64 = rng.random::<f64>() * step;
        let last = weights.len() - 1;
        let mut j = 0usize;
        let mut cum = weights[0];
        for (i, a) in ancestors.iter_mut().enumerate() {
            let u = u0 + i as f64 * step;
            while u > cum && j < last {
                j += 1;
                cum += weights[j];
            }
            *a = j;
        }
    }
}
