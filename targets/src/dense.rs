//! A full covariance matrix given in a study file (`covariance = [[...], ...]`): reading and
//! validation, and the whitening that the `gaussian`, `student-t` and `mixture` families use
//! with it.
//!
//! With the Cholesky factor `Sigma = L L'` (nalgebra), the inverse factor `W = L^-1` is lower
//! triangular and `(x - mu)' Sigma^-1 (x - mu) = |W (x - mu)|^2`; each `z_i = (W r)_i` needs
//! only row i of W, so the quadratic form costs d(d+1)/2 products and no scratch buffer, and
//! `log|Sigma| = 2 sum log L_ii` (Golub & Van Loan 2013, *Matrix Computations*, 4th ed.,
//! section 4.2). Exact draws are `mu + L z` with `z ~ N(0, I)`, computed in place from the
//! last coordinate to the first (common practice).

use nalgebra::DMatrix;

use crate::error::ParamError;
use crate::params::{Params, as_f64, out_of_range, show_f64};

/// Relative tolerance of the symmetry check: `|a_ij - a_ji| <= SYMMETRY_TOL * sqrt(a_ii a_jj)`.
/// Loose enough for matrices written with 15 significant digits, tight enough to catch a
/// typing error; the matrix used is the symmetrised `(A + A') / 2`.
pub const SYMMETRY_TOL: f64 = 1e-10;

/// A validated symmetric positive-definite covariance with its factors.
#[derive(Debug, Clone)]
pub struct DenseCov {
    dim: usize,
    /// The (symmetrised) covariance.
    cov: DMatrix<f64>,
    /// Lower Cholesky factor L, row-major lower triangle (row i has i + 1 entries).
    chol: Vec<f64>,
    /// Inverse factor W = L^-1, row-major lower triangle.
    white: Vec<f64>,
    log_det: f64,
}

/// Start of row i of a row-major lower triangle.
#[inline]
fn row(i: usize) -> usize {
    i * (i + 1) / 2
}

impl DenseCov {
    /// Validate `cov` (dim x dim, finite, symmetric within [`SYMMETRY_TOL`], positive diagonal,
    /// positive definite) for the parameter `key` of `family`, and factorise it. Errors name
    /// the first offending entry as `key[i][j]`, or the leading block whose factorisation
    /// failed.
    pub fn new(family: &str, key: &str, cov: &DMatrix<f64>) -> Result<Self, ParamError> {
        let d = cov.nrows();
        if cov.ncols() != d {
            return Err(ParamError::LengthMismatch {
                family: family.to_string(),
                key: format!("{key}[0]"),
                len: cov.ncols(),
                expected: d,
            });
        }
        for i in 0..d {
            for j in 0..d {
                let v = cov[(i, j)];
                if !v.is_finite() {
                    return Err(out_of_range(family, &entry(key, i, j), v, "finite number"));
                }
            }
        }
        for i in 0..d {
            let v = cov[(i, i)];
            if v <= 0.0 {
                return Err(out_of_range(
                    family,
                    &entry(key, i, i),
                    v,
                    "number > 0 (a variance on the diagonal of a positive-definite matrix)",
                ));
            }
        }
        for i in 0..d {
            for j in (i + 1)..d {
                let (a, b) = (cov[(i, j)], cov[(j, i)]);
                let s = (cov[(i, i)] * cov[(j, j)]).sqrt();
                if (a - b).abs() > SYMMETRY_TOL * s {
                    return Err(ParamError::OutOfRange {
                        family: family.to_string(),
                        key: entry(key, i, j),
                        value: show_f64(a),
                        allowed: format!(
                            "a symmetric matrix: {} = {} (relative tolerance {SYMMETRY_TOL})",
                            entry(key, j, i),
                            show_f64(b)
                        ),
                    });
                }
            }
        }
        let sym = 0.5 * (cov + cov.transpose());
        let Some(ch) = sym.clone().cholesky() else {
            let k = first_failing_block(&sym);
            return Err(ParamError::OutOfRange {
                family: family.to_string(),
                key: key.to_string(),
                value: format!("a {d} x {d} matrix"),
                allowed: format!(
                    "a positive-definite matrix; the Cholesky factorisation failed: the \
                     leading {k} x {k} block (rows and columns 0 to {}) is not positive definite",
                    k - 1
                ),
            });
        };
        let l = ch.l();
        let winv = l
            .clone()
            .solve_lower_triangular(&DMatrix::identity(d, d))
            .ok_or_else(|| {
                out_of_range(
                    family,
                    key,
                    f64::NAN,
                    "a positive-definite matrix (its Cholesky factor is singular)",
                )
            })?;
        let mut chol = Vec::with_capacity(row(d));
        let mut white = Vec::with_capacity(row(d));
        for i in 0..d {
            for j in 0..=i {
                chol.push(l[(i, j)]);
                white.push(winv[(i, j)]);
            }
        }
        let log_det = 2.0 * l.diagonal().iter().map(|v| v.ln()).sum::<f64>();
        if !log_det.is_finite() {
            return Err(ParamError::OutOfRange {
                family: family.to_string(),
                key: key.to_string(),
                value: format!("a {d} x {d} matrix with log determinant {log_det}"),
                allowed: "a positive-definite matrix with a finite log determinant".to_string(),
            });
        }
        Ok(DenseCov {
            dim: d,
            cov: sym,
            chol,
            white,
            log_det,
        })
    }

