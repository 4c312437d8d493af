//! The full `covariance` parameter of the `gaussian`, `student-t` and `mixture` families:
//! densities and reference values against statrs and nalgebra, exact draws, and the
//! validation errors (non-symmetric, not positive definite, wrong shape, given with `scale`).

use std::path::Path;

use approx::assert_abs_diff_eq;
use assay_targets::Target;
use assay_targets::registry::build_target;
use nalgebra::{DMatrix, DVector};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use statrs::distribution::{Continuous, MultivariateNormal, MultivariateStudent};

const SIGMA: [[f64; 3]; 3] = [[2.0, 0.6, -0.4], [0.6, 1.0, 0.3], [-0.4, 0.3, 0.5]];

fn sigma() -> DMatrix<f64> {
    DMatrix::from_fn(3, 3, |i, j| SIGMA[i][j])
}

fn toml_matrix(m: &[[f64; 3]; 3]) -> String {
    let rows: Vec<String> = m
        .iter()
        .map(|r| format!("[{}, {}, {}]", r[0], r[1], r[2]))
        .collect();
    format!("[{}]", rows.join(", "))
}

fn build(spec: &str) -> Result<Box<dyn Target>, assay_targets::error::ParamError> {
    let t: toml::Table = spec.parse().unwrap();
    build_target(&t, "t", Path::new("."))
}

fn points() -> Vec<[f64; 3]> {
    vec![
        [0.0, 0.0, 0.0],
        [1.0, -2.0, 0.5],
        [-3.0, 0.7, 2.0],
        [0.2, 0.1, -0.9],
    ]
}

#[test]
fn gaussian_with_covariance_matches_statrs_and_nalgebra() {
    let mean = [1.0, -0.5, 2.0];
    let spec = format!(
        "family = 'gaussian'\ndim = 3\nmean = [1.0, -0.5, 2.0]\ncovariance = {}",
        toml_matrix(&SIGMA)
    );
    let g = build(&spec).unwrap();
    // log Z = d/2 log 2pi + 1/2 log|Sigma|, |Sigma| by nalgebra's LU determinant.
    let lz = 1.5 * (2.0 * std::f64::consts::PI).ln() + 0.5 * sigma().determinant().ln();
    assert_abs_diff_eq!(g.log_z().unwrap(), lz, epsilon = 1e-12);
    assert_eq!(g.mean().unwrap(), &mean[..]);
    assert_eq!(g.covariance().unwrap(), &sigma());
    // statrs MultivariateNormal::ln_pdf = log_density - log_z.
    let flat: Vec<f64> = SIGMA.iter().flatten().copied().collect();
    let mvn = MultivariateNormal::new(mean.to_vec(), flat).unwrap();
    for x in points() {
        let want = mvn.ln_pdf(&DVector::from_column_slice(&x));
        assert_abs_diff_eq!(
            g.log_density(&x) - g.log_z().unwrap(),
            want,
            epsilon = 1e-10
        );
    }
    // Exact draws: sample mean within 5 standard errors sqrt(Sigma_ii / n) of the mean
    // (n = 20000, fixed seed).
    let mut rng = ChaCha8Rng::seed_from_u64(7);
    let n = 20000;
    let mut sum = [0.0; 3];
    let mut x = [0.0; 3];
    for _ in 0..n {
        assert!(g.sample(&mut rng, &mut x));
        for j in 0..3 {
            sum[j] += x[j];
        }
    }
    for j in 0..3 {
        let se = (SIGMA[j][j] / n as f64).sqrt();
        assert!(
            (sum[j] / n as f64 - mean[j]).abs() < 5.0 * se,
            "coordinate {j}"
        );
    }
}

#[test]
fn student_t_with_covariance_matches_statrs() {
    let nu = 5.0;
    let spec = format!(
        "family = 'student-t'\ndim = 3\ndof = 5\nmean = [0.5, 0.0, -1.0]\ncovariance = {}",
        toml_matrix(&SIGMA)
    );
    let t = build(&spec).unwrap();
    // statrs MultivariateStudent::ln_pdf with scale matrix Sigma = log_density - log_z.
    let flat: Vec<f64> = SIGMA.iter().flatten().copied().collect();
    let r = MultivariateStudent::new(vec![0.5, 0.0, -1.0], flat, nu).unwrap();
    for x in points() {
        let want = r.ln_pdf(&DVector::from_column_slice(&x));
        assert_abs_diff_eq!(
            t.log_density(&x) - t.log_z().unwrap(),
            want,
            epsilon = 1e-10
        );
    }
    // Covariance nu / (nu - 2) Sigma (Kotz & Nadarajah 2004, ch. 1).
    let want = sigma() * (nu / (nu - 2.0));
    assert!((t.covariance().unwrap() - want).amax() < 1e-14);
}

