//! Helpers for the cross-crate integration tests in `tests/tests/`: locating the `assay`
//! binary, running it, and scratch directories.

use std::path::{Path, PathBuf};
use std::process::{Command, Output};
use std::sync::atomic::{AtomicUsize, Ordering};

/// Path of the `assay` binary built alongside the test executable (same profile).
pub fn assay_bin() -> PathBuf {
    let exe = std::env::current_exe().expect("test executable path");
    // target/<profile>/deps/<test> -> target/<profile>/assay
    let dir = exe
        .parent()
        .and_then(Path::parent)
        .expect("target directory");
    let bin = dir.join(format!("assay{}", std::env::consts::EXE_SUFFIX));
    if !bin.exists() {
        // `cargo test --workspace` builds it (the harness package has an integration test);
        // when only this package is tested, build it here, in the same profile.
        static BUILD: std::sync::Once = std::sync::Once::new();
        BUILD.call_once(|| {
            let cargo = std::env::var("CARGO").unwrap_or_else(|_| "cargo".to_string());
            let mut cmd = Command::new(cargo);
            cmd.args(["build", "-q", "-p", "assay", "--bin", "assay"]);
            if dir.ends_with("release") {
                cmd.arg("--release");
            }
            let _ = cmd.status();
        });
    }
    assert!(
        bin.exists(),
        "{} not found: run the tests with `cargo test --workspace` so that the binary is built",
        bin.display()
    );
    bin
}

/// Run `assay` with arguments in a working directory.
pub fn assay(dir: &Path, args: &[&str]) -> Output {
    Command::new(assay_bin())
        .args(args)
        .current_dir(dir)
        .output()
        .expect("assay runs")
}

/// A fresh, empty scratch directory under the system temp dir.
pub fn scratch(name: &str) -> PathBuf {
    static N: AtomicUsize = AtomicUsize::new(0);
    let d = std::env::temp_dir().join(format!(
        "assay-test-{}-{}-{}",
        name,
        std::process::id(),
        N.fetch_add(1, Ordering::Relaxed)
    ));
    let _ = std::fs::remove_dir_all(&d);
    std::fs::create_dir_all(&d).expect("scratch dir");
    d
}

/// Stdout and stderr of an output as text.
pub fn text(o: &Output) -> (String, String) {
    (
        String::from_utf8_lossy(&o.stdout).into_owned(),
        String::from_utf8_lossy(&o.stderr).into_owned(),
    )
}

/// The run records of a results file, without their timing field, sorted by identity: the
/// part of a results file that must be identical across threads, shards and resumption.
pub fn canonical_runs(path: &Path) -> Vec<serde_json::Value> {
    let text = std::fs::read_to_string(path).expect("results file");
    let mut runs: Vec<serde_json::Value> = text
        .lines()
        .skip(1)
        .filter(|l| !l.trim().is_empty())
        .map(|l| {
            let mut v: serde_json::Value = serde_json::from_str(l).expect("record");
            if let Some(o) = v.as_object_mut() {
                o.remove("seconds");
            }
            v
        })
        .collect();
    runs.sort_by_key(|v| {
        (
            v["target"].as_str().unwrap_or("").to_string(),
            v["settings"].to_string(),
            v["replicate"].as_u64().unwrap_or(0),
        )
    });
    runs
}

/// The run-record lines of a results file as written, byte for byte, with only the
/// `"seconds":<number>` field cut out, sorted: merge, resume and shards must give back exactly
/// these bytes (a number read and written again keeps its bits).
pub fn record_bytes_without_seconds(path: &Path) -> Vec<String> {
    let text = std::fs::read_to_string(path).expect("results file");
    let mut lines: Vec<String> = text
        .lines()
        .skip(1)
        .filter(|l| !l.trim().is_empty())
        .map(|l| match l.find("\"seconds\":") {
            Some(at) => {
                let rest = &l[at..];
                let end = rest.find([',', '}']).unwrap_or(rest.len());
                format!("{}{}", &l[..at], &rest[end..])
            }
            None => l.to_string(),
        })
        .collect();
    lines.sort();
    lines
}
