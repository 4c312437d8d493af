//! The regression gate on real studies: reruns with other master seeds pass, injected shifts
//! and inflated spreads are caught, unusable files exit 2 with file and line.

use std::path::{Path, PathBuf};

use assay::check::{CheckOptions, check};
use assay::results::read_results;
use assay::study::{RunOptions, parse_study, run_study};
use assay_integration::{assay, scratch, text};
use serde_json::Value;

/// 2 targets x 2 cells x 30 replicates of tempered SMC: a small but real study.
fn study_text(seed: u64) -> String {
    format!(
        r#"
[study]
name = "gate"
replicates = 30
seed = {seed}

[sampler]
particles = 300
path = "tempered"
move = "metropolis"
move_steps = 2
backward_kernel = "mcmc"
proposal_shape = "particle-covariance"
initial_scale = 3.0

[grid]
proposal_scale = [0.6, 1.2]

[[target]]
label = "g3"
family = "gaussian"
dim = 3
ar1 = 0.5

[[target]]
label = "reg"
family = "linear-regression"
dim = 2
observations = 15
noise = 0.7
prior_scale = 2.0
data_seed = 1
"#
    )
}

fn run_to(dir: &Path, seed: u64) -> PathBuf {
    let file = dir.join(format!("gate-{seed}.toml"));
    let text = study_text(seed);
    std::fs::write(&file, &text).unwrap();
    let study = parse_study(&file, &text).unwrap();
    let out = dir.join(format!("gate-{seed}.jsonl"));
    let opts = RunOptions {
        out: Some(out.clone()),
        quiet: true,
        replace: true,
        ..Default::default()
    };
    run_study(&study, &opts).unwrap();
    out
}

#[test]
fn reruns_with_other_seeds_pass() {
    // False-alarm rate over 20 reruns: the gate controls the family-wise rate at 1e-3 per
    // comparison (Holm 1979), so 20 clean reruns all pass with probability >= 0.98 even if the
    // estimates were exactly at the edge of the null; with these fixed seeds it is a fixed
    // outcome, and any alarm is a defect to investigate. Measured: 0 alarms in 20.
    let d = scratch("gate-reruns");
    let base = read_results(&run_to(&d, 1), false).unwrap();
    let mut alarms = 0;
    for seed in 2..22 {
        let cand = read_results(&run_to(&d, seed), false).unwrap();
        let r = check(&base, &cand, &CheckOptions::default()).unwrap();
        if r.regressed() {
            alarms += 1;
            eprintln!("seed {seed}:\n{}", r.to_markdown());
        }
    }
    assert_eq!(alarms, 0, "false alarms in 20 reruns");
}

/// An edit of one record's mean vector, given the cell mean and sd.
type MeanEdit = dyn Fn(&mut [f64], &[f64], &[f64]);

/// Rewrite the candidate's records of one cell with `f(mean_vector, cell_mean, sd)`.
fn doctor(src: &Path, dst: &Path, target: &str, f: &MeanEdit) {
    let text = std::fs::read_to_string(src).unwrap();
    let mut lines: Vec<Value> = text
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect();
    // The cell: the target's first by its settings text, not the first record of the file,
    // whose cell depends on which thread finished first.
    let cell = (1..lines.len())
        .filter(|&i| lines[i]["target"] == target)
        .map(|i| lines[i]["settings"].clone())
        .min_by_key(|s| s.to_string())
        .unwrap();
    let idx: Vec<usize> = (1..lines.len())
        .filter(|&i| lines[i]["target"] == target && lines[i]["settings"] == cell)
        .collect();
    let means: Vec<Vec<f64>> = idx
        .iter()
        .map(|&i| {
            lines[i]["mean"]
                .as_array()
                .unwrap()
                .iter()
                .map(|x| x.as_f64().unwrap())
                .collect()
        })
        .collect();
    let n = means.len() as f64;
    let d = means[0].len();
    let mu: Vec<f64> = (0..d)
        .map(|j| means.iter().map(|m| m[j]).sum::<f64>() / n)
        .collect();
    let sd: Vec<f64> = (0..d)
        .map(|j| (means.iter().map(|m| (m[j] - mu[j]).powi(2)).sum::<f64>() / (n - 1.0)).sqrt())
        .collect();
    for (k, &i) in idx.iter().enumerate() {
        let mut m = means[k].clone();
        f(&mut m, &mu, &sd);
        lines[i]["mean"] = serde_json::json!(m);
    }
    let out: Vec<String> = lines.iter().map(|v| v.to_string()).collect();
    std::fs::write(dst, out.join("\n") + "\n").unwrap();
}

