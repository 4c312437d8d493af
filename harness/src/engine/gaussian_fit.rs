//! Gaussian fits of a particle population: weighted and unweighted moments, and a Cholesky
//! factorisation with an increasing ridge for near-singular covariances.
//!
//! The routines are small hand-written dense loops over row-major slices rather than
//! `nalgebra::DMatrix` because they run once or twice per iteration on buffers allocated once
//! per run: `DMatrix` constructors and its `cholesky()` allocate on every call. nalgebra serves
//! as the outside reference in the tests.

/// Relative size of the first ridge tried (times trace / dim).
const FIRST_RIDGE: f64 = 1e-10;
/// Factor by which the ridge grows after a failed factorisation.
const RIDGE_GROWTH: f64 = 10.0;
/// Number of ridges tried before giving up (1e-10 * 10^40 covers any finite matrix).
const MAX_ATTEMPTS: usize = 40;
/// A pivot must exceed this fraction of trace / dim to count as positive.
const PIVOT_TOL: f64 = 1e-12;

/// Weighted mean and covariance sum_i w_i (x_i - m)(x_i - m)^T of the rows of `x` (`n` rows of
/// length `d`), with normalised weights `w` (summing to 1). No bias correction (the weights are
/// importance weights, not frequencies). `cov` is `d * d`, row-major.
pub fn weighted_moments(x: &[f64], d: usize, w: &[f64], mean: &mut [f64], cov: &mut [f64]) {
    mean.fill(0.0);
    cov.fill(0.0);
    for (row, &wi) in x.chunks_exact(d).zip(w) {
        if wi > 0.0 {
            for (m, &v) in mean.iter_mut().zip(row) {
                *m += wi * v;
            }
        }
    }
    for (row, &wi) in x.chunks_exact(d).zip(w) {
        if wi > 0.0 {
            for a in 0..d {
                let da = wi * (row[a] - mean[a]);
                for b in 0..=a {
                    cov[a * d + b] += da * (row[b] - mean[b]);
                }
            }
        }
    }
    mirror_lower(cov, d);
}

/// Particles per block of the cross-product update in [`joint_moments`].
pub const BLOCK: usize = 4;

/// Unweighted mean and sample covariance (divisor m - 1, or 1 when m < 2) of the joint vectors
/// v_i = (new_i, old_i) of length 2d, over the particles i = start, start + stride, ...
/// `mean` has length 2d, `cov` is 2d x 2d row-major, `v` is scratch of length
/// [`BLOCK`] * 2d.
///
/// Two passes: the mean first, then the cross-products of the centred vectors (a one-pass
/// update of raw sums would lose the covariance to cancellation when the population sits far
/// from the origin relative to its spread). Only the lower triangle is accumulated (the
/// matrix is symmetric; it is mirrored at the end), and [`BLOCK`] particles at a time: each
/// entry is loaded and stored once per block and gets the block's products added one after
/// the other, left to right, which is exactly the order of one particle at a time, so
/// blocking changes no bit of the result.
///
/// On x86-64 CPUs with AVX2 (detected at run time) the same code is compiled for 4-wide
/// vectors; it has no FMA, so it performs the same operations in the same order and gives the
/// same bits as the baseline build.
#[allow(clippy::too_many_arguments)]
pub fn joint_moments(
    new: &[f64],
    old: &[f64],
    d: usize,
    start: usize,
    stride: usize,
    mean: &mut [f64],
    cov: &mut [f64],
    v: &mut [f64],
) {
    #[cfg(target_arch = "x86_64")]
    if std::arch::is_x86_feature_detected!("avx2") {
        // SAFETY: the CPU has AVX2 (checked just above), the only requirement of
        // `joint_moments_avx2`.
        unsafe { joint_moments_avx2(new, old, d, start, stride, mean, cov, v) };
        return;
    }
    joint_moments_body(new, old, d, start, stride, mean, cov, v);
}

/// [`joint_moments_body`] compiled for AVX2.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
#[allow(clippy::too_many_arguments)]
fn joint_moments_avx2(
    new: &[f64],
    old: &[f64],
    d: usize,
    start: usize,
    stride: usize,
    mean: &mut [f64],
    cov: &mut [f64],
    v: &mut [f64],
) {
    joint_moments_body(new, old, d, start, stride, mean, cov, v);
}

