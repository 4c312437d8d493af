//! End-to-end tests of racing (`[study] race = true`) through the binary. Every race here is
//! decided on `variance_ess`, which does not depend on time, so which runs are made is the same
//! on every machine and exact equality can be asserted (common practice: a timing-dependent
//! metric would make the set of runs depend on the machine's speed).

use std::collections::BTreeSet;
use std::path::Path;

use assay_integration::{assay, record_bytes_without_seconds, scratch, text};
use serde_json::Value;

/// 2 targets x 8 cells, up to 24 replicates, round 1 at 6: scales from hopeless (0.05, 5.0) to
/// good, so that rounds 1 and 2 both eliminate cells and round 2 runs replicates 6..12. (At 4
/// replicates a cell, the permutation test of the worse rule cannot eliminate anything: two
/// cells of 4 runs have C(8, 4) = 70 splits, so no p-value is below 1 / 70, above the first
/// Holm level 0.025 / 8; at 6, C(12, 6) = 924.)
const RACED: &str = r#"
[study]
name = "raced"
replicates = 24
seed = 11
race = true
race_start = 6

[sampler]
particles = 150
iterations = 12
initial_scale = 3.0

[grid]
proposal_scale = [0.05, 0.3, 0.8, 5.0]
backward_kernel = ["proposal", "gaussian-optimal-crossfit"]

[[target]]
label = "g3"
family = "gaussian"
dim = 3
ar1 = 0.4

[[target]]
label = "wide"
family = "gaussian"
dim = 2
scale = [2.0, 0.5]
"#;

fn write(dir: &Path, name: &str, body: &str) {
    std::fs::write(dir.join(name), body).expect("write");
}

fn run_ok(dir: &Path, args: &[&str]) {
    let o = assay(dir, args);
    assert!(o.status.success(), "{args:?}: {:?}", text(&o));
}

/// Resume the race of `raced.toml` in `out`, quietly, with more arguments.
fn resume(dir: &Path, out: &str, extra: &[&str]) -> std::process::Output {
    let mut args = vec!["run", "raced.toml", "--quiet", "--resume", "--out", out];
    args.extend_from_slice(extra);
    assay(dir, &args)
}

/// Race `raced.toml` by variance_ess, quietly, with more arguments.
fn race(dir: &Path, extra: &[&str]) {
    let mut args = vec!["run", "raced.toml", "--rank-by", "variance_ess", "--quiet"];
    args.extend_from_slice(extra);
    run_ok(dir, &args);
}

/// The elimination lines of a results file, sorted.
fn eliminations(path: &Path) -> Vec<String> {
    let mut v: Vec<String> = std::fs::read_to_string(path)
        .expect("results")
        .lines()
        .filter(|l| l.starts_with("{\"record\":\"elimination\""))
        .map(str::to_string)
        .collect();
    v.sort();
    v
}

/// The race settings in a results file's header.
fn race_header(path: &Path) -> Value {
    let text = std::fs::read_to_string(path).expect("results");
    let header: Value = serde_json::from_str(text.lines().next().expect("header")).unwrap();
    header["study"]["race"].clone()
}

/// The run-record lines without `seconds`, without elimination lines.
fn runs(path: &Path) -> Vec<String> {
    record_bytes_without_seconds(path)
        .into_iter()
        .filter(|l| !l.starts_with("{\"record\":"))
        .collect()
}

