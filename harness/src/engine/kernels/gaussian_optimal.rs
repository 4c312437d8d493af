//! Approximately optimal L-kernel (Green, Devlin, Moore, Jewell & Maskell 2022, "Increasing the
//! efficiency of Sequential Monte Carlo samplers through the use of approximately optimal
//! L-kernels", Mechanical Systems and Signal Processing 162).
//!
//! The optimal backward kernel (Del Moral, Doucet & Jasra 2006, eq. 30) is
//! L_opt(x_{k-1} | x_k) = eta_{k-1}(x_{k-1}) q(x_k | x_{k-1}) / eta_k(x_k), where eta is the
//! distribution the particles are drawn from. Following Green et al., the joint distribution of
//! (x_{k-1}, x_k) is approximated by a Gaussian fitted to the particle pairs, and L is its
//! conditional x_{k-1} | x_k. The fit is **unweighted** (sample mean and sample covariance,
//! divisor m - 1), because eta is the sampling distribution of the particles, not the
//! weighted target; right after resampling both coincide.
//!
//! Implementation: the pairs are stacked as v = (x_k, x_{k-1}) and the 2d x 2d covariance is
//! factorised once, Sigma = C C^T. With z = C^{-1}(v - mu), the first d entries of z are the
//! whitened x_k and the last d the whitened conditional residual of x_{k-1} given x_k, so
//! log L = -|z_{d..2d}|^2 / 2 - sum_{j >= d} ln C_jj - d ln(2 pi) / 2. The last d rows of
//! C^{-1} are computed once per fit, so each particle costs one 2d x d matrix-vector product
//! (written as contiguous axpy updates), with no per-particle allocation. A ridge (see `gaussian_fit`) keeps Sigma positive
//! definite when the population has collapsed (duplicated particles after resampling).
//!
//! Cross-fit variant (`gaussian-optimal-crossfit`, an assay-specific option): the particles
//! are split into two contiguous halves of the index range; each half is scored with the
//! Gaussian fitted to the other half, so neither a particle's own pair nor (after resampling,
//! which keeps the copies of an ancestor adjacent) its duplicates enter its own L.

use super::LKernel;
use crate::engine::gaussian_fit::{
    cholesky_regularised, joint_moments, log_diag_sum, lower_inverse,
};
use crate::engine::moves::HALF_LN_2PI;

/// Buffers of one or two joint fits.
pub(crate) struct GaussianOptimal {
    crossfit: bool,
    mean: [Vec<f64>; 2],
    cov: [Vec<f64>; 2],
    chol: [Vec<f64>; 2],
    /// Transposed last d rows of C^{-1}: `w[j * d + i] = C^{-1}[d + i][j]`.
    w: [Vec<f64>; 2],
    /// Scratch: C^{-1}, the joint vector, and the whitened residual.
    inv: Vec<f64>,
    v: Vec<f64>,
    z: Vec<f64>,
}

impl GaussianOptimal {
    pub fn new(_n: usize, d: usize, crossfit: bool) -> Self {
        let p = 2 * d;
        let fits = if crossfit { 2 } else { 1 };
        let buf = |len: usize, k: usize| if k < fits { vec![0.0; len] } else { Vec::new() };
        GaussianOptimal {
            crossfit,
            mean: [buf(p, 0), buf(p, 1)],
            cov: [buf(p * p, 0), buf(p * p, 1)],
            chol: [buf(p * p, 0), buf(p * p, 1)],
            w: [buf(p * d, 0), buf(p * d, 1)],
            inv: vec![0.0; p * p],
            v: vec![0.0; p],
            z: vec![0.0; d],
        }
    }

    /// Fit the joint Gaussian of the pairs i = start, start + stride, ... into slot `k`.
    fn fit(
        &mut self,
        k: usize,
        old: &[f64],
        new: &[f64],
        d: usize,
        start: usize,
        stride: usize,
    ) -> Result<f64, String> {
        joint_moments(
            new,
            old,
            d,
            start,
            stride,
            &mut self.mean[k],
            &mut self.cov[k],
            &mut self.v,
        );
        let p = 2 * d;
        let ridge = cholesky_regularised(&self.cov[k], p, &mut self.chol[k]).ok_or_else(|| {
            "could not factorise the fitted joint covariance of (x_{k-1}, x_k) of the \
             approximately optimal L-kernel even with a ridge (non-finite positions?); use \
             backward_kernel = \"proposal\" or a smaller proposal_scale"
                .to_string()
        })?;
        lower_inverse(&self.chol[k], p, &mut self.inv);
        for j in 0..p {
            for i in 0..d {
                self.w[k][j * d + i] = self.inv[(d + i) * p + j];
            }
        }
        Ok(ridge)
    }

    /// Add log L - log q for the particles i = start, start + stride, ... scored with fit `k`.
    #[allow(clippy::too_many_arguments)]
    fn score(
        &mut self,
        k: usize,
        old: &[f64],
        new: &[f64],
        log_q: &[f64],
        d: usize,
        start: usize,
        stride: usize,
        log_inc: &mut [f64],
    ) {
        let p = 2 * d;
        let (mean, w) = (&self.mean[k], &self.w[k]);
        let log_norm = -log_diag_sum(&self.chol[k], p, d, p) - d as f64 * HALF_LN_2PI;
        let n = log_q.len();
        let mut i = start;
        while i < n {
            for j in 0..d {
                self.v[j] = new[i * d + j] - mean[j];
                self.v[d + j] = old[i * d + j] - mean[d + j];
            }
            self.z.fill(0.0);
            for (j, &vj) in self.v.iter().enumerate() {
                for (zi, wi) in self.z.iter_mut().zip(&w[j * d..(j + 1) * d]) {
                    *zi += vj * wi;
                }
            }
            let q: f64 = self.z.iter().map(|v| v * v).sum();
            log_inc[i] += log_norm - 0.5 * q - log_q[i];
            i += stride;
        }
    }
}

impl LKernel for GaussianOptimal {
    fn add_correction(
        &mut self,
        old: &[f64],
        new: &[f64],
        log_q: &[f64],
        d: usize,
        log_inc: &mut [f64],
    ) -> Result<f64, String> {
        if self.crossfit {
            // Contiguous halves [0, h) and [h, n): resampling writes ancestors in
            // non-decreasing order, so the copies of one ancestor are adjacent and (but for
            // the one family that straddles h) fall in one half. An even/odd split would put
            // copies of the same particle on both sides and let a particle's twin fit its L.
            let n = log_q.len();
            let h = n / 2;
            let (o0, o1) = old.split_at(h * d);
            let (n0, n1) = new.split_at(h * d);
            let (q0, q1) = log_q.split_at(h);
            let (i0, i1) = log_inc.split_at_mut(h);
            let r0 = self.fit(0, o0, n0, d, 0, 1)?;
            let r1 = self.fit(1, o1, n1, d, 0, 1)?;
            // Each half is scored with the fit of the other half.
            self.score(1, o0, n0, q0, d, 0, 1, i0);
            self.score(0, o1, n1, q1, d, 0, 1, i1);
            Ok(r0.max(r1))
        } else {
            let r = self.fit(0, old, new, d, 0, 1)?;
            self.score(0, old, new, log_q, d, 0, 1, log_inc);
            Ok(r)
        }
    }
}
