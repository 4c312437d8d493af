//! End-to-end tests of `assay plot` and `assay report` through the binary, on a small results
//! file written by hand (so they do not depend on the sampler engine).

use std::path::Path;

use assay_integration::{assay, scratch, text};
use serde_json::json;

/// One target, a grid of 2 x 2 cells, 3 finished replicates each and one failed run (a study of
/// 4 replicates, interrupted: the reader refuses a replicate beyond the header's count).
fn write_results(path: &Path) {
    let header = json!({
        "schema": "assay-results/1",
        "study": {
            "name": "hand", "replicates": 4, "seed": 1, "timeout_s": null,
            "sampler": { "particles": 100 },
            "grid": [["proposal_scale", [0.5, 1.0]], ["move", ["random-walk", "metropolis"]]]
        },
        "targets": [{
            "label": "g2", "family": "gaussian", "dim": 2, "log_z": 0.0,
            "mean": [0.0, 0.0], "covariance": [[1.0, 0.0], [0.0, 1.0]]
        }]
    });
    let mut lines = vec![header.to_string()];
    let mut k = 0.0f64;
    for scale in [0.5, 1.0] {
        for mv in ["random-walk", "metropolis"] {
            for rep in 0..3u64 {
                k += 1.0;
                let e = (k * 0.7).sin() * 0.1 * scale;
                let trace: Vec<_> = (1..=5)
                    .map(|i| json!({"iteration": i, "ess": 100.0 - 10.0 * i as f64, "resampled": i == 3, "acceptance": 0.4}))
                    .collect();
                lines.push(
                    json!({
                        "target": "g2", "settings": {"move": mv, "proposal_scale": scale},
                        "replicate": rep, "seed": rep, "status": "ok", "error": null,
                        "mean": [e, -e], "covariance": [[1.0, 0.0], [0.0, 1.0]],
                        "log_evidence": e - 0.01, "kish_ess": 80.0, "resamples": 1,
                        "evaluations": 500, "seconds": 0.01 * scale + 0.001 * k, "trace": trace
                    })
                    .to_string(),
                );
            }
        }
    }
    lines.push(
        json!({
            "target": "g2", "settings": {"move": "metropolis", "proposal_scale": 1.0},
            "replicate": 3, "seed": 3, "status": "failed", "error": "weights degenerate",
            "mean": null, "covariance": null, "log_evidence": null, "kish_ess": null,
            "resamples": 0, "evaluations": 0, "seconds": 0.0, "trace": []
        })
        .to_string(),
    );
    std::fs::write(path, lines.join("\n") + "\n").expect("write results");
}

#[test]
fn plot_writes_every_chart() {
    let dir = scratch("plot");
    write_results(&dir.join("r.jsonl"));
    let out = assay(&dir, &["plot", "r.jsonl", "--out", "charts"]);
    assert!(out.status.success(), "{}", text(&out).1);
    for f in [
        "error-vs-cost.svg",
        "evidence-error.svg",
        "traces.svg",
        "heatmap-proposal_scale-move.svg",
    ] {
        let svg = std::fs::read_to_string(dir.join("charts").join(f)).expect(f);
        assert!(svg.starts_with("<?xml"), "{f}");
        assert!(svg.trim_end().ends_with("</svg>"), "{f}");
    }
}

#[test]
fn report_embeds_charts_and_names_failures() {
    let dir = scratch("report");
    write_results(&dir.join("r.jsonl"));
    let out = assay(&dir, &["report", "r.jsonl", "--out", "rep"]);
    assert!(out.status.success(), "{}", text(&out).1);
    let md = std::fs::read_to_string(dir.join("rep/report.md")).expect("report.md");
    assert!(md.contains("# Study report: `hand`"));
    assert!(md.contains("](error-vs-cost.svg)"));
    assert!(md.contains("`weights degenerate`"));
    assert!(dir.join("rep/traces.svg").exists());
}

#[test]
fn bad_arguments_are_explained() {
    let dir = scratch("plot-bad");
    write_results(&dir.join("r.jsonl"));
    let out = assay(&dir, &["plot", "r.jsonl", "--out", "c", "--score", "rmse"]);
    assert_eq!(out.status.code(), Some(2));
    assert!(
        text(&out).1.contains("--score `rmse` is not a metric"),
        "{}",
        text(&out).1
    );
    let out = assay(&dir, &["report", "missing.jsonl", "--out", "c"]);
    assert_eq!(out.status.code(), Some(2));
    assert!(text(&out).1.contains("missing.jsonl"));
    // An output that cannot be written is exit 2, as for `run` and `merge` (1 is a regression).
    let out = assay(&dir, &["plot", "r.jsonl", "--out", "r.jsonl"]);
    assert_eq!(out.status.code(), Some(2));
    assert!(
        text(&out)
            .1
            .contains("r.jsonl: cannot create the output directory")
    );
}
