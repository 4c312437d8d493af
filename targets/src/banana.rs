//! `banana`: the twisted Gaussian of Haario, Saksman & Tamminen (1999), "Adaptive proposal
//! distribution for random walk Metropolis algorithm", Computational Statistics 14, 375-395.
//!
//! With curvature `b` and spread `v`: `y1 = x1`, `y2 = x2 + b x1^2 - b v`, `y_i = x_i`
//! (i >= 3), and `y ~ N(0, diag(v, 1, ..., 1))`. The map x -> y has unit Jacobian, so
//! `log_density(x) = -1/2 (y1^2 / v + sum_{i>=2} y_i^2)` (unnormalised) has
//! `log_z = d/2 log 2pi + 1/2 log v`. Moments: mean 0 (E x2 = -b E x1^2 + b v = 0),
//! `Var x1 = v`, `Var x2 = 1 + b^2 Var(x1^2) = 1 + 2 b^2 v^2`, other variances 1, and all
//! covariances 0 (`Cov(x1, x2) = -b E x1^3 = 0`).

use std::path::Path;

use nalgebra::DMatrix;
use rand::Rng;
use rand_distr::{Distribution, StandardNormal};

use crate::error::ParamError;
use crate::params::{Params, check_dim, check_finite, check_positive};
use crate::registry::BANANA;
use crate::target::Target;

/// Config keys of the `banana` family.
pub const KEYS: &[&str] = &["dim", "curvature", "spread"];

/// The twisted ("banana") Gaussian.
#[derive(Debug, Clone)]
pub struct Banana {
    label: String,
    dim: usize,
    b: f64,
    v: f64,
    sqrt_v: f64,
    log_z: f64,
    mean: Vec<f64>,
    cov: DMatrix<f64>,
}

impl Banana {
    /// A banana of dimension `dim >= 2` with `curvature` b (any finite number) and `spread`
    /// v > 0 (the variance of x1). The label defaults to `banana-<dim>`.
    pub fn new(dim: usize, curvature: f64, spread: f64) -> Result<Self, ParamError> {
        check_dim(BANANA, dim, 2)?;
        check_finite(BANANA, "curvature", curvature)?;
        check_positive(BANANA, "spread", spread)?;
        let (b, v) = (curvature, spread);
        let log_z = 0.5 * dim as f64 * (2.0 * std::f64::consts::PI).ln() + 0.5 * v.ln();
        let mut cov = DMatrix::identity(dim, dim);
        cov[(0, 0)] = v;
        cov[(1, 1)] = 1.0 + 2.0 * b * b * v * v;
        Ok(Banana {
            label: format!("{BANANA}-{dim}"),
            dim,
            b,
            v,
            sqrt_v: v.sqrt(),
            log_z,
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
        let p = Params::new(table, BANANA, KEYS)?;
        let dim = p.dim(2)?;
        let b = p.f64_or("curvature", 0.1)?;
        let v = p.f64_or("spread", 100.0)?;
        Ok(Self::new(dim, b, v)?.with_label(label))
    }

    /// Curvature b.
    pub fn curvature(&self) -> f64 {
        self.b
    }

    /// Spread v (variance of x1).
    pub fn spread(&self) -> f64 {
        self.v
    }

    #[inline]
    fn y2(&self, x: &[f64]) -> f64 {
        x[1] + self.b * (x[0] * x[0] - self.v)
    }
}

impl Target for Banana {
    fn dim(&self) -> usize {
        self.dim
    }

    fn log_density(&self, x: &[f64]) -> f64 {
        let y2 = self.y2(x);
        let rest: f64 = x[2..].iter().map(|t| t * t).sum();
        -0.5 * (x[0] * x[0] / self.v + y2 * y2 + rest)
    }

    fn grad_log_density(&self, x: &[f64], grad: &mut [f64]) -> bool {
        let y2 = self.y2(x);
        grad[0] = -x[0] / self.v - 2.0 * self.b * x[0] * y2;
        grad[1] = -y2;
        for (g, &t) in grad[2..].iter_mut().zip(&x[2..]) {
            *g = -t;
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
        for o in out.iter_mut() {
            *o = StandardNormal.sample(rng);
        }
        let x1 = self.sqrt_v * out[0];
        out[0] = x1;
        out[1] -= self.b * (x1 * x1 - self.v);
        true
    }

    fn label(&self) -> &str {
        &self.label
    }

    fn family(&self) -> &str {
        BANANA
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use approx::assert_relative_eq;

    fn err(s: &str) -> ParamError {
        let t: toml::Table = s.parse().unwrap();
        Banana::from_table(&t, "b", Path::new(".")).unwrap_err()
    }

    #[test]
    fn invalid_parameters() {
        assert!(
            matches!(err("curvature = 1"), ParamError::Missing { ref key, .. } if key == "dim")
        );
        assert!(matches!(err("dim = 1"), ParamError::OutOfRange { ref key, .. } if key == "dim"));
        assert!(matches!(err("dim = 2.5"), ParamError::WrongType { ref key, .. } if key == "dim"));
        assert!(
            matches!(err("dim = 2\ncurvature = inf"), ParamError::OutOfRange { ref key, .. } if key == "curvature")
        );
        assert!(
            matches!(err("dim = 2\ncurvature = [1]"), ParamError::WrongType { ref key, .. } if key == "curvature")
        );
        assert!(
            matches!(err("dim = 2\nspread = 0"), ParamError::OutOfRange { ref key, .. } if key == "spread")
        );
        assert!(
            matches!(err("dim = 2\nspread = -3"), ParamError::OutOfRange { ref key, .. } if key == "spread")
        );
        match err("dim = 2\ncurvture = 0.1") {
            ParamError::UnknownKey {
                key, suggestion, ..
            } => {
                assert_eq!(key, "curvture");
                assert_eq!(suggestion.as_deref(), Some("curvature"));
            }
            other => panic!("{other:?}"),
        }
    }

    #[test]
    fn gradient_matches_finite_differences() {
        // Central differences, error O(h^2) (common practice).
        let t = Banana::new(3, 0.3, 4.0).unwrap();
        let x = [1.2, -0.7, 0.4];
        let mut g = [0.0; 3];
        assert!(t.grad_log_density(&x, &mut g));
        for i in 0..3 {
            let h = 1e-6;
            let mut a = x;
            let mut b = x;
            a[i] += h;
            b[i] -= h;
            let fd = (t.log_density(&a) - t.log_density(&b)) / (2.0 * h);
            assert_relative_eq!(g[i], fd, max_relative = 1e-6);
        }
    }

    #[test]
    fn defaults() {
        let t: toml::Table = "dim = 2".parse().unwrap();
        let b = Banana::from_table(&t, "b", Path::new(".")).unwrap();
        assert_eq!((b.curvature(), b.spread()), (0.1, 100.0));
        // Haario et al. 1999: Var x2 = 1 + 2 b^2 v^2 = 1 + 2 * 0.01 * 10^4 = 201.
        assert_relative_eq!(b.covariance().unwrap()[(1, 1)], 201.0, max_relative = 1e-14);
    }
}