#[inline(always)]
#[allow(clippy::too_many_arguments)]
fn joint_moments_body(
    new: &[f64],
    old: &[f64],
    d: usize,
    start: usize,
    stride: usize,
    mean: &mut [f64],
    cov: &mut [f64],
    v: &mut [f64],
) {
    let n = new.len() / d;
    let p = 2 * d;
    mean.fill(0.0);
    cov.fill(0.0);
    let mut m = 0usize;
    let mut i = start;
    while i < n {
        for (mj, a) in mean[..d].iter_mut().zip(&new[i * d..(i + 1) * d]) {
            *mj += a;
        }
        for (mj, b) in mean[d..].iter_mut().zip(&old[i * d..(i + 1) * d]) {
            *mj += b;
        }
        m += 1;
        i += stride;
    }
    if m == 0 {
        return;
    }
    let inv = 1.0 / m as f64;
    mean.iter_mut().for_each(|v| *v *= inv);
    // Centred joint vector of particle i into `out` (length 2d).
    let centre = |i: usize, out: &mut [f64]| {
        let (a, b) = out.split_at_mut(d);
        for ((o, x), mu) in a.iter_mut().zip(&new[i * d..(i + 1) * d]).zip(&mean[..d]) {
            *o = x - mu;
        }
        for ((o, x), mu) in b.iter_mut().zip(&old[i * d..(i + 1) * d]).zip(&mean[d..]) {
            *o = x - mu;
        }
    };
    let v = &mut v[..BLOCK * p];
    let full = m / BLOCK;
    let mut i = start;
    for _ in 0..full {
        for l in 0..BLOCK {
            centre(i, &mut v[l * p..(l + 1) * p]);
            i += stride;
        }
        let (v0, rest) = v.split_at(p);
        let (v1, rest) = rest.split_at(p);
        let (v2, v3) = rest.split_at(p);
        for r in 0..p {
            let (a0, a1, a2, a3) = (v0[r], v1[r], v2[r], v3[r]);
            let row = &mut cov[r * p..r * p + r + 1];
            for ((((slot, x0), x1), x2), x3) in row
                .iter_mut()
                .zip(&v0[..=r])
                .zip(&v1[..=r])
                .zip(&v2[..=r])
                .zip(&v3[..=r])
            {
                *slot = *slot + a0 * x0 + a1 * x1 + a2 * x2 + a3 * x3;
            }
        }
    }
    while i < n {
        let v0 = &mut v[..p];
        centre(i, v0);
        for r in 0..p {
            let a0 = v0[r];
            for (slot, x0) in cov[r * p..r * p + r + 1].iter_mut().zip(&v0[..=r]) {
                *slot += a0 * x0;
            }
        }
        i += stride;
    }
    let div = if m >= 2 { (m - 1) as f64 } else { 1.0 };
    cov.iter_mut().for_each(|v| *v /= div);
    mirror_lower(cov, p);
}

/// Copy the lower triangle of a square row-major matrix onto its upper triangle.
fn mirror_lower(a: &mut [f64], n: usize) {
    for r in 0..n {
        for c in 0..r {
            a[c * n + r] = a[r * n + c];
        }
    }
}

/// Lower Cholesky factor `l` (row-major, upper part zeroed) of `a + ridge * I`, where the ridge
/// is 0 if `a` factorises with every pivot above 1e-12 trace/n, and otherwise the smallest of
/// 1e-10 trace/n, 1e-9 trace/n, ... that does (trace/n is replaced by 1 when it is zero).
/// Returns the ridge, or `None` when `a` has a non-finite entry or no ridge helped.
pub fn cholesky_regularised(a: &[f64], n: usize, l: &mut [f64]) -> Option<f64> {
    if a.iter().any(|v| !v.is_finite()) {
        return None;
    }
    let trace: f64 = (0..n).map(|i| a[i * n + i]).sum();
    let base = if trace > 0.0 && trace.is_finite() {
        trace / n as f64
    } else {
        1.0
    };
    let tol = PIVOT_TOL * base;
    let mut ridge = 0.0;
    for _ in 0..MAX_ATTEMPTS {
        if cholesky_with_ridge(a, n, ridge, tol, l) {
            return Some(ridge);
        }
        ridge = if ridge == 0.0 {
            FIRST_RIDGE * base
        } else {
            ridge * RIDGE_GROWTH
        };
    }
    None
}

