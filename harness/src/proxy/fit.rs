//! Weighted moments of a pilot, the Gaussian fit, a Gaussian density by its Cholesky factor
//! (nalgebra), and the Bayesian information criterion shared by the three fits.
//!
//! Weights are normalised to sum to 1; a weighted log-likelihood is `n_e sum_i w_i log p(x_i)`
//! with `n_e` the Kish effective sample size `1 / sum w_i^2` (Kish 1965, *Survey Sampling*,
//! Wiley), which is n for an unweighted pilot. BIC = `-2 log L + k log n_e` (Schwarz 1978,
//! "Estimating the dimension of a model", Annals of Statistics 6(2)); lower is better.

use nalgebra::{DMatrix, DVector};

use super::csv::Pilot;

const LN_2PI: f64 = 1.837_877_066_409_345_5;

/// `sum_i c_i x_i` with coefficients `c(i)`.
pub fn sum_with(p: &Pilot, c: impl Fn(usize) -> f64) -> DVector<f64> {
    let mut m = DVector::zeros(p.dim());
    for i in 0..p.rows() {
        let ci = c(i);
        for (j, &v) in p.row(i).iter().enumerate() {
            m[j] += ci * v;
        }
    }
    m
}

/// `sum_i c_i (x_i - m)(x_i - m)'` with coefficients `c(i)`, exactly symmetric.
pub fn scatter_with(p: &Pilot, m: &DVector<f64>, c: impl Fn(usize) -> f64) -> DMatrix<f64> {
    let d = p.dim();
    let mut s = DMatrix::zeros(d, d);
    let mut r = vec![0.0; d];
    for i in 0..p.rows() {
        let ci = c(i);
        for (j, &v) in p.row(i).iter().enumerate() {
            r[j] = v - m[j];
        }
        for a in 0..d {
            for b in 0..=a {
                s[(a, b)] += ci * r[a] * r[b];
            }
        }
    }
    mirror_lower(&mut s);
    s
}

/// Weighted mean `sum_i w_i x_i`.
pub fn weighted_mean(p: &Pilot) -> DVector<f64> {
    sum_with(p, |i| p.w[i])
}

/// Weighted scatter `sum_i w_i (x_i - m)(x_i - m)'` about `m` (the maximum-likelihood
/// covariance when `m` is the weighted mean).
pub fn weighted_scatter(p: &Pilot, m: &DVector<f64>) -> DMatrix<f64> {
    scatter_with(p, m, |i| p.w[i])
}

/// Copy the lower triangle onto the upper one.
pub fn mirror_lower(s: &mut DMatrix<f64>) {
    for a in 0..s.nrows() {
        for b in 0..a {
            s[(b, a)] = s[(a, b)];
        }
    }
}

/// A Gaussian density `N(mean, cov)` through the Cholesky factor of `cov`.
#[derive(Debug, Clone)]
pub struct Mvn {
    /// Mean.
    pub mean: DVector<f64>,
    /// Covariance.
    pub cov: DMatrix<f64>,
    l: DMatrix<f64>,
    /// `-d/2 log 2pi - 1/2 log|cov|`
    log_norm: f64,
}

impl Mvn {
    /// `None` when `cov` is not numerically positive definite.
    pub fn new(mean: DVector<f64>, cov: DMatrix<f64>) -> Option<Mvn> {
        let l = cov.clone().cholesky()?.l();
        let log_det = 2.0 * l.diagonal().iter().map(|v| v.ln()).sum::<f64>();
        if !log_det.is_finite() {
            return None;
        }
        let log_norm = -0.5 * (mean.len() as f64 * LN_2PI + log_det);
        Some(Mvn {
            mean,
            cov,
            l,
            log_norm,
        })
    }

    /// `log |cov|`.
    pub fn log_det(&self) -> f64 {
        -2.0 * self.log_norm - self.mean.len() as f64 * LN_2PI
    }

