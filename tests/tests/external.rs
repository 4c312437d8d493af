//! External samplers and targets over the JSON Lines protocol, end to end through the binary:
//! the shipped Python examples, and failure handling (garbage, early exit, hang).

use std::path::PathBuf;

use assay_integration::{assay, scratch, text};
use serde_json::Value;

fn example(name: &str) -> String {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("..")
        .join("examples")
        .join(name)
        .to_string_lossy()
        .into_owned()
}

fn records(path: &std::path::Path) -> Vec<Value> {
    std::fs::read_to_string(path)
        .unwrap()
        .lines()
        .skip(1)
        .map(|l| serde_json::from_str(l).unwrap())
        .collect()
}

/// Deadline (`timeout_s`) of the studies whose programs misbehave at once (garbage, early exit,
/// wrong lengths, a bad exit status): they must fail by their misbehaviour, never by the
/// deadline, however loaded the machine. Python's start alone took 0.35 s with one build
/// running on the 2-core machine, and with six busy loops every such program overran a 1.5 s
/// deadline; these programs fail within a second of starting, so a deadline they never reach
/// costs no time.
const PROMPT_FAILURE_TIMEOUT_S: f64 = 120.0;

/// Deadline of the studies of programs that hang (sleep for 600 s): they fail by the deadline
/// at any speed of the machine, so it can be short.
const HANG_TIMEOUT_S: f64 = 1.5;

/// Run a study text in `d` to `out` and return its records.
fn run_records(d: &std::path::Path, file: &str, study: &str, out: &str) -> Vec<Value> {
    std::fs::write(d.join(file), study).unwrap();
    let o = assay(d, &["run", file, "--quiet", "--out", out]);
    assert!(o.status.success(), "{:?}", text(&o));
    records(&d.join(out))
}

#[test]
fn built_in_and_external_samplers_share_one_table() {
    let d = scratch("external-ok");
    // The external target is the Python example (a 2-d Gaussian whose reference values are
    // stated here in closed form: log Z = log(2 pi) + 1/2 log|Sigma|, |Sigma| = 0.14).
    let study = format!(
        r#"
[study]
name = "mixed"
replicates = 6
seed = 3
timeout_s = 60

[sampler]
particles = 300
iterations = 8
initial_scale = 2.0
proposal_scale = 0.5

[grid]
external = [[], ["python3", "{sampler}"]]

[[target]]
label = "g2"
family = "gaussian"
dim = 2
ar1 = 0.3

[[target]]
label = "bridge-offsets"
family = "external"
command = ["python3", "{target}"]
dim = 2
log_z = 0.854820638222929
mean = [1.0, -0.5]
covariance = [[1.0, 0.6], [0.6, 0.5]]
"#,
        sampler = example("external_sampler.py"),
        target = example("external_target.py"),
    );
    std::fs::write(d.join("s.toml"), study).unwrap();
    let o = assay(&d, &["run", "s.toml", "--out", "r.jsonl"]);
    let (out, err) = text(&o);
    assert!(o.status.success(), "{err}");
    let recs = records(&d.join("r.jsonl"));
    assert_eq!(recs.len(), 2 * 2 * 6);
    for r in &recs {
        assert_eq!(r["status"], "ok", "{r}");
        assert!(r["evaluations"].as_u64().unwrap() >= 300 * 8);
    }
    // Both samplers' rows appear in one table, scored the same way.
    assert!(
        out.contains("built-in") && out.contains("external_sampler.py"),
        "{out}"
    );
    let j = assay(&d, &["table", "r.jsonl", "--format", "json"]);
    let t: Value = serde_json::from_slice(&j.stdout).unwrap();
    let rows = t["rows"].as_array().unwrap();
    assert_eq!(rows.len(), 4);
    for row in rows {
        assert!(row["rmse_mean"].as_f64().is_some() && row["log_z_error_mean"].as_f64().is_some());
        // Both samplers run the same static algorithm at N = 300; a mean error above 0.5
        // (several posterior standard deviations) would mean the protocol mangled points.
        assert!(row["rmse_mean"].as_f64().unwrap() < 0.5, "{row}");
    }
    // The external sampler's stderr went to a per-run log.
    let logs: Vec<_> = std::fs::read_dir(d.join("r.jsonl.logs")).unwrap().collect();
    assert!(!logs.is_empty());
}

