//! The particle population in contiguous buffers, and the log-space weight arithmetic.

use assay_targets::Target;

/// N particles in R^d. Positions are one row-major `Vec<f64>` of N * d; the log target density
/// and the log reference density (tempered path only) are cached per particle; log weights are
/// kept normalised (their log-sum-exp is 0), and the linear weights `w` are kept in step with
/// them by every method that changes them ([`Population::normalise`], [`Population::resample`]),
/// so one `exp` per particle and reweighting serves the evidence, the ESS, the resampling and
/// the weighted fits.
#[derive(Debug, Clone)]
pub(crate) struct Population {
    pub n: usize,
    pub d: usize,
    /// Positions, row by row.
    pub x: Vec<f64>,
    /// Log target density at each particle; every non-finite value is stored as -inf.
    pub lt: Vec<f64>,
    /// Log reference density at each particle (0 on the static path).
    pub lr: Vec<f64>,
    /// Normalised log weights.
    pub logw: Vec<f64>,
    /// Incremental log weights of the current reweighting (scratch, filled by the caller).
    pub log_inc: Vec<f64>,
    /// Normalised linear weights, W_i = exp(logw_i).
    pub w: Vec<f64>,
    /// Resampling scratch: ancestors and gather buffers.
    ancestors: Vec<usize>,
    x_tmp: Vec<f64>,
    lt_tmp: Vec<f64>,
    lr_tmp: Vec<f64>,
}

impl Population {
    pub fn new(n: usize, d: usize) -> Self {
        Population {
            n,
            d,
            x: vec![0.0; n * d],
            lt: vec![f64::NEG_INFINITY; n],
            lr: vec![0.0; n],
            logw: vec![-(n as f64).ln(); n],
            log_inc: vec![0.0; n],
            w: vec![1.0 / n as f64; n],
            ancestors: vec![0; n],
            x_tmp: vec![0.0; n * d],
            lt_tmp: vec![0.0; n],
            lr_tmp: vec![0.0; n],
        }
    }

    /// Add `log_inc` to the log weights (a particle whose weight or increment is not a finite
    /// number, or +inf, gets weight zero), renormalise, and return log sum_i W_i exp(log_inc_i),
    /// the log of this step's factor of the evidence estimate. `-inf` means every weight is zero
    /// (the weights are then left unnormalised and the caller must stop).
    pub fn reweight(&mut self) -> f64 {
        for (lw, &inc) in self.logw.iter_mut().zip(&self.log_inc) {
            *lw = clean(*lw + inc);
        }
        self.normalise()
    }

    /// Normalise the log weights, fill the linear weights, and return the log-sum-exp of the
    /// log weights before normalisation (`-inf` when every weight is zero; the weights are then
    /// left as they were).
    ///
    /// One `exp` per particle: with m = max_i logw_i and e_i = exp(logw_i - m), the sum
    /// s = sum_i e_i gives log-sum-exp = m + ln s and W_i = e_i / s.
    pub fn normalise(&mut self) -> f64 {
        let m = self.logw.iter().copied().fold(f64::NEG_INFINITY, f64::max);
        if !m.is_finite() {
            return f64::NEG_INFINITY;
        }
        let mut s = 0.0;
        for (w, &lw) in self.w.iter_mut().zip(&self.logw) {
            let e = (lw - m).exp();
            *w = e;
            s += e;
        }
        let lse = m + s.ln();
        let inv = 1.0 / s;
        for (w, lw) in self.w.iter_mut().zip(self.logw.iter_mut()) {
            *w *= inv;
            *lw -= lse;
        }
        lse
    }

    /// Kish effective sample size 1 / sum W_i^2 of the normalised weights (Kong 1992).
    pub fn ess(&self) -> f64 {
        let s2: f64 = self.w.iter().map(|&w| w * w).sum();
        if s2 > 0.0 { 1.0 / s2 } else { 0.0 }
    }

