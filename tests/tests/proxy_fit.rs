//! The fits behind `assay proxy` against outside references: Gaussian moments against nalgebra
//! and a hand computation, Student-t degrees of freedom recovered from large samples, EM on an
//! invented well-separated mixture, and BIC choosing the family on clear cases.

use assay::proxy::fit::fit_gaussian;
use assay::proxy::mixture::fit_mixture;
use assay::proxy::student::fit_student;
use assay::proxy::{Family, Fitted, Pilot, ProxyOptions, fit_pilot};
use nalgebra::DMatrix;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{ChiSquared, Distribution, StandardNormal};

fn pilot(x: Vec<f64>, d: usize, w: Option<Vec<f64>>) -> Pilot {
    let n = x.len() / d;
    let weighted = w.is_some();
    let mut w = w.unwrap_or_else(|| vec![1.0; n]);
    let t: f64 = w.iter().sum();
    w.iter_mut().for_each(|v| *v /= t);
    Pilot {
        names: (1..=d).map(|j| format!("x{j}")).collect(),
        x,
        w,
        weighted,
    }
}

/// n draws of `mu + L z / sqrt(chi2_nu / nu)` (nu = None: Gaussian), L lower triangular.
fn draws(n: usize, mu: &[f64], l: &DMatrix<f64>, nu: Option<f64>, seed: u64) -> Vec<f64> {
    let d = mu.len();
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let chi = nu.map(|v| ChiSquared::new(v).unwrap());
    let mut x = Vec::with_capacity(n * d);
    for _ in 0..n {
        let f = chi.as_ref().map_or(1.0, |c| {
            let w: f64 = c.sample(&mut rng);
            1.0 / (w / nu.unwrap()).sqrt()
        });
        let z: Vec<f64> = (0..d).map(|_| StandardNormal.sample(&mut rng)).collect();
        for i in 0..d {
            let s: f64 = (0..=i).map(|k| l[(i, k)] * z[k]).sum();
            x.push(mu[i] + f * s);
        }
    }
    x
}

fn chol3() -> DMatrix<f64> {
    DMatrix::from_row_slice(3, 3, &[1.0, 0.0, 0.0, 0.6, 0.8, 0.0, -0.3, 0.2, 0.5])
}

#[test]
fn gaussian_moments_match_nalgebra() {
    let (n, d) = (500, 3);
    let x = draws(n, &[1.0, -2.0, 0.5], &chol3(), None, 1);
    let g = fit_gaussian(&pilot(x.clone(), d, None)).unwrap();
    // nalgebra: column means and C'C / (n - 1) of the centred data matrix.
    let m = DMatrix::from_row_slice(n, d, &x);
    let mean = m.row_mean();
    let mut c = m.clone();
    for i in 0..n {
        for j in 0..d {
            c[(i, j)] -= mean[j];
        }
    }
    let cov = c.transpose() * &c / (n as f64 - 1.0);
    for j in 0..d {
        assert!((g.mean[j] - mean[j]).abs() < 1e-12);
        for k in 0..d {
            assert!((g.cov[(j, k)] - cov[(j, k)]).abs() < 1e-12, "({j}, {k})");
        }
    }
}

#[test]
fn weighted_gaussian_by_hand() {
    // Points (0, 0), (2, 0), (0, 4) with weights 1, 1, 2. By hand: mean (0.5, 2); with
    // v1 = sum w = 4 and v2 = sum w^2 = 6, Cov = sum w r r' * v1 / (v1^2 - v2) (the
    // reliability-weights formula of NumPy's cov(aweights=...), from memory):
    // sum w r r' = [[3, -4], [-4, 16]], times 4 / 10 = [[1.2, -1.6], [-1.6, 6.4]].
    let g = fit_gaussian(&pilot(
        vec![0.0, 0.0, 2.0, 0.0, 0.0, 4.0],
        2,
        Some(vec![1.0, 1.0, 2.0]),
    ))
    .unwrap();
    let want = [[1.2, -1.6], [-1.6, 6.4]];
    assert!((g.mean[0] - 0.5).abs() < 1e-15 && (g.mean[1] - 2.0).abs() < 1e-15);
    for (j, row) in want.iter().enumerate() {
        for (k, w) in row.iter().enumerate() {
            assert!((g.cov[(j, k)] - w).abs() < 1e-14, "({j}, {k})");
        }
    }
}