#[test]
fn raced_records_are_the_full_grids_records_bit_for_bit() {
    // Seeds depend only on the master seed, the target, the cell and the replicate, so every
    // run a race makes is the full grid's run of the same identity, byte for byte but for
    // `seconds`; the race makes fewer of them.
    let d = scratch("race-subset");
    write(&d, "raced.toml", RACED);
    write(
        &d,
        "full.toml",
        &RACED.replace("race = true", "race = false"),
    );
    race(&d, &["--out", "r.jsonl"]);
    run_ok(&d, &["run", "full.toml", "--quiet", "--out", "f.jsonl"]);
    let (raced, full) = (runs(&d.join("r.jsonl")), runs(&d.join("f.jsonl")));
    let full_set: BTreeSet<&String> = full.iter().collect();
    assert!(
        raced.iter().all(|l| full_set.contains(l)),
        "a raced record differs"
    );
    assert!(
        raced.len() < full.len(),
        "{} of {}",
        raced.len(),
        full.len()
    );
    assert!(!eliminations(&d.join("r.jsonl")).is_empty());
    // The table shows the eliminated cells with their reason, below the survivors.
    let o = assay(&d, &["table", "r.jsonl"]);
    let (out, _) = text(&o);
    assert!(o.status.success());
    assert!(out.contains("eliminated in round 1"), "{out}");
    assert!(out.contains("worse variance_ess than"), "{out}");
    // The gate refuses a raced file (its eliminated cells stopped early).
    let o = assay(&d, &["check", "f.jsonl", "r.jsonl"]);
    assert_eq!(o.status.code(), Some(2), "{:?}", text(&o));
    assert!(text(&o).1.contains("raced study"), "{:?}", text(&o));
    // The report explains the race.
    run_ok(&d, &["report", "r.jsonl", "--out", "rep"]);
    let md = std::fs::read_to_string(d.join("rep").join("report.md")).expect("report");
    assert!(
        md.contains("## Racing") && md.contains("**Round 1**"),
        "{md}"
    );
    // The charts draw a raced file, whose cells have different numbers of replicates: every
    // chart is a well-formed SVG document.
    run_ok(&d, &["plot", "r.jsonl", "--out", "charts"]);
    let svgs: Vec<String> = std::fs::read_dir(d.join("charts"))
        .expect("charts")
        .filter_map(|e| e.ok())
        .map(|e| e.path())
        .filter(|p| p.extension().is_some_and(|x| x == "svg"))
        .map(|p| std::fs::read_to_string(p).expect("svg"))
        .collect();
    assert!(!svgs.is_empty());
    assert!(
        svgs.iter()
            .all(|s| s.contains("<svg") && s.trim_end().ends_with("</svg>"))
    );
}

#[test]
fn resume_after_a_kill_in_round_two_gives_the_uninterrupted_race() {
    // A kill in the middle of round 2 is simulated by cutting the uninterrupted file after
    // the first three records of round 2 (replicate >= race_start = 6) plus half a line. A
    // round's decisions read only the records of the completed rounds, so --resume must make
    // exactly the runs and the eliminations the uninterrupted race made.
    let d = scratch("race-resume");
    write(&d, "raced.toml", RACED);
    race(&d, &["--threads", "1", "--out", "a.jsonl"]);
    let whole = std::fs::read_to_string(d.join("a.jsonl")).expect("results");
    let lines: Vec<&str> = whole.lines().collect();
    let round2: Vec<usize> = lines
        .iter()
        .enumerate()
        .filter(|(_, l)| {
            serde_json::from_str::<serde_json::Value>(l)
                .ok()
                .and_then(|v| v["replicate"].as_u64())
                .is_some_and(|r| r >= 6)
        })
        .map(|(i, _)| i)
        .collect();
    assert!(round2.len() > 3, "the race must reach round 2");
    let cut = round2[2] + 1;
    let mut torn = lines[..cut].join("\n");
    torn.push('\n');
    torn.push_str(&lines[cut][..lines[cut].len() / 2]);
    std::fs::write(d.join("b.jsonl"), torn).expect("write");
    // Resumed without --rank-by: the file's own race metric is used.
    run_ok(
        &d,
        &[
            "run",
            "raced.toml",
            "--quiet",
            "--resume",
            "--out",
            "b.jsonl",
        ],
    );
    assert_eq!(runs(&d.join("a.jsonl")), runs(&d.join("b.jsonl")));
    assert_eq!(
        eliminations(&d.join("a.jsonl")),
        eliminations(&d.join("b.jsonl"))
    );
    // A resume with another metric is another race: refused, naming the key.
    let o = resume(&d, "b.jsonl", &["--rank-by", "rmse_mean"]);
    assert_eq!(o.status.code(), Some(2));
    assert!(text(&o).1.contains("[study] race"), "{:?}", text(&o));
    // A file raced before the permutation tests (its header records no `comparison`) was
    // decided by other tests: its resume is refused, naming the key and both tests.
    let old = std::fs::read_to_string(d.join("b.jsonl"))
        .expect("results")
        .replacen("\"comparison\":\"permutation\",", "", 1);
    std::fs::write(d.join("old.jsonl"), old).expect("write");
    let o = resume(&d, "old.jsonl", &[]);
    assert_eq!(o.status.code(), Some(2), "{:?}", text(&o));
    let err = text(&o).1;
    assert!(
        err.contains("[study] race") && err.contains("bootstrap") && err.contains("permutation"),
        "{err}"
    );
}