    /// Resample with `scheme`: ancestors are drawn from the normalised weights, the particles
    /// are copied, and the weights become uniform.
    pub fn resample(&mut self, scheme: &dyn crate::resampling::Resampler, rng: &mut dyn rand::Rng) {
        scheme.resample(&self.w, rng, &mut self.ancestors);
        let d = self.d;
        for (i, &a) in self.ancestors.iter().enumerate() {
            // A scheme that returned an out-of-range index is clamped rather than trusted.
            let a = a.min(self.n - 1);
            self.x_tmp[i * d..(i + 1) * d].copy_from_slice(&self.x[a * d..(a + 1) * d]);
            self.lt_tmp[i] = self.lt[a];
            self.lr_tmp[i] = self.lr[a];
        }
        std::mem::swap(&mut self.x, &mut self.x_tmp);
        std::mem::swap(&mut self.lt, &mut self.lt_tmp);
        std::mem::swap(&mut self.lr, &mut self.lr_tmp);
        let u = -(self.n as f64).ln();
        self.logw.fill(u);
        self.w.fill(1.0 / self.n as f64);
    }
}

/// A log weight or log density that is NaN or +inf becomes -inf (weight zero).
#[inline]
pub(crate) fn clean(v: f64) -> f64 {
    if v.is_nan() || v == f64::INFINITY {
        f64::NEG_INFINITY
    } else {
        v
    }
}

/// log of the density of the bridge ref^(1-phi) target^phi at a particle, with the
/// conventions 0 * (-inf) = 0 at phi = 0 and phi = 1 (so a point outside the target's support
/// keeps its reference density at phi = 0).
#[inline]
pub(crate) fn log_bridge(lt: f64, lr: f64, phi: f64) -> f64 {
    if phi <= 0.0 {
        lr
    } else if phi >= 1.0 {
        lt
    } else {
        (1.0 - phi) * lr + phi * lt
    }
}

/// Evaluate the target on `n = out.len()` points with one batch call; non-finite values are
/// stored as -inf, and the evaluation counter grows by n. An `Err` is a broken evaluator (e.g.
/// an external model process that died), which ends the run.
pub(crate) fn evaluate(
    target: &dyn Target,
    points: &[f64],
    out: &mut [f64],
    evaluations: &mut u64,
) -> Result<(), String> {
    *evaluations += out.len() as u64;
    target
        .try_log_density_batch(points, out)
        .map_err(|e| format!("target evaluation failed: {e}"))?;
    out.iter_mut().for_each(|v| *v = clean(*v));
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn log_sum_exp_is_stable() {
        // log(e^1000 + e^1000) = 1000 + ln 2 (exact identity). // common practice
        let mut p = Population::new(2, 1);
        p.logw = vec![1000.0, 1000.0];
        assert!((p.normalise() - (1000.0 + 2f64.ln())).abs() < 1e-12);
        assert_eq!(p.w, vec![0.5, 0.5]);
        let mut p = Population::new(3, 1);
        p.logw.fill(f64::NEG_INFINITY);
        assert_eq!(p.normalise(), f64::NEG_INFINITY);
        let mut p = Population::new(0, 1);
        assert_eq!(p.normalise(), f64::NEG_INFINITY);
    }

    #[test]
    fn ess_of_uniform_and_degenerate_weights() {
        // Kong 1992: ESS = N for equal weights and 1 for a single non-zero weight.
        let mut p = Population::new(8, 1);
        assert!((p.ess() - 8.0).abs() < 1e-12);
        p.logw.fill(f64::NEG_INFINITY);
        p.logw[3] = 0.0;
        assert_eq!(p.normalise(), 0.0);
        assert!((p.ess() - 1.0).abs() < 1e-12);
    }

    #[test]
    fn reweight_returns_the_evidence_factor() {
        // sum_i W_i w_i with W uniform over 4 particles and w = (1, 2, 3, 4) is 2.5; a NaN
        // increment gives weight zero.
        let mut p = Population::new(4, 1);
        p.log_inc = vec![0.0, 2f64.ln(), 3f64.ln(), 4f64.ln()];
        assert!((p.reweight() - 2.5f64.ln()).abs() < 1e-12);
        p.log_inc = vec![f64::NAN, 0.0, 0.0, f64::INFINITY];
        p.reweight();
        assert_eq!(p.logw[0], f64::NEG_INFINITY);
        assert_eq!(p.logw[3], f64::NEG_INFINITY);
        assert!((p.logw[1].exp() + p.logw[2].exp() - 1.0).abs() < 1e-12);
        // The linear weights follow the log weights.
        for (w, lw) in p.w.iter().zip(&p.logw) {
            assert!((w - lw.exp()).abs() < 1e-15);
        }
    }
}
