//! End-to-end tests of `assay run`, `table`, `merge` and `targets` through the binary.

use std::path::Path;

use assay_integration::{assay, canonical_runs, record_bytes_without_seconds, scratch, text};
use serde_json::Value;

/// A small study: 2 targets x 4 cells x 4 replicates, fast in release mode.
const SMALL: &str = r#"
[study]
name = "small"
replicates = 4
seed = 7

[sampler]
particles = 200
iterations = 12
initial_scale = 3.0

[grid]
proposal_scale = [0.3, 0.8]
backward_kernel = ["proposal", "gaussian-optimal"]

[[target]]
label = "g3"
family = "gaussian"
dim = 3
ar1 = 0.4

[[target]]
family = "banana"
dim = 2
curvature = 0.05
spread = 4.0
"#;

fn write(dir: &Path, name: &str, body: &str) {
    std::fs::write(dir.join(name), body).expect("write");
}

#[test]
fn threads_shards_and_resume_give_identical_records() {
    let d = scratch("identical");
    write(&d, "s.toml", SMALL);
    let one = assay(
        &d,
        &[
            "run",
            "s.toml",
            "--threads",
            "1",
            "--quiet",
            "--out",
            "one.jsonl",
        ],
    );
    assert!(one.status.success(), "{:?}", text(&one));
    let two = assay(
        &d,
        &[
            "run",
            "s.toml",
            "--threads",
            "2",
            "--quiet",
            "--out",
            "two.jsonl",
        ],
    );
    assert!(two.status.success(), "{:?}", text(&two));
    let reference = canonical_runs(&d.join("one.jsonl"));
    assert_eq!(reference.len(), 2 * 4 * 4);
    assert_eq!(reference, canonical_runs(&d.join("two.jsonl")));

    // Shards 1/3, 2/3, 3/3 merged give what one whole run gives.
    for k in 1..=3 {
        let o = assay(
            &d,
            &[
                "run",
                "s.toml",
                "--quiet",
                "--shard",
                &format!("{k}/3"),
                "--out",
                &format!("part{k}.jsonl"),
            ],
        );
        assert!(o.status.success(), "{:?}", text(&o));
    }
    let m = assay(
        &d,
        &[
            "merge",
            "part1.jsonl",
            "part2.jsonl",
            "part3.jsonl",
            "--out",
            "merged.jsonl",
        ],
    );
    assert!(m.status.success(), "{:?}", text(&m));
    assert_eq!(reference, canonical_runs(&d.join("merged.jsonl")));
    // Byte for byte, not only as parsed values: merge reads every number and writes it again,
    // and must give back the same digits (it did not when numbers were parsed to the nearest
    // float but one).
    let whole = record_bytes_without_seconds(&d.join("one.jsonl"));
    assert_eq!(whole.len(), reference.len());
    assert_eq!(whole, record_bytes_without_seconds(&d.join("merged.jsonl")));

    // An interrupted file: keep the header and 10 runs, then a torn half line; resume.
    let full = std::fs::read_to_string(d.join("one.jsonl")).unwrap();
    let lines: Vec<&str> = full.lines().collect();
    let mut cut = lines[..11].join("\n");
    cut.push('\n');
    cut.push_str(&lines[11][..lines[11].len() / 2]);
    std::fs::write(d.join("cut.jsonl"), cut).unwrap();
    let r = assay(
        &d,
        &["run", "s.toml", "--quiet", "--resume", "--out", "cut.jsonl"],
    );
    assert!(r.status.success(), "{:?}", text(&r));
    assert_eq!(reference, canonical_runs(&d.join("cut.jsonl")));
    assert_eq!(whole, record_bytes_without_seconds(&d.join("cut.jsonl")));
}

