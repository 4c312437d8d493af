//! End-to-end tests of target sweeps through the binary: expansion order and labels
//! (`assay targets --config`), the header's sweep membership, the sweep view of `assay table`,
//! the sweep chart of `assay plot`, and every bad-sweep error (exit 2 with file:line:col and
//! the key).

use std::path::Path;

use assay_integration::{assay, scratch, text};
use serde_json::Value;

fn write(dir: &Path, name: &str, body: &str) {
    std::fs::write(dir.join(name), body).expect("write");
}

/// A sweep over two keys (dim slowest, as listed first) and a target outside it.
const TWO_KEYS: &str = r#"
[study]
name = "sweep-order"
replicates = 2

[sampler]
particles = 50
iterations = 3

[[target]]
label = "corr"
family = "gaussian"
ar1 = [0.0, 0.9]          # listed first: slowest
dim = [2, 5, 10]
scale = [1.0, 2.0, 3.0]   # a vector (of d values), never a sweep

[[target]]
family = "student-t"
dim = 2
dof = [3, 30.5]
"#;

#[test]
fn expansion_follows_the_file_order_and_labels_from_the_base() {
    let d = scratch("sweep-order");
    // `scale` is a vector for the Gaussian: a list of 3 is kept as a vector, so dim = 2 fails
    // on its length, pointed at by the family's own error.
    write(&d, "s.toml", TWO_KEYS);
    let o = assay(&d, &["targets", "--config", "s.toml"]);
    assert_eq!(o.status.code(), Some(2), "{:?}", text(&o));
    let (_, err) = text(&o);
    assert!(
        err.contains("s.toml:15:1:") && err.contains("`scale`"),
        "{err}"
    );

    write(
        &d,
        "s.toml",
        &TWO_KEYS.replace("scale = [1.0, 2.0, 3.0]", ""),
    );
    let o = assay(&d, &["targets", "--config", "s.toml", "--json"]);
    assert!(o.status.success(), "{:?}", text(&o));
    let list: Vec<Value> = serde_json::from_slice(&o.stdout).expect("json");
    let labels: Vec<&str> = list.iter().filter_map(|t| t["label"].as_str()).collect();
    assert_eq!(
        labels,
        [
            "corr-ar1_0-dim_2",
            "corr-ar1_0-dim_5",
            "corr-ar1_0-dim_10",
            "corr-ar1_0.9-dim_2",
            "corr-ar1_0.9-dim_5",
            "corr-ar1_0.9-dim_10",
            // An unlabelled entry's base is derived from its family (its dim is not a list).
            "student-t-2-dof_3",
            "student-t-2-dof_30.5",
        ]
    );
    assert_eq!(list[4]["dim"], 5);
    assert_eq!(list[4]["sweep"]["label"], "corr");
    assert_eq!(
        list[4]["sweep"]["values"],
        serde_json::json!([["ar1", 0.9], ["dim", 5]])
    );
    // The text listing names the sweep too.
    let o = assay(&d, &["targets", "--config", "s.toml"]);
    let (out, _) = text(&o);
    assert!(
        out.contains("corr-ar1_0.9-dim_5 (gaussian, d = 5)")
            && out.contains("[sweep `corr`: ar1 = 0.9, dim = 5]"),
        "{out}"
    );
    // And the family listing marks what may be swept.
    let o = assay(&d, &["targets"]);
    let (out, _) = text(&o);
    assert!(
        out.contains("AR(1) correlation rho between neighbours (sweepable)"),
        "{out}"
    );
}

/// One bad-sweep case: the `[[target]]` body, the expected `line:col`, and words the message
/// must contain (the key and what is allowed).
fn bad_sweep(body: &str, at: &str, words: &[&str]) {
    let d = scratch("sweep-bad");
    let study =
        format!("[study]\nreplicates = 2\n[sampler]\nparticles = 50\niterations = 3\n{body}");
    write(&d, "bad.toml", &study);
    for args in [
        &["targets", "--config", "bad.toml"][..],
        &["run", "bad.toml", "--quiet"][..],
    ] {
        let o = assay(&d, args);
        let (_, err) = text(&o);
        assert_eq!(o.status.code(), Some(2), "{args:?} {body}: {err}");
        assert!(err.contains(&format!("bad.toml:{at}:")), "{body}: {err}");
        for w in words {
            assert!(err.contains(w), "{body}: `{w}` not in {err}");
        }
        // Nothing was written.
        assert!(!d.join("results").exists(), "{body}");
    }
}

