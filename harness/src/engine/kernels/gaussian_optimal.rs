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
//! C^{-1} are computed once per fit, so each particle costs one d x 2d matrix-vector product,
//! with no per-particle allocation. C^{-1} is lower triangular, so row d + i has d + i + 1
//! non-zero entries: d^2 + d(d+1)/2 products per particle instead of 2 d^2. Particles are
//! scored [`BLOCK`] at a time with their centred vectors interleaved (entry j of the block's
//! particles side by side), so each entry of z is a dot product of a matrix row with the block
//! whose [`BLOCK`] running sums stay in registers and advance together as one vector operation.
//! A ridge (see `gaussian_fit`) keeps Sigma positive definite when the population has collapsed
//! (duplicated particles after resampling).
//!
//! Cross-fit variant (`gaussian-optimal-crossfit`, an assay-specific option): the particles
//! are split into two contiguous halves of the index range; each half is scored with the
//! Gaussian fitted to the other half, so neither a particle's own pair nor (after resampling,
//! which keeps the copies of an ancestor adjacent) its duplicates enter its own L.

use super::LKernel;
use crate::engine::gaussian_fit::{
    BLOCK, cholesky_regularised, joint_moments, log_diag_sum, lower_inverse,
};
use crate::engine::moves::HALF_LN_2PI;

/// Buffers of one or two joint fits.
pub(crate) struct GaussianOptimal {
    crossfit: bool,
    mean: [Vec<f64>; 2],
    cov: [Vec<f64>; 2],
    chol: [Vec<f64>; 2],
    /// The last d rows of C^{-1}, row-major d x 2d: `w[i * 2d + j] = C^{-1}[d + i][j]`.
    w: [Vec<f64>; 2],
    /// Scratch: C^{-1}, and the centred joint vectors of one block (`v[j * BLOCK + l]` is
    /// entry j of the block's particle l).
    inv: Vec<f64>,
    v: Vec<f64>,
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
            v: vec![0.0; BLOCK * p],
        }
    }

    /// Fit the joint Gaussian of the pairs i = start, start + stride, ... into slot `k`.
    pub(crate) fn fit(
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
        self.w[k].copy_from_slice(&self.inv[d * p..]);
        Ok(ridge)
    }

    /// Add log L - log q for the particles i = start, start + stride, ... scored with fit `k`.
    #[allow(clippy::too_many_arguments)]
    pub(crate) fn score(
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
        let log_norm = -log_diag_sum(&self.chol[k], p, d, p) - d as f64 * HALF_LN_2PI;
        let args = ScoreArgs {
            mean: &self.mean[k],
            w: &self.w[k],
            log_norm,
            old,
            new,
            log_q,
            d,
            start,
            stride,
        };
        #[cfg(target_arch = "x86_64")]
        if std::arch::is_x86_feature_detected!("avx2") {
            // SAFETY: the CPU has AVX2 (checked just above), the only requirement of
            // `score_particles_avx2`.
            return unsafe { score_particles_avx2(&args, &mut self.v, log_inc) };
        }
        score_particles(&args, &mut self.v, log_inc);
    }
}

/// [`score_particles`] compiled for AVX2 (4-wide vectors). Without FMA: the same additions
/// and multiplications in the same order as the baseline build, so the same bits.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
fn score_particles_avx2(a: &ScoreArgs<'_>, v: &mut [f64], log_inc: &mut [f64]) {
    score_particles(a, v, log_inc);
}

/// What [`score_particles`] reads.
struct ScoreArgs<'a> {
    mean: &'a [f64],
    w: &'a [f64],
    log_norm: f64,
    old: &'a [f64],
    new: &'a [f64],
    log_q: &'a [f64],
    d: usize,
    start: usize,
    stride: usize,
}

/// The body of [`GaussianOptimal::score`]; `v` is the block scratch.
#[inline(always)]
fn score_particles(a: &ScoreArgs<'_>, v: &mut [f64], log_inc: &mut [f64]) {
    let ScoreArgs {
        mean,
        w,
        log_norm,
        old,
        new,
        log_q,
        d,
        start,
        stride,
    } = *a;
    let p = 2 * d;
    let n = log_q.len();
    let mut idx = [0usize; BLOCK];
    let mut i = start;
    while i < n {
        // The next block of up to BLOCK particles; a missing lane repeats the block's last
        // particle and its result is ignored.
        let mut b = 0;
        while b < BLOCK && i < n {
            idx[b] = i;
            b += 1;
            i += stride;
        }
        for l in b..BLOCK {
            idx[l] = idx[b - 1];
        }
        let rows_new: [&[f64]; BLOCK] = std::array::from_fn(|l| &new[idx[l] * d..][..d]);
        let rows_old: [&[f64]; BLOCK] = std::array::from_fn(|l| &old[idx[l] * d..][..d]);
        let (vn, vo) = v.split_at_mut(d * BLOCK);
        for (j, (vj, mu)) in vn.chunks_exact_mut(BLOCK).zip(&mean[..d]).enumerate() {
            for l in 0..BLOCK {
                vj[l] = rows_new[l][j] - mu;
            }
        }
        for (j, (vj, mu)) in vo.chunks_exact_mut(BLOCK).zip(&mean[d..]).enumerate() {
            for l in 0..BLOCK {
                vj[l] = rows_old[l][j] - mu;
            }
        }
        let mut q = [0.0f64; BLOCK];
        // ROWS rows at a time: ROWS * BLOCK independent running sums keep both floating-point
        // pipes busy (one row alone would wait on its own additions).
        let mut r = 0;
        while r < d {
            let rows = (d - r).min(ROWS);
            match rows {
                4 => add_squared_rows::<4>(w, p, d, r, v, &mut q),
                3 => add_squared_rows::<3>(w, p, d, r, v, &mut q),
                2 => add_squared_rows::<2>(w, p, d, r, v, &mut q),
                _ => add_squared_rows::<1>(w, p, d, r, v, &mut q),
            }
            r += rows;
        }
        for (l, &pi) in idx[..b].iter().enumerate() {
            log_inc[pi] += log_norm - 0.5 * q[l] - log_q[pi];
        }
    }
}

/// Rows scored together in [`GaussianOptimal::score`].
const ROWS: usize = 4;

/// Add z_k[l]^2 to q[l] for the entries k = r .. r + R of z of the block, where
/// z_k[l] = sum_j W[k][j] v[j][l] over the d + k + 1 non-zero entries of row k of `w` (d x p,
/// lower-triangular tail), each sum formed in increasing j.
#[inline(always)]
fn add_squared_rows<const R: usize>(
    w: &[f64],
    p: usize,
    d: usize,
    r: usize,
    v: &[f64],
    q: &mut [f64; BLOCK],
) {
    let common = d + r + 1;
    let rows: [&[f64]; R] = std::array::from_fn(|k| &w[(r + k) * p..(r + k) * p + common + k]);
    let mut z = [[0.0f64; BLOCK]; R];
    for (j, vj) in v[..common * BLOCK].chunks_exact(BLOCK).enumerate() {
        for k in 0..R {
            let c = rows[k][j];
            for l in 0..BLOCK {
                z[k][l] += c * vj[l];
            }
        }
    }
    // The triangular tails: row r + k has k more entries after the common part.
    for k in 1..R {
        for j in common..common + k {
            let vj = &v[j * BLOCK..(j + 1) * BLOCK];
            let c = rows[k][j];
            for l in 0..BLOCK {
                z[k][l] += c * vj[l];
            }
        }
    }
    for zk in &z {
        for l in 0..BLOCK {
            q[l] += zk[l] * zk[l];
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
