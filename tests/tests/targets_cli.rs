//! `assay targets`: the listing, and reference values that an independent computation
//! reproduces to 1e-6 relative.

use assay_integration::{assay, scratch, text};
use nalgebra::{DMatrix, DVector};
use serde_json::Value;

const STUDY: &str = r#"
[[target]]
label = "ar"
family = "gaussian"
dim = 5
ar1 = 0.6

[[target]]
label = "reg"
family = "linear-regression"
dim = 3
observations = 12
noise = 0.7
prior_scale = 1.5
data_seed = 3

[[target]]
family = "student-t"
dim = 2
dof = 1.5
"#;

fn rel(a: f64, b: f64) -> f64 {
    (a - b).abs() / b.abs().max(1e-300)
}

#[test]
fn reference_values_match_independent_computations() {
    let d = scratch("targets");
    std::fs::write(d.join("t.toml"), STUDY).unwrap();
    let o = assay(&d, &["targets", "--config", "t.toml", "--json"]);
    assert!(o.status.success(), "{:?}", text(&o));
    let v: Value = serde_json::from_slice(&o.stdout).unwrap();
    let list = v.as_array().unwrap();
    assert_eq!(list.len(), 3);

    // AR(1) Gaussian with unit scales: |Sigma| = (1 - rho^2)^(d-1) (determinant of the
    // Kac-Murdock-Szego matrix, Kac, Murdock & Szego 1953), so
    // log Z = d/2 log 2pi + (d-1)/2 log(1 - rho^2).
    let ar = &list[0];
    assert_eq!(ar["label"], "ar");
    let want = 2.5 * (2.0 * std::f64::consts::PI).ln() + 2.0 * (1.0f64 - 0.36).ln();
    assert!(rel(ar["log_z"].as_f64().unwrap(), want) < 1e-6);
    let cov = ar["covariance"].as_array().unwrap();
    assert!(rel(cov[0][3].as_f64().unwrap(), 0.6f64.powi(3)) < 1e-12);

    // Conjugate regression: evidence log N(y; 0, sigma^2 I + tau^2 X X') (Bishop 2006,
    // eq. 3.86 in marginal form), posterior covariance (I/tau^2 + X'X/sigma^2)^-1 and mean
    // S X'y / sigma^2 (Bishop 2006, eqs. 3.53-3.54), computed here with nalgebra.
    let reg = &list[1];
    let data = &reg["data"];
    let rows: Vec<Vec<f64>> = data["x"]
        .as_array()
        .unwrap()
        .iter()
        .map(|r| {
            r.as_array()
                .unwrap()
                .iter()
                .map(|x| x.as_f64().unwrap())
                .collect()
        })
        .collect();
    let y: Vec<f64> = data["y"]
        .as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_f64().unwrap())
        .collect();
    let (n, p) = (rows.len(), rows[0].len());
    assert_eq!((n, p), (12, 3));
    let x = DMatrix::from_fn(n, p, |i, j| rows[i][j]);
    let yv = DVector::from_vec(y);
    let (s2, t2) = (0.49, 2.25);
    let c = DMatrix::<f64>::identity(n, n) * s2 + &x * x.transpose() * t2;
    let ch = c.clone().cholesky().unwrap();
    let alpha = ch.solve(&yv);
    let logdet: f64 = 2.0 * ch.l().diagonal().iter().map(|d| d.ln()).sum::<f64>();
    let want = -0.5 * (n as f64 * (2.0 * std::f64::consts::PI).ln() + logdet + yv.dot(&alpha));
    assert!(
        rel(reg["log_z"].as_f64().unwrap(), want) < 1e-6,
        "{} vs {want}",
        reg["log_z"]
    );
    let prec = DMatrix::<f64>::identity(p, p) / t2 + x.transpose() * &x / s2;
    let s = prec.try_inverse().unwrap();
    let m = &s * x.transpose() * &yv / s2;
    for i in 0..p {
        assert!(rel(reg["mean"][i].as_f64().unwrap(), m[i]) < 1e-6);
        for j in 0..p {
            assert!(rel(reg["covariance"][i][j].as_f64().unwrap(), s[(i, j)]) < 1e-6);
        }
    }

    // Student-t with dof 1.5: mean exists (dof > 1), covariance does not (dof <= 2);
    // log Z = lnG(nu/2) + d/2 log(nu pi) - lnG((nu+d)/2) (the multivariate t normaliser,
    // Kotz & Nadarajah 2004), lnGamma from statrs.
    let t = &list[2];
    assert_eq!(t["label"], "student-t-2");
    assert!(t["covariance"].is_null());
    assert_eq!(t["mean"].as_array().unwrap().len(), 2);
    use statrs::function::gamma::ln_gamma;
    let want = ln_gamma(0.75) + (1.5 * std::f64::consts::PI).ln() - ln_gamma(1.75);
    assert!(rel(t["log_z"].as_f64().unwrap(), want) < 1e-6);
}

#[test]
fn listing_and_bad_parameters() {
    let d = scratch("targets-list");
    let o = assay(&d, &["targets"]);
    assert!(o.status.success());
    let (out, _) = text(&o);
    for fam in [
        "gaussian",
        "banana",
        "mixture",
        "student-t",
        "funnel",
        "linear-regression",
    ] {
        assert!(out.contains(fam), "{fam} missing from listing");
    }
    std::fs::write(
        d.join("t.toml"),
        "[[target]]\nfamily = \"funnel\"\ndim = 1\n",
    )
    .unwrap();
    let o = assay(&d, &["targets", "--config", "t.toml", "--json"]);
    assert_eq!(o.status.code(), Some(2));
    let (_, err) = text(&o);
    assert!(err.contains("t.toml:3:1") && err.contains("dim"), "{err}");
    std::fs::write(
        d.join("t.toml"),
        "[[target]]\nfamily = \"gausian\"\ndim = 1\n",
    )
    .unwrap();
    let o = assay(&d, &["targets", "--config", "t.toml"]);
    assert_eq!(o.status.code(), Some(2));
    assert!(
        text(&o).1.contains("did you mean `gaussian`"),
        "{:?}",
        text(&o)
    );
}
