//! `gaussian`: a Gaussian with AR(1) correlation, `Sigma_ij = s_i s_j rho^|i-j|`.
//!
//! `log_density(x) = -1/2 (x - mu)' Sigma^-1 (x - mu)` (no normalising constant), so
//! `log_z = d/2 log 2pi + 1/2 log|Sigma|` with `log|Sigma| = 2 sum log s_i + (d-1) log(1-rho^2)`.
//!
//! With `z_i = (x_i - mu_i) / s_i`, the AR(1) correlation matrix has the innovation form
//! `z' R^-1 z = z_1^2 + sum_{i>=2} (z_i - rho z_{i-1})^2 / (1 - rho^2)` (its inverse is
//! tridiagonal), so the density costs O(d) with no allocation, and exact sampling is the
//! stationary AR(1) recursion (the AR(1) process as a Gaussian Markov random field with
//! tridiagonal precision: Rue & Held 2005, *Gaussian Markov Random Fields*, Chapman & Hall,
//! section 1.2).
//!
//! With `covariance = [[...]]` instead of `scale` and `ar1`, Sigma is that full matrix and the
//! density, `log|Sigma|` and exact draws go through its Cholesky factor ([`crate::dense`]).

use std::path::Path;

use nalgebra::DMatrix;
use rand::Rng;
use rand_distr::{Distribution, StandardNormal};

use crate::dense::{self, DenseCov};
use crate::error::ParamError;
use crate::params::{
    Params, broadcast, check_dim, check_each, check_finite, check_open, check_positive,
};
use crate::registry::GAUSSIAN;
use crate::target::Target;

/// Config keys of the `gaussian` family.
pub const KEYS: &[&str] = &["dim", "mean", "scale", "ar1", "covariance"];

/// A Gaussian `N(mu, Sigma)` with `Sigma_ij = s_i s_j rho^|i-j|`.
#[derive(Debug, Clone)]
pub struct Gaussian {
    label: String,
    mean: Vec<f64>,
    scale: Vec<f64>,
    inv_scale: Vec<f64>,
    rho: f64,
    /// 1 / (1 - rho^2)
    inv_innov_var: f64,
    /// sqrt(1 - rho^2)
    innov_sd: f64,
    log_z: f64,
    cov: DMatrix<f64>,
    /// A full covariance given as such (then `scale` and `rho` are unused by the density).
    dense: Option<DenseCov>,
}

impl Gaussian {
    /// A Gaussian of dimension `dim >= 1` with mean `mean` and marginal standard deviations
    /// `scale` (each given as one value, broadcast, or `dim` values) and AR(1) correlation
    /// `ar1` in (-1, 1). The label defaults to `gaussian-<dim>`.
    pub fn new(dim: usize, mean: &[f64], scale: &[f64], ar1: f64) -> Result<Self, ParamError> {
        check_dim(GAUSSIAN, dim, 1)?;
        check_each(GAUSSIAN, "mean", mean, check_finite)?;
        check_each(GAUSSIAN, "scale", scale, check_positive)?;
        let mean = broadcast(GAUSSIAN, "mean", mean, dim)?;
        let scale = broadcast(GAUSSIAN, "scale", scale, dim)?;
        check_open(GAUSSIAN, "ar1", ar1, -1.0, 1.0, "open interval (-1, 1)")?;
        let one_m_r2 = 1.0 - ar1 * ar1;
        let log_det =
            2.0 * scale.iter().map(|s| s.ln()).sum::<f64>() + (dim as f64 - 1.0) * one_m_r2.ln();
        let log_z = 0.5 * dim as f64 * (2.0 * std::f64::consts::PI).ln() + 0.5 * log_det;
        let cov = DMatrix::from_fn(dim, dim, |i, j| {
            scale[i] * scale[j] * ar1.powi(i.abs_diff(j) as i32)
        });
        Ok(Gaussian {
            label: format!("{GAUSSIAN}-{dim}"),
            inv_scale: scale.iter().map(|s| 1.0 / s).collect(),
            mean,
            scale,
            rho: ar1,
            inv_innov_var: 1.0 / one_m_r2,
            innov_sd: one_m_r2.sqrt(),
            log_z,
            cov,
            dense: None,
        })
    }

