//! Resampling schemes (Douc, Cappe & Moulines 2005, "Comparison of resampling schemes for
//! particle filtering"). One file per scheme; [`scheme`] is the registry.

use rand::Rng;

use crate::settings::Resampling;

mod systematic;

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
        // Stub: every scheme is systematic until the other files land.
        Resampling::Multinomial
        | Resampling::Systematic
        | Resampling::Stratified
        | Resampling::Residual => &Systematic,
    }
}
