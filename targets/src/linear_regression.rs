//! `linear-regression`: the posterior of conjugate Bayesian linear regression.
//!
//! Model (Bishop 2006, Pattern Recognition and Machine Learning, sections 3.3 and 3.5):
//! prior `beta ~ N(0, tau^2 I_p)`, likelihood `y | beta ~ N(X beta, sigma^2 I_n)`. The target's
//! log density is the log joint with normalised pieces,
//! `log N(beta; 0, tau^2 I) + sum_i log N(y_i; x_i' beta, sigma^2)`, so `log_z` is the log
//! evidence `log p(y)` (Bishop eq. 3.86). The posterior is `N(m, S)` with
//! `S^-1 = A = I / tau^2 + X'X / sigma^2` and `m = S X'y / sigma^2` (Bishop eqs. 3.53-3.54).
//!
//! # Data
//! * `data = "file.csv"`: the user's own data, a CSV file with a header row; the last column
//!   is the response and the others are the design (no intercept column is added). The path
//!   is relative to the study file's folder. Blank lines are skipped.
//! * otherwise synthetic, INVENTED data generated from `data_seed` (see
//!   [`synthetic_data`]): a ChaCha8Rng seeded with `seed_from_u64(data_seed)` draws the design
//!   entries `X_ij ~ N(0, 1)` row by row, then the true coefficients `beta* ~ N(0, tau^2 I)`
//!   (the prior), then the response `y_i = x_i' beta* + sigma e_i` with `e_i ~ N(0, 1)`.
//!
//! # Evaluation
//! `log_density` is evaluated from the prior and the residual sum of squares, written around
//! the posterior mean as an exact expansion point, `|y - X beta|^2 = r0 - 2 delta' g +
//! delta' G delta` with `delta = beta - m`, `r0 = |y - X m|^2`, `g = X'(y - X m)` and
//! `G = X'X`. That costs O(p^2) per call independently of n, allocates nothing, and avoids
//! the cancellation of the naive `y'y - 2 beta'X'y + beta'X'X beta`.

use std::path::{Path, PathBuf};

use nalgebra::{DMatrix, DVector};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};

use crate::error::ParamError;
use crate::params::{Params, check_dim, check_min_usize, check_positive};
use crate::registry::LINEAR_REGRESSION;
use crate::target::{DiagGaussian, Target};

/// Config keys of the `linear-regression` family.
pub const KEYS: &[&str] = &[
    "dim",
    "observations",
    "noise",
    "prior_scale",
    "data_seed",
    "data",
];

/// Largest synthetic design (observations * dim entries, 400 MB).
pub const MAX_SYNTHETIC_ENTRIES: usize = 50_000_000;

const LN_2PI: f64 = 1.837_877_066_409_345_5;

/// The posterior of conjugate Bayesian linear regression, with its evidence as `log_z`.
#[derive(Debug, Clone)]
pub struct LinearRegression {
    label: String,
    x: DMatrix<f64>,
    y: Vec<f64>,
    noise: f64,
    prior_scale: f64,
    /// X'X, row-major p x p.
    gram: Vec<f64>,
    /// X'(y - X m)
    g: Vec<f64>,
    /// |y - X m|^2
    r0: f64,
    /// -p/2 log(2 pi tau^2) - n/2 log(2 pi sigma^2)
    c: f64,
    inv_tau2: f64,
    inv_sigma2: f64,
    /// Lower Cholesky factor of the posterior covariance, row-major p x p.
    chol_s: Vec<f64>,
    log_z: f64,
    post_mean: Vec<f64>,
    post_cov: DMatrix<f64>,
    prior: DiagGaussian,
}

