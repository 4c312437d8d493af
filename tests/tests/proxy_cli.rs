//! `assay proxy` end to end: the printed block is accepted as-is by a study file, and
//! `assay targets --config` gives back the fitted mean and covariance; bad pilots exit 2 with
//! the file, line and column.

use std::path::Path;

use assay_integration::{assay, scratch, text};
use nalgebra::DMatrix;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};
use serde_json::Value;

/// An invented pilot: soil moisture (volume fraction) at three depths from a short run of an
/// imagined infiltration model, as a correlated Gaussian around (0.30, 0.25, 0.20).
fn write_pilot(path: &Path, n: usize) -> Vec<[f64; 3]> {
    let mut rng = ChaCha8Rng::seed_from_u64(3);
    let mut rows = Vec::with_capacity(n);
    let mut s = String::from("moisture_10cm,moisture_30cm,moisture_60cm\n");
    for _ in 0..n {
        let z: [f64; 3] = [
            StandardNormal.sample(&mut rng),
            StandardNormal.sample(&mut rng),
            StandardNormal.sample(&mut rng),
        ];
        let r = [
            0.30 + 0.05 * z[0],
            0.25 + 0.03 * z[0] + 0.02 * z[1],
            0.20 + 0.01 * z[1] + 0.02 * z[2],
        ];
        s.push_str(&format!("{},{},{}\n", r[0], r[1], r[2]));
        rows.push(r);
    }
    std::fs::write(path, s).unwrap();
    rows
}

fn study_with(dir: &Path, block: &str) -> Value {
    let study = format!("[study]\nname = \"proxy\"\n[sampler]\nparticles = 100\n\n{block}");
    std::fs::write(dir.join("s.toml"), study).unwrap();
    let o = assay(dir, &["targets", "--config", "s.toml", "--json"]);
    assert!(o.status.success(), "{:?}", text(&o));
    serde_json::from_slice(&o.stdout).unwrap()
}

#[test]
fn gaussian_block_reads_back_the_pilot_moments() {
    let d = scratch("proxy-gauss");
    let rows = write_pilot(&d.join("soil.csv"), 400);
    let o = assay(
        &d,
        &[
            "proxy", "soil.csv", "--family", "gaussian", "--label", "soil",
        ],
    );
    assert!(o.status.success(), "{:?}", text(&o));
    let (block, _) = text(&o);
    assert!(
        block.contains("Caution: a proxy is only as good as the pilot"),
        "{block}"
    );
    assert!(
        block.contains("lies in [0, 1] in every pilot draw"),
        "{block}"
    );
    let t = &study_with(&d, &block)[0];
    assert_eq!(t["label"], "soil");
    assert_eq!(t["family"], "gaussian");
    // nalgebra: column means and C'C / (n - 1) of the centred pilot.
    let n = rows.len();
    let m = DMatrix::from_fn(n, 3, |i, j| rows[i][j]);
    let mean = m.row_mean();
    let c = DMatrix::from_fn(n, 3, |i, j| rows[i][j] - mean[j]);
    let cov = c.transpose() * &c / (n as f64 - 1.0);
    for j in 0..3 {
        let got = t["mean"][j].as_f64().unwrap();
        assert!((got - mean[j]).abs() < 1e-14, "mean {j}");
        for k in 0..3 {
            let got = t["covariance"][j][k].as_f64().unwrap();
            assert!((got - cov[(j, k)]).abs() < 1e-14, "cov ({j}, {k})");
        }
    }
}

