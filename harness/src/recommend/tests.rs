//! Tests of the recommendation rule on constructed rankings (values worked by hand from the
//! rule in the module documentation) and of its bootstrap on constructed results files.

use serde_json::{Map, Value, json};
use statrs::distribution::{ContinuousCDF, Normal};

use super::*;
use crate::plot::testkit;
use crate::results::{RunRecord, SCHEMA};
use crate::sampler::{RunOutput, RunStatus};
use crate::scores::CellScores;
use crate::table::{self, FLAG_FAILED_RUNS};

fn settings(scale: f64) -> Map<String, Value> {
    let mut s = Map::new();
    s.insert("proposal_scale".into(), json!(scale));
    s
}

/// A ranked row of the cell `proposal_scale = scale` on `target` with metric `value`.
fn row(target: &str, scale: f64, value: Option<f64>, flags: &[&'static str]) -> Row {
    let mut scores = CellScores::empty();
    scores.replicates_ok = 16;
    if flags.contains(&FLAG_BIASED) {
        scores.bias_p = Some(1e-6);
        scores.bias_share = Some(0.5);
    }
    if flags.contains(&FLAG_FAILED_RUNS) {
        scores.replicates_failed = 2;
        scores.replicates_ok = 14;
    }
    if flags.contains(&FLAG_TOO_FEW) {
        scores.replicates_ok = 1;
    }
    Row {
        target: target.into(),
        settings: settings(scale),
        rank: 0,
        flags: flags.to_vec(),
        scores,
        metric_value: value,
        interval: None,
        eliminated: None,
        sweep: None,
    }
}

fn ranking(metric: Metric, rows: Vec<Row>) -> Ranking {
    Ranking {
        scored: Vec::new(),
        metric,
        rows,
        raced: false,
    }
}

fn targets() -> Vec<String> {
    vec!["a".to_string(), "b".to_string()]
}

fn scale_of(c: &Candidate) -> f64 {
    c.settings["proposal_scale"].as_f64().unwrap()
}

#[test]
fn a_cell_ten_times_worse_on_one_target_loses_the_worst_case_but_wins_the_mean() {
    // ess_per_second (higher is better). Worked by hand:
    //   cell 1: a 100, b 10  -> relative (1, 0.1):   worst 0.1,  geometric sqrt(0.1)  = 0.316
    //   cell 2: a 20,  b 40  -> relative (0.2, 0.4): worst 0.2,  geometric sqrt(0.08) = 0.283
    //   cell 3: a 1,   b 100 -> relative (0.01, 1):  worst 0.01, geometric 0.1
    let rows = vec![
        row("a", 1.0, Some(100.0), &[]),
        row("a", 2.0, Some(20.0), &[]),
        row("a", 3.0, Some(1.0), &[]),
        row("b", 1.0, Some(10.0), &[]),
        row("b", 2.0, Some(40.0), &[]),
        row("b", 3.0, Some(100.0), &[]),
    ];
    let r = ranking(Metric::EssPerSecond, rows);
    let worst = select(&targets(), &r, RecommendBy::Worst);
    let best = worst.recommended().unwrap();
    assert_eq!(scale_of(best), 2.0);
    assert!((best.aggregate - 0.2).abs() < 1e-15);
    assert_eq!(scale_of(worst.runner_up().unwrap()), 1.0);
    assert_eq!(worst.eligible.len(), 3);
    assert!(worst.excluded.is_empty());
    let geo = select(&targets(), &r, RecommendBy::GeometricMean);
    let best = geo.recommended().unwrap();
    assert_eq!(scale_of(best), 1.0);
    assert!((best.aggregate - 0.1f64.sqrt()).abs() < 1e-12);
    assert_eq!(best.targets[1].relative, 0.1);
    // The normaliser of each target is its best valid cell.
    assert_eq!(geo.normaliser("a").unwrap().value, 100.0);
    assert_eq!(geo.normaliser("b").unwrap().settings, settings(3.0));
}

#[test]
fn a_cell_biased_on_one_target_is_never_recommended() {
    // Cell 1 is best on both targets but biased on b; it is excluded under either rule, and
    // it does not serve as b's normaliser (cell 2's 50 does: relative 1 there).
    let rows = vec![
        row("a", 1.0, Some(100.0), &[]),
        row("a", 2.0, Some(50.0), &[]),
        row("b", 1.0, Some(100.0), &[FLAG_BIASED]),
        row("b", 2.0, Some(50.0), &[]),
    ];
    let r = ranking(Metric::EssPerSecond, rows);
    for by in [RecommendBy::Worst, RecommendBy::GeometricMean] {
        let rec = select(&targets(), &r, by);
        assert_eq!(rec.eligible.len(), 1);
        assert_eq!(scale_of(rec.recommended().unwrap()), 2.0);
        assert!(rec.runner_up().is_none());
        assert_eq!(rec.recommended().unwrap().targets[1].relative, 1.0);
        assert_eq!(rec.excluded.len(), 1);
        assert_eq!(
            rec.excluded[0].ruled_out,
            vec![(
                "b".to_string(),
                vec![Exclusion::Biased {
                    bias_p: Some(1e-6),
                    bias_share: Some(0.5)
                }]
            )]
        );
    }
}

#[test]
fn with_no_eligible_cell_every_cell_says_which_target_rules_it_out() {
    let rows = vec![
        row("a", 1.0, Some(100.0), &[FLAG_BIASED]),
        row("b", 1.0, Some(100.0), &[FLAG_FAILED_RUNS]),
        row("a", 2.0, Some(50.0), &[]),
        row("b", 2.0, None, &[FLAG_TOO_FEW]),
        row("a", 3.0, None, &[]),
        // cell 3 has no runs on b at all
    ];
    let r = ranking(Metric::EssPerSecond, rows);
    let rec = select(&targets(), &r, RecommendBy::Worst);
    assert!(rec.recommended().is_none());
    assert!(rec.comparison.is_none());
    assert_eq!(rec.cells, 3);
    let find = |s: f64| {
        rec.excluded
            .iter()
            .find(|e| e.settings == settings(s))
            .unwrap()
            .ruled_out
            .clone()
    };
    assert_eq!(
        find(1.0),
        vec![
            (
                "a".to_string(),
                vec![Exclusion::Biased {
                    bias_p: Some(1e-6),
                    bias_share: Some(0.5)
                }]
            ),
            (
                "b".to_string(),
                vec![Exclusion::FailedRuns {
                    failed: 2,
                    total: 16
                }]
            )
        ]
    );
    assert_eq!(
        find(2.0),
        vec![("b".to_string(), vec![Exclusion::TooFewRuns { ok: 1 }])]
    );
    assert_eq!(
        find(3.0),
        vec![
            ("a".to_string(), vec![Exclusion::NoValue]),
            ("b".to_string(), vec![Exclusion::NoRuns])
        ]
    );
    // Fewest ruling targets first.
    assert_eq!(rec.excluded[0].settings, settings(2.0));
    let md = render::markdown(&testkit::one_axis_study(), &rec, 2);
    assert!(md.contains("No cell is eligible"), "{md}");
    assert!(md.contains("b (too few finished runs (1))"), "{md}");
}

#[test]
fn lower_is_better_metrics_are_inverted() {
    // rmse_mean: relative efficiency = best / value. Worked by hand:
    //   cell 1: a 0.1, b 0.4 -> (1, 0.25):  worst 0.25
    //   cell 2: a 0.2, b 0.2 -> (0.5, 0.5): worst 0.5
    //   cell 3: a 0.8, b 0.1 -> (0.125, 1): worst 0.125
    let rows = vec![
        row("a", 1.0, Some(0.1), &[]),
        row("a", 2.0, Some(0.2), &[]),
        row("a", 3.0, Some(0.8), &[]),
        row("b", 1.0, Some(0.4), &[]),
        row("b", 2.0, Some(0.2), &[]),
        row("b", 3.0, Some(0.1), &[]),
    ];
    let rec = select(
        &targets(),
        &ranking(Metric::RmseMean, rows),
        RecommendBy::Worst,
    );
    let best = rec.recommended().unwrap();
    assert_eq!(scale_of(best), 2.0);
    assert_eq!(best.targets[0].relative, 0.5);
    assert_eq!(best.aggregate, 0.5);
    assert_eq!(rec.normaliser("a").unwrap().value, 0.1);
    assert_eq!(rec.eligible[2].aggregate, 0.125);
    // The pure function, edge cases included.
    assert_eq!(relative_efficiency(0.2, 0.1, false), 0.5);
    assert_eq!(relative_efficiency(5.0, 10.0, true), 0.5);
    assert_eq!(relative_efficiency(0.0, 0.0, false), 1.0);
    assert_eq!(relative_efficiency(f64::INFINITY, f64::INFINITY, true), 1.0);
    assert_eq!(relative_efficiency(3.0, f64::INFINITY, true), 0.0);
    assert_eq!(relative_efficiency(f64::INFINITY, 1.0, false), 0.0);
    assert_eq!(relative_efficiency(f64::NAN, 1.0, true), 0.0);
    assert_eq!(
        relative_efficiencies(&[0.2, 0.4], &[0.1, 0.1], false),
        vec![0.5, 0.25]
    );
    assert_eq!(aggregate(RecommendBy::Worst, &[]), None);
    assert_eq!(
        aggregate(RecommendBy::GeometricMean, &[0.0, 1.0]),
        Some(0.0)
    );
    assert_eq!(best_value([1.0, f64::NAN, 3.0], true), Some(3.0));
    assert_eq!(best_value([1.0, f64::NAN, 3.0], false), Some(1.0));
}

#[test]
fn ties_are_broken_by_the_other_rule_then_by_the_cell_key() {
    // Cells 1 and 2 tie under worst (0.5) and differ in the geometric mean:
    //   cell 1: (1, 0.5) geometric 0.707; cell 2: (0.5, 0.5) geometric 0.5;
    //   cell 3: a 10, b 100 -> (0.1, 1).
    let rows = vec![
        row("a", 2.0, Some(50.0), &[]),
        row("a", 1.0, Some(100.0), &[]),
        row("a", 3.0, Some(10.0), &[]),
        row("b", 2.0, Some(50.0), &[]),
        row("b", 1.0, Some(50.0), &[]),
        row("b", 3.0, Some(100.0), &[]),
    ];
    let rec = select(
        &targets(),
        &ranking(Metric::EssPerSecond, rows),
        RecommendBy::Worst,
    );
    assert_eq!(scale_of(rec.recommended().unwrap()), 1.0);
    assert_eq!(scale_of(rec.runner_up().unwrap()), 2.0);
    // Identical cells: the smaller key wins, whatever the order of the rows.
    let mut rows = vec![
        row("a", 2.0, Some(50.0), &[]),
        row("a", 1.5, Some(50.0), &[]),
        row("b", 2.0, Some(50.0), &[]),
        row("b", 1.5, Some(50.0), &[]),
    ];
    for _ in 0..2 {
        let rec = select(
            &targets(),
            &ranking(Metric::EssPerSecond, rows.clone()),
            RecommendBy::GeometricMean,
        );
        assert_eq!(scale_of(rec.recommended().unwrap()), 1.5);
        rows.reverse();
    }
}

/// A results file of two 2-d standard Gaussian targets and cells `proposal_scale = s` for each
/// (s, error sd) in `cells`, 32 replicates each. Every coordinate's errors are the 32 normal
/// quantiles (i + 0.5) / 32 of N(0, sd^2), in a different order per coordinate, target and cell,
/// so the estimates are unbiased, the rmse is sd up to the quantiles' own spread, and no
/// random numbers are drawn.
fn gaussian_study(cells: &[(f64, f64)]) -> Results {
    let n = 32u64;
    let z = Normal::new(0.0, 1.0).unwrap();
    let q: Vec<f64> = (0..n)
        .map(|i| z.inverse_cdf((i as f64 + 0.5) / n as f64))
        .collect();
    let grid = vec![(
        "proposal_scale".to_string(),
        cells.iter().map(|(s, _)| json!(s)).collect(),
    )];
    let ts = vec![testkit::target("t1", 2, 0.0), testkit::target("t2", 2, 0.0)];
    let mut header = testkit::header("pair", n, grid, ts.clone());
    header.schema = SCHEMA.into();
    let mut runs = Vec::new();
    for (ti, t) in ts.iter().enumerate() {
        for &(s, sd) in cells {
            for rep in 0..n {
                // Multipliers coprime with 32 give permutations of 0..32.
                let mean = (0..2u64)
                    .map(|k| sd * q[((rep * (2 * k + 3 + 2 * ti as u64) + k) % n) as usize])
                    .collect();
                runs.push(RunRecord {
                    target: t.label.clone(),
                    settings: settings(s),
                    replicate: rep,
                    seed: rep,
                    output: RunOutput {
                        status: RunStatus::Ok,
                        error: None,
                        mean: Some(mean),
                        covariance: None,
                        log_evidence: None,
                        kish_ess: Some(100.0),
                        resamples: 1,
                        evaluations: 100,
                        seconds: 0.01,
                        trace: Vec::new(),
                    },
                });
            }
        }
    }
    Results {
        path: "pair.jsonl".into(),
        header,
        runs,
        eliminations: Vec::new(),
        torn_tail: false,
    }
}

#[test]
fn bootstrap_separates_a_tenfold_gap_and_not_identical_cells() {
    // A tenfold gap in rmse_mean. Cell 0.5's errors are exactly 10 times smaller than cell
    // 1.0's, on both targets, so the ratio of the worst relative efficiencies is 10. Each rmse
    // rests on 64 squared normal errors: its relative standard error is about 1 / sqrt(2 * 64)
    // = 0.088 (delta method on a chi-square with 64 df, any statistics textbook), the log of
    // the ratio of two independent ones about 0.125; 4.5 of those is a factor 1.75, so the
    // interval lies within [10 / 1.75, 10 * 1.75] and far above 1.
    let r = gaussian_study(&[(0.5, 0.01), (1.0, 0.1)]);
    let ranking = table::rank(&r, Metric::RmseMean);
    let rec = recommend(&r, &ranking, RecommendBy::Worst);
    assert_eq!(scale_of(rec.recommended().unwrap()), 0.5);
    let c = rec.comparison.clone().unwrap();
    assert!((c.ratio - 10.0).abs() < 1e-9, "{}", c.ratio);
    let (lo, hi) = c.interval.unwrap();
    assert!(lo > 10.0 / 1.75 && hi < 10.0 * 1.75, "[{lo}, {hi}]");
    assert!(c.distinguishable());
    // Reproducible: the seed is fixed by the study.
    assert_eq!(recommend(&r, &ranking, RecommendBy::Worst), rec);

    // Identical records under two settings. The two cells are resampled independently from the
    // same empirical distribution, so the ratio and its inverse have the same bootstrap law
    // (exchangeability): its median is 1 and the 2.5 % and 97.5 % quantiles straddle 1.
    let r = gaussian_study(&[(0.5, 0.1), (1.0, 0.1)]);
    for by in [RecommendBy::Worst, RecommendBy::GeometricMean] {
        let rec = recommend(&r, &table::rank(&r, Metric::RmseMean), by);
        assert_eq!(scale_of(rec.recommended().unwrap()), 0.5, "the smaller key");
        let c = rec.comparison.clone().unwrap();
        assert_eq!(c.ratio, 1.0);
        let (lo, hi) = c.interval.unwrap();
        assert!(lo < 1.0 && 1.0 < hi, "[{lo}, {hi}]");
        assert!(!c.distinguishable());
        let md = render::markdown(&r, &rec, 2);
        assert!(
            md.contains("not distinguishable at these replicate counts"),
            "{md}"
        );
        let j = render::json(&rec);
        assert_eq!(j["comparison"]["distinguishable"], json!(false));
        assert_eq!(j["by"], json!(by.name()));
    }
}

#[test]
fn a_long_list_of_ruled_out_cells_is_capped() {
    let rows: Vec<Row> = (0..25)
        .map(|i| row("a", i as f64, Some(1.0), &[FLAG_BIASED]))
        .collect();
    let rec = select(
        &["a".to_string()],
        &ranking(Metric::EssPerSecond, rows),
        RecommendBy::Worst,
    );
    let md = render::markdown(&testkit::one_axis_study(), &rec, 2);
    assert!(md.contains("… and 5 more cells"), "{md}");
    assert_eq!(render::json(&rec)["excluded"].as_array().unwrap().len(), 25);
}

#[test]
fn rule_names_parse_back() {
    for (n, by) in RecommendBy::ALL {
        assert_eq!(RecommendBy::parse(n), Some(*by));
        assert_eq!(by.name(), *n);
    }
    assert_eq!(RecommendBy::parse("mean"), None);
    assert_eq!(DEFAULT_RECOMMEND_BY, RecommendBy::Worst);
}