/// The synthetic (invented) data set for `observations` n, `dim` p, `prior_scale` tau,
/// `noise` sigma and `data_seed`: design `X_ij ~ N(0, 1)` (row by row), true coefficients
/// `beta* ~ N(0, tau^2 I)`, response `y = X beta* + sigma e`, all drawn in that order from
/// `ChaCha8Rng::seed_from_u64(data_seed)`. Returns `(X, y, beta*)`.
pub fn synthetic_data(
    observations: usize,
    dim: usize,
    prior_scale: f64,
    noise: f64,
    data_seed: u64,
) -> (DMatrix<f64>, Vec<f64>, Vec<f64>) {
    let mut rng = ChaCha8Rng::seed_from_u64(data_seed);
    let mut rows = Vec::with_capacity(observations * dim);
    for _ in 0..observations * dim {
        let z: f64 = StandardNormal.sample(&mut rng);
        rows.push(z);
    }
    let x = DMatrix::from_row_slice(observations, dim, &rows);
    let beta: Vec<f64> = (0..dim)
        .map(|_| {
            let z: f64 = StandardNormal.sample(&mut rng);
            prior_scale * z
        })
        .collect();
    let y = (0..observations)
        .map(|i| {
            let e: f64 = StandardNormal.sample(&mut rng);
            (0..dim).map(|j| x[(i, j)] * beta[j]).sum::<f64>() + noise * e
        })
        .collect();
    (x, y, beta)
}

/// Read a regression data set from CSV: a header row, then one row per observation, the last
/// column the response and the others the design. Errors are [`ParamError::Data`] naming the
/// file and the (1-based) line.
pub fn read_csv(path: &Path) -> Result<(DMatrix<f64>, Vec<f64>), ParamError> {
    let shown = path.display().to_string();
    let err = |line: Option<usize>, message: String| ParamError::Data {
        family: LINEAR_REGRESSION.to_string(),
        path: shown.clone(),
        line,
        message,
    };
    let text = std::fs::read_to_string(path).map_err(|e| err(None, e.to_string()))?;
    let mut lines = text
        .lines()
        .enumerate()
        .filter(|(_, l)| !l.trim().is_empty());
    let Some((_, header)) = lines.next() else {
        return Err(err(
            None,
            "the file is empty (a header row is expected)".into(),
        ));
    };
    let cols = header.split(',').count();
    if cols < 2 {
        return Err(err(
            Some(1),
            format!(
                "the header has {cols} column(s); at least one design column and the \
                 response (last) are needed"
            ),
        ));
    }
    let mut design = Vec::new();
    let mut y = Vec::new();
    for (i, line) in lines {
        let ln = i + 1;
        let fields: Vec<&str> = line.split(',').collect();
        if fields.len() != cols {
            return Err(err(
                Some(ln),
                format!("{} fields, but the header has {cols}", fields.len()),
            ));
        }
        for (j, f) in fields.iter().enumerate() {
            let t = f.trim().trim_matches('"').trim();
            let v: f64 = t
                .parse()
                .map_err(|_| err(Some(ln), format!("field {} ({t:?}) is not a number", j + 1)))?;
            if !v.is_finite() {
                return Err(err(
                    Some(ln),
                    format!("field {} ({t:?}) is not finite", j + 1),
                ));
            }
            if j + 1 == cols {
                y.push(v);
            } else {
                design.push(v);
            }
        }
    }
    if y.is_empty() {
        return Err(err(None, "no data rows after the header".into()));
    }
    let x = DMatrix::from_row_slice(y.len(), cols - 1, &design);
    Ok((x, y))
}

