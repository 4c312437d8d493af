//! Hostile and careless inputs (issue 14): limits are enforced, outputs are atomic, and no
//! input makes assay panic, abort or hang. Each test is sized to take about a second; a time
//! bound is always generous (a failure means "did not stop", never "a slow machine").

use std::path::Path;
use std::time::{Duration, Instant};

use assay_integration::{assay, canonical_runs, scratch, text};

/// Far above what any case here needs on a loaded CI machine, far below "hangs".
const GENEROUS: Duration = Duration::from_secs(60);

fn write(d: &Path, name: &str, body: &str) {
    std::fs::write(d.join(name), body).unwrap();
}

fn gauss(dim: usize) -> String {
    format!("[[target]]\nfamily = \"gaussian\"\ndim = {dim}\n")
}

/// Files of a directory other than the ones listed: temporary files left behind show up here.
fn strays(d: &Path, known: &[&str]) -> Vec<String> {
    std::fs::read_dir(d)
        .unwrap()
        .filter_map(|e| e.ok())
        .map(|e| e.file_name().to_string_lossy().into_owned())
        .filter(|n| !known.contains(&n.as_str()))
        .collect()
}

/// Write a small study to `d/file`, run it into `d/r.jsonl` and return that file's bytes: the
/// results a refused or failed `--replace` must leave as they were.
fn existing_results(d: &Path, file: &str) -> Vec<u8> {
    write(
        d,
        file,
        &format!(
            "[study]\nname = \"s\"\nreplicates = 2\n[sampler]\nparticles = 20\niterations = 3\n{}",
            gauss(2)
        ),
    );
    assert!(
        assay(d, &["run", file, "--quiet", "--out", "r.jsonl"])
            .status
            .success()
    );
    std::fs::read(d.join("r.jsonl")).unwrap()
}

/// `assay run FILE --quiet --replace --out r.jsonl` in `d`.
fn run_replacing(d: &Path, file: &str) -> std::process::Output {
    assay(
        d,
        &["run", file, "--quiet", "--replace", "--out", "r.jsonl"],
    )
}

// ---- item 2: the deadline inside an iteration, the protocol line cap ----

#[test]
fn a_metropolis_move_of_many_steps_stops_at_the_deadline() {
    let d = scratch("hostile-sweeps");
    write(
        &d,
        "s.toml",
        &format!(
            "[study]\nname = \"s\"\nreplicates = 2\ntimeout_s = 0.5\n[sampler]\nparticles = 20\n\
             move = \"metropolis\"\nmove_steps = 1000000000\n{}",
            gauss(2)
        ),
    );
    let t0 = Instant::now();
    let o = assay(&d, &["run", "s.toml", "--quiet", "--out", "r.jsonl"]);
    assert!(o.status.success(), "{:?}", text(&o));
    assert!(t0.elapsed() < GENEROUS, "took {:?}", t0.elapsed());
    let runs = canonical_runs(&d.join("r.jsonl"));
    assert_eq!(runs.len(), 2);
    for r in &runs {
        assert_eq!(r["status"], "failed");
        assert!(r["error"].as_str().unwrap().contains("timeout"), "{r}");
    }
}

#[test]
fn an_external_sampler_writing_without_a_newline_fails_only_its_run() {
    let d = scratch("hostile-endless");
    write(
        &d,
        "endless.py",
        "import sys\nsys.stdin.readline()\nchunk = 'x' * 65536\nwhile True:\n    sys.stdout.write(chunk)\n",
    );
    write(
        &d,
        "s.toml",
        &format!(
            "[study]\nname = \"s\"\nreplicates = 1\ntimeout_s = 60\n[sampler]\nparticles = 20\n\
             iterations = 2\n[grid]\nexternal = [[], [\"python3\", \"endless.py\"]]\n{}",
            gauss(2)
        ),
    );
    let t0 = Instant::now();
    let o = assay(&d, &["run", "s.toml", "--quiet", "--out", "r.jsonl"]);
    assert!(o.status.success(), "{:?}", text(&o));
    assert!(t0.elapsed() < GENEROUS, "took {:?}", t0.elapsed());
    let runs = canonical_runs(&d.join("r.jsonl"));
    assert_eq!(runs.len(), 2);
    let failed: Vec<_> = runs.iter().filter(|r| r["status"] == "failed").collect();
    assert_eq!(failed.len(), 1, "{runs:?}");
    assert!(
        failed[0]["error"].as_str().unwrap().contains("64 MiB"),
        "{}",
        failed[0]
    );
}

