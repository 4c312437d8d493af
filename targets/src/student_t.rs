//! `student-t`: a multivariate Student-t with isotropic scale, `Sigma = s^2 I`.
//!
//! `log_density(x) = -(nu + d)/2 log(1 + (x - mu)' Sigma^-1 (x - mu) / nu)` (unnormalised),
//! so `log_z = lnGamma(nu/2) + d/2 log(nu pi) + 1/2 log|Sigma| - lnGamma((nu + d)/2)` with
//! `1/2 log|Sigma| = d log s`. The mean `mu` exists for nu > 1 and the covariance
//! `nu / (nu - 2) Sigma` for nu > 2; otherwise they are `None`. Exact sampling:
//! `x = mu + s z / sqrt(w / nu)` with `z ~ N(0, I)` and `w ~ chi^2_nu`.
//!
//! With `covariance = [[...]]` instead of `scale`, Sigma is that full scale matrix (not the
//! covariance of the t, which is `nu / (nu - 2) Sigma`); the quadratic form, `log|Sigma|` and
//! draws `mu + L z / sqrt(w / nu)` go through its Cholesky factor L ([`crate::dense`]).
//!
//! Density, moments and the normal/chi-square representation: Kotz & Nadarajah (2004),
//! *Multivariate t Distributions and Their Applications*, Cambridge University Press, ch. 1.

use std::path::Path;

use nalgebra::DMatrix;
use rand::Rng;
use rand_distr::{ChiSquared, Distribution, StandardNormal};
use statrs::function::gamma::ln_gamma;

use crate::dense::{self, DenseCov};
use crate::error::ParamError;
use crate::params::{Params, broadcast, check_dim, check_each, check_finite, check_positive};
use crate::registry::STUDENT_T;
use crate::target::Target;

/// Config keys of the `student-t` family.
pub const KEYS: &[&str] = &["dim", "dof", "scale", "mean", "covariance"];

/// A multivariate Student-t `t_nu(mu, s^2 I)`.
#[derive(Debug, Clone)]
pub struct StudentT {
    label: String,
    dof: f64,
    scale: f64,
    loc: Vec<f64>,
    /// 1 / (nu s^2)
    inv_nu_s2: f64,
    /// (nu + d) / 2
    half_nu_d: f64,
    chi2: ChiSquared<f64>,
    log_z: f64,
    mean: Option<Vec<f64>>,
    cov: Option<DMatrix<f64>>,
    /// A full scale matrix given as `covariance` (then `scale` is unused by the density).
    dense: Option<DenseCov>,
}

impl StudentT {
    /// A Student-t in `dim >= 1` dimensions with `dof` nu > 0, isotropic `scale` s > 0 and
    /// location `mean` (one value, broadcast, or `dim` values). The label defaults to
    /// `student-t-<dim>`.
    pub fn new(dim: usize, dof: f64, scale: f64, mean: &[f64]) -> Result<Self, ParamError> {
        check_dim(STUDENT_T, dim, 1)?;
        check_positive(STUDENT_T, "dof", dof)?;
        check_positive(STUDENT_T, "scale", scale)?;
        check_each(STUDENT_T, "mean", mean, check_finite)?;
        let loc = broadcast(STUDENT_T, "mean", mean, dim)?;
        let d = dim as f64;
        let log_z =
            ln_gamma(0.5 * dof) + 0.5 * d * (dof * std::f64::consts::PI).ln() + d * scale.ln()
                - ln_gamma(0.5 * (dof + d));
        let mean = (dof > 1.0).then(|| loc.clone());
        let cov =
            (dof > 2.0).then(|| DMatrix::identity(dim, dim) * (dof / (dof - 2.0) * scale * scale));
        let chi2 = ChiSquared::new(dof).map_err(|e| ParamError::OutOfRange {
            family: STUDENT_T.to_string(),
            key: "dof".to_string(),
            value: dof.to_string(),
            allowed: format!("finite number > 0 ({e})"),
        })?;
        Ok(StudentT {
            label: format!("{STUDENT_T}-{dim}"),
            dof,
            scale,
            inv_nu_s2: 1.0 / (dof * scale * scale),
            half_nu_d: 0.5 * (dof + d),
            chi2,
            loc,
            log_z,
            mean,
            cov,
            dense: None,
        })
    }

