//! `funnel`: Neal's funnel (Neal 2003, "Slice sampling", Annals of Statistics 31, 705-767).
//!
//! `v = x1 ~ N(0, sigma^2)` and `x_i | v ~ N(0, e^v)` for i = 2..d. The log density is the
//! normalised one, so `log_z = 0`. Moments: mean 0, `Var x1 = sigma^2`,
//! `Var x_i = E e^v = e^(sigma^2 / 2)`, all covariances 0.

use std::path::Path;

use nalgebra::DMatrix;
use rand::Rng;
use rand_distr::{Distribution, StandardNormal};

use crate::error::ParamError;
use crate::params::{Params, check_dim, check_positive};
use crate::registry::FUNNEL;
use crate::target::Target;

/// Config keys of the `funnel` family.
pub const KEYS: &[&str] = &["dim", "sigma"];

const LN_2PI: f64 = 1.837_877_066_409_345_5;

/// Neal's funnel.
#[derive(Debug, Clone)]
pub struct Funnel {
    label: String,
    dim: usize,
    sigma: f64,
    inv_var: f64,
    /// Constant part of the log density: -1/2 log(2 pi sigma^2) - (d-1)/2 log 2pi.
    c: f64,
    mean: Vec<f64>,
    cov: DMatrix<f64>,
}

impl Funnel {
    /// A funnel of dimension `dim >= 2` with `sigma > 0`. The label defaults to `funnel-<dim>`.
    pub fn new(dim: usize, sigma: f64) -> Result<Self, ParamError> {
        check_dim(FUNNEL, dim, 2)?;
        check_positive(FUNNEL, "sigma", sigma)?;
        let mut cov = DMatrix::from_element(dim, dim, 0.0);
        cov[(0, 0)] = sigma * sigma;
        let vx = (0.5 * sigma * sigma).exp();
        for i in 1..dim {
            cov[(i, i)] = vx;
        }
        Ok(Funnel {
            label: format!("{FUNNEL}-{dim}"),
            dim,
            sigma,
            inv_var: 1.0 / (sigma * sigma),
            c: -0.5 * LN_2PI - sigma.ln() - 0.5 * (dim as f64 - 1.0) * LN_2PI,
            mean: vec![0.0; dim],
            cov,
        })
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
        let p = Params::new(table, FUNNEL, KEYS)?;
        let dim = p.dim(2)?;
        let sigma = p.f64_or("sigma", 3.0)?;
        Ok(Self::new(dim, sigma)?.with_label(label))
    }

    /// Standard deviation of x1.
    pub fn sigma(&self) -> f64 {
        self.sigma
    }
}

impl Target for Funnel {
    fn dim(&self) -> usize {
        self.dim
    }

    fn log_density(&self, x: &[f64]) -> f64 {
        let v = x[0];
        let ss: f64 = x[1..].iter().map(|t| t * t).sum();
        self.c
            - 0.5 * v * v * self.inv_var
            - 0.5 * ss * (-v).exp()
            - 0.5 * (self.dim as f64 - 1.0) * v
    }

    fn grad_log_density(&self, x: &[f64], grad: &mut [f64]) -> bool {
        let v = x[0];
        let prec = (-v).exp();
        let mut ss = 0.0;
        for (g, &t) in grad[1..].iter_mut().zip(&x[1..]) {
            ss += t * t;
            *g = -t * prec;
        }
        grad[0] = -v * self.inv_var + 0.5 * ss * prec - 0.5 * (self.dim as f64 - 1.0);
        true
    }

    fn log_z(&self) -> Option<f64> {
        Some(0.0)
    }

    fn mean(&self) -> Option<&[f64]> {
        Some(&self.mean)
    }

    fn covariance(&self) -> Option<&DMatrix<f64>> {
        Some(&self.cov)
    }

    fn sample(&self, rng: &mut dyn Rng, out: &mut [f64]) -> bool {
        let z: f64 = StandardNormal.sample(rng);
        let v = self.sigma * z;
        let sd = (0.5 * v).exp();
        out[0] = v;
        for o in out[1..].iter_mut() {
            let e: f64 = StandardNormal.sample(rng);
            *o = sd * e;
        }
        true
    }

    fn label(&self) -> &str {
        &self.label
    }

    fn family(&self) -> &str {
        FUNNEL
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use approx::assert_relative_eq;

    fn err(s: &str) -> ParamError {
        let t: toml::Table = s.parse().unwrap();
        Funnel::from_table(&t, "f", Path::new(".")).unwrap_err()
    }

    #[test]
    fn invalid_parameters() {
        assert!(matches!(err("sigma = 1"), ParamError::Missing { ref key, .. } if key == "dim"));
        assert!(matches!(err("dim = 1"), ParamError::OutOfRange { ref key, .. } if key == "dim"));
        assert!(matches!(err("dim = '3'"), ParamError::WrongType { ref key, .. } if key == "dim"));
        assert!(
            matches!(err("dim = 2\nsigma = 0"), ParamError::OutOfRange { ref key, .. } if key == "sigma")
        );
        assert!(
            matches!(err("dim = 2\nsigma = nan"), ParamError::OutOfRange { ref key, .. } if key == "sigma")
        );
        assert!(
            matches!(err("dim = 2\nsigma = 'big'"), ParamError::WrongType { ref key, .. } if key == "sigma")
        );
        match err("dim = 2\nsgima = 1") {
            ParamError::UnknownKey { suggestion, .. } => {
                assert_eq!(suggestion.as_deref(), Some("sigma"))
            }
            other => panic!("{other:?}"),
        }
    }

    #[test]
    fn density_is_normalised_product() {
        // Neal 2003: N(v; 0, sigma^2) prod_i N(x_i; 0, e^v), written out by hand; gradient by
        // central differences (common practice).
        let f = Funnel::new(3, 1.5).unwrap();
        let x = [0.7, -0.4, 1.1];
        let norm = |x: f64, sd: f64| -0.5 * (x / sd).powi(2) - sd.ln() - 0.5 * LN_2PI;
        let sd = (0.5f64 * 0.7).exp();
        let want = norm(0.7, 1.5) + norm(-0.4, sd) + norm(1.1, sd);
        assert_relative_eq!(f.log_density(&x), want, max_relative = 1e-13);
        let mut g = [0.0; 3];
        f.grad_log_density(&x, &mut g);
        for i in 0..3 {
            let h = 1e-6;
            let (mut a, mut b) = (x, x);
            a[i] += h;
            b[i] -= h;
            let fd = (f.log_density(&a) - f.log_density(&b)) / (2.0 * h);
            assert_relative_eq!(g[i], fd, max_relative = 1e-6);
        }
    }
}