#[test]
fn shards_race_their_own_targets_and_merge_into_the_whole_race() {
    // A race is sharded by target; a sharded race runs without the recommendation clause
    // (the one rule that looks across targets), so two shards make exactly the runs and
    // eliminations of one process racing every target without it, `--shard 1/1`.
    let d = scratch("race-shards");
    write(&d, "raced.toml", RACED);
    race(&d, &["--shard", "1/1", "--out", "whole.jsonl"]);
    race(&d, &["--shard", "1/2", "--out", "p1.jsonl"]);
    race(&d, &["--shard", "2/2", "--out", "p2.jsonl"]);
    run_ok(
        &d,
        &["merge", "p1.jsonl", "p2.jsonl", "--out", "merged.jsonl"],
    );
    assert_eq!(runs(&d.join("whole.jsonl")), runs(&d.join("merged.jsonl")));
    assert_eq!(
        eliminations(&d.join("whole.jsonl")),
        eliminations(&d.join("merged.jsonl"))
    );
    // More shards than targets: refused.
    let o = assay(
        &d,
        &[
            "run",
            "raced.toml",
            "--quiet",
            "--shard",
            "3/3",
            "--out",
            "p3.jsonl",
        ],
    );
    assert_eq!(o.status.code(), Some(2));
    assert!(text(&o).1.contains("sharded by target"), "{:?}", text(&o));
}

#[test]
fn bad_race_start_values_exit_2_with_file_and_line() {
    // race_start must be an integer in [2, replicates]; line 7 of the study holds it (the text starts with a newline).
    let d = scratch("race-start");
    for bad in ["1", "0", "25", "2.5", "\"eight\"", "-3"] {
        let body = RACED.replace("race_start = 6", &format!("race_start = {bad}"));
        write(&d, "bad.toml", &body);
        let o = assay(&d, &["run", "bad.toml", "--quiet", "--out", "x.jsonl"]);
        let (_, err) = text(&o);
        assert_eq!(o.status.code(), Some(2), "{bad}: {err}");
        assert!(err.contains("bad.toml:7:"), "{bad}: {err}");
        assert!(
            err.contains("race_start") && err.contains("[2, 24]"),
            "{bad}: {err}"
        );
        assert!(!d.join("x.jsonl").exists());
    }
    let body = RACED.replace("race = true", "race = 1");
    write(&d, "bad.toml", &body);
    let o = assay(&d, &["run", "bad.toml", "--quiet", "--out", "x.jsonl"]);
    assert_eq!(o.status.code(), Some(2));
    assert!(text(&o).1.contains("bad.toml:6:"), "{:?}", text(&o));
}