// ---- item 3: sizes bounded by memory, --replace atomic ----

#[test]
fn huge_sizes_are_refused_before_the_old_results_are_touched() {
    let d = scratch("hostile-sizes");
    let before = existing_results(&d, "ok.toml");
    for (sampler, needle) in [
        ("particles = 1000000000000", "particles"),
        ("particles = 9223372036854775807", "particles"),
        (
            "steps = 1000000000000\npath = \"tempered\"\nschedule = \"fixed\"",
            "steps",
        ),
        ("particles = 1000000000", "of memory"),
    ] {
        let study = format!(
            "[study]\nname = \"s\"\nreplicates = 2\n[sampler]\n{sampler}\n{}",
            gauss(10)
        );
        write(&d, "big.toml", &study);
        let o = run_replacing(&d, "big.toml");
        let (_, err) = text(&o);
        assert_eq!(o.status.code(), Some(2), "{sampler}: {err}");
        assert!(err.contains(needle), "{sampler}: {err}");
        assert!(!err.contains("panicked"), "{err}");
        assert_eq!(
            std::fs::read(d.join("r.jsonl")).unwrap(),
            before,
            "{sampler}"
        );
    }
    let study = "[study]\nname = \"s\"\n[reference]\nruns = 1000000000\n[[target]]\nfamily = \"external\"\n\
         command = [\"true\"]\ndim = 2\n";
    write(&d, "ref.toml", study);
    let o = run_replacing(&d, "ref.toml");
    assert_eq!(o.status.code(), Some(2), "{:?}", text(&o));
    assert!(text(&o).1.contains("runs"), "{:?}", text(&o));
    assert_eq!(std::fs::read(d.join("r.jsonl")).unwrap(), before);
    assert_eq!(
        strays(&d, &["ok.toml", "big.toml", "ref.toml", "r.jsonl"]),
        Vec::<String>::new()
    );
}

#[test]
fn a_replaced_file_keeps_the_old_results_until_the_study_has_started() {
    let d = scratch("hostile-replace");
    let before = existing_results(&d, "s.toml");
    // The header fits in the file-size limit, the first record does not: the write fails
    // after the study was set up, and the old file must still be there, whole.
    let bin = assay_integration::assay_bin();
    let o = std::process::Command::new("sh")
        .arg("-c")
        .arg(format!(
            "trap '' XFSZ; ulimit -f 1; exec '{}' run s.toml --quiet --replace --out r.jsonl",
            bin.display()
        ))
        .current_dir(&d)
        .output()
        .unwrap();
    assert_eq!(o.status.code(), Some(2), "{:?}", text(&o));
    assert!(text(&o).1.contains("cannot write"), "{:?}", text(&o));
    assert_eq!(std::fs::read(d.join("r.jsonl")).unwrap(), before);
    assert_eq!(strays(&d, &["s.toml", "r.jsonl"]), Vec::<String>::new());
    // A clean replacement leaves the new file and nothing else.
    write(
        &d,
        "s.toml",
        &format!(
            "[study]\nname = \"s\"\nreplicates = 3\n[sampler]\nparticles = 20\niterations = 3\n{}",
            gauss(2)
        ),
    );
    let o = assay(
        &d,
        &["run", "s.toml", "--quiet", "--replace", "--out", "r.jsonl"],
    );
    assert!(o.status.success(), "{:?}", text(&o));
    assert_eq!(canonical_runs(&d.join("r.jsonl")).len(), 3);
    assert_eq!(strays(&d, &["s.toml", "r.jsonl"]), Vec::<String>::new());
}

// ---- item 4: the trace is bounded ----

#[test]
fn a_long_run_keeps_a_bounded_trace_and_says_so() {
    let d = scratch("hostile-trace");
    write(
        &d,
        "s.toml",
        &format!(
            "[study]\nname = \"s\"\nreplicates = 1\ntimeout_s = 1\n[sampler]\nparticles = 2\n\
             iterations = 100000000\n{}",
            gauss(1)
        ),
    );
    let o = assay(&d, &["run", "s.toml", "--quiet", "--out", "r.jsonl"]);
    assert!(o.status.success(), "{:?}", text(&o));
    let size = std::fs::metadata(d.join("r.jsonl")).unwrap().len();
    assert!(size < 200_000, "results file of {size} bytes");
    let runs = canonical_runs(&d.join("r.jsonl"));
    let trace = runs[0]["trace"].as_array().unwrap();
    assert!(trace.len() <= 1001, "{} rows", trace.len());
    // A second of 2-particle iterations is far more than 1000 on any machine.
    let stride = trace[1]["stride"]
        .as_u64()
        .expect("a thinned trace says so");
    assert!(stride >= 2 && stride.is_power_of_two());
    assert_eq!(trace[1]["iteration"].as_u64(), Some(1 + stride));
    assert!(assay(&d, &["table", "r.jsonl"]).status.success());
}