#[test]
fn weighted_pilot_reads_back_the_weighted_moments() {
    // The same invented soil-moisture pilot with a `weight` column of importance weights
    // (invented: 0.2 to 1.8, from a second seeded generator). The fitted Gaussian must be the
    // weighted mean and the reliability-weights covariance, sum w (x - m)(x - m)' / (V1 - V2 /
    // V1) with V1 = sum w and V2 = sum w^2 (the unbiased weighted covariance for reliability
    // weights; common practice, e.g. the GNU Scientific Library's weighted variance, from
    // memory), computed here with nalgebra.
    let d = scratch("proxy-weighted");
    let rows = write_pilot(&d.join("plain.csv"), 300);
    let mut rng = ChaCha8Rng::seed_from_u64(17);
    let law = rand_distr::Uniform::new(0.2f64, 1.8).unwrap();
    let w: Vec<f64> = (0..rows.len()).map(|_| law.sample(&mut rng)).collect();
    let mut csv = String::from("moisture_10cm,moisture_30cm,moisture_60cm,weight\n");
    for (r, wi) in rows.iter().zip(&w) {
        csv.push_str(&format!("{},{},{},{wi}\n", r[0], r[1], r[2]));
    }
    std::fs::write(d.join("soil.csv"), csv).unwrap();
    let o = assay(
        &d,
        &[
            "proxy", "soil.csv", "--family", "gaussian", "--label", "soil",
        ],
    );
    assert!(o.status.success(), "{:?}", text(&o));
    let (block, _) = text(&o);
    let t = &study_with(&d, &block)[0];
    let n = rows.len();
    let x = DMatrix::from_fn(n, 3, |i, j| rows[i][j]);
    let v1: f64 = w.iter().sum();
    let v2: f64 = w.iter().map(|x| x * x).sum();
    let mean: Vec<f64> = (0..3)
        .map(|j| (0..n).map(|i| w[i] * x[(i, j)]).sum::<f64>() / v1)
        .collect();
    let c = DMatrix::from_fn(n, 3, |i, j| (x[(i, j)] - mean[j]) * w[i].sqrt());
    let cov = c.transpose() * &c / (v1 - v2 / v1);
    for j in 0..3 {
        let got = t["mean"][j].as_f64().unwrap();
        assert!((got - mean[j]).abs() < 1e-13, "mean {j}: {got} {}", mean[j]);
        for k in 0..3 {
            let got = t["covariance"][j][k].as_f64().unwrap();
            assert!(
                (got - cov[(j, k)]).abs() < 1e-13,
                "cov ({j}, {k}): {got} {}",
                cov[(j, k)]
            );
        }
    }
    // Against the unweighted fit: the weights moved the mean (a check that they were read).
    let plain = assay(
        &d,
        &[
            "proxy",
            "plain.csv",
            "--family",
            "gaussian",
            "--label",
            "soil",
        ],
    );
    let p = &study_with(&d, &text(&plain).0)[0];
    assert_ne!(p["mean"], t["mean"]);
}

#[test]
fn every_family_block_is_accepted() {
    let d = scratch("proxy-families");
    write_pilot(&d.join("soil.csv"), 300);
    for (family, want) in [
        ("auto", None),
        ("student-t", Some("student-t")),
        ("mixture", Some("mixture")),
    ] {
        let o = assay(
            &d,
            &[
                "proxy",
                "soil.csv",
                "--family",
                family,
                "--max-components",
                "2",
            ],
        );
        assert!(o.status.success(), "{family}: {:?}", text(&o));
        let (block, _) = text(&o);
        assert!(block.contains("<- chosen"), "{block}");
        let t = &study_with(&d, &block)[0];
        assert_eq!(t["label"], "soil-proxy");
        if let Some(w) = want {
            assert_eq!(t["family"], w, "{block}");
        }
        assert!(t["covariance"].is_array(), "{family}: {t}");
    }
}

#[test]
fn bad_pilots_exit_2_naming_file_line_and_column() {
    let d = scratch("proxy-bad");
    let cases = [
        ("empty.csv", "", "empty.csv: the file is empty"),
        (
            "ragged.csv",
            "a,b\n1,2\n3,4\n5\n6,7\n",
            "ragged.csv, line 4: 1 fields",
        ),
        (
            "text.csv",
            "a,b\n1,2\n3,wet\n5,6\n7,1\n",
            "text.csv, line 3, column 2 (`b`)",
        ),
        (
            "nan.csv",
            "a,b\n1,2\n3,NaN\n5,6\n7,1\n",
            "nan.csv, line 3, column 2 (`b`): NaN is not finite",
        ),
        (
            "neg.csv",
            "a,weight\n1,1\n2,-0.5\n",
            "neg.csv, line 3, column 2 (`weight`)",
        ),
        ("zero.csv", "a,weight\n1,0\n2,0\n", "the weights sum to 0"),
        ("few.csv", "a,b,c\n1,2,3\n2,3,1\n", "2 draws of 3 columns"),
        (
            "flat.csv",
            "a,b\n1,5\n2,5\n3,5\n4,5\n",
            "column 2 (`b`): the column is constant",
        ),
    ];
    for (file, body, want) in cases {
        std::fs::write(d.join(file), body).unwrap();
        let o = assay(&d, &["proxy", file]);
        assert_eq!(o.status.code(), Some(2), "{file}: {:?}", text(&o));
        assert!(text(&o).1.contains(want), "{file}: {}", text(&o).1);
    }
    let o = assay(&d, &["proxy", "missing.csv"]);
    assert_eq!(o.status.code(), Some(2));
    assert!(text(&o).1.contains("missing.csv: cannot read it"));
    let o = assay(&d, &["proxy", "flat.csv", "--max-components", "0"]);
    assert_eq!(o.status.code(), Some(2));
}