#[test]
fn existing_output_is_never_overwritten_silently() {
    let d = scratch("overwrite");
    write(&d, "s.toml", SMALL);
    let first = assay(&d, &["run", "s.toml", "--quiet", "--out", "r.jsonl"]);
    assert!(first.status.success());
    let before = std::fs::read(d.join("r.jsonl")).unwrap();
    let again = assay(&d, &["run", "s.toml", "--quiet", "--out", "r.jsonl"]);
    assert_eq!(again.status.code(), Some(2));
    let (_, err) = text(&again);
    assert!(err.contains("--resume") && err.contains("r.jsonl"), "{err}");
    assert_eq!(before, std::fs::read(d.join("r.jsonl")).unwrap());

    // A file of another study is refused on --resume.
    write(&d, "other.toml", &SMALL.replace("seed = 7", "seed = 8"));
    let o = assay(
        &d,
        &[
            "run",
            "other.toml",
            "--quiet",
            "--resume",
            "--out",
            "r.jsonl",
        ],
    );
    assert_eq!(o.status.code(), Some(2));
    assert!(text(&o).1.contains("different study"), "{:?}", text(&o));

    // Shards of different studies are refused by merge.
    let p = assay(&d, &["run", "other.toml", "--quiet", "--out", "o.jsonl"]);
    assert!(p.status.success());
    let m = assay(&d, &["merge", "r.jsonl", "o.jsonl", "--out", "m.jsonl"]);
    assert_eq!(m.status.code(), Some(2));
    assert!(!d.join("m.jsonl").exists());
}

/// Each bad study must exit 2, name the place and touch no output file.
#[test]
fn invalid_studies_are_rejected_before_any_run() {
    let d = scratch("invalid");
    let cases: Vec<(String, Vec<&str>)> = vec![
        (
            SMALL.replace("iterations = 12", "iteratons = 12"),
            vec!["s.toml:9:1", "iteratons", "did you mean `iterations`"],
        ),
        (
            SMALL.replace("family = \"banana\"", "family = \"bananna\""),
            vec!["s.toml:", "bananna", "did you mean `banana`"],
        ),
        (
            SMALL.replace(
                "backward_kernel = [\"proposal\", \"gaussian-optimal\"]",
                "backward_kernel = [\"proposal\", \"mcmc\"]",
            ),
            vec!["s.toml:14:", "mcmc", "metropolis"],
        ),
        (
            SMALL.replace(
                "proposal_scale = [0.3, 0.8]",
                "proposal_scale = [0.3, -0.8]",
            ),
            vec!["s.toml:13:", "proposal_scale", "> 0"],
        ),
        (
            SMALL.replace("ar1 = 0.4", "ar1 = 1.4"),
            vec!["s.toml:", "ar1", "1.4"],
        ),
        (
            SMALL.replace("[grid]", "[gird]"),
            vec!["s.toml:", "gird", "did you mean `grid`"],
        ),
        (
            SMALL.replace("\"gaussian-optimal\"]", "\"gaussian-optimum\"]"),
            vec![
                "s.toml:14:",
                "gaussian-optimum",
                "did you mean `gaussian-optimal`",
            ],
        ),
        (
            SMALL.replace("replicates = 4", "replicates = 0"),
            vec!["s.toml:4:1", "replicates"],
        ),
    ];
    for (body, needles) in cases {
        write(&d, "s.toml", &body);
        let o = assay(&d, &["run", "s.toml", "--out", "never.jsonl"]);
        let (_, err) = text(&o);
        assert_eq!(o.status.code(), Some(2), "{err}");
        for n in needles {
            assert!(err.contains(n), "expected `{n}` in: {err}");
        }
        assert!(
            !err.contains("panicked") && !err.contains("RUST_BACKTRACE"),
            "{err}"
        );
        assert!(!d.join("never.jsonl").exists());
    }
}