// ---- item 5: one validating reader for every command ----

/// A small finished study: 1 target, 2 cells, 3 replicates (lines 2 to 7 are its records).
fn small_results(d: &Path) -> Vec<String> {
    write(
        d,
        "s.toml",
        &format!(
            "[study]\nname = \"s\"\nreplicates = 3\n[sampler]\nparticles = 20\niterations = 3\n\
             [grid]\nproposal_scale = [0.5, 1.0]\n{}",
            gauss(2)
        ),
    );
    let o = assay(d, &["run", "s.toml", "--quiet", "--out", "good.jsonl"]);
    assert!(o.status.success(), "{:?}", text(&o));
    std::fs::read_to_string(d.join("good.jsonl"))
        .unwrap()
        .lines()
        .map(String::from)
        .collect()
}

fn edit(line: &str, f: impl FnOnce(&mut serde_json::Value)) -> String {
    let mut v: serde_json::Value = serde_json::from_str(line).unwrap();
    f(&mut v);
    v.to_string()
}

#[test]
fn corrupt_results_are_refused_by_every_command_with_file_and_line() {
    let d = scratch("hostile-corrupt");
    let good = small_results(&d);
    assert_eq!(good.len(), 7);
    type Corrupt = Box<dyn Fn(&mut Vec<String>)>;
    let cases: Vec<(&str, Corrupt, &str)> = vec![
        (
            "duplicate",
            Box::new(|l: &mut Vec<String>| {
                let x = l[3].clone();
                l.push(x)
            }),
            "line 8",
        ),
        (
            "off-grid",
            Box::new(|l: &mut Vec<String>| {
                l[2] = edit(&l[2], |v| v["settings"]["proposal_scale"] = 0.7.into())
            }),
            "line 3",
        ),
        (
            "unknown target",
            Box::new(|l: &mut Vec<String>| l[4] = edit(&l[4], |v| v["target"] = "nope".into())),
            "line 5",
        ),
        (
            "replicate 99",
            Box::new(|l: &mut Vec<String>| l[1] = edit(&l[1], |v| v["replicate"] = 99.into())),
            "line 2",
        ),
        (
            "short mean",
            Box::new(|l: &mut Vec<String>| {
                l[5] = edit(&l[5], |v| v["mean"] = serde_json::json!([0.0]))
            }),
            "line 6",
        ),
        (
            "ok without mean",
            Box::new(|l: &mut Vec<String>| {
                l[6] = edit(&l[6], |v| v["mean"] = serde_json::Value::Null)
            }),
            "line 7",
        ),
        (
            "no targets",
            Box::new(|l: &mut Vec<String>| {
                l[0] = edit(&l[0], |v| v["targets"] = serde_json::json!([]))
            }),
            "line 1",
        ),
    ];
    for (what, corrupt, line) in cases {
        let mut lines = good.clone();
        corrupt(&mut lines);
        write(&d, "c.jsonl", &(lines.join("\n") + "\n"));
        let commands: [&[&str]; 5] = [
            &["table", "c.jsonl"],
            &["plot", "c.jsonl", "--out", "charts"],
            &["report", "c.jsonl", "--out", "rep"],
            &["merge", "c.jsonl", "--out", "m.jsonl"],
            &["check", "good.jsonl", "c.jsonl"],
        ];
        for args in commands {
            let o = assay(&d, args);
            let (_, err) = text(&o);
            assert_eq!(o.status.code(), Some(2), "{what}, {args:?}: {err}");
            assert!(
                err.contains(&format!("c.jsonl, {line}:")),
                "{what}, {args:?}: {err}"
            );
        }
        assert!(!d.join("m.jsonl").exists(), "{what}: merge wrote a file");
        assert!(!d.join("rep").join("report.md").exists(), "{what}");
    }
}

// ---- item 7: exit codes of write failures, atomic outputs ----