    /// `(x - mean)' cov^-1 (x - mean)` by forward substitution; `z` is scratch of length d.
    pub fn mahalanobis2(&self, x: &[f64], z: &mut [f64]) -> f64 {
        let d = self.mean.len();
        let mut q = 0.0;
        for i in 0..d {
            let mut s = x[i] - self.mean[i];
            for (k, zk) in z.iter().enumerate().take(i) {
                s -= self.l[(i, k)] * zk;
            }
            z[i] = s / self.l[(i, i)];
            q += z[i] * z[i];
        }
        q
    }

    /// Log density at x; `z` is scratch of length d.
    pub fn log_pdf(&self, x: &[f64], z: &mut [f64]) -> f64 {
        self.log_norm - 0.5 * self.mahalanobis2(x, z)
    }
}

/// BIC of a fit with weighted mean log-likelihood `mean_ll` (= `sum_i w_i log p(x_i)`) and
/// `k` free parameters, on a pilot of Kish ESS `n_e`.
pub fn bic(mean_ll: f64, k: usize, n_e: f64) -> f64 {
    -2.0 * n_e * mean_ll + k as f64 * n_e.ln()
}

/// Free parameters of a d-dimensional Gaussian: d means and d(d+1)/2 covariances.
pub fn gaussian_params(d: usize) -> usize {
    d + d * (d + 1) / 2
}

/// The Gaussian proxy of a pilot.
#[derive(Debug, Clone)]
pub struct GaussianFit {
    /// Weighted mean.
    pub mean: DVector<f64>,
    /// Weighted covariance with the reliability-weights correction `1 / (1 - sum w_i^2)`,
    /// i.e. the usual n - 1 divisor for an unweighted pilot (the estimator that NumPy's
    /// `cov(..., aweights=w)` computes; common practice).
    pub cov: DMatrix<f64>,
    /// Weighted mean log-likelihood at the maximum-likelihood fit (divisor 1).
    pub mean_ll: f64,
    /// BIC of the maximum-likelihood fit.
    pub bic: f64,
}

/// Fit a Gaussian by its weighted moments. Errors when the covariance is singular (columns
/// that are linear combinations of others).
pub fn fit_gaussian(p: &Pilot) -> Result<GaussianFit, String> {
    let d = p.dim();
    let mean = weighted_mean(p);
    let ml = weighted_scatter(p, &mean);
    let sum_w2: f64 = p.w.iter().map(|w| w * w).sum();
    let cov = &ml / (1.0 - sum_w2);
    let mvn = Mvn::new(mean.clone(), ml).ok_or_else(|| {
        format!(
            "the pilot's covariance of its {d} columns is singular (not positive definite): \
             some column is (nearly) a linear combination of the others; drop it"
        )
    })?;
    // At the maximum-likelihood covariance sum_i w_i delta_i = d exactly, so the mean
    // log-likelihood is -1/2 (d log 2pi + log|S| + d) (Mardia, Kent & Bibby 1979,
    // *Multivariate Analysis*, section 4.2; common practice).
    let mean_ll = -0.5 * (d as f64 * LN_2PI + mvn.log_det() + d as f64);
    let bic = bic(mean_ll, gaussian_params(d), p.kish_ess());
    Ok(GaussianFit {
        mean,
        cov,
        mean_ll,
        bic,
    })
}

/// Weighted skewness and excess kurtosis of column j: `m3 / m2^1.5` and `m4 / m2^2 - 3` with
/// weighted central moments (the moment coefficients; Joanes & Gill 1998, "Comparing
/// measures of sample skewness and kurtosis", The Statistician 47, their g1 and g2).
pub fn shape_of_column(p: &Pilot, j: usize, mean: f64) -> (f64, f64) {
    let (mut m2, mut m3, mut m4) = (0.0, 0.0, 0.0);
    for i in 0..p.rows() {
        let r = p.row(i)[j] - mean;
        let r2 = r * r;
        m2 += p.w[i] * r2;
        m3 += p.w[i] * r2 * r;
        m4 += p.w[i] * r2 * r2;
    }
    (m3 / m2.powf(1.5), m4 / (m2 * m2) - 3.0)
}
