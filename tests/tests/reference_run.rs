//! Targets without exact reference values are scored against a reference run, which is
//! computed once, stored keyed by the target's definition, and reused.

use std::path::PathBuf;

use assay_integration::{assay, scratch, text};
use serde_json::Value;

fn example(name: &str) -> String {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("../examples")
        .join(name)
        .to_string_lossy()
        .into_owned()
}

#[test]
fn reference_run_is_accurate_stored_and_reused() {
    let d = scratch("reference");
    // The example external target is N(mu, Sigma) with mu = (1, -0.5),
    // Sigma = [[1, 0.6], [0.6, 0.5]] (closed form stated in examples/external_target.py);
    // here the study does not say so, so assay must find out with a reference run.
    let study = format!(
        r#"
[study]
name = "refrun"
replicates = 8
seed = 1

[sampler]
particles = 400
path = "tempered"
move = "metropolis"
backward_kernel = "mcmc"
proposal_shape = "particle-covariance"
initial_scale = 3.0

[grid]
move_steps = [1, 3]

[reference]
runs = 6
particles = 4000
path = "tempered"
cess_target = 0.95
move = "metropolis"
move_steps = 5
backward_kernel = "mcmc"
proposal_shape = "particle-covariance"
initial_scale = 3.0

[[target]]
label = "bridge"
family = "external"
command = ["python3", "{}"]
dim = 2
"#,
        example("external_target.py")
    );
    std::fs::write(d.join("s.toml"), study).unwrap();
    let o = assay(&d, &["run", "s.toml", "--out", "out/r.jsonl"]);
    let (md, err) = text(&o);
    assert!(o.status.success(), "{err}");
    assert!(md.contains("relative to a reference run"), "{md}");

    let header: Value = serde_json::from_str(
        std::fs::read_to_string(d.join("out/r.jsonl"))
            .unwrap()
            .lines()
            .next()
            .unwrap(),
    )
    .unwrap();
    let t = &header["targets"][0];
    let rr = &t["reference_run"];
    let file = PathBuf::from(rr["file"].as_str().unwrap());
    assert!(file.starts_with("out/references"), "{file:?}");
    let mean_se: Vec<f64> = rr["mean_se"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_f64().unwrap())
        .collect();
    // Closed form of the Gaussian (examples/external_target.py): the pooled reference must
    // agree within 5 of its own standard errors; log Z = log(2 pi) + 1/2 log 0.14.
    let truth = [1.0, -0.5];
    for j in 0..2 {
        let m = t["mean"][j].as_f64().unwrap();
        assert!(
            (m - truth[j]).abs() < 5.0 * mean_se[j] + 1e-3,
            "mean[{j}] = {m} +- {}",
            mean_se[j]
        );
    }
    let log_z = t["log_z"].as_f64().unwrap();
    let log_z_se = rr["log_z_se"].as_f64().unwrap();
    let exact = (2.0 * std::f64::consts::PI).ln() + 0.5 * 0.14f64.ln();
    assert!(
        (log_z - exact).abs() < 5.0 * log_z_se + 1e-3,
        "log Z {log_z} +- {log_z_se} vs {exact}"
    );
    // Covariance from the pooled runs: within 10 % of the closed form (4000 particles x 6
    // runs; the weighted covariance of an SMC population has relative error of a few percent).
    let cov = &t["covariance"];
    assert!((cov[0][1].as_f64().unwrap() - 0.6).abs() < 0.06, "{cov}");

    // Reused: doctor the stored mean, rerun, and see the doctored value in the new header.
    let path = d.join(&file);
    let mut stored: Value = serde_json::from_str(&std::fs::read_to_string(&path).unwrap()).unwrap();
    stored["mean"][0] = serde_json::json!(1.25);
    std::fs::write(&path, stored.to_string()).unwrap();
    let o = assay(
        &d,
        &[
            "run",
            "s.toml",
            "--quiet",
            "--replace",
            "--out",
            "out/r.jsonl",
        ],
    );
    assert!(o.status.success(), "{:?}", text(&o));
    let header: Value = serde_json::from_str(
        std::fs::read_to_string(d.join("out/r.jsonl"))
            .unwrap()
            .lines()
            .next()
            .unwrap(),
    )
    .unwrap();
    assert_eq!(header["targets"][0]["mean"][0].as_f64(), Some(1.25));
}

#[test]
fn bad_reference_tables_are_rejected() {
    let d = scratch("reference-bad");
    for (body, needle) in [
        ("[reference]\nruns = 1\n", "runs"),
        ("[reference]\nparticle = 10\n", "did you mean `particles`"),
        ("[reference]\nbackward_kernel = \"mcmc\"\n", "metropolis"),
    ] {
        let s = format!("{body}[[target]]\nfamily = \"gaussian\"\ndim = 1\n");
        std::fs::write(d.join("s.toml"), s).unwrap();
        let o = assay(&d, &["run", "s.toml", "--out", "r.jsonl"]);
        assert_eq!(o.status.code(), Some(2));
        let (_, err) = text(&o);
        assert!(err.contains("s.toml:") && err.contains(needle), "{err}");
    }
}