/// Run assay under `sh` with a file-size limit of one 512-byte block (SIGXFSZ ignored, so a
/// write past it fails with EFBIG, as on a full disk).
fn assay_with_small_disk(d: &Path, args: &str) -> std::process::Output {
    let bin = assay_integration::assay_bin();
    std::process::Command::new("sh")
        .arg("-c")
        .arg(format!(
            "trap '' XFSZ; ulimit -f 1; exec '{}' {args}",
            bin.display()
        ))
        .current_dir(d)
        .output()
        .unwrap()
}

#[test]
fn write_failures_exit_2_and_leave_no_torn_file() {
    let d = scratch("hostile-writes");
    small_results(&d);
    // `check` (and `table`) with standard output on a full device: 2, naming what failed.
    let full = std::fs::OpenOptions::new().write(true).open("/dev/full");
    if let Ok(full) = full {
        let o = std::process::Command::new(assay_integration::assay_bin())
            .args(["check", "good.jsonl", "good.jsonl"])
            .current_dir(&d)
            .stdout(full)
            .output()
            .unwrap();
        assert_eq!(o.status.code(), Some(2), "{:?}", text(&o));
        assert!(text(&o).1.contains("standard output"), "{:?}", text(&o));
    }
    // `merge` onto a full disk: the old file stays whole, no temporary file is left.
    write(&d, "m.jsonl", "old\n");
    let o = assay_with_small_disk(&d, "merge good.jsonl --out m.jsonl --replace");
    assert_eq!(o.status.code(), Some(2), "{:?}", text(&o));
    assert!(text(&o).1.contains("m.jsonl"), "{:?}", text(&o));
    assert_eq!(std::fs::read_to_string(d.join("m.jsonl")).unwrap(), "old\n");
    // `plot` onto a full disk: no empty or torn SVG.
    let o = assay_with_small_disk(&d, "plot good.jsonl --out charts");
    assert_eq!(o.status.code(), Some(2), "{:?}", text(&o));
    if d.join("charts").exists() {
        for e in std::fs::read_dir(d.join("charts")).unwrap() {
            let p = e.unwrap().path();
            let svg = std::fs::read_to_string(&p).unwrap();
            assert!(
                svg.trim_end().ends_with("</svg>"),
                "{} is torn",
                p.display()
            );
        }
    }
    // `plot` and `report` onto an existing file: 2, like `run` and `merge`.
    for cmd in ["plot", "report"] {
        let o = assay(&d, &[cmd, "good.jsonl", "--out", "m.jsonl"]);
        assert_eq!(o.status.code(), Some(2), "{cmd}: {:?}", text(&o));
    }
    assert_eq!(
        strays(&d, &["s.toml", "good.jsonl", "m.jsonl"]),
        Vec::<String>::new()
    );
}

// ---- item 6: one study however its values are written ----

#[test]
fn numbers_and_defaults_written_differently_are_the_same_study() {
    let d = scratch("hostile-normalise");
    let study = |grid: &str, extra: &str| {
        format!(
            "[study]\nname = \"s\"\nreplicates = 2\n[sampler]\nparticles = 20\niterations = 3\n\
             {extra}[grid]\nproposal_scale = {grid}\n{}",
            gauss(2)
        )
    };
    write(&d, "a.toml", &study("[0.5, 1]", ""));
    write(&d, "b.toml", &study("[0.5, 1.0]", "initial_scale = 1.0\n"));
    for (f, out) in [("a.toml", "a.jsonl"), ("b.toml", "b.jsonl")] {
        let o = assay(&d, &["run", f, "--quiet", "--out", out]);
        assert!(o.status.success(), "{:?}", text(&o));
    }
    // The same seeds, so the same records.
    assert_eq!(
        canonical_runs(&d.join("a.jsonl")),
        canonical_runs(&d.join("b.jsonl"))
    );
    let o = assay(&d, &["check", "a.jsonl", "b.jsonl"]);
    assert!(o.status.success(), "{:?}", text(&o));
    let o = assay(
        &d,
        &["run", "b.toml", "--quiet", "--resume", "--out", "a.jsonl"],
    );
    assert!(o.status.success(), "{:?}", text(&o));
    // A real difference is named, key and values.
    write(&d, "c.toml", &study("[0.5, 1.0]", "initial_scale = 2.0\n"));
    let o = assay(
        &d,
        &["run", "c.toml", "--quiet", "--resume", "--out", "a.jsonl"],
    );
    assert_eq!(o.status.code(), Some(2));
    let err = text(&o).1;
    assert!(
        err.contains("[sampler] initial_scale: 1.0 (the default) against 2.0"),
        "{err}"
    );
    assert!(!d.join("a.jsonl.logs").exists());
}

