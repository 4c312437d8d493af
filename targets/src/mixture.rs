//! `mixture`: a finite mixture of isotropic Gaussians, `sum_k w_k N(x; mu_k, s_k^2 I)`.
//!
//! The components are normalised densities and the weights need not sum to 1, so
//! `log_z = log sum_k w_k`. With `pi_k = w_k / sum w`, the mean is `sum_k pi_k mu_k` and the
//! covariance follows from the law of total variance:
//! `Cov = sum_k pi_k (s_k^2 I + mu_k mu_k') - mean mean'`. The density uses a streaming
//! log-sum-exp over the components (no allocation; common practice).
//!
//! A component may give `covariance = [[...]]` instead of `scale`: it is then `N(mu_k,
//! Sigma_k)` with that full matrix, its normaliser uses `log|Sigma_k|` from the Cholesky
//! factor ([`crate::dense`]), and `Sigma_k` replaces `s_k^2 I` in the law of total variance.

use std::path::Path;

use nalgebra::{DMatrix, DVector};
use rand::Rng;
use rand_distr::{Distribution, StandardNormal, StandardUniform};

use crate::dense::{self, DenseCov};
use crate::error::ParamError;
use crate::params::{Params, broadcast, check_dim, check_finite, check_positive};
use crate::registry::MIXTURE;
use crate::target::Target;

/// Config keys of the `mixture` family.
pub const KEYS: &[&str] = &["dim", "components"];

/// Config keys of one entry of `components`.
pub const COMPONENT_KEYS: &[&str] = &["weight", "mean", "scale", "covariance"];

const LN_2PI: f64 = 1.837_877_066_409_345_5;

/// One mixture component `w N(mu, s^2 I)`.
#[derive(Debug, Clone, PartialEq)]
pub struct MixtureComponent {
    /// Unnormalised weight w > 0.
    pub weight: f64,
    /// Mean vector of length `dim`.
    pub mean: Vec<f64>,
    /// Isotropic standard deviation s > 0.
    pub scale: f64,
}

/// A mixture of isotropic Gaussians.
#[derive(Debug, Clone)]
pub struct Mixture {
    label: String,
    dim: usize,
    components: Vec<MixtureComponent>,
    /// Component means, row k at `k * dim`.
    means: Vec<f64>,
    /// log w_k - d/2 log(2 pi s_k^2)
    log_c: Vec<f64>,
    /// 1 / s_k^2
    inv_var: Vec<f64>,
    /// Full covariances of the components that have one.
    dense: Vec<Option<DenseCov>>,
    /// Cumulative normalised weights, for sampling.
    cum: Vec<f64>,
    log_z: f64,
    mean: Vec<f64>,
    cov: DMatrix<f64>,
}

impl Mixture {
    /// A mixture in `dim >= 1` dimensions of at least one component. Errors name the
    /// component as `components[k].key` (k from 0). The label defaults to `mixture-<dim>`.
    pub fn new(dim: usize, components: Vec<MixtureComponent>) -> Result<Self, ParamError> {
        let none = vec![None; components.len()];
        Self::with_covariances(dim, components, none)
    }

