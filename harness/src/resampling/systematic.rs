//! Systematic resampling (Kitagawa 1996, "Monte Carlo filter and smoother for non-Gaussian
//! nonlinear state space models", J. Comput. Graph. Statist. 5(1); Carpenter, Clifford &
//! Fearnhead 1999, "Improved particle filter for nonlinear problems", IEE Proc. Radar, Sonar
//! Navig. 146(1)); compared with the other schemes in Douc, Cappe & Moulines 2005.

use rand::{Rng, RngExt};

use super::{Resampler, usable};

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
///
/// # How it is computed
///
/// The points are evenly spaced, so the number of them below a cumulative sum `C` has the
/// closed form `ceil(C M - V)` (clamped to `0..=M`), and the ancestors are filled particle by
/// particle from those counts. The loop over particles branches only on rare events (a sum
/// within rounding distance of a point, more than four offspring), which the branch predictor
/// gets right: the usual walk over points and sums mispredicts a branch about twice per
/// particle, which made it 3x slower on fresh weights (measured:
/// `cargo bench --bench resampling`). Where `C M - V` lies within rounding distance of an
/// integer, the count is settled by evaluating the points `(k + V) / M` themselves, so the
/// result is exactly that of inverting the floating-point points through the running sums in
/// order (the test `systematic_counting_equals_the_walk` checks this against the walk).
#[derive(Debug, Clone, Copy, Default)]
pub struct Systematic;

impl Resampler for Systematic {
    fn resample(&self, weights: &[f64], rng: &mut dyn Rng, ancestors: &mut [usize]) {
        if weights.is_empty() || ancestors.is_empty() {
            return;
        }
        let v: f64 = rng.random();
        fill_from(weights, v, ancestors);
    }
}

/// The ancestors of the points `(k + v) / M` for a given `v` in `[0, 1)`; `weights` and
/// `ancestors` are not empty.
pub(super) fn fill_from(weights: &[f64], v: f64, ancestors: &mut [usize]) {
    // Points past every sum (rounding) go to the last index with positive weight.
    let last = weights.iter().rposition(|&w| usable(w) > 0.0).unwrap_or(0);
    let m = ancestors.len();
    let counter = PointCounter::new(m, v);
    // ancestors[..filled] are final.
    let mut filled = 0usize;
    let mut cum = 0.0f64;
    for (j, &w) in weights[..last].iter().enumerate() {
        cum += usable(w);
        let c = counter.below(cum, filled);
        if c - filled <= 4 && filled + 4 <= m {
            // Almost every particle gets 0 to 4 offspring: one fixed-width store, whose
            // slots past `c` are overwritten by the particles that follow.
            ancestors[filled..filled + 4].fill(j);
        } else {
            ancestors[filled..c].fill(j);
        }
        filled = c;
    }
    ancestors[filled..].fill(last);
}

/// Counts the points `(k + V) / M`, `k = 0..M`, below a cumulative sum.
pub(super) struct PointCounter {
    m: usize,
    mf: f64,
    v: f64,
}

impl PointCounter {
    pub(super) fn new(m: usize, v: f64) -> Self {
        PointCounter { m, mf: m as f64, v }
    }

    /// The `k`-th point, computed as the walk over points computes it.
    #[inline]
    pub(super) fn point(&self, k: usize) -> f64 {
        (k as f64 + self.v) / self.mf
    }

    /// `#{k < M : point(k) < cum}`, given that it is at least `floor`. The points are
    /// non-decreasing in `k` (rounding is monotone), so that set is a prefix.
    #[inline]
    pub(super) fn below(&self, cum: f64, floor: usize) -> usize {
        let t = cum * self.mf - self.v;
        // In exact arithmetic the count is ceil(T), T = cum M - v. In the standard model of
        // floating-point arithmetic (Higham 2002, "Accuracy and Stability of Numerical
        // Algorithms", 2nd ed., section 2.2: each operation has relative error at most
        // u = 2^-53), t is within u (2 cum M + 1) of T, and point(k) < cum can disagree with
        // k < T only if |k - T| <= about u (cum M + M). So when t is farther than
        // 3 u (cum M + M + 1) from every integer, ceil(t) is the count of the floating-point
        // points. The margin below is 2^13 u (cum M + M + 2), some 2700 times that bound.
        let margin = (cum * self.mf + self.mf + 2.0) * f64::EPSILON * 4096.0;
        // Integer part by truncation rather than f64::ceil and f64::round, which are calls
        // into libm on the baseline x86-64 target.
        let whole = if t > 0.0 && t < self.mf {
            t as usize
        } else {
            0
        };
        let frac = t - whole as f64;
        if t > margin && t < self.mf - margin && frac > margin && frac < 1.0 - margin {
            return (whole + 1).max(floor);
        }
        // Near an integer, at either end, or not finite: settle the count on the points.
        let mut c = if t >= self.mf {
            self.m
        } else if t > 0.0 {
            whole + 1
        } else {
            0
        }
        .clamp(floor, self.m);
        while c > floor && self.point(c - 1) >= cum {
            c -= 1;
        }
        while c < self.m && self.point(c) < cum {
            c += 1;
        }
        c
    }
}