impl LinearRegression {
    /// The posterior for design `x` (n x p, n >= 1, p >= 1), response `y` (length n), `noise`
    /// sigma > 0 and `prior_scale` tau > 0. The label defaults to `linear-regression-<p>`.
    pub fn new(
        x: DMatrix<f64>,
        y: Vec<f64>,
        noise: f64,
        prior_scale: f64,
    ) -> Result<Self, ParamError> {
        let fam = LINEAR_REGRESSION;
        check_dim(fam, x.ncols(), 1)?;
        check_min_usize(fam, "observations", x.nrows(), 1)?;
        crate::params::check_len(fam, "data", y.len(), x.nrows())?;
        check_positive(fam, "noise", noise)?;
        check_positive(fam, "prior_scale", prior_scale)?;
        if let Some(v) = x.iter().chain(&y).find(|v| !v.is_finite()) {
            return Err(crate::params::out_of_range(
                fam,
                "data",
                *v,
                "finite design and response values",
            ));
        }
        let (n, p) = x.shape();
        let inv_sigma2 = 1.0 / (noise * noise);
        let inv_tau2 = 1.0 / (prior_scale * prior_scale);
        let yv = DVector::from_column_slice(&y);
        let gram = x.transpose() * &x;
        let xty = x.transpose() * &yv;
        // Values so large that their sums of squares overflow are the data's fault, not the
        // prior's: name the largest value rather than blame `prior_scale` below.
        if gram.iter().chain(xty.iter()).any(|v| !v.is_finite())
            || !(yv.norm_squared() * inv_sigma2).is_finite()
        {
            let largest = x
                .iter()
                .chain(&y)
                .copied()
                .fold(0.0f64, |m, v| if v.abs() > m.abs() { v } else { m });
            return Err(crate::params::out_of_range(
                fam,
                "data",
                largest,
                "design and response values whose sums of squares are finite (about |value| < \
                 1e150); rescale the data",
            ));
        }
        let mut a = &gram * inv_sigma2;
        for i in 0..p {
            a[(i, i)] += inv_tau2;
        }
        let chol = a.clone().cholesky().ok_or_else(|| {
            // A = I/tau^2 + X'X/sigma^2 is positive definite in exact arithmetic; this only
            // fails with extreme scales.
            crate::params::out_of_range(
                fam,
                "prior_scale",
                prior_scale,
                "a value for which the posterior precision is numerically positive definite",
            )
        })?;
        let m = chol.solve(&(xty * inv_sigma2));
        let s = chol.inverse();
        let s = 0.5 * (&s + s.transpose());
        let resid = &yv - &x * &m;
        let r0 = resid.norm_squared();
        let g = x.transpose() * &resid;
        let log_det_a = 2.0 * chol.l().diagonal().iter().map(|v| v.ln()).sum::<f64>();
        let (nf, pf) = (n as f64, p as f64);
        // Bishop eq. 3.86 with alpha = 1/tau^2, beta = 1/sigma^2.
        let e_m = 0.5 * inv_sigma2 * r0 + 0.5 * inv_tau2 * m.norm_squared();
        let log_z =
            -pf * prior_scale.ln() - nf * noise.ln() - e_m - 0.5 * log_det_a - 0.5 * nf * LN_2PI;
        let chol_s = match s.clone().cholesky() {
            Some(c) => c.l(),
            // S = A^-1: fall back to L^-T via the triangular inverse of A's factor.
            None => chol
                .l()
                .try_inverse()
                .map(|li| li.transpose())
                .unwrap_or_else(|| DMatrix::zeros(p, p)),
        };
        let c =
            -0.5 * pf * (LN_2PI + 2.0 * prior_scale.ln()) - 0.5 * nf * (LN_2PI + 2.0 * noise.ln());
        Ok(LinearRegression {
            label: format!("{LINEAR_REGRESSION}-{p}"),
            gram: row_major(&gram),
            g: g.iter().copied().collect(),
            r0,
            c,
            inv_tau2,
            inv_sigma2,
            chol_s: row_major(&chol_s),
            log_z,
            post_mean: m.iter().copied().collect(),
            post_cov: s,
            prior: DiagGaussian {
                mean: vec![0.0; p],
                sd: vec![prior_scale; p],
            },
            x,
            y,
            noise,
            prior_scale,
        })
    }

    /// The posterior for the synthetic data of [`synthetic_data`].
    pub fn synthetic(
        observations: usize,
        dim: usize,
        noise: f64,
        prior_scale: f64,
        data_seed: u64,
    ) -> Result<Self, ParamError> {
        let fam = LINEAR_REGRESSION;
        check_dim(fam, dim, 1)?;
        check_min_usize(fam, "observations", observations, 1)?;
        if observations.saturating_mul(dim) > MAX_SYNTHETIC_ENTRIES {
            return Err(ParamError::OutOfRange {
                family: fam.to_string(),
                key: "observations".to_string(),
                value: observations.to_string(),
                allowed: format!("integer >= 1 with observations * dim <= {MAX_SYNTHETIC_ENTRIES}"),
            });
        }
        check_positive(fam, "noise", noise)?;
        check_positive(fam, "prior_scale", prior_scale)?;
        let (x, y, _) = synthetic_data(observations, dim, prior_scale, noise, data_seed);
        Self::new(x, y, noise, prior_scale)
    }