#[test]
fn table_is_recomputable_from_the_records() {
    let d = scratch("table");
    write(&d, "s.toml", SMALL);
    let o = assay(&d, &["run", "s.toml", "--out", "r.jsonl"]);
    assert!(o.status.success(), "{:?}", text(&o));
    let (md, _) = text(&o);
    assert!(md.contains("| rank |") && md.contains("### g3"), "{md}");
    assert!(md.contains("Columns:"), "legend missing: {md}");

    let j = assay(
        &d,
        &[
            "table",
            "r.jsonl",
            "--format",
            "json",
            "--rank-by",
            "rmse_mean",
        ],
    );
    assert!(j.status.success());
    let table: Value = serde_json::from_slice(&j.stdout).unwrap();
    let rows = table["rows"].as_array().unwrap();
    assert_eq!(rows.len(), 2 * 4);

    // Recompute rmse_mean and log_z_error_mean of every row from the raw records, by the
    // definitions in the README, independently of the library's code.
    let file = std::fs::read_to_string(d.join("r.jsonl")).unwrap();
    let mut lines = file.lines();
    let header: Value = serde_json::from_str(lines.next().unwrap()).unwrap();
    let recs: Vec<Value> = lines.map(|l| serde_json::from_str(l).unwrap()).collect();
    for row in rows {
        let t = header["targets"]
            .as_array()
            .unwrap()
            .iter()
            .find(|t| t["label"] == row["target"])
            .unwrap();
        let truth: Vec<f64> = t["mean"]
            .as_array()
            .unwrap()
            .iter()
            .map(|x| x.as_f64().unwrap())
            .collect();
        let log_z = t["log_z"].as_f64().unwrap();
        let mine: Vec<&Value> = recs
            .iter()
            .filter(|r| {
                r["target"] == row["target"]
                    && r["settings"] == row["settings"]
                    && r["status"] == "ok"
            })
            .collect();
        let mut ss = 0.0;
        let mut n = 0.0;
        let mut lz = 0.0;
        for r in &mine {
            for (a, b) in r["mean"].as_array().unwrap().iter().zip(&truth) {
                ss += (a.as_f64().unwrap() - b).powi(2);
                n += 1.0;
            }
            lz += r["log_evidence"].as_f64().unwrap() - log_z;
        }
        let rmse = (ss / n).sqrt();
        let got = row["rmse_mean"].as_f64().unwrap();
        assert!(
            (rmse - got).abs() <= 1e-12 * rmse.max(1.0),
            "{rmse} vs {got}"
        );
        let lzm = lz / mine.len() as f64;
        let got = row["log_z_error_mean"].as_f64().unwrap();
        assert!(
            (lzm - got).abs() <= 1e-12 * lzm.abs().max(1.0),
            "{lzm} vs {got}"
        );
        assert_eq!(row["replicates_ok"].as_u64().unwrap(), mine.len() as u64);
        for key in [
            "rank",
            "flags",
            "bias_z",
            "kish_ess",
            "variance_ess",
            "ess_per_second",
            "resamples",
            "seconds",
            "evaluations",
            "log_z_error_sd",
        ] {
            assert!(row.get(key).is_some(), "row lacks {key}");
        }
    }
    // Ranks within a target are 1..k.
    let mut ranks: Vec<u64> = rows
        .iter()
        .filter(|r| r["target"] == "g3")
        .map(|r| r["rank"].as_u64().unwrap())
        .collect();
    ranks.sort();
    assert_eq!(ranks, vec![1, 2, 3, 4]);

    let csv = assay(&d, &["table", "r.jsonl", "--format", "csv"]);
    assert!(csv.status.success());
    assert_eq!(text(&csv).0.lines().count(), 1 + 8);
}

#[test]
fn missing_or_garbled_results_exit_2_with_the_path() {
    let d = scratch("missing");
    let o = assay(&d, &["table", "nope.jsonl"]);
    assert_eq!(o.status.code(), Some(2));
    assert!(text(&o).1.contains("nope.jsonl"));
    std::fs::write(d.join("bad.jsonl"), "{not json\n").unwrap();
    let o = assay(&d, &["table", "bad.jsonl"]);
    assert_eq!(o.status.code(), Some(2));
    assert!(text(&o).1.contains("bad.jsonl, line 1"), "{:?}", text(&o));
    let o = assay(&d, &["table", "nope.jsonl", "--rank-by", "rmse"]);
    assert_eq!(o.status.code(), Some(2));
}