    /// A Student-t with `dof` nu > 0, location `mean` (one value, broadcast, or `dim` values)
    /// and the full scale matrix `covariance` (symmetric positive definite; errors name the
    /// first offending entry or the failed factorisation).
    pub fn with_covariance(
        dof: f64,
        covariance: &DMatrix<f64>,
        mean: &[f64],
    ) -> Result<Self, ParamError> {
        let dim = covariance.nrows();
        let mut t = Self::new(dim, dof, 1.0, mean)?;
        let dense = DenseCov::new(STUDENT_T, "covariance", covariance)?;
        let d = dim as f64;
        t.log_z = ln_gamma(0.5 * dof)
            + 0.5 * d * (dof * std::f64::consts::PI).ln()
            + 0.5 * dense.log_det()
            - ln_gamma(0.5 * (dof + d));
        t.cov = (dof > 2.0).then(|| dense.matrix() * (dof / (dof - 2.0)));
        t.dense = Some(dense);
        Ok(t)
    }

    /// Set the label.
    pub fn with_label(mut self, label: impl Into<String>) -> Self {
        self.label = label.into();
        self
    }

    /// Build from a `[[target]]` table (keys [`KEYS`]; `dof` is required).
    pub fn from_table(
        table: &toml::Table,
        label: &str,
        _base_dir: &Path,
    ) -> Result<Self, ParamError> {
        let p = Params::new(table, STUDENT_T, KEYS)?;
        let dim = p.dim(1)?;
        let dof = p.f64_req("dof")?;
        dense::exclusive(&p, "covariance", &["scale"])?;
        if let Some(cov) = dense::read_matrix(&p, "covariance", dim)? {
            let mean = p.vec_or("mean", dim, 0.0)?;
            return Ok(Self::with_covariance(dof, &cov, &mean)?.with_label(label));
        }
        let scale = p.f64_or("scale", 1.0)?;
        let mean = p.vec_or("mean", dim, 0.0)?;
        Ok(Self::new(dim, dof, scale, &mean)?.with_label(label))
    }

    /// Degrees of freedom nu.
    pub fn dof(&self) -> f64 {
        self.dof
    }

    /// The full scale matrix, when the target was given one (`covariance`).
    pub fn dense(&self) -> Option<&DenseCov> {
        self.dense.as_ref()
    }

    /// Isotropic scale s.
    pub fn scale(&self) -> f64 {
        self.scale
    }

    /// Location mu (the mean when nu > 1).
    pub fn location(&self) -> &[f64] {
        &self.loc
    }
}

impl Target for StudentT {
    fn dim(&self) -> usize {
        self.loc.len()
    }

    fn log_density(&self, x: &[f64]) -> f64 {
        if let Some(c) = &self.dense {
            return -self.half_nu_d * (c.mahalanobis2(x, &self.loc) / self.dof).ln_1p();
        }
        let r2: f64 = x
            .iter()
            .zip(&self.loc)
            .map(|(a, b)| (a - b) * (a - b))
            .sum();
        -self.half_nu_d * (r2 * self.inv_nu_s2).ln_1p()
    }

    fn grad_log_density(&self, x: &[f64], grad: &mut [f64]) -> bool {
        if let Some(c) = &self.dense {
            // grad = -(nu + d) / (nu + delta) Sigma^-1 (x - mu)
            let delta = c.mahalanobis2(x, &self.loc);
            grad.iter_mut().for_each(|g| *g = 0.0);
            c.add_precision_times(
                x,
                &self.loc,
                -2.0 * self.half_nu_d / (self.dof + delta),
                grad,
            );
            return true;
        }
        let r2: f64 = x
            .iter()
            .zip(&self.loc)
            .map(|(a, b)| (a - b) * (a - b))
            .sum();
        let c = 2.0 * self.half_nu_d * self.inv_nu_s2 / (1.0 + r2 * self.inv_nu_s2);
        for ((g, &a), &b) in grad.iter_mut().zip(x).zip(&self.loc) {
            *g = -c * (a - b);
        }
        true
    }

    fn log_z(&self) -> Option<f64> {
        Some(self.log_z)
    }