    /// A Gaussian with mean `mean` (one value, broadcast, or `dim` values) and the full
    /// covariance `covariance` (dim x dim, symmetric positive definite; errors name the first
    /// offending entry or the failed factorisation). The label defaults to `gaussian-<dim>`.
    pub fn with_covariance(mean: &[f64], covariance: &DMatrix<f64>) -> Result<Self, ParamError> {
        let dim = covariance.nrows();
        check_dim(GAUSSIAN, dim, 1)?;
        check_each(GAUSSIAN, "mean", mean, check_finite)?;
        let mean = broadcast(GAUSSIAN, "mean", mean, dim)?;
        let dense = DenseCov::new(GAUSSIAN, "covariance", covariance)?;
        let log_z = 0.5 * dim as f64 * (2.0 * std::f64::consts::PI).ln() + 0.5 * dense.log_det();
        let scale: Vec<f64> = (0..dim).map(|i| dense.matrix()[(i, i)].sqrt()).collect();
        Ok(Gaussian {
            label: format!("{GAUSSIAN}-{dim}"),
            inv_scale: scale.iter().map(|s| 1.0 / s).collect(),
            mean,
            scale,
            rho: 0.0,
            inv_innov_var: 1.0,
            innov_sd: 1.0,
            log_z,
            cov: dense.matrix().clone(),
            dense: Some(dense),
        })
    }

    /// The standard normal `N(0, I)` in `dim` dimensions.
    pub fn standard(dim: usize) -> Result<Self, ParamError> {
        Self::new(dim, &[0.0], &[1.0], 0.0)
    }

    /// Set the label.
    pub fn with_label(mut self, label: impl Into<String>) -> Self {
        self.label = label.into();
        self
    }

    /// Build from a `[[target]]` table (keys [`KEYS`]).
    pub fn from_table(
        table: &toml::Table,
        label: &str,
        _base_dir: &Path,
    ) -> Result<Self, ParamError> {
        let p = Params::new(table, GAUSSIAN, KEYS)?;
        let dim = p.dim(1)?;
        let mean = p.vec_or("mean", dim, 0.0)?;
        dense::exclusive(&p, "covariance", &["scale", "ar1"])?;
        if let Some(cov) = dense::read_matrix(&p, "covariance", dim)? {
            return Ok(Self::with_covariance(&mean, &cov)?.with_label(label));
        }
        let scale = p.vec_or("scale", dim, 1.0)?;
        let ar1 = p.f64_or("ar1", 0.0)?;
        Ok(Self::new(dim, &mean, &scale, ar1)?.with_label(label))
    }

    /// The full covariance, when the target was given one (`covariance`).
    pub fn dense(&self) -> Option<&DenseCov> {
        self.dense.as_ref()
    }

    /// Marginal standard deviations.
    pub fn scale(&self) -> &[f64] {
        &self.scale
    }

    /// AR(1) correlation.
    pub fn ar1(&self) -> f64 {
        self.rho
    }
}

impl Target for Gaussian {
    fn dim(&self) -> usize {
        self.mean.len()
    }

    fn log_density(&self, x: &[f64]) -> f64 {
        if let Some(c) = &self.dense {
            return -0.5 * c.mahalanobis2(x, &self.mean);
        }
        let mut q = 0.0;
        let mut zprev = 0.0;
        for (i, ((&xi, &mi), &is)) in x.iter().zip(&self.mean).zip(&self.inv_scale).enumerate() {
            let z = (xi - mi) * is;
            if i == 0 {
                q += z * z;
            } else {
                let e = z - self.rho * zprev;
                q += e * e * self.inv_innov_var;
            }
            zprev = z;
        }
        -0.5 * q
    }