#[test]
fn mixture_with_covariance_matches_statrs_and_total_variance() {
    let spec = format!(
        "family = 'mixture'\ndim = 3\ncomponents = [{{ weight = 0.3, mean = [1, 0, 0], covariance = {} }}, {{ weight = 0.7, mean = [-1, 2, 0], scale = 0.5 }}]",
        toml_matrix(&SIGMA)
    );
    let m = build(&spec).unwrap();
    let flat: Vec<f64> = SIGMA.iter().flatten().copied().collect();
    let a = MultivariateNormal::new(vec![1.0, 0.0, 0.0], flat).unwrap();
    let iso: Vec<f64> = (0..9)
        .map(|k| if k % 4 == 0 { 0.25 } else { 0.0 })
        .collect();
    let b = MultivariateNormal::new(vec![-1.0, 2.0, 0.0], iso).unwrap();
    for x in points() {
        // log(0.3 N_a + 0.7 N_b) from statrs densities; log Z = log(0.3 + 0.7) = 0.
        let v = DVector::from_column_slice(&x);
        let want = (0.3 * a.pdf(&v) + 0.7 * b.pdf(&v)).ln();
        assert_abs_diff_eq!(m.log_density(&x), want, epsilon = 1e-10);
    }
    // Law of total variance: sum pi_k (Sigma_k + mu_k mu_k') - mean mean'.
    let mu_a = DVector::from_column_slice(&[1.0, 0.0, 0.0]);
    let mu_b = DVector::from_column_slice(&[-1.0, 2.0, 0.0]);
    let mean: DVector<f64> = &mu_a * 0.3 + &mu_b * 0.7;
    let cov = 0.3 * (sigma() + &mu_a * mu_a.transpose())
        + 0.7 * (DMatrix::identity(3, 3) * 0.25 + &mu_b * mu_b.transpose())
        - &mean * mean.transpose();
    assert!((m.covariance().unwrap() - cov).amax() < 1e-12);
}

#[test]
fn invalid_covariances_are_named() {
    let cases = [
        (
            "gaussian",
            "covariance = [[1, 0.5], [0.4, 1]]",
            "covariance[0][1]",
            "symmetric",
        ),
        (
            "gaussian",
            "covariance = [[1, 2], [2, 1]]",
            "covariance",
            "not positive definite",
        ),
        (
            "gaussian",
            "covariance = [[1, 0], [0, 0]]",
            "covariance[1][1]",
            "number > 0",
        ),
        (
            "gaussian",
            "covariance = [[1, 0]]",
            "covariance",
            "length 1",
        ),
        (
            "gaussian",
            "covariance = [[1, 0], [0]]",
            "covariance[1]",
            "length 1",
        ),
        (
            "gaussian",
            "covariance = [[1, 0], [0, 'x']]",
            "covariance[1][1]",
            "wrong type",
        ),
        (
            "gaussian",
            "covariance = [[1, 0], [0, 1]]\nar1 = 0.5",
            "covariance",
            "not both",
        ),
        (
            "student-t",
            "dof = 3\nscale = 2\ncovariance = [[1, 0], [0, 1]]",
            "covariance",
            "`scale`",
        ),
        (
            "mixture",
            "components = [{ mean = 0, covariance = [[1, 3], [3, 1]] }]",
            "components[0].covariance",
            "Cholesky",
        ),
    ];
    for (family, rest, key, text) in cases {
        let spec = format!("family = '{family}'\ndim = 2\n{rest}");
        let e = match build(&spec) {
            Err(e) => e,
            Ok(_) => panic!("{spec}: accepted"),
        };
        assert_eq!(e.key(), Some(key), "{spec}: {e}");
        assert!(e.to_string().contains(text), "{spec}: {e}");
    }
}