    /// Set the label.
    pub fn with_label(mut self, label: impl Into<String>) -> Self {
        self.label = label.into();
        self
    }

    /// Build from a `[[target]]` table (keys [`KEYS`]). Without `data`, `observations` is
    /// required and the data are synthetic; with `data`, `data_seed` is not allowed, and
    /// `dim` (and `observations`, if given) must match the file.
    pub fn from_table(
        table: &toml::Table,
        label: &str,
        base_dir: &Path,
    ) -> Result<Self, ParamError> {
        let p = Params::new(table, LINEAR_REGRESSION, KEYS)?;
        let dim = p.dim(1)?;
        let obs = p.u64_opt("observations", "integer >= 1")?;
        if let Some(n) = obs {
            check_min_usize(LINEAR_REGRESSION, "observations", n as usize, 1)?;
        }
        let noise = p.f64_or("noise", 1.0)?;
        let tau = p.f64_or("prior_scale", 1.0)?;
        check_positive(LINEAR_REGRESSION, "noise", noise)?;
        check_positive(LINEAR_REGRESSION, "prior_scale", tau)?;
        let seed = p.u64_opt("data_seed", "integer >= 0")?;
        let t = match p.str_opt("data")? {
            None => {
                let n = obs.ok_or_else(|| p.missing("observations"))? as usize;
                Self::synthetic(n, dim, noise, tau, seed.unwrap_or(0))?
            }
            Some(file) => {
                if let Some(s) = seed {
                    return Err(p.out_of_range(
                        "data_seed",
                        s.to_string(),
                        "not allowed together with `data` (the data come from the file)",
                    ));
                }
                let path: PathBuf = base_dir.join(file);
                let (x, y) = read_csv(&path)?;
                if x.ncols() != dim {
                    return Err(p.out_of_range(
                        "dim",
                        dim.to_string(),
                        &format!(
                            "{} (the number of design columns in {})",
                            x.ncols(),
                            path.display()
                        ),
                    ));
                }
                if let Some(n) = obs
                    && n as usize != x.nrows()
                {
                    return Err(p.out_of_range(
                        "observations",
                        n.to_string(),
                        &format!(
                            "{} (the number of data rows in {})",
                            x.nrows(),
                            path.display()
                        ),
                    ));
                }
                Self::new(x, y, noise, tau)?
            }
        };
        Ok(t.with_label(label))
    }

    /// Noise standard deviation sigma.
    pub fn noise(&self) -> f64 {
        self.noise
    }

    /// Prior standard deviation tau.
    pub fn prior_scale(&self) -> f64 {
        self.prior_scale
    }

    /// Number of observations n.
    pub fn observations(&self) -> usize {
        self.y.len()
    }
}

fn row_major(m: &DMatrix<f64>) -> Vec<f64> {
    let (r, c) = m.shape();
    let mut out = Vec::with_capacity(r * c);
    for i in 0..r {
        for j in 0..c {
            out.push(m[(i, j)]);
        }
    }
    out
}

impl Target for LinearRegression {
    fn dim(&self) -> usize {
        self.post_mean.len()
    }

    fn log_density(&self, beta: &[f64]) -> f64 {
        let p = self.post_mean.len();
        let mut b2 = 0.0;
        let mut lin = 0.0;
        let mut quad = 0.0;
        for i in 0..p {
            let di = beta[i] - self.post_mean[i];
            b2 += beta[i] * beta[i];
            lin += di * self.g[i];
            let row = &self.gram[i * p..(i + 1) * p];
            let mut gd = 0.0;
            for (gij, (bj, mj)) in row.iter().zip(beta.iter().zip(&self.post_mean)) {
                gd += gij * (bj - mj);
            }
            quad += di * gd;
        }
        let rss = self.r0 - 2.0 * lin + quad;
        self.c - 0.5 * b2 * self.inv_tau2 - 0.5 * rss * self.inv_sigma2
    }