/// Cholesky-Banachiewicz factorisation of `a + ridge I`; false when a pivot is not above `tol`.
fn cholesky_with_ridge(a: &[f64], n: usize, ridge: f64, tol: f64, l: &mut [f64]) -> bool {
    l.fill(0.0);
    for i in 0..n {
        for j in 0..=i {
            let mut s = a[i * n + j];
            if i == j {
                s += ridge;
            }
            for k in 0..j {
                s -= l[i * n + k] * l[j * n + k];
            }
            if i == j {
                // NaN fails this test too.
                if s.is_nan() || s <= tol {
                    return false;
                }
                l[i * n + i] = s.sqrt();
            } else {
                l[i * n + j] = s / l[j * n + j];
            }
        }
    }
    true
}

/// Solve L z = r in place (forward substitution), L lower triangular row-major n x n.
/// (Kept as the tested reference for `lower_inverse`.)
#[cfg(test)]
pub fn forward_solve(l: &[f64], n: usize, r: &mut [f64]) {
    for i in 0..n {
        let row = &l[i * n..i * n + i];
        let s: f64 = row.iter().zip(&r[..i]).map(|(a, b)| a * b).sum();
        r[i] = (r[i] - s) / l[i * n + i];
    }
}

/// out = x + L z, with the lower factor L given transposed (`lt[j * d + i] = L[i][j]`), so
/// that the product is a sum of contiguous axpy updates (no floating-point reduction chain).
#[inline]
pub fn add_lower_times(lt: &[f64], d: usize, x: &[f64], z: &[f64], out: &mut [f64]) {
    out.copy_from_slice(x);
    for (j, &zj) in z.iter().enumerate() {
        for (o, l) in out[j..].iter_mut().zip(&lt[j * d + j..(j + 1) * d]) {
            *o += zj * l;
        }
    }
}

/// Transpose a square row-major matrix into `out`.
pub fn transpose(a: &[f64], n: usize, out: &mut [f64]) {
    for i in 0..n {
        for j in 0..n {
            out[j * n + i] = a[i * n + j];
        }
    }
}

/// Inverse of a lower-triangular row-major n x n matrix (by forward substitution on the
/// columns of I), written into `inv` (lower triangular).
pub fn lower_inverse(l: &[f64], n: usize, inv: &mut [f64]) {
    inv.fill(0.0);
    for c in 0..n {
        for i in c..n {
            let mut s = if i == c { 1.0 } else { 0.0 };
            for k in c..i {
                s -= l[i * n + k] * inv[k * n + c];
            }
            inv[i * n + c] = s / l[i * n + i];
        }
    }
}

/// Sum of the logs of the diagonal entries of rows `from..to` of an n x n lower factor.
pub fn log_diag_sum(l: &[f64], n: usize, from: usize, to: usize) -> f64 {
    (from..to).map(|i| l[i * n + i].ln()).sum()
}

#[cfg(test)]
mod tests {
    use super::*;
    use approx::assert_relative_eq;
    use nalgebra::DMatrix;

    fn spd(n: usize) -> Vec<f64> {
        // A fixed well-conditioned SPD matrix B B^T + n I. // common practice
        let b: Vec<f64> = (0..n * n)
            .map(|k| ((k * 7 + 3) % 11) as f64 / 11.0 - 0.5)
            .collect();
        let mut a = vec![0.0; n * n];
        for i in 0..n {
            for j in 0..n {
                a[i * n + j] = (0..n).map(|k| b[i * n + k] * b[j * n + k]).sum::<f64>()
                    + if i == j { n as f64 } else { 0.0 };
            }
        }
        a
    }