#[test]
fn a_killed_study_resumes_to_the_same_records() {
    // A study of 2000 runs takes over a second on one thread (measured 1.4 s in release
    // mode), far longer than the few milliseconds until a few runs are on disk; it is killed
    // then (SIGKILL, as an out-of-time batch job would be), and resumed.
    let d = scratch("kill");
    let body = SMALL
        .replace("replicates = 4", "replicates = 250")
        .replace("particles = 200", "particles = 2000");
    write(&d, "s.toml", &body);
    let mut child = std::process::Command::new(assay_integration::assay_bin())
        .args([
            "run",
            "s.toml",
            "--threads",
            "1",
            "--quiet",
            "--out",
            "k.jsonl",
        ])
        .current_dir(&d)
        .spawn()
        .unwrap();
    let t0 = std::time::Instant::now();
    loop {
        let lines = std::fs::read_to_string(d.join("k.jsonl"))
            .map(|t| t.lines().count())
            .unwrap_or(0);
        if lines > 5 || t0.elapsed().as_secs() > 60 {
            break;
        }
        std::thread::sleep(std::time::Duration::from_millis(5));
    }
    child.kill().unwrap();
    let _ = child.wait();
    let partial = std::fs::read_to_string(d.join("k.jsonl"))
        .unwrap()
        .lines()
        .count()
        - 1;
    let total = 2 * 4 * 250;
    assert!(
        partial < total,
        "the study finished before it could be killed"
    );
    assert_eq!(resume_and_compare(&d, "k.jsonl"), total);
}

/// Resume the study `s.toml` into `out` in `d`, check that its records are those of an
/// uninterrupted run, and return their number.
fn resume_and_compare(d: &Path, out: &str) -> usize {
    let r = assay(d, &["run", "s.toml", "--quiet", "--resume", "--out", out]);
    assert!(r.status.success(), "{:?}", text(&r));
    let whole = assay(d, &["run", "s.toml", "--quiet", "--out", "whole.jsonl"]);
    assert!(whole.status.success(), "{:?}", text(&whole));
    let resumed = canonical_runs(&d.join(out));
    assert_eq!(resumed, canonical_runs(&d.join("whole.jsonl")));
    resumed.len()
}

#[cfg(target_os = "linux")]
#[test]
fn a_full_disk_stops_the_study_cleanly_and_resume_completes_it() {
    // A file-size limit (ulimit -f, with SIGXFSZ ignored so that the write fails with EFBIG
    // instead of killing the process) stands in for a full disk: the study must stop with
    // exit status 2 naming the file, leave only complete records before at most one torn
    // last line, and a resume without the limit must complete it to the same records as an
    // uninterrupted run.
    let d = scratch("full");
    write(&d, "s.toml", SMALL);
    let bin = assay_integration::assay_bin();
    let limited = std::process::Command::new("bash")
        .arg("-c")
        .arg(format!(
            "trap '' XFSZ; ulimit -f 12; exec '{}' run s.toml --threads 2 --quiet --out f.jsonl",
            bin.display()
        ))
        .current_dir(&d)
        .output()
        .expect("bash runs");
    let (_, err) = text(&limited);
    assert_eq!(limited.status.code(), Some(2), "{err}");
    assert!(
        err.contains("cannot write") && err.contains("f.jsonl"),
        "{err}"
    );
    let written = std::fs::read_to_string(d.join("f.jsonl")).unwrap();
    let lines: Vec<&str> = written.split_inclusive('\n').collect();
    let complete = lines.iter().filter(|l| l.ends_with('\n')).count();
    // The header and at least one record made it; only the last line may be torn.
    assert!(complete >= 2, "{complete} complete lines");
    assert!(
        lines.len() - complete <= 1,
        "only the last line may be torn"
    );
    for l in lines.iter().filter(|l| l.ends_with('\n')) {
        serde_json::from_str::<serde_json::Value>(l).expect("every complete line is a record");
    }
    assert!(complete - 1 < 2 * 4 * 4, "the limit was not reached");
    assert_eq!(resume_and_compare(&d, "f.jsonl"), 2 * 4 * 4);
}