#[test]
fn every_bad_sweep_exits_2_with_its_location_and_key() {
    let head = "[[target]]\nlabel = \"g\"\nfamily = \"gaussian\"\n";
    // Line 6 is the first line of `head`; the swept key is on line 9.
    bad_sweep(
        &format!("{head}dim = []\n"),
        "9:1",
        &[
            "`dim`",
            "empty",
            "allowed: a non-empty list of distinct numbers",
        ],
    );
    bad_sweep(
        &format!("{head}dim = [2, 5, 5]\n"),
        "9:14",
        &["`dim`", "lists 5 twice", "distinct"],
    );
    bad_sweep(
        &format!("{head}dim = 2\nar1 = [0.5, \"high\"]\n"),
        "10:13",
        &["`ar1`", "element 1", "\"high\"", "not a number"],
    );
    // A value the family rejects is pointed at in the list.
    bad_sweep(
        &format!("{head}dim = 2\nar1 = [0.5, 1.5]\n"),
        "10:13",
        &["`ar1`", "1.5", "(-1, 1)", "target `g-ar1_1.5`"],
    );
    bad_sweep(
        &format!("{head}dim = [3, 0]\n"),
        "9:11",
        &["`dim`", "integer >= 1"],
    );
    // More than MAX_SWEEP_TARGETS targets.
    let many: Vec<String> = (1..=40).map(|i| i.to_string()).collect();
    let rho: Vec<String> = (0..30).map(|i| format!("0.{i:02}")).collect();
    bad_sweep(
        &format!(
            "{head}dim = [{}]\nar1 = [{}]\n",
            many.join(", "),
            rho.join(", ")
        ),
        "9:1",
        &[
            "more than 1000 targets",
            "dim: 40 x ar1: 30",
            "MAX_SWEEP_TARGETS",
        ],
    );
    // An expanded label that another target already has.
    bad_sweep(
        &format!(
            "{head}dim = [2, 3]\n[[target]]\nlabel = \"g-dim_3\"\nfamily = \"banana\"\ndim = 2\n"
        ),
        "11:1",
        &["`g-dim_3`", "the sweep `g`", "labels must be unique"],
    );
    // A list on a key that is not sweepable keeps its meaning (a vector) and its error.
    bad_sweep(
        &format!("{head}dim = 2\nmean = [0.0, 1.0, 2.0]\n"),
        "10:1",
        &["`mean`", "length"],
    );
}

/// A tiny study: a sweep over d = 1, 2, 3 and one unswept target, 2 cells, 3 replicates.
const TINY: &str = r#"
[study]
name = "tiny-sweep"
replicates = 3
seed = 5

[sampler]
particles = 100
iterations = 6
initial_scale = 2.0

[grid]
proposal_scale = [0.5, 1.0]

[[target]]
label = "g"
family = "gaussian"
dim = [1, 2, 3]

[[target]]
label = "b"
family = "banana"
dim = 2
curvature = 0.05
spread = 4.0
"#;

#[test]
fn a_swept_study_runs_records_its_sweeps_and_shows_them() {
    let d = scratch("sweep-run");
    write(&d, "s.toml", TINY);
    let o = assay(&d, &["run", "s.toml", "--quiet", "--out", "r.jsonl"]);
    assert!(o.status.success(), "{:?}", text(&o));
    let body = std::fs::read_to_string(d.join("r.jsonl")).expect("results");
    let header: Value = serde_json::from_str(body.lines().next().unwrap()).expect("header");
    let targets = header["targets"].as_array().unwrap();
    assert_eq!(targets.len(), 4);
    assert_eq!(targets[1]["label"], "g-dim_2");
    assert_eq!(targets[1]["params"]["dim"], 2);
    assert_eq!(targets[1]["sweep"]["label"], "g");
    assert!(targets[3].get("sweep").is_none(), "{}", targets[3]);
    // Expanded targets get distinct seeds (seeds depend on the label).
    let mut seeds: Vec<u64> = body
        .lines()
        .skip(1)
        .filter_map(|l| serde_json::from_str::<Value>(l).ok()?["seed"].as_u64())
        .collect();
    assert_eq!(seeds.len(), 4 * 2 * 3);
    seeds.sort_unstable();
    seeds.dedup();
    assert_eq!(seeds.len(), 4 * 2 * 3);

    // The default view: one sweep table, the unswept target's full table.
    let o = assay(&d, &["table", "r.jsonl"]);
    assert!(o.status.success(), "{:?}", text(&o));
    let (md, _) = text(&o);
    assert!(
        md.contains("### Sweep g (gaussian, 3 targets over dim)"),
        "{md}"
    );
    assert!(md.contains("| dim = 1"), "{md}");
    assert!(md.contains("### b (banana"), "{md}");
    assert!(!md.contains("### g-dim_1"), "{md}");
    let o = assay(&d, &["table", "r.jsonl", "--view", "targets"]);
    let (md, _) = text(&o);
    assert!(
        md.contains("### g-dim_1 (gaussian") && !md.contains("### Sweep"),
        "{md}"
    );
    let o = assay(
        &d,
        &[
            "table",
            "r.jsonl",
            "--view",
            "sweeps",
            "--rank-by",
            "rmse_mean",
        ],
    );
    let (md, _) = text(&o);
    assert!(
        md.contains("`rmse_mean` of each cell") && !md.contains("### b ("),
        "{md}"
    );
    let o = assay(&d, &["table", "r.jsonl", "--format", "csv"]);
    let (csv, _) = text(&o);
    assert!(
        csv.starts_with("target,sweep,sweep_dim,proposal_scale,"),
        "{csv}"
    );
    assert!(csv.contains("\ng-dim_3,g,3,"), "{csv}");

    // The chart.
    let o = assay(&d, &["plot", "r.jsonl", "--out", "charts"]);
    assert!(o.status.success(), "{:?}", text(&o));
    let svg = std::fs::read_to_string(d.join("charts").join("sweep-g.svg")).expect("chart");
    assert!(svg.contains("against dim"), "{svg}");

    // `--view sweeps` on a file without sweeps is a usage error.
    write(&d, "flat.toml", &TINY.replace("dim = [1, 2, 3]", "dim = 2"));
    let o = assay(&d, &["run", "flat.toml", "--quiet", "--out", "flat.jsonl"]);
    assert!(o.status.success(), "{:?}", text(&o));
    let o = assay(&d, &["table", "flat.jsonl", "--view", "sweeps"]);
    let (_, err) = text(&o);
    assert_eq!(o.status.code(), Some(2), "{err}");
    assert!(err.contains("has no sweeps"), "{err}");
}