/// A study where every external program misbehaves in its own way: each run must fail with
/// the reason, and the study must go on (the built-in cell still succeeds).
#[test]
fn misbehaving_programs_fail_their_runs_only() {
    let d = scratch("external-bad");
    let scripts = [
        (
            "garbage.py",
            "import sys\nsys.stdin.readline()\nprint('this is not json', flush=True)\n",
        ),
        (
            "early_exit.py",
            "import sys\nsys.stdin.readline()\nsys.exit(3)\n",
        ),
        (
            "hang.py",
            "import sys, time\nsys.stdin.readline()\ntime.sleep(600)\n",
        ),
        (
            "wrong_length.py",
            "import sys, json\nsys.stdin.readline()\nprint(json.dumps({'kind':'evaluate','points':[[1.0]]}), flush=True)\nsys.stdin.readline()\n",
        ),
        (
            "bad_exit.py",
            "import sys, json\nsys.stdin.readline()\nprint(json.dumps({'kind':'result','mean':[0.0,0.0]}), flush=True)\nsys.exit(1)\n",
        ),
    ];
    let mut prompt = vec!["[]".to_string()];
    let mut hanging = Vec::new();
    for (name, body) in scripts {
        std::fs::write(d.join(name), body).unwrap();
        let entry = format!("[\"python3\", \"{name}\"]");
        if name.starts_with("hang") {
            hanging.push(entry);
        } else {
            prompt.push(entry);
        }
    }
    let study = |axis: &[String], timeout: f64| {
        format!(
            "[study]\nname = \"bad\"\nreplicates = 2\ntimeout_s = {timeout}\n[sampler]\nparticles = 50\niterations = 3\n[grid]\nexternal = [{}]\n[[target]]\nfamily = \"gaussian\"\ndim = 2\n",
            axis.join(", ")
        )
    };
    let mut recs = run_records(
        &d,
        "s.toml",
        &study(&prompt, PROMPT_FAILURE_TIMEOUT_S),
        "r.jsonl",
    );
    let t0 = std::time::Instant::now();
    recs.extend(run_records(
        &d,
        "hang.toml",
        &study(&hanging, HANG_TIMEOUT_S),
        "hang.jsonl",
    ));
    // The hanging program is stopped at the deadline, not waited for (600 s).
    assert!(t0.elapsed().as_secs_f64() < 300.0);
    assert_eq!(recs.len(), 12);
    let reason = |script: &str| -> Vec<String> {
        recs.iter()
            .filter(|r| r["settings"]["external"].to_string().contains(script))
            .map(|r| {
                assert_eq!(r["status"], "failed", "{r}");
                r["error"].as_str().unwrap().to_string()
            })
            .collect()
    };
    for e in reason("garbage.py") {
        assert!(e.contains("malformed line 1"), "{e}");
    }
    for e in reason("early_exit.py") {
        assert!(
            e.contains("exited early") || e.contains("closed its output"),
            "{e}"
        );
    }
    for e in reason("hang.py") {
        assert!(e.contains("time limit"), "{e}");
    }
    for e in reason("wrong_length.py") {
        assert!(e.contains("point 0 has 1 coordinates"), "{e}");
    }
    for e in reason("bad_exit.py") {
        assert!(e.contains("exited with"), "{e}");
    }
    let ok: Vec<&Value> = recs
        .iter()
        .filter(|r| r["settings"]["external"] == serde_json::json!([]))
        .collect();
    assert_eq!(ok.len(), 2);
    assert!(ok.iter().all(|r| r["status"] == "ok"));
}

#[test]
fn misbehaving_external_targets_fail_their_runs_only() {
    let d = scratch("external-target-bad");
    let scripts = [
        (
            "t_garbage.py",
            "import sys\nfor line in sys.stdin:\n    print('nope', flush=True)\n",
        ),
        (
            "t_exit.py",
            "import sys\nsys.stdin.readline()\nsys.exit(2)\n",
        ),
        (
            "t_hang.py",
            "import sys, time\nsys.stdin.readline()\ntime.sleep(600)\n",
        ),
        (
            "t_short.py",
            "import sys, json\nfor line in sys.stdin:\n    print(json.dumps({'kind':'log_density','values':[0.0]}), flush=True)\n",
        ),
    ];
    let mut prompt = String::new();
    let mut hanging = String::new();
    for (name, body) in scripts {
        std::fs::write(d.join(name), body).unwrap();
        let table = format!(
            "[[target]]\nlabel = \"{}\"\nfamily = \"external\"\ncommand = [\"python3\", \"{name}\"]\ndim = 2\n",
            name.trim_end_matches(".py").replace('_', "-")
        );
        if name.contains("hang") {
            hanging.push_str(&table);
        } else {
            prompt.push_str(&table);
        }
    }
    let study = |timeout: f64, targets: &str| {
        format!(
            "[study]\nname = \"badt\"\nreplicates = 2\ntimeout_s = {timeout}\n[sampler]\nparticles = 20\niterations = 3\n[[target]]\nlabel = \"fine\"\nfamily = \"gaussian\"\ndim = 2\n{targets}"
        )
    };
    let mut recs = run_records(
        &d,
        "s.toml",
        &study(PROMPT_FAILURE_TIMEOUT_S, &prompt),
        "r.jsonl",
    );
    recs.extend(run_records(
        &d,
        "hang.toml",
        &study(HANG_TIMEOUT_S, &hanging),
        "hang.jsonl",
    ));
    assert_eq!(recs.len(), 12);
    for r in &recs {
        let label = r["target"].as_str().unwrap();
        if label == "fine" {
            assert_eq!(r["status"], "ok");
            continue;
        }
        assert_eq!(r["status"], "failed", "{r}");
        let e = r["error"].as_str().unwrap();
        assert!(e.contains("target evaluation failed"), "{e}");
        let expect = match label {
            "t-garbage" => "malformed line",
            "t-exit" => "exited early",
            "t-hang" => "time limit",
            _ => "1 values for 20 points",
        };
        assert!(e.contains(expect), "{label}: {e}");
    }
    // Scoring a file with unknown references still works (no reference values: no scores).
    let j = assay(&d, &["table", "r.jsonl"]);
    assert!(j.status.success());
}
