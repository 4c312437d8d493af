//! The [`Target`] trait: one analytic (or user-supplied) distribution to sample.

use nalgebra::DMatrix;
use rand::Rng;

/// A diagonal Gaussian, used as the reference (starting) distribution of a tempered path
/// when a target has a natural one, e.g. the prior of a Bayesian model.
#[derive(Debug, Clone, PartialEq)]
pub struct DiagGaussian {
    /// Mean vector.
    pub mean: Vec<f64>,
    /// Marginal standard deviations, all > 0.
    pub sd: Vec<f64>,
}

/// A distribution known through its (possibly unnormalised) log density, with whatever exact
/// reference values are known about it.
///
/// Conventions:
/// * `log_density` may be unnormalised; `log_z` is then the log of the integral of
///   `exp(log_density)` over R^d, so that the normalised density is `exp(log_density - log_z)`.
/// * `log_density` may return `-inf` (outside the support) or any non-finite value; callers
///   treat non-finite values as data, never as a reason to panic.
/// * Reference values are `None` where they do not exist (e.g. the covariance of a Student-t with
///   `dof <= 2`) or are not known (a user's own model).
///
/// # Example
///
/// A user's own model: an (invented) one-parameter posterior known only through its log density.
///
/// ```
/// use assay_targets::Target;
///
/// /// Log-posterior of a rate lambda = exp(x) given 3 invented event counts, Exp(1) prior on
/// /// lambda, written in x = log lambda (Jacobian included).
/// struct EventRate;
///
/// impl Target for EventRate {
///     fn dim(&self) -> usize { 1 }
///     fn log_density(&self, x: &[f64]) -> f64 {
///         let (counts, lambda) = (4.0 + 2.0 + 5.0, x[0].exp());
///         counts * x[0] - 3.0 * lambda - lambda + x[0]
///     }
///     fn label(&self) -> &str { "event-rate" }
///     fn family(&self) -> &str { "event-rate" }
/// }
///
/// let t = EventRate;
/// let mut out = [0.0; 2];
/// t.log_density_batch(&[0.0, 1.0], &mut out); // the default batch method
/// assert_eq!(out[0], t.log_density(&[0.0]));
/// assert!(t.mean().is_none()); // unknown by default: a study scores it against a [reference] run
/// ```
pub trait Target: Send + Sync {
    /// Dimension d of the state space.
    fn dim(&self) -> usize;

    /// Log of the (possibly unnormalised) density at `x` (`x.len() == dim()`).
    fn log_density(&self, x: &[f64]) -> f64;

    /// Log densities of `out.len()` points stored row by row in `points`
    /// (`points.len() == out.len() * dim()`). The default evaluates one point at a time;
    /// targets that can vectorise, or that live in another process, override it.
    fn log_density_batch(&self, points: &[f64], out: &mut [f64]) {
        let d = self.dim();
        for (x, o) in points.chunks_exact(d).zip(out.iter_mut()) {
            *o = self.log_density(x);
        }
    }

    /// As [`Target::log_density_batch`], for targets whose evaluation can break (e.g. a model
    /// living in another process): an `Err` means the evaluator itself failed, and the run that
    /// asked must end as failed with that reason. Non-finite densities are not errors.
    fn try_log_density_batch(&self, points: &[f64], out: &mut [f64]) -> Result<(), String> {
        self.log_density_batch(points, out);
        Ok(())
    }

    /// Gradient of `log_density` at `x`, written into `grad`. Returns `false` (and leaves
    /// `grad` unspecified) when the target offers no gradient.
    fn grad_log_density(&self, _x: &[f64], _grad: &mut [f64]) -> bool {
        false
    }

    /// Log normalising constant: log of the integral of `exp(log_density)`. Unknown (`None`)
    /// unless the target says otherwise.
    fn log_z(&self) -> Option<f64> {
        None
    }

    /// Mean vector of the normalised distribution, when it exists and is known.
    fn mean(&self) -> Option<&[f64]> {
        None
    }

    /// Covariance matrix of the normalised distribution, when it exists and is known.
    fn covariance(&self) -> Option<&DMatrix<f64>> {
        None
    }

    /// Draw one exact iid sample into `out` (`out.len() == dim()`). Returns `false` when the
    /// target has no exact sampler (e.g. a user's own model).
    fn sample(&self, _rng: &mut dyn Rng, _out: &mut [f64]) -> bool {
        false
    }

    /// A short unique label, e.g. `"corr-gauss-10"`.
    fn label(&self) -> &str;

    /// The family name as used in study files, e.g. `"gaussian"`.
    fn family(&self) -> &str;

    /// A natural reference distribution for tempering (e.g. a prior), when the target has one.
    fn tempering_reference(&self) -> Option<&DiagGaussian> {
        None
    }

    /// The data a target was built from (design matrix rows and response), when it has any.
    fn data(&self) -> Option<(&DMatrix<f64>, &[f64])> {
        None
    }
}