    fn grad_log_density(&self, beta: &[f64], grad: &mut [f64]) -> bool {
        let p = self.post_mean.len();
        for i in 0..p {
            let row = &self.gram[i * p..(i + 1) * p];
            let mut gd = 0.0;
            for (gij, (bj, mj)) in row.iter().zip(beta.iter().zip(&self.post_mean)) {
                gd += gij * (bj - mj);
            }
            grad[i] = -beta[i] * self.inv_tau2 + (self.g[i] - gd) * self.inv_sigma2;
        }
        true
    }

    fn log_z(&self) -> Option<f64> {
        Some(self.log_z)
    }

    fn mean(&self) -> Option<&[f64]> {
        Some(&self.post_mean)
    }

    fn covariance(&self) -> Option<&DMatrix<f64>> {
        Some(&self.post_cov)
    }

    fn sample(&self, rng: &mut dyn Rng, out: &mut [f64]) -> bool {
        let p = self.post_mean.len();
        for o in out.iter_mut() {
            *o = StandardNormal.sample(rng);
        }
        // out = m + C z in place, last row first (row i reads z_0..z_i only).
        for i in (0..p).rev() {
            let row = &self.chol_s[i * p..i * p + i + 1];
            let v: f64 = row.iter().zip(&out[..=i]).map(|(c, z)| c * z).sum();
            out[i] = self.post_mean[i] + v;
        }
        true
    }

    fn label(&self) -> &str {
        &self.label
    }

    fn family(&self) -> &str {
        LINEAR_REGRESSION
    }

    fn tempering_reference(&self) -> Option<&DiagGaussian> {
        Some(&self.prior)
    }