#[test]
fn student_t_dof_is_recovered() {
    // 20000 draws of a 3-d t_nu by normal / sqrt(chi2 / nu) (Kotz & Nadarajah 2004, ch. 1).
    // Bound: |nu_hat / nu - 1| < 0.2, a generous stated bound (no asymptotic standard error
    // of nu_hat was checked against a source). Measured with these seeds: nu_hat = 2.970 at
    // nu = 3 and 8.168 at nu = 8, 1% and 2% off.
    for (nu, seed) in [(3.0, 11), (8.0, 12)] {
        let x = draws(20000, &[1.0, -2.0, 0.5], &chol3(), Some(nu), seed);
        let p = pilot(x, 3, None);
        let g = fit_gaussian(&p).unwrap();
        let t = fit_student(&p, &g).unwrap();
        println!(
            "nu = {nu}: nu_hat = {:.3} in {} iterations",
            t.dof, t.iterations
        );
        assert!((t.dof / nu - 1.0).abs() < 0.2, "nu {nu}: {}", t.dof);
        // The scale matrix is L L' (standard error about sqrt(2 / n) relative; 0.1 absolute
        // is over 5 of them for these entries).
        let s = chol3() * chol3().transpose();
        assert!((t.scale.clone() - s).amax() < 0.1, "{}", t.scale);
    }
}

#[test]
fn em_recovers_an_invented_separated_mixture() {
    // Invented: three clusters of unit-variance 2-d Gaussians, 10 sd apart, weights
    // 0.5 / 0.3 / 0.2, 4000 draws. Standard errors: weight sqrt(pi (1 - pi) / n) <= 0.008,
    // mean 1 / sqrt(n pi) <= 0.036; bounds are 5 of them (0.04 and 0.18).
    let means = [[-10.0, 0.0], [0.0, 10.0], [10.0, 0.0]];
    let weights = [0.5, 0.3, 0.2];
    let mut rng = ChaCha8Rng::seed_from_u64(5);
    let n = 4000;
    let mut x = Vec::with_capacity(2 * n);
    for i in 0..n {
        // Deterministic allocation by index keeps the counts at exactly n pi_k.
        let k = if i < 2000 {
            0
        } else if i < 3200 {
            1
        } else {
            2
        };
        for m in means[k] {
            let z: f64 = StandardNormal.sample(&mut rng);
            x.push(m + z);
        }
    }
    let p = pilot(x, 2, None);
    let g = fit_gaussian(&p).unwrap();
    let var = [g.cov[(0, 0)], g.cov[(1, 1)]];
    let m = fit_mixture(&p, 3, &var).unwrap();
    for (c, (w, mu)) in m.components.iter().zip(weights.iter().zip(means)) {
        assert!((c.weight - w).abs() < 0.04, "{} vs {w}", c.weight);
        for j in 0..2 {
            assert!((c.mean[j] - mu[j]).abs() < 0.18, "{} vs {:?}", c.mean, mu);
        }
    }
}

#[test]
fn bic_chooses_the_family_on_clear_cases() {
    let auto = ProxyOptions::default();
    let family = |x: Vec<f64>, d: usize| match fit_pilot(pilot(x, d, None), &auto).unwrap().chosen {
        Fitted::Gaussian(_) => "gaussian".to_string(),
        Fitted::StudentT(_) => "student-t".to_string(),
        Fitted::Mixture(m) => format!("mixture {}", m.components.len()),
    };
    let l = chol3();
    assert_eq!(family(draws(3000, &[0.0; 3], &l, None, 21), 3), "gaussian");
    assert_eq!(
        family(draws(3000, &[0.0; 3], &l, Some(3.0), 22), 3),
        "student-t"
    );
    // Two clusters 8 sd apart.
    let mut x = draws(1500, &[-4.0, 0.0, 0.0], &l, None, 23);
    x.extend(draws(1500, &[4.0, 0.0, 0.0], &l, None, 24));
    assert_eq!(family(x.clone(), 3), "mixture 2");
    // An explicit family is honoured whatever BIC says.
    let opts = ProxyOptions {
        family: Family::Gaussian,
        ..Default::default()
    };
    let chosen = fit_pilot(pilot(x, 3, None), &opts).unwrap().chosen;
    assert!(matches!(chosen, Fitted::Gaussian(_)));
}
