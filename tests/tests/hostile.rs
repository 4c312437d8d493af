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

fn runs_with_errors(path: &Path) -> Vec<serde_json::Value> {
    canonical_runs(path)
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
    let runs = runs_with_errors(&d.join("r.jsonl"));
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
    let runs = runs_with_errors(&d.join("r.jsonl"));
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
    write(&d, "ok.toml", &format!("[study]\nname = \"s\"\nreplicates = 2\n[sampler]\nparticles = 20\niterations = 3\n{}", gauss(2)));
    assert!(assay(&d, &["run", "ok.toml", "--quiet", "--out", "r.jsonl"]).status.success());
    let before = std::fs::read(d.join("r.jsonl")).unwrap();
    for (sampler, needle) in [
        ("particles = 1000000000000", "particles"),
        ("particles = 9223372036854775807", "particles"),
        ("steps = 1000000000000\npath = \"tempered\"\nschedule = \"fixed\"", "steps"),
        ("particles = 1000000000", "of memory"),
    ] {
        let study = format!("[study]\nname = \"s\"\nreplicates = 2\n[sampler]\n{sampler}\n{}", gauss(10));
        write(&d, "big.toml", &study);
        let o = assay(&d, &["run", "big.toml", "--quiet", "--replace", "--out", "r.jsonl"]);
        let (_, err) = text(&o);
        assert_eq!(o.status.code(), Some(2), "{sampler}: {err}");
        assert!(err.contains(needle), "{sampler}: {err}");
        assert!(!err.contains("panicked"), "{err}");
        assert_eq!(std::fs::read(d.join("r.jsonl")).unwrap(), before, "{sampler}");
    }
    let study = format!(
        "[study]\nname = \"s\"\n[reference]\nruns = 1000000000\n[[target]]\nfamily = \"external\"\n\
         command = [\"true\"]\ndim = 2\n"
    );
    write(&d, "ref.toml", &study);
    let o = assay(&d, &["run", "ref.toml", "--quiet", "--replace", "--out", "r.jsonl"]);
    assert_eq!(o.status.code(), Some(2), "{:?}", text(&o));
    assert!(text(&o).1.contains("runs"), "{:?}", text(&o));
    assert_eq!(std::fs::read(d.join("r.jsonl")).unwrap(), before);
    assert_eq!(strays(&d, &["ok.toml", "big.toml", "ref.toml", "r.jsonl"]), Vec::<String>::new());
}

#[test]
fn a_replaced_file_keeps_the_old_results_until_the_study_has_started() {
    let d = scratch("hostile-replace");
    write(&d, "s.toml", &format!("[study]\nname = \"s\"\nreplicates = 2\n[sampler]\nparticles = 20\niterations = 3\n{}", gauss(2)));
    assert!(assay(&d, &["run", "s.toml", "--quiet", "--out", "r.jsonl"]).status.success());
    let before = std::fs::read(d.join("r.jsonl")).unwrap();
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
    write(&d, "s.toml", &format!("[study]\nname = \"s\"\nreplicates = 3\n[sampler]\nparticles = 20\niterations = 3\n{}", gauss(2)));
    let o = assay(&d, &["run", "s.toml", "--quiet", "--replace", "--out", "r.jsonl"]);
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
    let stride = trace[1]["stride"].as_u64().expect("a thinned trace says so");
    assert!(stride >= 2 && stride.is_power_of_two());
    assert_eq!(trace[1]["iteration"].as_u64(), Some(1 + stride));
    assert!(assay(&d, &["table", "r.jsonl"]).status.success());
}