    /// Four points at a time: each point's sum is formed in exactly the order of
    /// [`Target::log_density`] (so the values are bit-identical to it), but the four
    /// independent dependency chains overlap instead of waiting on one another.
    fn log_density_batch(&self, points: &[f64], out: &mut [f64]) {
        const LANES: usize = 4;
        let d = self.mean.len();
        if self.dense.is_some() {
            for (x, o) in points.chunks_exact(d).zip(out.iter_mut()) {
                *o = self.log_density(x);
            }
            return;
        }
        let (rho, iv) = (self.rho, self.inv_innov_var);
        let (m, is) = (&self.mean[..], &self.inv_scale[..]);
        let mut blocks = points.chunks_exact(LANES * d);
        let mut outs = out.chunks_exact_mut(LANES);
        for (x, o) in (&mut blocks).zip(&mut outs) {
            let mut zprev = [0.0; LANES];
            let mut q = [0.0; LANES];
            for l in 0..LANES {
                let z = (x[l * d] - m[0]) * is[0];
                q[l] = z * z;
                zprev[l] = z;
            }
            for i in 1..d {
                for l in 0..LANES {
                    let z = (x[l * d + i] - m[i]) * is[i];
                    let e = z - rho * zprev[l];
                    q[l] += e * e * iv;
                    zprev[l] = z;
                }
            }
            for l in 0..LANES {
                o[l] = -0.5 * q[l];
            }
        }
        for (x, o) in blocks
            .remainder()
            .chunks_exact(d)
            .zip(outs.into_remainder())
        {
            *o = self.log_density(x);
        }
    }

    fn grad_log_density(&self, x: &[f64], grad: &mut [f64]) -> bool {
        if let Some(c) = &self.dense {
            grad.iter_mut().for_each(|g| *g = 0.0);
            c.add_precision_times(x, &self.mean, -1.0, grad);
            return true;
        }
        let d = self.mean.len();
        let z = |i: usize| (x[i] - self.mean[i]) * self.inv_scale[i];
        let rho = self.rho;
        // innovation of coordinate i, scaled by 1 / (1 - rho^2)
        let e = |zi: f64, zim1: f64| (zi - rho * zim1) * self.inv_innov_var;
        let mut zprev = 0.0;
        let mut zj = z(0);
        for (j, gj) in grad.iter_mut().enumerate().take(d) {
            let mut g = if j == 0 { zj } else { e(zj, zprev) };
            let znext = if j + 1 < d { z(j + 1) } else { 0.0 };
            if j + 1 < d {
                g -= rho * e(znext, zj);
            }
            *gj = -g * self.inv_scale[j];
            zprev = zj;
            zj = znext;
        }
        true
    }

    fn log_z(&self) -> Option<f64> {
        Some(self.log_z)
    }

    fn mean(&self) -> Option<&[f64]> {
        Some(&self.mean)
    }

    fn covariance(&self) -> Option<&DMatrix<f64>> {
        Some(&self.cov)
    }

    fn sample(&self, rng: &mut dyn Rng, out: &mut [f64]) -> bool {
        if let Some(c) = &self.dense {
            out.iter_mut()
                .for_each(|o| *o = StandardNormal.sample(&mut *rng));
            c.colour_in_place(out);
            out.iter_mut().zip(&self.mean).for_each(|(o, m)| *o += m);
            return true;
        }
        let mut z = 0.0;
        for (i, o) in out.iter_mut().enumerate() {
            let e: f64 = StandardNormal.sample(rng);
            z = if i == 0 {
                e
            } else {
                self.rho * z + self.innov_sd * e
            };
            *o = self.mean[i] + self.scale[i] * z;
        }
        true
    }

    fn label(&self) -> &str {
        &self.label
    }

