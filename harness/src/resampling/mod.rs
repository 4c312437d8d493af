//! Resampling schemes (Douc, Cappe & Moulines 2005, "Comparison of resampling schemes for
//! particle filtering", ISPA). One file per scheme; [`scheme`] is the registry.
//!
//! # Behaviour shared by every scheme
//!
//! The caller guarantees normalised weights (non-negative, summing to 1 up to rounding). Every
//! scheme is still total on any input — it never panics and never indexes past the end:
//!
//! - `M = ancestors.len()` draws are taken from `N = weights.len()` weights; `M != N` is allowed.
//! - A weight that is zero, negative, NaN or infinite is treated as zero and never gets
//!   offspring.
//! - Weights summing to slightly less than 1 (rounding): a point past the last cumulative sum
//!   goes to the last index with positive weight. Weights summing to slightly more than 1 leave
//!   the tail of the last weight unreachable. Both effects are of the order of the rounding.
//! - If no weight is positive, every ancestor is 0. If `weights` is empty, `ancestors` is left
//!   unchanged (no index would be valid).
//! - Ancestors are written in non-decreasing order.

use rand::Rng;

use crate::settings::Resampling;

mod multinomial;
mod residual;
mod stratified;
mod systematic;

#[cfg(test)]
mod tests;

pub use multinomial::Multinomial;
pub use residual::Residual;
pub use stratified::Stratified;
pub use systematic::Systematic;

/// A resampling scheme: given normalised weights, choose N ancestor indices.
pub trait Resampler: Send + Sync {
    /// Write `ancestors.len()` ancestor indices, drawn according to `weights` (non-negative,
    /// summing to 1 up to rounding), into `ancestors`, in non-decreasing order. Must not
    /// allocate and must be O(N).
    fn resample(&self, weights: &[f64], rng: &mut dyn Rng, ancestors: &mut [usize]);
}

/// The registry: the scheme for a setting.
pub fn scheme(kind: Resampling) -> &'static dyn Resampler {
    match kind {
        Resampling::Multinomial => &Multinomial,
        Resampling::Systematic => &Systematic,
        Resampling::Stratified => &Stratified,
        Resampling::Residual => &Residual,
    }
}

/// The weight as used by every scheme: zero unless positive and finite.
#[inline]
fn usable(w: f64) -> f64 {
    if w > 0.0 && w.is_finite() { w } else { 0.0 }
}

/// Inverts the weights' cumulative distribution function at non-decreasing points, in one
/// forward pass: O(N + M) over a whole resampling step.
///
/// Index `j` receives the points in `[C_{j-1}, C_j)`, where `C_j` is the running sum of the
/// usable weights; that interval is empty for a zero weight, so zero weights never get a
/// point. The walk never goes past the last index with positive weight (index 0 if there is
/// none), so points at or beyond the total (rounding) land there.
struct CdfWalk<'a> {
    weights: &'a [f64],
    /// Current index.
    j: usize,
    /// Running sum of the usable weights up to and including `j`.
    cum: f64,
    /// Last index with a positive usable weight (0 if none).
    last: usize,
}

impl<'a> CdfWalk<'a> {
    /// `None` if there are no weights.
    fn new(weights: &'a [f64]) -> Option<Self> {
        let first = *weights.first()?;
        let last = weights.iter().rposition(|&w| usable(w) > 0.0).unwrap_or(0);
        Some(CdfWalk {
            weights,
            j: 0,
            cum: usable(first),
            last,
        })
    }

    /// The index whose interval holds `u`; `u` must not decrease between calls.
    #[inline]
    fn locate(&mut self, u: f64) -> usize {
        while u >= self.cum && self.j < self.last {
            self.j += 1;
            self.cum += usable(self.weights[self.j]);
        }
        self.j
    }
}