// ---- item 8: the smaller ones ----

#[test]
fn threads_labels_numbers_and_data_are_bounded_and_blamed_right() {
    let d = scratch("hostile-small");
    // Far more threads than runs: capped, the study runs.
    write(
        &d,
        "s.toml",
        &format!(
            "[study]\nname = \"s\"\nreplicates = 3\n[sampler]\nparticles = 20\niterations = 3\n[grid]\nproposal_scale = [0.5, 1.0]\n{}",
            gauss(2)
        ),
    );
    let t0 = Instant::now();
    let o = assay(
        &d,
        &[
            "run",
            "s.toml",
            "--quiet",
            "--threads",
            "100000",
            "--out",
            "r.jsonl",
        ],
    );
    assert!(o.status.success(), "{:?}", text(&o));
    assert!(t0.elapsed() < GENEROUS);
    assert_eq!(canonical_runs(&d.join("r.jsonl")).len(), 6);
    // A label too long to name a log file is refused up front.
    let long = "x".repeat(300);
    write(
        &d,
        "l.toml",
        &format!("[[target]]\nlabel = \"{long}\"\nfamily = \"gaussian\"\ndim = 1\n"),
    );
    let o = assay(&d, &["run", "l.toml", "--quiet", "--out", "l.jsonl"]);
    assert_eq!(o.status.code(), Some(2));
    assert!(text(&o).1.contains("at most 200"), "{:?}", text(&o));
    // Huge numbers are shown in exponent form, not with 300 digits.
    write(
        &d,
        "t.toml",
        &format!("[study]\ntimeout_s = 1e300\n{}", gauss(1)),
    );
    let o = assay(&d, &["run", "t.toml", "--quiet", "--out", "t.jsonl"]);
    assert_eq!(o.status.code(), Some(2));
    let err = text(&o).1;
    assert!(err.contains("1e300") && err.len() < 400, "{err}");
    // Overflowing data are blamed on the data, not on a prior_scale never set.
    write(&d, "data.csv", "x1,y\n1e308,1\n2,3\n1,1\n");
    write(
        &d,
        "c.toml",
        "[[target]]\nfamily = \"linear-regression\"\ndim = 1\ndata = \"data.csv\"\n",
    );
    let o = assay(&d, &["run", "c.toml", "--quiet", "--out", "c.jsonl"]);
    assert_eq!(o.status.code(), Some(2));
    let err = text(&o).1;
    assert!(err.contains("`data`") || err.contains("data"), "{err}");
    assert!(
        !err.contains("prior_scale") && err.contains("1e308"),
        "{err}"
    );
}

#[test]
fn a_tampered_reference_file_is_refused() {
    let d = scratch("hostile-reference");
    let target =
        std::path::PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../examples/external_target.py");
    let study = format!(
        "[study]\nname = \"s\"\nreplicates = 2\n[sampler]\nparticles = 50\niterations = 3\n\
         [reference]\nruns = 2\nparticles = 200\n[[target]]\nlabel = \"ext\"\nfamily = \"external\"\n\
         command = [\"python3\", \"{}\"]\ndim = 2\n",
        target.display()
    );
    write(&d, "s.toml", &study);
    let o = assay(&d, &["run", "s.toml", "--quiet", "--out", "r.jsonl"]);
    assert!(o.status.success(), "{:?}", text(&o));
    let refs: Vec<_> = std::fs::read_dir(d.join("references"))
        .unwrap()
        .map(|e| e.unwrap().path())
        .collect();
    assert_eq!(refs.len(), 1);
    let good = std::fs::read_to_string(&refs[0]).unwrap();
    let edits: [fn(&mut serde_json::Value); 2] = [
        |v| v["mean"] = serde_json::json!([0.0]),
        |v| v["mean_se"][0] = serde_json::json!(-1.0),
    ];
    for e in edits {
        let mut v: serde_json::Value = serde_json::from_str(&good).unwrap();
        e(&mut v);
        std::fs::write(&refs[0], v.to_string()).unwrap();
        let o = assay(
            &d,
            &["run", "s.toml", "--quiet", "--replace", "--out", "r.jsonl"],
        );
        assert_eq!(o.status.code(), Some(2), "{:?}", text(&o));
        assert!(
            text(&o).1.contains("not a usable reference"),
            "{:?}",
            text(&o)
        );
    }
}