    fn data(&self) -> Option<(&DMatrix<f64>, &[f64])> {
        Some((&self.x, &self.y))
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use approx::assert_relative_eq;

    fn build_in(s: &str, dir: &Path) -> Result<LinearRegression, ParamError> {
        let t: toml::Table = s.parse().unwrap();
        LinearRegression::from_table(&t, "r", dir)
    }

    fn build(s: &str) -> Result<LinearRegression, ParamError> {
        build_in(s, Path::new("."))
    }

    fn check(spec: &str, variant: &str, key: &str) {
        crate::params::assert_rejected(build(spec), spec, variant, key);
    }

    #[test]
    fn invalid_parameters() {
        check("observations = 3", "Missing", "dim");
        check("dim = 2", "Missing", "observations");
        check("dim = 0\nobservations = 3", "OutOfRange", "dim");
        check("dim = 2\nobservations = 0", "OutOfRange", "observations");
        check(
            "dim = 1000\nobservations = 100000",
            "OutOfRange",
            "observations",
        );
        check("dim = 2\nobservations = 3.5", "WrongType", "observations");
        check(
            "dim = 2\nobservations = 3\nnoise = 0",
            "OutOfRange",
            "noise",
        );
        check(
            "dim = 2\nobservations = 3\nprior_scale = -1",
            "OutOfRange",
            "prior_scale",
        );
        check(
            "dim = 2\nobservations = 3\ndata_seed = -1",
            "OutOfRange",
            "data_seed",
        );
        check(
            "dim = 2\nobservations = 3\ndata_seed = 'a'",
            "WrongType",
            "data_seed",
        );
        check("dim = 2\ndata = 3", "WrongType", "data");
        check(
            "dim = 2\ndata = 'x.csv'\ndata_seed = 1",
            "OutOfRange",
            "data_seed",
        );
        check("dim = 2\nobservation = 3", "UnknownKey", "observation");
        check("dim = 2\ndata = 'does-not-exist.csv'", "Data", "data");
        match build("dim = 2\nprior_scael = 3") {
            Err(ParamError::UnknownKey { suggestion, .. }) => {
                assert_eq!(suggestion.as_deref(), Some("prior_scale"))
            }
            other => panic!("{other:?}"),
        }
    }

    #[test]
    fn csv_data_and_errors() {
        let dir = std::env::temp_dir().join(format!("assay-lr-test-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        std::fs::write(dir.join("ok.csv"), "x1,x2,y\n1,0,1.5\n\n0,1,-0.5\n1,1,2\n").unwrap();
        std::fs::write(dir.join("bad.csv"), "x1,y\n1,2\n1,abc\n").unwrap();
        std::fs::write(dir.join("short.csv"), "x1,y\n1,2\n1\n").unwrap();
        let t = build_in("dim = 2\ndata = 'ok.csv'", &dir).unwrap();
        let (x, y) = t.data().unwrap();
        assert_eq!(x.shape(), (3, 2));
        assert_eq!(y, &[1.5, -0.5, 2.0]);
        assert_eq!(x[(2, 1)], 1.0);
        match build_in("dim = 1\ndata = 'bad.csv'", &dir) {
            Err(ParamError::Data { line, path, .. }) => {
                assert_eq!(line, Some(3));
                assert!(path.ends_with("bad.csv"));
            }
            other => panic!("{other:?}"),
        }
        match build_in("dim = 1\ndata = 'short.csv'", &dir) {
            Err(ParamError::Data { line, .. }) => assert_eq!(line, Some(3)),
            other => panic!("{other:?}"),
        }
        assert!(matches!(
            build_in("dim = 3\ndata = 'ok.csv'", &dir),
            Err(ParamError::OutOfRange { ref key, .. }) if key == "dim"
        ));
        assert!(matches!(
            build_in("dim = 2\nobservations = 4\ndata = 'ok.csv'", &dir),
            Err(ParamError::OutOfRange { ref key, .. }) if key == "observations"
        ));
        std::fs::remove_dir_all(&dir).ok();
    }

    #[test]
    fn density_matches_direct_formula() {
        // Model definition: log N(beta; 0, tau^2 I) + sum_i log N(y_i; x_i' beta, sigma^2),
        // written out directly (O(n p)), against the O(p^2) expansion around m.
        let t = LinearRegression::synthetic(7, 3, 0.5, 2.0, 11).unwrap();
        let (x, y) = t.data().unwrap();
        let norm =
            |v: f64, mu: f64, sd: f64| -0.5 * ((v - mu) / sd).powi(2) - sd.ln() - 0.5 * LN_2PI;
        let beta = [0.3, -1.0, 2.5];
        let mut want: f64 = beta.iter().map(|b| norm(*b, 0.0, 2.0)).sum();
        for i in 0..7 {
            let fit: f64 = (0..3).map(|j| x[(i, j)] * beta[j]).sum();
            want += norm(y[i], fit, 0.5);
        }
        assert_relative_eq!(t.log_density(&beta), want, max_relative = 1e-12);
        let mut g = [0.0; 3];
        t.grad_log_density(&beta, &mut g);
        for i in 0..3 {
            let h = 1e-6;
            let (mut a, mut b) = (beta, beta);
            a[i] += h;
            b[i] -= h;
            let fd = (t.log_density(&a) - t.log_density(&b)) / (2.0 * h);
            assert_relative_eq!(g[i], fd, max_relative = 1e-6);
        }
        assert_eq!(
            t.tempering_reference().unwrap(),
            &DiagGaussian {
                mean: vec![0.0; 3],
                sd: vec![2.0; 3]
            }
        );
    }

    #[test]
    fn synthetic_data_is_deterministic() {
        let a = synthetic_data(5, 2, 1.0, 1.0, 3);
        let b = synthetic_data(5, 2, 1.0, 1.0, 3);
        let c = synthetic_data(5, 2, 1.0, 1.0, 4);
        assert_eq!(a, b);
        assert_ne!(a.1, c.1);
    }
}