#[test]
fn injected_shift_and_spread_are_caught_through_the_cli() {
    let d = scratch("gate-inject");
    let base = run_to(&d, 1);
    let cand = run_to(&d, 2);
    let ok = assay(
        &d,
        &["check", base.to_str().unwrap(), cand.to_str().unwrap()],
    );
    assert_eq!(ok.status.code(), Some(0), "{:?}", text(&ok));

    // Every posterior-mean coordinate of one cell shifted by 8 standard errors of the mean
    // (sd / sqrt(30)).
    let shifted = d.join("shifted.jsonl");
    doctor(&cand, &shifted, "g3", &|m, _mu, sd| {
        for (x, s) in m.iter_mut().zip(sd) {
            *x += 8.0 * s / 30f64.sqrt();
        }
    });
    let o = assay(
        &d,
        &["check", base.to_str().unwrap(), shifted.to_str().unwrap()],
    );
    assert_eq!(o.status.code(), Some(1), "{:?}", text(&o));
    let (report, _) = text(&o);
    assert!(
        report.contains("g3") && report.contains("proposal_scale"),
        "{report}"
    );

    // The spread of one cell's mean estimates tripled around their mean.
    let wide = d.join("wide.jsonl");
    doctor(&cand, &wide, "g3", &|m, mu, _sd| {
        for (x, c) in m.iter_mut().zip(mu) {
            *x = c + 3.0 * (*x - c);
        }
    });
    let o = assay(
        &d,
        &[
            "check",
            base.to_str().unwrap(),
            wide.to_str().unwrap(),
            "--format",
            "json",
        ],
    );
    assert_eq!(o.status.code(), Some(1), "{:?}", text(&o));
    let v: Value = serde_json::from_slice(&o.stdout).unwrap();
    assert!(v.to_string().contains("spread"), "{v}");
}

#[test]
fn unusable_files_exit_2_naming_file_and_line() {
    let d = scratch("gate-bad");
    let base = run_to(&d, 1);
    let text_all = std::fs::read_to_string(&base).unwrap();
    let lines: Vec<&str> = text_all.lines().collect();
    // Garbled line 5.
    let mut g = lines.clone();
    g[4] = "{\"target\": garbage";
    std::fs::write(d.join("garbled.jsonl"), g.join("\n") + "\n").unwrap();
    // Truncated mid-line.
    let cut = &text_all[..text_all.len() - 40];
    std::fs::write(d.join("cut.jsonl"), cut).unwrap();
    let b = base.to_str().unwrap();
    for (file, needle) in [
        ("garbled.jsonl", "garbled.jsonl, line 5"),
        ("cut.jsonl", &format!("cut.jsonl, line {}", lines.len())),
        ("missing.jsonl", "missing.jsonl"),
    ] {
        let o = assay(&d, &["check", b, file]);
        assert_eq!(o.status.code(), Some(2), "{file}: {:?}", text(&o));
        assert!(text(&o).1.contains(needle), "{file}: {:?}", text(&o));
    }
    // Another design: a different grid.
    let other = d.join("other.toml");
    std::fs::write(&other, study_text(1).replace("[0.6, 1.2]", "[0.6, 1.3]")).unwrap();
    let o = assay(
        &d,
        &[
            "run",
            other.to_str().unwrap(),
            "--quiet",
            "--out",
            "other.jsonl",
        ],
    );
    assert!(o.status.success());
    let o = assay(&d, &["check", b, "other.jsonl"]);
    assert_eq!(o.status.code(), Some(2), "{:?}", text(&o));
}

#[test]
fn a_parameter_written_at_its_default_is_the_same_design() {
    // `scale = 1.0` and `mean = [0.0, 0.0]` written out are the registry's defaults (`assay
    // targets` lists them), so the study is the same design as with them left out: `check`
    // compares the two files (same seeds, so the same runs: exit 0). A different value is
    // another design: exit 2, naming the parameter.
    let d = scratch("check-defaults");
    let study = |extra: &str| {
        format!(
            "[study]\nname = \"defaults\"\nreplicates = 4\nseed = 3\n\n[sampler]\nparticles = \
             100\niterations = 5\n\n[[target]]\nlabel = \"g2\"\nfamily = \"gaussian\"\ndim = \
             2\n{extra}"
        )
    };
    for (name, extra) in [
        ("plain", ""),
        ("explicit", "scale = 1.0\nmean = [0.0, 0.0]\n"),
        ("other", "scale = 2.0\n"),
    ] {
        std::fs::write(d.join(format!("{name}.toml")), study(extra)).unwrap();
        let o = assay(
            &d,
            &[
                "run",
                &format!("{name}.toml"),
                "--quiet",
                "--out",
                &format!("{name}.jsonl"),
            ],
        );
        assert!(o.status.success(), "{name}: {:?}", text(&o));
    }
    let o = assay(&d, &["check", "plain.jsonl", "explicit.jsonl"]);
    assert_eq!(o.status.code(), Some(0), "{:?}", text(&o));
    let o = assay(&d, &["check", "plain.jsonl", "other.jsonl"]);
    assert_eq!(o.status.code(), Some(2), "{:?}", text(&o));
    assert!(text(&o).1.contains("parameter `scale`"), "{:?}", text(&o));
}