    /// Dimension d.
    pub fn dim(&self) -> usize {
        self.dim
    }

    /// The covariance (symmetrised).
    pub fn matrix(&self) -> &DMatrix<f64> {
        &self.cov
    }

    /// log |Sigma|.
    pub fn log_det(&self) -> f64 {
        self.log_det
    }

    /// `(x - mu)' Sigma^-1 (x - mu)`.
    #[inline]
    pub fn mahalanobis2(&self, x: &[f64], mu: &[f64]) -> f64 {
        let mut q = 0.0;
        for i in 0..self.dim {
            let w = &self.white[row(i)..row(i) + i + 1];
            let mut z = 0.0;
            for j in 0..=i {
                z += w[j] * (x[j] - mu[j]);
            }
            q += z * z;
        }
        q
    }

    /// Add `c Sigma^-1 (x - mu)` to `grad` (so `c = -1/2 * 2` gives the gradient of a
    /// Gaussian log density), using `Sigma^-1 = W' W`.
    pub fn add_precision_times(&self, x: &[f64], mu: &[f64], c: f64, grad: &mut [f64]) {
        for i in 0..self.dim {
            let w = &self.white[row(i)..row(i) + i + 1];
            let mut z = 0.0;
            for j in 0..=i {
                z += w[j] * (x[j] - mu[j]);
            }
            for j in 0..=i {
                grad[j] += c * w[j] * z;
            }
        }
    }

    /// Overwrite `z` (standard normal draws) with `L z`: a draw of N(0, Sigma).
    pub fn colour_in_place(&self, z: &mut [f64]) {
        for i in (0..self.dim).rev() {
            let l = &self.chol[row(i)..row(i) + i + 1];
            let mut s = 0.0;
            for j in 0..=i {
                s += l[j] * z[j];
            }
            z[i] = s;
        }
    }
}

/// `key[i][j]`.
fn entry(key: &str, i: usize, j: usize) -> String {
    format!("{key}[{i}][{j}]")
}

/// The size of the smallest leading block of `m` that is not positive definite (m itself is
/// not): a block of a positive-definite matrix is positive definite, so bisection applies.
fn first_failing_block(m: &DMatrix<f64>) -> usize {
    let (mut ok, mut bad) = (0usize, m.nrows());
    while bad - ok > 1 {
        let k = (ok + bad) / 2;
        if m.view((0, 0), (k, k)).clone_owned().cholesky().is_some() {
            ok = k;
        } else {
            bad = k;
        }
    }
    bad
}

/// Read an optional `covariance = [[...], ...]` of `dim` rows of `dim` numbers from a table.
pub fn read_matrix(p: &Params, key: &str, dim: usize) -> Result<Option<DMatrix<f64>>, ParamError> {
    let Some(v) = p.raw(key) else {
        return Ok(None);
    };
    let toml::Value::Array(rows) = v else {
        return Err(p.wrong_type(
            key,
            v,
            "an array of arrays of numbers (one row per coordinate)",
        ));
    };
    if rows.len() != dim {
        return Err(ParamError::LengthMismatch {
            family: p.family().to_string(),
            key: p.key(key),
            len: rows.len(),
            expected: dim,
        });
    }
    let mut m = DMatrix::zeros(dim, dim);
    for (i, r) in rows.iter().enumerate() {
        let rk = format!("{key}[{i}]");
        let toml::Value::Array(r) = r else {
            return Err(p.wrong_type(&rk, r, "an array of numbers"));
        };
        if r.len() != dim {
            return Err(ParamError::LengthMismatch {
                family: p.family().to_string(),
                key: p.key(&rk),
                len: r.len(),
                expected: dim,
            });
        }
        for (j, e) in r.iter().enumerate() {
            m[(i, j)] = as_f64(e).ok_or_else(|| p.wrong_type(&entry(key, i, j), e, "a number"))?;
        }
    }
    Ok(Some(m))
}