    fn family(&self) -> &str {
        GAUSSIAN
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use approx::assert_relative_eq;

    fn build(s: &str) -> Result<Gaussian, ParamError> {
        let t: toml::Table = s.parse().unwrap();
        Gaussian::from_table(&t, "g", Path::new("."))
    }

    fn key_of(r: Result<Gaussian, ParamError>) -> (String, String) {
        let e = r.unwrap_err();
        let variant = format!("{e:?}");
        let variant = variant.split([' ', '{']).next().unwrap().to_string();
        (variant, e.key().unwrap().to_string())
    }

    #[test]
    fn invalid_parameters() {
        let cases = [
            ("mean = 0", "Missing", "dim"),
            ("dim = 0", "OutOfRange", "dim"),
            ("dim = 20000", "OutOfRange", "dim"),
            ("dim = 1e300", "OutOfRange", "dim"),
            ("dim = 1.5", "WrongType", "dim"),
            ("dim = 'two'", "WrongType", "dim"),
            ("dim = 2\nscale = 0", "OutOfRange", "scale"),
            ("dim = 2\nscale = [1, -1]", "OutOfRange", "scale[1]"),
            ("dim = 2\nscale = [1, 1, 1]", "LengthMismatch", "scale"),
            ("dim = 2\nmean = [1]", "LengthMismatch", "mean"),
            ("dim = 2\nmean = nan", "OutOfRange", "mean"),
            ("dim = 2\nmean = 'x'", "WrongType", "mean"),
            ("dim = 2\nar1 = 1", "OutOfRange", "ar1"),
            ("dim = 2\nar1 = -1.5", "OutOfRange", "ar1"),
            ("dim = 2\nar1 = true", "WrongType", "ar1"),
            ("dim = 2\nsacle = 1", "UnknownKey", "sacle"),
        ];
        for (spec, variant, key) in cases {
            let (v, k) = key_of(build(spec));
            assert_eq!((v.as_str(), k.as_str()), (variant, key), "{spec}");
        }
        match build("dim = 2\nsacle = 1") {
            Err(ParamError::UnknownKey { suggestion, .. }) => {
                assert_eq!(suggestion.as_deref(), Some("scale"))
            }
            other => panic!("{other:?}"),
        }
    }

    #[test]
    fn integral_float_dim_accepted() {
        assert_eq!(build("dim = 3.0").unwrap().dim(), 3);
    }

    #[test]
    fn density_matches_dense_precision() {
        let g = Gaussian::new(4, &[1.0, -1.0, 0.5, 0.0], &[0.5, 1.0, 2.0, 3.0], 0.7).unwrap();
        // Definition: -1/2 r' Sigma^-1 r, with Sigma^-1 by a dense nalgebra inverse, and
        // log_z = d/2 log 2pi + 1/2 log|Sigma| with |Sigma| from a nalgebra Cholesky factor.
        let prec = g.cov.clone().try_inverse().unwrap();
        let x = [0.3, 0.2, -1.0, 2.0];
        let r = nalgebra::DVector::from_fn(4, |i, _| x[i] - g.mean[i]);
        let q = (r.transpose() * &prec * &r)[(0, 0)];
        assert_relative_eq!(g.log_density(&x), -0.5 * q, max_relative = 1e-12);
        let log_det = g
            .cov
            .clone()
            .cholesky()
            .unwrap()
            .l()
            .diagonal()
            .map(|v| v.ln())
            .sum()
            * 2.0;
        let lz = 2.0 * (2.0 * std::f64::consts::PI).ln() + 0.5 * log_det;
        assert_relative_eq!(g.log_z().unwrap(), lz, max_relative = 1e-12);
        let mut grad = [0.0; 4];
        assert!(g.grad_log_density(&x, &mut grad));
        let want = -(&prec * &r);
        for i in 0..4 {
            assert_relative_eq!(grad[i], want[i], max_relative = 1e-10);
        }
    }

    #[test]
    fn batch_density_is_bit_identical_to_pointwise() {
        // The batch path only interleaves points; each value must equal log_density exactly,
        // including the points of a partial last block.
        for d in [1usize, 2, 5, 10] {
            let g = Gaussian::new(d, &[0.3], &[0.7, 1.3].repeat(d)[..d], -0.4).unwrap();
            let n = 11;
            let x: Vec<f64> = (0..n * d)
                .map(|k| ((k * 37 % 23) as f64 - 11.0) / 5.0)
                .collect();
            let mut out = vec![0.0; n];
            g.log_density_batch(&x, &mut out);
            for (o, xi) in out.iter().zip(x.chunks_exact(d)) {
                assert_eq!(o.to_bits(), g.log_density(xi).to_bits());
            }
        }
    }

    #[test]
    fn one_dimensional_gradient() {
        // 1-d: d/dx of -(x - mu)^2 / (2 s^2) is -(x - mu) / s^2 (rho plays no role).
        let g = Gaussian::new(1, &[2.0], &[3.0], 0.5).unwrap();
        let mut grad = [0.0];
        g.grad_log_density(&[5.0], &mut grad);
        assert_relative_eq!(grad[0], -3.0 / 9.0, max_relative = 1e-14);
        assert_relative_eq!(g.log_density(&[5.0]), -0.5, max_relative = 1e-14);
    }
}