#[test]
fn the_recommended_cell_is_raced_to_the_maximum_on_every_target() {
    // With two targets and no shard, the race keeps every cell that can still be recommended
    // on every target (the recommendation clause), and the last cells in it run to
    // `replicates`; so the cell the table recommends has all 24 replicates on both targets,
    // and the header records the clause.
    let d = scratch("race-clause");
    write(&d, "raced.toml", RACED);
    race(&d, &["--out", "r.jsonl"]);
    let info = race_header(&d.join("r.jsonl"));
    assert_eq!(info["recommend_by"], "worst", "{info}");
    assert_eq!(info["recommend_alpha"], 0.05, "{info}");
    let o = assay(
        &d,
        &[
            "table",
            "r.jsonl",
            "--format",
            "json",
            "--rank-by",
            "variance_ess",
        ],
    );
    assert!(o.status.success(), "{:?}", text(&o));
    let doc: Value = serde_json::from_slice(&o.stdout).unwrap();
    let best = &doc["recommendation"]["recommended"]["settings"];
    assert!(best.is_object(), "{}", doc["recommendation"]);
    let rows: Vec<&Value> = doc["rows"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|r| &r["settings"] == best)
        .collect();
    assert_eq!(rows.len(), 2);
    for r in rows {
        assert_eq!(r["replicates_ok"].as_u64(), Some(24), "{r}");
        assert!(r["eliminated"].is_null(), "{r}");
    }
    // Every worse elimination of a race with the clause says when the cell left the
    // recommendation, at or before the round of the elimination.
    for e in doc["rows"]
        .as_array()
        .unwrap()
        .iter()
        .map(|r| &r["eliminated"])
    {
        if e["reason"] == "worse" {
            let left = &e["left_recommendation"];
            assert!(left["round"].as_u64() <= e["round"].as_u64(), "{e}");
        }
    }
    // The report explains the clause, and names when an eliminated cell left the
    // recommendation.
    run_ok(&d, &["report", "r.jsonl", "--out", "rep"]);
    let report = std::fs::read_to_string(d.join("rep").join("report.md")).expect("report");
    assert!(
        report.contains("The race kept the recommendation open"),
        "{report}"
    );
    assert!(
        report.contains("out of the recommendation after round"),
        "{report}"
    );
    // A sharded race records the clause off.
    race(&d, &["--shard", "1/2", "--out", "s.jsonl"]);
    assert!(race_header(&d.join("s.jsonl"))["recommend_by"].is_null());
}

#[test]
fn a_cell_whose_runs_all_fail_is_eliminated_as_failed() {
    // An external sampler that exits at once with an error (`false`, POSIX) makes every run
    // of its cells fail. Such a cell has no metric, so only the failure rule can eliminate it:
    // in round 1, 8 failures of 8 give p = 2^-8 = 0.0039 (exact binomial tail at a failure
    // share of 1/2, a closed form), below the first Holm level 0.025 / 4 over the 4 failing
    // cells of a target, so the failing cells stop at 8 of the 32 replicates, with the reason
    // in the table.
    let d = scratch("race-failed");
    let body = RACED
        .replace("replicates = 24", "replicates = 32")
        .replace("race_start = 6", "race_start = 8")
        .replace(
            "backward_kernel = [\"proposal\", \"gaussian-optimal-crossfit\"]",
            "external = [[], [\"false\"]]",
        );
    write(&d, "raced.toml", &body);
    race(&d, &["--out", "r.jsonl"]);
    let text_of = std::fs::read_to_string(d.join("r.jsonl")).expect("results");
    let failed_runs = text_of
        .lines()
        .filter(|l| l.contains("\"replicate\"") && l.contains("\"status\":\"failed\""))
        .count();
    // 4 scales x 2 targets failing cells, 8 runs each.
    assert_eq!(failed_runs, 4 * 2 * 8, "the failing cells ran past round 1");
    let eliminated: Vec<Value> = text_of
        .lines()
        .filter(|l| l.starts_with("{\"record\":\"elimination\""))
        .map(|l| serde_json::from_str(l).unwrap())
        .filter(|e: &Value| e["reason"] == "failed")
        .collect();
    assert_eq!(eliminated.len(), 8, "{eliminated:?}");
    for e in &eliminated {
        assert_eq!(e["round"], 1, "{e}");
        assert_eq!(e["statistic"], 1.0, "{e}");
    }
    let o = assay(&d, &["table", "r.jsonl"]);
    let (out, _) = text(&o);
    assert!(o.status.success());
    assert!(out.contains("failed runs (8 of 8 failed)"), "{out}");
}
