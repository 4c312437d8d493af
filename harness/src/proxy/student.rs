//! Maximum-likelihood fit of a multivariate Student-t `t_nu(mu, Sigma)` to a (weighted)
//! pilot by the ECME algorithm of Liu & Rubin (1995), "ML estimation of the t distribution
//! using EM and its extensions, ECM and ECME", Statistica Sinica 5, 19-39: the EM steps for
//! `mu` and `Sigma` given the latent scales (Lange, Little & Taylor 1989, JASA 84, the same
//! updates), then a conditional maximisation of the actual log-likelihood over `nu` alone, in
//! one dimension (a grid over log nu, refined by golden-section search; Kiefer 1953).

use nalgebra::{DMatrix, DVector};

use statrs::function::gamma::ln_gamma;

use super::csv::Pilot;
use super::fit::{GaussianFit, Mvn, bic, gaussian_params, scatter_with, sum_with};

/// Range of the degrees of freedom searched. At the upper end the t is a Gaussian for every
/// purpose here; below 0.5 no pilot of a useful size pins nu down.
pub const DOF_RANGE: (f64, f64) = (0.5, 1000.0);

const MAX_ITER: usize = 500;
const TOL: f64 = 1e-10;

/// A fitted Student-t.
#[derive(Debug, Clone)]
pub struct StudentFit {
    /// Location mu.
    pub loc: DVector<f64>,
    /// Scale matrix Sigma (the covariance is `nu / (nu - 2) Sigma` for nu > 2).
    pub scale: DMatrix<f64>,
    /// Degrees of freedom nu.
    pub dof: f64,
    /// Weighted mean log-likelihood.
    pub mean_ll: f64,
    /// BIC (d + d(d+1)/2 + 1 parameters).
    pub bic: f64,
    /// EM iterations used.
    pub iterations: usize,
}

/// Weighted mean log-likelihood of `t_nu(mu, Sigma)` given the squared Mahalanobis distances
/// `delta` under Sigma and `log|Sigma|` (Kotz & Nadarajah 2004, *Multivariate t
/// Distributions*, eq. 1.1).
fn mean_ll(nu: f64, d: usize, log_det: f64, delta: &[f64], w: &[f64]) -> f64 {
    let df = d as f64;
    let c = ln_gamma(0.5 * (nu + df))
        - ln_gamma(0.5 * nu)
        - 0.5 * df * (nu * std::f64::consts::PI).ln()
        - 0.5 * log_det;
    let s: f64 = delta
        .iter()
        .zip(w)
        .map(|(&q, &wi)| wi * (q / nu).ln_1p())
        .sum();
    c - 0.5 * (nu + df) * s
}

/// The nu in [`DOF_RANGE`] maximising the log-likelihood for fixed mu and Sigma.
fn best_dof(d: usize, log_det: f64, delta: &[f64], w: &[f64]) -> f64 {
    let f = |t: f64| mean_ll(t.exp(), d, log_det, delta, w);
    let (lo, hi) = (DOF_RANGE.0.ln(), DOF_RANGE.1.ln());
    const GRID: usize = 40;
    let at = |k: usize| lo + (hi - lo) * k as f64 / GRID as f64;
    let best = (0..=GRID)
        .max_by(|&a, &b| f(at(a)).total_cmp(&f(at(b))))
        .unwrap_or(GRID);
    let (mut a, mut b) = (at(best.saturating_sub(1)), at((best + 1).min(GRID)));
    let g = 0.5 * (5f64.sqrt() - 1.0);
    let (mut c, mut e) = (b - g * (b - a), a + g * (b - a));
    let (mut fc, mut fe) = (f(c), f(e));
    for _ in 0..80 {
        if fc > fe {
            b = e;
            e = c;
            fe = fc;
            c = b - g * (b - a);
            fc = f(c);
        } else {
            a = c;
            c = e;
            fc = fe;
            e = a + g * (b - a);
            fe = f(e);
        }
    }
    let t = 0.5 * (a + b);
    // The grid end points themselves, where the maximum is on the boundary.
    [t, lo, hi]
        .into_iter()
        .max_by(|&x, &y| f(x).total_cmp(&f(y)))
        .unwrap_or(t)
        .exp()
}

/// Fit by ECME from the Gaussian fit. Errors when the scale matrix becomes singular.
pub fn fit_student(p: &Pilot, start: &GaussianFit) -> Result<StudentFit, String> {
    let (n, d) = (p.rows(), p.dim());
    let mut loc = start.mean.clone();
    let mut scale = start.cov.clone();
    let mut nu = 10.0;
    let mut delta = vec![0.0; n];
    let mut z = vec![0.0; d];
    let mut prev = f64::NEG_INFINITY;
    let mut ll = prev;
    let mut iterations = 0;
    let singular = || "the Student-t fit's scale matrix became singular".to_string();
    for it in 1..=MAX_ITER {
        iterations = it;
        let mvn = Mvn::new(loc.clone(), scale.clone()).ok_or_else(singular)?;
        for (i, q) in delta.iter_mut().enumerate() {
            *q = mvn.mahalanobis2(p.row(i), &mut z);
        }
        // E-step: u_i = E[tau_i | x_i] = (nu + d) / (nu + delta_i).
        let u: Vec<f64> = delta.iter().map(|q| (nu + d as f64) / (nu + q)).collect();
        // CM-steps for mu and Sigma (Liu & Rubin 1995, eqs. 6-7, with weights).
        let su: f64 = u.iter().zip(&p.w).map(|(a, b)| a * b).sum();
        let m = sum_with(p, |i| p.w[i] * u[i]) / su;
        scale = scatter_with(p, &m, |i| p.w[i] * u[i]);
        loc = m;
        // CM-step for nu on the actual likelihood (the "E" of ECME: Liu & Rubin 1995, sec. 4).
        let mvn = Mvn::new(loc.clone(), scale.clone()).ok_or_else(singular)?;
        for (i, q) in delta.iter_mut().enumerate() {
            *q = mvn.mahalanobis2(p.row(i), &mut z);
        }
        nu = best_dof(d, mvn.log_det(), &delta, &p.w);
        ll = mean_ll(nu, d, mvn.log_det(), &delta, &p.w);
        if (ll - prev).abs() <= TOL * (1.0 + ll.abs()) {
            break;
        }
        prev = ll;
    }
    Ok(StudentFit {
        bic: bic(ll, gaussian_params(d) + 1, p.kish_ess()),
        loc,
        scale,
        dof: nu,
        mean_ll: ll,
        iterations,
    })
}
