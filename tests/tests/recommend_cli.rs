//! End-to-end tests of the recommended configuration through the binary: `run`, `table` (markdown
//! and JSON), `report` and the `--recommend-by` option.

use assay_integration::{assay, scratch, text};
use serde_json::Value;

/// 2 targets x 4 cells x 8 replicates of short static runs: well under a second.
const STUDY: &str = r#"
[study]
name = "pick-one"
replicates = 8
seed = 3

[sampler]
particles = 200
iterations = 12
initial_scale = 2.0

[grid]
proposal_scale = [0.3, 0.8]
backward_kernel = ["proposal", "gaussian-optimal-crossfit"]

[[target]]
label = "g3"
family = "gaussian"
dim = 3
ar1 = 0.3

[[target]]
label = "g2-wide"
family = "gaussian"
dim = 2
scale = 2.0
"#;

const SECTION: &str = "## Recommended configuration";

#[test]
fn run_table_and_report_carry_the_recommendation() {
    let d = scratch("recommend");
    std::fs::write(d.join("s.toml"), STUDY).unwrap();

    // A bad rule exits 2 with the allowed values, before any run.
    let bad = assay(
        &d,
        &[
            "run",
            "s.toml",
            "--out",
            "r.jsonl",
            "--recommend-by",
            "average",
        ],
    );
    assert_eq!(bad.status.code(), Some(2), "{:?}", text(&bad));
    assert!(
        text(&bad).1.contains("allowed: worst, geometric-mean"),
        "{:?}",
        text(&bad)
    );
    assert!(!d.join("r.jsonl").exists());

    let o = assay(&d, &["run", "s.toml", "--out", "r.jsonl"]);
    assert!(o.status.success(), "{:?}", text(&o));
    let (md, _) = text(&o);
    // The section comes after the tables and their legend.
    let at = md.find(SECTION).unwrap_or_else(|| panic!("{md}"));
    assert!(md.find("Columns:").unwrap() < at, "{md}");
    let section = &md[at..];
    assert!(section.contains("Rule `worst`"), "{section}");
    assert!(
        section.contains("**Recommended:**") || section.contains("No cell is eligible"),
        "{section}"
    );
    assert!(section.contains("not proven on your model"), "{section}");

    // `table` prints the same section as `run`.
    let t = assay(&d, &["table", "r.jsonl"]);
    assert!(t.status.success());
    assert_eq!(text(&t).0, md);

    let j = assay(
        &d,
        &[
            "table",
            "r.jsonl",
            "--format",
            "json",
            "--recommend-by",
            "geometric-mean",
        ],
    );
    assert!(j.status.success(), "{:?}", text(&j));
    let doc: Value = serde_json::from_slice(&j.stdout).unwrap();
    let rec = &doc["recommendation"];
    assert_eq!(rec["by"], "geometric-mean");
    assert_eq!(rec["metric"], "ess_per_second");
    assert_eq!(rec["cells"], 4);
    let eligible = rec["eligible"].as_array().unwrap();
    let excluded = rec["excluded"].as_array().unwrap();
    assert_eq!(eligible.len() + excluded.len(), 4);
    match eligible.first() {
        Some(first) => {
            assert_eq!(&rec["recommended"], first);
            assert_eq!(first["targets"].as_array().unwrap().len(), 2);
            for t in first["targets"].as_array().unwrap() {
                let r = t["relative_efficiency"].as_f64().unwrap();
                assert!((0.0..=1.0).contains(&r), "{t}");
            }
        }
        None => assert!(rec["recommended"].is_null()),
    }
    assert_eq!(rec["comparison"].is_null(), eligible.len() < 2);
    // The rows are the table's as before.
    assert_eq!(doc["rows"].as_array().unwrap().len(), 8);

    // CSV has no recommendation: one header line and one line per row.
    let csv = assay(&d, &["table", "r.jsonl", "--format", "csv"]);
    assert_eq!(text(&csv).0.lines().count(), 1 + 8);

    for args in [
        &["table", "r.jsonl", "--recommend-by", "mean"][..],
        &[
            "report",
            "r.jsonl",
            "--out",
            "rep",
            "--recommend-by",
            "mean",
        ][..],
    ] {
        let bad = assay(&d, args);
        assert_eq!(bad.status.code(), Some(2), "{args:?}");
        assert!(text(&bad).1.contains("geometric-mean"), "{:?}", text(&bad));
    }
    assert!(!d.join("rep").exists());

    // The report opens with the recommendation: it is the first section.
    let r = assay(&d, &["report", "r.jsonl", "--out", "rep"]);
    assert!(r.status.success(), "{:?}", text(&r));
    let report = std::fs::read_to_string(d.join("rep/report.md")).unwrap();
    let first = report.lines().find(|l| l.starts_with("## ")).unwrap();
    assert_eq!(first, SECTION, "{report}");
}