    fn mean(&self) -> Option<&[f64]> {
        self.mean.as_deref()
    }

    fn covariance(&self) -> Option<&DMatrix<f64>> {
        self.cov.as_ref()
    }

    fn sample(&self, rng: &mut dyn Rng, out: &mut [f64]) -> bool {
        let w: f64 = self.chi2.sample(rng);
        let f = self.scale / (w / self.dof).sqrt();
        if let Some(c) = &self.dense {
            out.iter_mut()
                .for_each(|o| *o = StandardNormal.sample(&mut *rng));
            c.colour_in_place(out);
            for (o, &m) in out.iter_mut().zip(&self.loc) {
                *o = m + f * *o;
            }
            return true;
        }
        for (o, &m) in out.iter_mut().zip(&self.loc) {
            let z: f64 = StandardNormal.sample(rng);
            *o = m + f * z;
        }
        true
    }

    fn label(&self) -> &str {
        &self.label
    }

    fn family(&self) -> &str {
        STUDENT_T
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use approx::assert_relative_eq;

    fn build(s: &str) -> Result<StudentT, ParamError> {
        let t: toml::Table = s.parse().unwrap();
        StudentT::from_table(&t, "t", Path::new("."))
    }

    fn check(spec: &str, variant: &str, key: &str) {
        crate::params::assert_rejected(build(spec), spec, variant, key);
    }

    #[test]
    fn invalid_parameters() {
        check("dof = 3", "Missing", "dim");
        check("dim = 1", "Missing", "dof");
        check("dim = -1\ndof = 3", "OutOfRange", "dim");
        check("dim = 1\ndof = 0", "OutOfRange", "dof");
        check("dim = 1\ndof = -inf", "OutOfRange", "dof");
        check("dim = 1\ndof = '3'", "WrongType", "dof");
        check("dim = 1\ndof = 3\nscale = 0", "OutOfRange", "scale");
        check("dim = 1\ndof = 3\nscale = [1]", "WrongType", "scale");
        check(
            "dim = 2\ndof = 3\nmean = [1, 2, 3]",
            "LengthMismatch",
            "mean",
        );
        check("dim = 2\ndof = 3\nmean = [1, nan]", "OutOfRange", "mean[1]");
        check("dim = 2\ndf = 3", "UnknownKey", "df");
        match build("dim = 2\ndoff = 3") {
            Err(ParamError::UnknownKey { suggestion, .. }) => {
                assert_eq!(suggestion.as_deref(), Some("dof"))
            }
            other => panic!("{other:?}"),
        }
    }

    #[test]
    fn moments_exist_only_when_finite() {
        let t = StudentT::new(2, 1.0, 1.0, &[0.0]).unwrap();
        assert!(t.mean().is_none() && t.covariance().is_none());
        let t = StudentT::new(2, 2.0, 1.0, &[1.0]).unwrap();
        assert_eq!(t.mean(), Some(&[1.0, 1.0][..]));
        assert!(t.covariance().is_none());
        // Cov = nu / (nu - 2) s^2 I = 4/2 * 9 = 18 (Kotz & Nadarajah 2004, from memory).
        let t = StudentT::new(2, 4.0, 3.0, &[0.0]).unwrap();
        assert_relative_eq!(t.covariance().unwrap()[(1, 1)], 18.0, max_relative = 1e-14);
    }

    #[test]
    fn cauchy_normaliser() {
        // nu = 1, d = 1, s = 2: Cauchy with scale 2, integral of 1 / (1 + x^2/4) over R is
        // 2 arctan(inf) * 2 = 2 pi (elementary calculus).
        let t = StudentT::new(1, 1.0, 2.0, &[0.0]).unwrap();
        assert_relative_eq!(
            t.log_z().unwrap(),
            (2.0 * std::f64::consts::PI).ln(),
            max_relative = 1e-12
        );
        let mut g = [0.0];
        t.grad_log_density(&[0.8], &mut g);
        let h = 1e-6;
        let fd = (t.log_density(&[0.8 + h]) - t.log_density(&[0.8 - h])) / (2.0 * h);
        assert_relative_eq!(g[0], fd, max_relative = 1e-6);
    }
}