    #[test]
    fn cholesky_matches_nalgebra() {
        // Outside reference: nalgebra's Cholesky factor of the same matrix.
        let n = 6;
        let a = spd(n);
        let mut l = vec![0.0; n * n];
        assert_eq!(cholesky_regularised(&a, n, &mut l), Some(0.0));
        let reference = DMatrix::from_row_slice(n, n, &a).cholesky().unwrap().l();
        for i in 0..n {
            for j in 0..n {
                assert_relative_eq!(l[i * n + j], reference[(i, j)], epsilon = 1e-12);
            }
        }
        // Forward solve against nalgebra's triangular solve.
        let mut r: Vec<f64> = (0..n).map(|i| i as f64 - 2.5).collect();
        let rhs = nalgebra::DVector::from_column_slice(&r);
        let z = reference.solve_lower_triangular(&rhs).unwrap();
        forward_solve(&l, n, &mut r);
        for i in 0..n {
            assert_relative_eq!(r[i], z[i], epsilon = 1e-12);
        }
        // Triangular inverse against nalgebra's inverse; L z via the transposed factor.
        let mut inv = vec![0.0; n * n];
        lower_inverse(&l, n, &mut inv);
        let rinv = reference.clone().try_inverse().unwrap();
        let mut lt = vec![0.0; n * n];
        transpose(&l, n, &mut lt);
        let zz: Vec<f64> = (0..n).map(|i| 0.3 * i as f64 - 1.0).collect();
        let mut out = vec![0.0; n];
        add_lower_times(&lt, n, &vec![1.0; n], &zz, &mut out);
        let want = &reference * nalgebra::DVector::from_column_slice(&zz);
        for i in 0..n {
            assert_relative_eq!(out[i], 1.0 + want[i], epsilon = 1e-12);
            for j in 0..n {
                assert_relative_eq!(inv[i * n + j], rinv[(i, j)], epsilon = 1e-12);
            }
        }
    }

    #[test]
    fn singular_matrix_gets_a_ridge() {
        // A rank-one matrix (all ones) is singular; the smallest successful ridge is recorded.
        // common practice: ridge regularisation proportional to trace / n.
        let n = 4;
        let a = vec![1.0; n * n];
        let mut l = vec![0.0; n * n];
        let ridge = cholesky_regularised(&a, n, &mut l).unwrap();
        assert!(ridge > 0.0 && ridge < 1e-3, "{ridge}");
        let zero = vec![0.0; n * n];
        assert!(cholesky_regularised(&zero, n, &mut l).unwrap() > 0.0);
        let bad = vec![f64::NAN; n * n];
        assert!(cholesky_regularised(&bad, n, &mut l).is_none());
    }

    #[test]
    fn moments_match_direct_formulas() {
        // Weighted mean/covariance against the textbook definitions computed with nalgebra.
        let d = 3;
        let x: Vec<f64> = (0..30).map(|k| ((k * 13 + 5) % 17) as f64 / 3.0).collect();
        let w: Vec<f64> = (0..10).map(|k| (k + 1) as f64 / 55.0).collect();
        let (mut m, mut c) = (vec![0.0; d], vec![0.0; d * d]);
        weighted_moments(&x, d, &w, &mut m, &mut c);
        let xs = DMatrix::from_row_slice(10, d, &x);
        let mref = (0..d)
            .map(|j| (0..10).map(|i| w[i] * xs[(i, j)]).sum::<f64>())
            .collect::<Vec<_>>();
        for a in 0..d {
            assert_relative_eq!(m[a], mref[a], epsilon = 1e-12);
            for b in 0..d {
                let cref: f64 = (0..10)
                    .map(|i| w[i] * (xs[(i, a)] - mref[a]) * (xs[(i, b)] - mref[b]))
                    .sum();
                assert_relative_eq!(c[a * d + b], cref, epsilon = 1e-12);
            }
        }
        // Joint moments of (new, old) with stride 2 against the sample covariance formula.
        let new = &x[..15];
        let old = &x[15..];
        let d = 3;
        let (mut m, mut c) = (vec![0.0; 2 * d], vec![0.0; 4 * d * d]);
        joint_moments(
            new,
            old,
            d,
            1,
            2,
            &mut m,
            &mut c,
            &mut vec![0.0; BLOCK * 2 * d],
        );
        let rows: Vec<Vec<f64>> = [1usize, 3]
            .iter()
            .map(|&i| {
                let mut v = new[i * d..(i + 1) * d].to_vec();
                v.extend_from_slice(&old[i * d..(i + 1) * d]);
                v
            })
            .collect();
        for a in 0..2 * d {
            let ma = (rows[0][a] + rows[1][a]) / 2.0;
            assert_relative_eq!(m[a], ma, epsilon = 1e-12);
            for b in 0..2 * d {
                let mb = (rows[0][b] + rows[1][b]) / 2.0;
                let cref = rows.iter().map(|r| (r[a] - ma) * (r[b] - mb)).sum::<f64>() / 1.0;
                assert_relative_eq!(c[a * 2 * d + b], cref, epsilon = 1e-12);
            }
        }
    }
}
