//! Residual resampling (Liu & Chen 1998, "Sequential Monte Carlo methods for dynamic systems",
//! J. Amer. Statist. Assoc. 93(443)); analysed in Douc, Cappe & Moulines 2005, "Comparison of
//! resampling schemes for particle filtering", ISPA. The remainder is drawn multinomially, as
//! in Liu & Chen, with the sorted uniforms of [`SortedUniforms`].

use rand::Rng;

use super::multinomial::SortedUniforms;
use super::{Resampler, usable};

/// Index `i` first gets `floor(M W_i)` copies deterministically; the remaining
/// `R = M - sum_i floor(M W_i)` ancestors are drawn multinomially from the residual weights
/// `r_i = M W_i - floor(M W_i)` (normalised by their sum). Every index therefore gets at least
/// `floor(M W_i)` offspring, and the expected count is `M W_i`.
///
/// Two passes over the weights and no buffer: the first computes `R`, the residual total and
/// the last index with positive residual; the second recomputes each `r_i` on the fly, writes
/// the copies of `i`, then the remainder points (sorted uniforms scaled by the residual total)
/// that fall in `i`'s residual interval, so the ancestors come out in non-decreasing order.
/// O(M + N), R uniforms from the one stream, no allocation.
///
/// Rounding: with weights summing to slightly more than 1 the floors can exceed `M`; copies
/// are then cut at `M`. With no positive residual but `R > 0` (weights summing to less than
/// 1), the `R` remaining ancestors go to the last index with positive weight (index 0 if none).
/// See the module [`super`] for the handling of degenerate weights.
#[derive(Debug, Clone, Copy, Default)]
pub struct Residual;

/// `(floor(m w), m w - floor(m w))` for a usable weight `w`.
#[inline]
fn split(m: f64, w: f64) -> (f64, f64) {
    let x = m * usable(w);
    let f = x.floor();
    (f, x - f)
}

impl Resampler for Residual {
    fn resample(&self, weights: &[f64], rng: &mut dyn Rng, ancestors: &mut [usize]) {
        if weights.is_empty() || ancestors.is_empty() {
            return;
        }
        let m_count = ancestors.len();
        let m = m_count as f64;

        // Pass 1: number of deterministic copies, residual total, where the remainder ends.
        let mut copies = 0usize;
        let mut residual_total = 0.0;
        let mut last_residual = None;
        let mut last_positive = 0;
        for (i, &w) in weights.iter().enumerate() {
            let (f, r) = split(m, w);
            // `as` saturates; the floor is finite because m and w are.
            copies = copies.saturating_add(f as usize);
            residual_total += r;
            if r > 0.0 {
                last_residual = Some(i);
            }
            if usable(w) > 0.0 {
                last_positive = i;
            }
        }
        let remainder = m_count.saturating_sub(copies);
        // All remaining points are flushed here at the latest, so none is left over.
        let sink = last_residual.unwrap_or(last_positive);

        // Pass 2: copies and remainder points, index by index.
        let mut points = SortedUniforms::new(remainder);
        let mut next = points.next(rng).map(|u| u * residual_total);
        let mut pos = 0usize;
        let mut cum = 0.0;
        for (i, &w) in weights.iter().enumerate().take(sink + 1) {
            let (f, r) = split(m, w);
            let k = (f as usize).min(m_count - pos);
            ancestors[pos..pos + k].fill(i);
            pos += k;
            cum += r;
            // Points in [cum_{i-1}, cum_i) belong to i; the sink takes whatever is left.
            while let Some(u) = next {
                if (u >= cum && i != sink) || pos == m_count {
                    break;
                }
                ancestors[pos] = i;
                pos += 1;
                next = points.next(rng).map(|u| u * residual_total);
            }
        }
        // Copies of indices after the sink (which have no residual).
        for (i, &w) in weights.iter().enumerate().skip(sink + 1) {
            if pos == m_count {
                break;
            }
            let (f, _) = split(m, w);
            let k = (f as usize).min(m_count - pos);
            ancestors[pos..pos + k].fill(i);
            pos += k;
        }
        // Unreachable by the counting above; kept so that every slot is written whatever the
        // rounding.
        if pos < m_count {
            let fill = if pos > 0 { ancestors[pos - 1] } else { sink };
            ancestors[pos..].fill(fill);
        }
    }
}