    /// Like [`Mixture::new`], where component k with `covariances[k] = Some(Sigma_k)` is
    /// `N(mu_k, Sigma_k)` (its `scale` is then unused); errors name `components[k].covariance`
    /// and the first offending entry or the failed factorisation.
    pub fn with_covariances(
        dim: usize,
        components: Vec<MixtureComponent>,
        covariances: Vec<Option<DMatrix<f64>>>,
    ) -> Result<Self, ParamError> {
        check_dim(MIXTURE, dim, 1)?;
        if components.is_empty() {
            return Err(ParamError::OutOfRange {
                family: MIXTURE.to_string(),
                key: "components".to_string(),
                value: "[]".to_string(),
                allowed: "at least one component".to_string(),
            });
        }
        for (k, c) in components.iter().enumerate() {
            check_positive(MIXTURE, &format!("components[{k}].weight"), c.weight)?;
            check_positive(MIXTURE, &format!("components[{k}].scale"), c.scale)?;
            crate::params::check_len(MIXTURE, &format!("components[{k}].mean"), c.mean.len(), dim)?;
            for (i, &m) in c.mean.iter().enumerate() {
                check_finite(MIXTURE, &format!("components[{k}].mean[{i}]"), m)?;
            }
        }
        crate::params::check_len(MIXTURE, "covariances", covariances.len(), components.len())?;
        let mut dense = Vec::with_capacity(components.len());
        for (k, c) in covariances.iter().enumerate() {
            let key = format!("components[{k}].covariance");
            dense.push(match c {
                None => None,
                Some(m) => {
                    crate::params::check_len(MIXTURE, &key, m.nrows(), dim)?;
                    Some(DenseCov::new(MIXTURE, &key, m)?)
                }
            });
        }
        let total: f64 = components.iter().map(|c| c.weight).sum();
        let d = dim as f64;
        let means: Vec<f64> = components.iter().flat_map(|c| c.mean.clone()).collect();
        let log_c = components
            .iter()
            .zip(&dense)
            .map(|(c, f)| {
                let half_log_det = f.as_ref().map_or(d * c.scale.ln(), |f| 0.5 * f.log_det());
                c.weight.ln() - 0.5 * d * LN_2PI - half_log_det
            })
            .collect();
        let inv_var = components
            .iter()
            .map(|c| 1.0 / (c.scale * c.scale))
            .collect();
        let mut cum = Vec::with_capacity(components.len());
        let mut acc = 0.0;
        for c in &components {
            acc += c.weight / total;
            cum.push(acc);
        }
        // Law of total variance: E[x x'] - E[x] E[x]'.
        let mut m = DVector::zeros(dim);
        let mut second = DMatrix::zeros(dim, dim);
        for (c, f) in components.iter().zip(&dense) {
            let pi = c.weight / total;
            let mu = DVector::from_column_slice(&c.mean);
            m += pi * &mu;
            second += pi * (&mu * mu.transpose());
            match f {
                Some(f) => second += pi * f.matrix(),
                None => {
                    for i in 0..dim {
                        second[(i, i)] += pi * c.scale * c.scale;
                    }
                }
            }
        }
        let mut cov = second - &m * m.transpose();
        // symmetrise rounding
        cov = 0.5 * (&cov + cov.transpose());
        Ok(Mixture {
            label: format!("{MIXTURE}-{dim}"),
            dim,
            means,
            log_c,
            inv_var,
            dense,
            cum,
            log_z: total.ln(),
            mean: m.iter().copied().collect(),
            cov,
            components,
        })
    }

    /// Set the label.
    pub fn with_label(mut self, label: impl Into<String>) -> Self {
        self.label = label.into();
        self
    }

    /// Build from a `[[target]]` table (keys [`KEYS`]; each component has keys
    /// [`COMPONENT_KEYS`], `weight` and `scale` defaulting to 1, `mean` required as a number
    /// (broadcast) or an array of `dim` numbers).
    pub fn from_table(
        table: &toml::Table,
        label: &str,
        _base_dir: &Path,
    ) -> Result<Self, ParamError> {
        let p = Params::new(table, MIXTURE, KEYS)?;
        let dim = p.dim(1)?;
        let tables = p
            .tables_opt("components")?
            .ok_or_else(|| p.missing("components"))?;
        let prefixes: Vec<String> = (0..tables.len())
            .map(|k| format!("components[{k}]."))
            .collect();
        let mut components = Vec::with_capacity(tables.len());
        let mut covariances = Vec::with_capacity(tables.len());
        for (t, prefix) in tables.iter().zip(&prefixes) {
            let c = Params::with_prefix(t, MIXTURE, prefix, COMPONENT_KEYS)?;
            if !c.has("mean") {
                return Err(c.missing("mean"));
            }
            dense::exclusive(&c, "covariance", &["scale"])?;
            covariances.push(dense::read_matrix(&c, "covariance", dim)?);
            components.push(MixtureComponent {
                weight: c.f64_or("weight", 1.0)?,
                mean: broadcast(MIXTURE, &c.key("mean"), &c.vec_or("mean", dim, 0.0)?, dim)?,
                scale: c.f64_or("scale", 1.0)?,
            });
        }
        Ok(Self::with_covariances(dim, components, covariances)?.with_label(label))
    }

    /// The components as given.
    pub fn components(&self) -> &[MixtureComponent] {
        &self.components
    }

    /// Log of component k's weighted density at x.
    #[inline]
    fn term(&self, k: usize, x: &[f64]) -> f64 {
        let mu = &self.means[k * self.dim..(k + 1) * self.dim];
        if let Some(f) = &self.dense[k] {
            return self.log_c[k] - 0.5 * f.mahalanobis2(x, mu);
        }
        let r2: f64 = x.iter().zip(mu).map(|(a, b)| (a - b) * (a - b)).sum();
        self.log_c[k] - 0.5 * r2 * self.inv_var[k]
    }
}

impl Target for Mixture {
    fn dim(&self) -> usize {
        self.dim
    }

    fn log_density(&self, x: &[f64]) -> f64 {
        // Streaming log-sum-exp.
        let mut m = f64::NEG_INFINITY;
        let mut s = 0.0;
        for k in 0..self.log_c.len() {
            let t = self.term(k, x);
            if t.is_nan() {
                return f64::NAN;
            }
            if t > m {
                s = s * (m - t).exp() + 1.0;
                m = t;
            } else if t > f64::NEG_INFINITY {
                s += (t - m).exp();
            }
        }
        if m == f64::NEG_INFINITY {
            return m;
        }
        m + s.ln()
    }