/// The error for `covariance` given together with one of the keys it replaces.
pub fn exclusive(p: &Params, key: &str, others: &[&str]) -> Result<(), ParamError> {
    if !p.has(key) {
        return Ok(());
    }
    match others.iter().find(|o| p.has(o)) {
        None => Ok(()),
        Some(o) => Err(ParamError::OutOfRange {
            family: p.family().to_string(),
            key: p.key(key),
            value: format!("given together with `{}`", p.key(o)),
            allowed: format!(
                "either `{}` or {}, not both: a full covariance replaces them",
                p.key(key),
                others
                    .iter()
                    .map(|k| format!("`{}`", p.key(k)))
                    .collect::<Vec<_>>()
                    .join(" / ")
            ),
        }),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use approx::assert_relative_eq;

    fn m(rows: &[&[f64]]) -> DMatrix<f64> {
        DMatrix::from_fn(rows.len(), rows.len(), |i, j| rows[i][j])
    }

    #[test]
    fn factors_agree_with_nalgebra() {
        let a = m(&[&[4.0, 1.2, -0.6], &[1.2, 2.0, 0.3], &[-0.6, 0.3, 1.5]]);
        let c = DenseCov::new("f", "covariance", &a).unwrap();
        // log|A| against nalgebra's LU determinant; quadratic form against a dense inverse.
        assert_relative_eq!(c.log_det(), a.determinant().ln(), max_relative = 1e-12);
        let inv = a.clone().try_inverse().unwrap();
        let (x, mu) = ([0.4, -1.0, 2.0], [0.1, 0.2, 0.3]);
        let r = nalgebra::DVector::from_fn(3, |i, _| x[i] - mu[i]);
        let q = (r.transpose() * &inv * &r)[(0, 0)];
        assert_relative_eq!(c.mahalanobis2(&x, &mu), q, max_relative = 1e-12);
        let mut g = [0.0; 3];
        c.add_precision_times(&x, &mu, 1.0, &mut g);
        let want = &inv * &r;
        for i in 0..3 {
            assert_relative_eq!(g[i], want[i], max_relative = 1e-12);
        }
        // L z against nalgebra's factor times z.
        let mut z = [0.5, -1.5, 2.5];
        let lz = a.clone().cholesky().unwrap().l() * nalgebra::DVector::from_column_slice(&z);
        c.colour_in_place(&mut z);
        for i in 0..3 {
            assert_relative_eq!(z[i], lz[i], max_relative = 1e-12);
        }
    }

    #[test]
    fn errors_name_the_entry_or_the_block() {
        let e = DenseCov::new("f", "covariance", &m(&[&[1.0, 0.5], &[0.4, 1.0]])).unwrap_err();
        assert_eq!(e.key(), Some("covariance[0][1]"));
        assert!(e.to_string().contains("covariance[1][0] = 0.4"), "{e}");
        let e = DenseCov::new("f", "covariance", &m(&[&[1.0, 0.0], &[0.0, -2.0]])).unwrap_err();
        assert_eq!(e.key(), Some("covariance[1][1]"));
        let e = DenseCov::new("f", "covariance", &m(&[&[1.0, f64::NAN], &[0.0, 1.0]]));
        assert_eq!(e.unwrap_err().key(), Some("covariance[0][1]"));
        // |rho| > 1 in the leading 2 x 2 block of a 3 x 3 matrix.
        let bad = m(&[&[1.0, 2.0, 0.0], &[2.0, 1.0, 0.0], &[0.0, 0.0, 1.0]]);
        let e = DenseCov::new("f", "covariance", &bad).unwrap_err();
        assert_eq!(e.key(), Some("covariance"));
        assert!(e.to_string().contains("leading 2 x 2 block"), "{e}");
    }
}
