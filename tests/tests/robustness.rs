//! Inputs that once broke assay: each must end as a clear error or a failed run, never a panic
//! or a hang. (Found in review; every case here was reproduced before it was fixed.)

use assay_integration::{assay, canonical_runs, scratch, text};

const BASE: &str =
    "[study]\nname = \"r\"\nreplicates = 3\n[sampler]\nparticles = 50\niterations = 4\n";

#[test]
fn resume_after_a_record_without_its_newline() {
    let d = scratch("robust-newline");
    let study = format!("{BASE}[[target]]\nfamily = \"gaussian\"\ndim = 2\n");
    std::fs::write(d.join("s.toml"), &study).unwrap();
    assert!(
        assay(&d, &["run", "s.toml", "--quiet", "--out", "whole.jsonl"])
            .status
            .success()
    );
    let full = std::fs::read_to_string(d.join("whole.jsonl")).unwrap();
    let lines: Vec<&str> = full.lines().collect();
    // Header and two complete records, the second without its newline.
    std::fs::write(d.join("cut.jsonl"), lines[..3].join("\n")).unwrap();
    let o = assay(
        &d,
        &["run", "s.toml", "--quiet", "--resume", "--out", "cut.jsonl"],
    );
    assert!(o.status.success(), "{:?}", text(&o));
    assert_eq!(
        canonical_runs(&d.join("cut.jsonl")),
        canonical_runs(&d.join("whole.jsonl"))
    );
}

#[test]
fn out_of_range_study_values_are_errors_not_panics() {
    let d = scratch("robust-values");
    for (extra, needle) in [
        ("timeout_s = 1e20\n", "timeout_s"),
        ("timeout_s = 1e19\n", "timeout_s"),
    ] {
        let study = BASE.replace("[sampler]", &format!("{extra}[sampler]"))
            + "[[target]]\nfamily = \"gaussian\"\ndim = 1\n";
        std::fs::write(d.join("s.toml"), study).unwrap();
        let o = assay(&d, &["run", "s.toml", "--out", "r.jsonl"]);
        assert_eq!(o.status.code(), Some(2), "{:?}", text(&o));
        assert!(text(&o).1.contains(needle));
        assert!(!d.join("r.jsonl").exists());
    }
    // A nested parameter error points at its own line (line 11: the bad weight).
    let study = format!(
        "{BASE}[[target]]\nfamily = \"mixture\"\ndim = 1\ncomponents = [\n  {{ mean = 0.0 }},\n  {{ mean = 1.0, weight = -2 }},\n]\n"
    );
    std::fs::write(d.join("s.toml"), study).unwrap();
    let o = assay(&d, &["run", "s.toml", "--out", "r.jsonl"]);
    assert_eq!(o.status.code(), Some(2));
    assert!(text(&o).1.contains("s.toml:12:"), "{:?}", text(&o));
}

#[test]
fn a_hand_edited_ragged_covariance_does_not_crash_the_table() {
    let d = scratch("robust-ragged");
    let study = format!("{BASE}[[target]]\nfamily = \"gaussian\"\ndim = 2\n");
    std::fs::write(d.join("s.toml"), &study).unwrap();
    assert!(
        assay(&d, &["run", "s.toml", "--quiet", "--out", "r.jsonl"])
            .status
            .success()
    );
    let text_all = std::fs::read_to_string(d.join("r.jsonl")).unwrap();
    let mut lines: Vec<String> = text_all.lines().map(String::from).collect();
    let mut h: serde_json::Value = serde_json::from_str(&lines[0]).unwrap();
    h["targets"][0]["covariance"] = serde_json::json!([[1.0], [2.0]]);
    lines[0] = h.to_string();
    std::fs::write(d.join("r.jsonl"), lines.join("\n") + "\n").unwrap();
    // Refused by the validating reader (exit 2, naming the file and the header line), never
    // a crash.
    let o = assay(&d, &["table", "r.jsonl", "--format", "json"]);
    assert_eq!(o.status.code(), Some(2), "{:?}", text(&o));
    assert!(text(&o).1.contains("r.jsonl, line 1:"), "{:?}", text(&o));
}

#[test]
fn external_programs_cannot_hang_or_hide_a_dead_target() {
    let d = scratch("robust-external");
    // A target that never reads its input, sent a batch larger than a pipe holds, and one
    // that closes its output but keeps running: both must fail at the deadline.
    let study = "[study]\nname = \"x\"\nreplicates = 1\ntimeout_s = 1.5\n[sampler]\nparticles = 5000\niterations = 2\n\
         [[target]]\nlabel = \"deaf\"\nfamily = \"external\"\ncommand = [\"sleep\", \"30\"]\ndim = 2\n\
         [[target]]\nlabel = \"mute\"\nfamily = \"external\"\ncommand = [\"sh\", \"-c\", \"exec >&-; sleep 30\"]\ndim = 2\n";
    std::fs::write(d.join("s.toml"), study).unwrap();
    let t0 = std::time::Instant::now();
    let o = assay(&d, &["run", "s.toml", "--quiet", "--out", "r.jsonl"]);
    assert!(o.status.success(), "{:?}", text(&o));
    assert!(t0.elapsed().as_secs_f64() < 20.0, "took {:?}", t0.elapsed());
    let runs = canonical_runs(&d.join("r.jsonl"));
    assert_eq!(runs.len(), 2);
    assert!(runs.iter().all(|r| r["status"] == "failed"), "{runs:?}");

    // An external sampler asking a dead external target: the run fails, with the reason.
    let sampler = std::path::PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("../examples/external_sampler.py");
    let study = format!(
        "[study]\nname = \"y\"\nreplicates = 1\ntimeout_s = 30\n[sampler]\nparticles = 20\niterations = 2\nexternal = [\"python3\", \"{}\"]\n\
         [[target]]\nlabel = \"gone\"\nfamily = \"external\"\ncommand = [\"true\"]\ndim = 2\n",
        sampler.display()
    );
    std::fs::write(d.join("t.toml"), study).unwrap();
    let o = assay(&d, &["run", "t.toml", "--quiet", "--out", "t.jsonl"]);
    assert!(o.status.success(), "{:?}", text(&o));
    let runs = canonical_runs(&d.join("t.jsonl"));
    assert_eq!(runs[0]["status"], "failed", "{runs:?}");
    assert!(
        runs[0]["error"]
            .as_str()
            .unwrap()
            .contains("target evaluation failed")
    );
}