    fn grad_log_density(&self, x: &[f64], grad: &mut [f64]) -> bool {
        let l = self.log_density(x);
        grad.iter_mut().for_each(|g| *g = 0.0);
        if !l.is_finite() {
            return true;
        }
        for k in 0..self.log_c.len() {
            let r = (self.term(k, x) - l).exp();
            let mu = &self.means[k * self.dim..(k + 1) * self.dim];
            if let Some(f) = &self.dense[k] {
                f.add_precision_times(x, mu, -r, grad);
                continue;
            }
            let c = r * self.inv_var[k];
            for ((g, &xi), &mi) in grad.iter_mut().zip(x).zip(mu) {
                *g -= c * (xi - mi);
            }
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
        let u: f64 = StandardUniform.sample(rng);
        let k = self
            .cum
            .iter()
            .position(|&c| u < c)
            .unwrap_or(self.cum.len() - 1);
        let s = self.components[k].scale;
        let mu = &self.means[k * self.dim..(k + 1) * self.dim];
        if let Some(f) = &self.dense[k] {
            out.iter_mut()
                .for_each(|o| *o = StandardNormal.sample(&mut *rng));
            f.colour_in_place(out);
            out.iter_mut().zip(mu).for_each(|(o, m)| *o += m);
            return true;
        }
        for (o, &m) in out.iter_mut().zip(mu) {
            let z: f64 = StandardNormal.sample(rng);
            *o = m + s * z;
        }
        true
    }

    fn label(&self) -> &str {
        &self.label
    }

    fn family(&self) -> &str {
        MIXTURE
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use approx::assert_relative_eq;

    fn build(s: &str) -> Result<Mixture, ParamError> {
        let t: toml::Table = s.parse().unwrap();
        Mixture::from_table(&t, "m", Path::new("."))
    }

    fn check(spec: &str, variant: &str, key: &str) {
        crate::params::assert_rejected(build(spec), spec, variant, key);
    }

    #[test]
    fn invalid_parameters() {
        check("components = [{ mean = 0 }]", "Missing", "dim");
        check("dim = 0\ncomponents = [{ mean = 0 }]", "OutOfRange", "dim");
        check("dim = 1", "Missing", "components");
        check("dim = 1\ncomponents = []", "OutOfRange", "components");
        check("dim = 1\ncomponents = 3", "WrongType", "components");
        check("dim = 1\ncomponents = [3]", "WrongType", "components[0]");
        check(
            "dim = 1\ncomponents = [{ weight = 1 }]",
            "Missing",
            "components[0].mean",
        );
        check(
            "dim = 1\ncomponents = [{ mean = 0 }, { mean = 1, weight = 0 }]",
            "OutOfRange",
            "components[1].weight",
        );
        check(
            "dim = 1\ncomponents = [{ mean = 0, scale = -1 }]",
            "OutOfRange",
            "components[0].scale",
        );
        check(
            "dim = 2\ncomponents = [{ mean = [0, 1, 2] }]",
            "LengthMismatch",
            "components[0].mean",
        );
        check(
            "dim = 2\ncomponents = [{ mean = [0, inf] }]",
            "OutOfRange",
            "components[0].mean[1]",
        );
        check(
            "dim = 1\ncomponents = [{ mean = 0, wieght = 2 }]",
            "UnknownKey",
            "components[0].wieght",
        );
        check("dim = 1\ncomponent = []", "UnknownKey", "component");
        match build("dim = 1\ncomponents = [{ mean = 0, wieght = 2 }]") {
            Err(ParamError::UnknownKey { suggestion, .. }) => {
                assert_eq!(suggestion.as_deref(), Some("weight"))
            }
            other => panic!("{other:?}"),
        }
    }

    #[test]
    fn density_far_from_all_components_is_finite() {
        // Far in the tail the nearest component dominates: log(3 N(1000; 1, 1)); exp of the
        // terms would underflow without log-sum-exp. log_z = log(1 + 3).
        let m = build("dim = 1\ncomponents = [{ mean = -1 }, { mean = 1, weight = 3 }]").unwrap();
        let x = [1e3];
        let want = 3f64.ln() - 0.5 * LN_2PI - 0.5 * (1e3f64 - 1.0).powi(2);
        assert_relative_eq!(m.log_density(&x), want, max_relative = 1e-12);
        assert_relative_eq!(m.log_z().unwrap(), 4f64.ln(), max_relative = 1e-14);
        let mut g = [0.0];
        m.grad_log_density(&[0.3], &mut g);
        let h = 1e-6;
        let fd = (m.log_density(&[0.3 + h]) - m.log_density(&[0.3 - h])) / (2.0 * h);
        assert_relative_eq!(g[0], fd, max_relative = 1e-6);
    }
}
