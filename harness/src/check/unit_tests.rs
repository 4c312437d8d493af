//! Tests of the regression gate on synthetic results drawn from known normal distributions.

use std::path::{Path, PathBuf};

use approx::assert_relative_eq;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, Normal as RNormal};
use serde_json::{Map, Value, json};
use statrs::distribution::{ContinuousCDF, DiscreteCDF, FisherSnedecor, Hypergeometric, StudentsT};

use super::stat::{self, Summary};
use super::*;
use crate::results::{Header, Results, RunRecord, SCHEMA, StudyInfo, TargetInfo, read_results};
use crate::sampler::{RunOutput, RunStatus};

const DIM: usize = 4;
const REPS: u64 = 30;
/// Per-replicate sd of the mean estimate of coordinate j.
fn coord_sd(j: usize) -> f64 {
    0.1 * (j + 1) as f64
}
const LOGZ_SD: f64 = 0.3;
/// A bias of log Z-hat shared by every file (log Z-hat is biased low): 0.5 / (0.3 / sqrt 30) =
/// 9 standard errors, so the one-sample test alone would flag it in every rerun and the
/// baseline guard is exercised.
const LOGZ_BIAS: f64 = -0.5;

fn header(replicates: u64, seed: u64) -> Header {
    let targets = (0..3)
        .map(|t| TargetInfo {
            label: format!("gauss{t}"),
            family: "gaussian".into(),
            dim: DIM,
            log_z: Some(-1.5 * t as f64),
            mean: Some((0..DIM).map(|j| j as f64 - 1.0 + t as f64).collect()),
            covariance: None,
            params: Map::new(),
            reference_run: None,
        })
        .collect();
    Header {
        schema: SCHEMA.into(),
        study: StudyInfo {
            name: "synthetic".into(),
            replicates,
            seed,
            timeout_s: None,
            sampler: Map::new(),
            grid: vec![
                ("particles".into(), vec![json!(100), json!(200)]),
                ("move".into(), vec![json!("walk"), json!("mh")]),
            ],
            reference: None,
        },
        targets,
    }
}

/// The 12 cells: (target index, settings).
fn cells() -> Vec<(usize, Map<String, Value>)> {
    let mut v = Vec::new();
    for t in 0..3 {
        for p in [100, 200] {
            for m in ["walk", "mh"] {
                let mut s = Map::new();
                s.insert("particles".into(), json!(p));
                s.insert("move".into(), json!(m));
                v.push((t, s));
            }
        }
    }
    v
}

/// A change applied to one cell's runs: (cell index, replicate, output, rng).
type Tweak<'a> = &'a dyn Fn(usize, u64, &mut RunOutput, &mut ChaCha8Rng);

/// Synthetic results: every estimate drawn around the truth from a known normal law.
fn synth(seed: u64, tweak: Tweak) -> Results {
    let h = header(REPS, seed);
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut runs = Vec::new();
    let std = RNormal::new(0.0, 1.0).unwrap();
    for (ci, (t, settings)) in cells().into_iter().enumerate() {
        let info = &h.targets[t];
        let truth = info.mean.clone().unwrap();
        for r in 0..REPS {
            let mean: Vec<f64> = (0..DIM)
                .map(|j| truth[j] + coord_sd(j) * std.sample(&mut rng))
                .collect();
            let log_evidence = info.log_z.unwrap() + LOGZ_BIAS + LOGZ_SD * std.sample(&mut rng);
            let mut output = RunOutput {
                status: RunStatus::Ok,
                error: None,
                mean: Some(mean),
                covariance: None,
                log_evidence: Some(log_evidence),
                kish_ess: Some(500.0 + 20.0 * std.sample(&mut rng)),
                resamples: 3,
                evaluations: 1000,
                seconds: 0.1 * (1.0 + 0.05 * std.sample(&mut rng)).abs(),
                trace: Vec::new(),
            };
            tweak(ci, r, &mut output, &mut rng);
            runs.push(RunRecord {
                target: info.label.clone(),
                settings: settings.clone(),
                replicate: r,
                seed: r,
                output,
            });
        }
    }
    Results {
        path: PathBuf::from(format!("synthetic-{seed}.jsonl")),
        header: h,
        runs,
        torn_tail: false,
    }
}

fn none(_: usize, _: u64, _: &mut RunOutput, _: &mut ChaCha8Rng) {}

fn opts() -> CheckOptions {
    CheckOptions::default()
}

fn regressed_cells(rep: &CheckReport) -> Vec<(String, String, FindingKind)> {
    rep.findings
        .iter()
        .map(|f| (f.target.clone(), settings_text(&f.settings), f.kind))
        .collect()
}

#[test]
fn reruns_with_other_seeds_pass() {
    // 200 reruns against one baseline. Under the model (normal estimates), Holm at family alpha
    // 1e-3 bounds each rerun's false-alarm probability by 1e-3, so the count over 200 reruns is
    // stochastically below Binomial(200, 1e-3): P(count >= 2) < 2e-2 and the seeds are fixed, so
    // the check is deterministic. We assert zero, which these seeds give.
    let base = synth(1, &none);
    let mut alarms = 0;
    for k in 0..200 {
        let cand = synth(1000 + k, &none);
        let rep = check(&base, &cand, &opts()).unwrap();
        // 12 cells x (4 coords + log Z) x (bias + spread) = 120 tests.
        assert_eq!(rep.tests, 120);
        if rep.regressed() {
            alarms += 1;
            eprintln!("{}", rep.to_markdown());
        }
    }
    assert_eq!(alarms, 0);
}

#[test]
fn shift_of_eight_standard_errors_is_caught() {
    // Every mean coordinate of cell 5 moves by 8 SE (SE = sd / sqrt 30). Per coordinate the
    // intersection-union test has power about 0.75 at this family size (Welch noncentrality
    // 8 / sqrt 2 = 5.66 against a critical value near 4.9; Monte Carlo, 2e5 draws); over the 4
    // independent coordinates the cell is caught with probability about 1 - 0.25^4 > 0.996.
    let shift = |ci: usize, _: u64, o: &mut RunOutput, _: &mut ChaCha8Rng| {
        if ci == 5
            && let Some(m) = o.mean.as_mut()
        {
            for (j, x) in m.iter_mut().enumerate() {
                *x += 8.0 * coord_sd(j) / (REPS as f64).sqrt();
            }
        }
    };
    let base = synth(1, &none);
    let cand = synth(2, &shift);
    let rep = check(&base, &cand, &opts()).unwrap();
    assert!(rep.regressed());
    let cells: Vec<_> = regressed_cells(&rep);
    assert!(
        cells
            .iter()
            .all(|c| c.0 == "gauss1" && c.2 == FindingKind::Bias),
        "{cells:?}"
    );
    assert!(cells[0].1.contains("particles=100") && cells[0].1.contains("move=mh"));
    assert_eq!(rep.cells_regressed(), 1);
    let md = rep.to_markdown();
    assert!(
        md.starts_with("**assay check: regression** in 1 of 12 cells"),
        "{md}"
    );
    assert!(
        md.contains("| gauss1 | move=mh, particles=100 | bias | mean["),
        "{md}"
    );
    let js = rep.to_json();
    assert_eq!(js["verdict"], "regression");
    assert_eq!(js["regressions"][0]["kind"], "bias");
    assert!(js["regressions"][0]["p_value"].as_f64().unwrap() <= 1e-3);
}

#[test]
fn tripled_spread_is_caught() {
    // Cell 7: every estimate's deviation from its centre is tripled (sd x 3). The F test at
    // ratio 9 on (29, 29) df has power 0.90 per quantity at this family size, 0.84 together
    // with the rank confirmation at 1e-3 (Monte Carlo, 2e5 draws); with 5 quantities the cell
    // is caught with probability above 0.9998. Means are unchanged, so no bias finding is expected (the Welch test allows
    // for unequal variances).
    let base = synth(1, &none);
    let triple = |ci: usize, _: u64, o: &mut RunOutput, _: &mut ChaCha8Rng| {
        if ci == 7 {
            let truth: Vec<f64> = (0..DIM).map(|j| j as f64 - 1.0 + 1.0).collect();
            if let Some(m) = o.mean.as_mut() {
                for (x, t) in m.iter_mut().zip(&truth) {
                    *x = t + 3.0 * (*x - t);
                }
            }
            let centre = -1.5 + LOGZ_BIAS;
            o.log_evidence = o.log_evidence.map(|l| centre + 3.0 * (l - centre));
        }
    };
    let cand = synth(3, &triple);
    let rep = check(&base, &cand, &opts()).unwrap();
    let cells = regressed_cells(&rep);
    assert!(!cells.is_empty());
    assert!(
        cells
            .iter()
            .all(|c| c.0 == "gauss1" && c.2 == FindingKind::Spread),
        "{cells:?}"
    );
    assert!(cells[0].1.contains("particles=200") && cells[0].1.contains("move=mh"));
    let f = &rep.findings[0];
    assert!(f.candidate.sd.unwrap() > 2.0 * f.baseline.sd.unwrap());
}

#[test]
fn a_new_failed_run_is_caught() {
    let fail = |ci: usize, r: u64, o: &mut RunOutput, _: &mut ChaCha8Rng| {
        if ci == 2 && r == 17 {
            *o = RunOutput::failed("weights degenerated");
        }
    };
    let base = synth(1, &none);
    let rep = check(&base, &synth(4, &fail), &opts()).unwrap();
    let cells = regressed_cells(&rep);
    assert_eq!(cells.len(), 1, "{cells:?}");
    assert_eq!(cells[0].2, FindingKind::Failures);
    assert_eq!(rep.findings[0].candidate.failures, 1);
    assert!(rep.to_markdown().contains("1 of 30 failed"));

    // When the baseline already failed now and then, one more failure is judged by the Fisher
    // exact test: 2 vs 1 of 30 is far from significant (one-sided p = 0.5), so no regression.
    let fail1 = |ci: usize, r: u64, o: &mut RunOutput, _: &mut ChaCha8Rng| {
        if ci == 2 && r == 3 {
            *o = RunOutput::failed("x");
        }
    };
    let fail2 = |ci: usize, r: u64, o: &mut RunOutput, rng: &mut ChaCha8Rng| {
        fail1(ci, r, o, rng);
        if ci == 2 && r == 4 {
            *o = RunOutput::failed("x");
        }
    };
    let rep = check(&synth(1, &fail1), &synth(5, &fail2), &opts()).unwrap();
    assert!(!rep.regressed(), "{}", rep.to_markdown());
    // A failure-count test entered the family: 120 + 1.
    assert_eq!(rep.tests, 121);

    // An "ok" run without its estimates counts as a failure too.
    let hollow = |ci: usize, r: u64, o: &mut RunOutput, _: &mut ChaCha8Rng| {
        if ci == 9 && r == 0 {
            o.log_evidence = None;
        }
    };
    let rep = check(&base, &synth(6, &hollow), &opts()).unwrap();
    assert_eq!(regressed_cells(&rep).len(), 1);
    assert_eq!(rep.findings[0].kind, FindingKind::Failures);
}

#[test]
fn a_missing_cell_is_caught() {
    let base = synth(1, &none);
    let mut cand = synth(7, &none);
    cand.runs
        .retain(|r| !(r.target == "gauss2" && r.settings["particles"] == json!(100)));
    let rep = check(&base, &cand, &opts()).unwrap();
    assert_eq!(rep.cells_regressed(), 2);
    assert!(rep.findings.iter().all(|f| f.kind == FindingKind::Missing));
    assert!(rep.to_markdown().contains("missing cell"));
    // The reverse: cells only in the candidate are counted, not judged.
    let rep = check(&cand, &base, &opts()).unwrap();
    assert!(!rep.regressed());
    assert_eq!(rep.cells_only_in_candidate, 2);
}

#[test]
fn speed_is_judged_only_when_asked() {
    // Cell 0 runs 4x slower: a 75% drop in ESS per second, 20+ standard deviations of the log
    // speed (sd about 0.06) away from no change.
    let slow = |ci: usize, _: u64, o: &mut RunOutput, _: &mut ChaCha8Rng| {
        if ci == 0 {
            o.seconds *= 4.0;
        }
    };
    let base = synth(1, &none);
    let cand = synth(8, &slow);
    assert!(!check(&base, &cand, &opts()).unwrap().regressed());
    let with = CheckOptions {
        speed_tolerance: Some(DEFAULT_SPEED_TOLERANCE),
        ..opts()
    };
    let rep = check(&base, &cand, &with).unwrap();
    let cells = regressed_cells(&rep);
    assert_eq!(cells.len(), 1, "{cells:?}");
    assert_eq!(cells[0].2, FindingKind::Speed);
    assert_eq!(rep.tests, 132);
    // A 4x slowdown is within a 90% tolerance, and a rerun passes with the check on.
    let loose = CheckOptions {
        speed_tolerance: Some(0.9),
        ..opts()
    };
    assert!(!check(&base, &cand, &loose).unwrap().regressed());
    assert!(!check(&base, &synth(9, &none), &with).unwrap().regressed());
    let bad = CheckOptions {
        speed_tolerance: Some(1.5),
        ..opts()
    };
    assert!(check(&base, &cand, &bad).is_err());
}

#[test]
fn deterministic_estimates_give_no_nan() {
    // Coordinate 0 is exact on every replicate of both files (zero spread). It must neither
    // raise an alarm nor produce NaN anywhere; a candidate that is off the truth by a constant
    // is a certain bias (p = 0).
    let exact = |_: usize, _: u64, o: &mut RunOutput, _: &mut ChaCha8Rng| {
        if let Some(m) = o.mean.as_mut() {
            m[0] = 0.25;
        }
    };
    let base = synth(1, &exact);
    let rep = check(&base, &synth(10, &exact), &opts()).unwrap();
    assert!(!rep.regressed(), "{}", rep.to_markdown());
    let off = |ci: usize, r: u64, o: &mut RunOutput, rng: &mut ChaCha8Rng| {
        exact(ci, r, o, rng);
        if ci == 4
            && let Some(m) = o.mean.as_mut()
        {
            m[0] = 0.5;
        }
    };
    let rep = check(&base, &synth(11, &off), &opts()).unwrap();
    let text = rep.to_json().to_string();
    assert!(!text.contains("NaN") && !text.contains("nan"));
    assert_eq!(rep.findings.len(), 1);
    assert_eq!(rep.findings[0].kind, FindingKind::Bias);
    assert_eq!(rep.findings[0].p_value, Some(0.0));
    // Deterministic in the baseline, random in the candidate: a certain spread increase.
    let b = Summary::of(&[1.0; 5]).unwrap();
    let c = Summary::of(&[1.0, 2.0, 3.0]).unwrap();
    assert_eq!(stat::f_upper(&b, &c), Some(0.0));
    assert_eq!(stat::f_upper(&b, &b), None);
    assert_eq!(stat::f_upper(&c, &b), Some(1.0));
    assert!(stat::fligner_killeen_upper(&[1.0; 5], &[1.0; 5]).is_none());
}

#[test]
fn unusable_inputs_are_errors() {
    let base = synth(1, &none);
    // Different design: another grid.
    let mut other = synth(2, &none);
    other.header.study.grid[0].1.push(json!(400));
    let e = check(&base, &other, &opts()).unwrap_err();
    assert!(e.message.contains("synthetic-1.jsonl") && e.message.contains("synthetic-2.jsonl"));
    assert!(e.message.contains("grid"), "{e}");
    // Another target definition.
    let mut other = synth(2, &none);
    other.header.targets[1].dim = 5;
    assert!(
        check(&base, &other, &opts())
            .unwrap_err()
            .message
            .contains("gauss1")
    );
    // Incomplete candidate (a cell with 29 of 30 runs).
    let mut cut = synth(2, &none);
    cut.runs.pop();
    let e = check(&base, &cut, &opts()).unwrap_err();
    assert!(
        e.message.contains("synthetic-2.jsonl") && e.message.contains("29 of 30"),
        "{e}"
    );
    // Incomplete baseline.
    let e = check(&cut, &base, &opts()).unwrap_err();
    assert!(e.message.contains("synthetic-2.jsonl"), "{e}");
    // A duplicated replicate, an unknown target.
    let mut dup = synth(2, &none);
    let r = dup.runs[0].clone();
    dup.runs.push(r);
    assert!(
        check(&base, &dup, &opts())
            .unwrap_err()
            .message
            .contains("twice")
    );
    let mut stray = synth(2, &none);
    stray.runs[3].target = "nope".into();
    assert!(
        check(&base, &stray, &opts())
            .unwrap_err()
            .message
            .contains("`nope`")
    );
    // Bad alpha.
    let bad = CheckOptions {
        family_alpha: 0.0,
        ..opts()
    };
    assert!(check(&base, &base, &bad).is_err());
    // Master seed and replicate count may differ.
    let mut more = synth(2, &none);
    more.header.study.replicates = 30;
    more.header.study.seed = 99;
    assert!(check(&base, &more, &opts()).is_ok());
}

fn temp_file(name: &str, content: &str) -> PathBuf {
    let dir = std::env::temp_dir().join(format!("assay-check-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let p = dir.join(name);
    std::fs::write(&p, content).unwrap();
    p
}

fn file_text(r: &Results) -> String {
    let mut s = serde_json::to_string(&r.header).unwrap();
    s.push('\n');
    for run in &r.runs {
        s.push_str(&serde_json::to_string(run).unwrap());
        s.push('\n');
    }
    s
}

fn read_err(p: &Path) -> String {
    read_results(p, false).unwrap_err().to_string()
}

#[test]
fn damaged_files_name_file_and_line() {
    let text = file_text(&synth(1, &none));
    let lines: Vec<&str> = text.lines().collect();
    // A round trip through a file checks cleanly.
    let ok = temp_file("ok.jsonl", &text);
    let r = read_results(&ok, false).unwrap();
    assert!(!check(&r, &r, &opts()).unwrap().regressed());
    // Garbled middle line (line 101 of 361).
    let mut g = lines.clone();
    g[100] = "{\"target\": \"gauss0\", oops";
    let p = temp_file("garbled.jsonl", &(g.join("\n") + "\n"));
    let e = read_err(&p);
    assert!(
        e.contains("garbled.jsonl") && e.contains("line 101") && e.contains("garbled"),
        "{e}"
    );
    // Cut mid-line.
    let cut = &text[..text.len() - 40];
    let p = temp_file("cut.jsonl", cut);
    let e = read_err(&p);
    assert!(
        e.contains("cut.jsonl") && e.contains(&format!("line {}", lines.len())),
        "{e}"
    );
    assert!(e.contains("truncated"), "{e}");
    // Empty file.
    let p = temp_file("empty.jsonl", "");
    let e = read_err(&p);
    assert!(e.contains("empty.jsonl") && e.contains("empty"), "{e}");
    // A header of another schema.
    let other = text.replacen(SCHEMA, "assay-results/999", 1);
    let p = temp_file("schema.jsonl", &other);
    let e = read_err(&p);
    assert!(
        e.contains("schema.jsonl") && e.contains("line 1") && e.contains("999"),
        "{e}"
    );
    // Not a results file at all.
    let p = temp_file("notes.jsonl", "{\"hello\": 1}\n");
    assert!(read_err(&p).contains("line 1"));
}

#[test]
fn p_values_against_statrs_and_textbooks() {
    // F(2.0; 29, 29) upper tail: the variance-ratio test on two samples of 30 with variance
    // ratio exactly 2, against statrs' FisherSnedecor survival function.
    let b = Summary {
        n: 30,
        mean: 0.0,
        var: 1.0,
    };
    let c = Summary {
        n: 30,
        mean: 0.0,
        var: 2.0,
    };
    let reference = FisherSnedecor::new(29.0, 29.0).unwrap().sf(2.0);
    assert_relative_eq!(
        stat::f_upper(&b, &c).unwrap(),
        reference,
        max_relative = 1e-12
    );
    // Tables of the F distribution (e.g. Abramowitz & Stegun 1964, table 26.9): the 5% point of
    // F(30, 30) is 1.84, so F(29, 29) at 2.0 lies a little below 5%.
    assert!(reference > 0.03 && reference < 0.05, "{reference}");

    // One-sample t: x = 1..=10, mu0 = 4: mean 5.5, sd sqrt(55/6), t = 1.5 / (sd / sqrt 10)
    // (Student 1908 formula), two-sided p from statrs' StudentsT with 9 df.
    let xs: Vec<f64> = (1..=10).map(f64::from).collect();
    let s = Summary::of(&xs).unwrap();
    let t = stat::one_sample_t(&s, 4.0);
    let t_ref = 1.5 / ((55.0f64 / 6.0).sqrt() / 10f64.sqrt());
    assert_relative_eq!(t.t, t_ref, max_relative = 1e-12);
    let tdist = StudentsT::new(0.0, 1.0, 9.0).unwrap();
    assert_relative_eq!(t.p_two_sided, 2.0 * tdist.sf(t_ref), max_relative = 1e-12);

    // Welch: the Satterthwaite df for var 4 (n 10) vs var 1 (n 20) by the textbook formula
    // (0.4 + 0.05)^2 / (0.4^2 / 9 + 0.05^2 / 19).
    let a = Summary {
        n: 10,
        mean: 1.0,
        var: 4.0,
    };
    let bb = Summary {
        n: 20,
        mean: 0.0,
        var: 1.0,
    };
    let w = stat::welch_t(&a, &bb);
    let df = 0.45f64.powi(2) / (0.16 / 9.0 + 0.0025 / 19.0);
    assert_relative_eq!(w.df, df, max_relative = 1e-12);
    assert_relative_eq!(w.t, 1.0 / 0.45f64.sqrt(), max_relative = 1e-12);
    let wd = StudentsT::new(0.0, 1.0, df).unwrap();
    assert_relative_eq!(w.p_two_sided, 2.0 * wd.sf(w.t), max_relative = 1e-12);
    assert_relative_eq!(w.p_lower(), wd.cdf(w.t), max_relative = 1e-12);
    // Far tail stays accurate (no 1 - (1 - p) cancellation): t = 8 on 29 df.
    let far = stat::t_sf(8.0, 29.0);
    assert_relative_eq!(
        far,
        StudentsT::new(0.0, 1.0, 29.0).unwrap().sf(8.0),
        max_relative = 1e-10
    );
    assert!(far > 0.0 && far < 1e-7);

    // Fisher exact, the tea-tasting experiment (Fisher 1935, The Design of Experiments, ch. 2):
    // 4 cups of each kind, 3 of 4 correct has one-sided p = 17/70, 4 of 4 has 1/70.
    assert_relative_eq!(
        stat::fisher_exact_upper(1, 4, 3, 4),
        17.0 / 70.0,
        max_relative = 1e-12
    );
    assert_relative_eq!(
        stat::fisher_exact_upper(0, 4, 4, 4),
        1.0 / 70.0,
        max_relative = 1e-12
    );
    // Against statrs' hypergeometric law: 2 of 30 vs 9 of 30 failed.
    let h = Hypergeometric::new(60, 11, 30).unwrap();
    assert_relative_eq!(
        stat::fisher_exact_upper(2, 30, 9, 30),
        h.sf(8),
        max_relative = 1e-10
    );
    assert_eq!(stat::fisher_exact_upper(3, 30, 0, 30), 1.0);

    // Holm 1979 worked by hand: p = (0.01, 0.04, 0.03, 0.005) at alpha 0.05. Sorted thresholds
    // 0.0125, 0.0167, 0.025, 0.05: 0.005 and 0.01 rejected, 0.03 > 0.025 stops the procedure,
    // so 0.04 is kept although it is below 0.05.
    let v = stat::holm(&[0.01, 0.04, 0.03, 0.005], 0.05);
    let rej: Vec<bool> = v.iter().map(|x| x.rejected).collect();
    assert_eq!(rej, vec![true, false, false, true]);
    assert_relative_eq!(v[3].threshold, 0.0125);
    assert_relative_eq!(v[0].adjusted, 0.03);
    assert_relative_eq!(v[2].adjusted, 0.06);
    assert_relative_eq!(v[1].adjusted, 0.06);
    assert!(stat::holm(&[f64::NAN], 0.05)[0].adjusted == 1.0);

    // Fligner-Killeen: identical samples give z = 0 (p = 1/2); a sample spread 10 times wider
    // has every deviation ranked above the other's (common practice: a sanity check, no table).
    let x: Vec<f64> = (0..20).map(|i| f64::from(i) - 9.5).collect();
    assert_relative_eq!(
        stat::fligner_killeen_upper(&x, &x).unwrap(),
        0.5,
        epsilon = 1e-12
    );
    let wide: Vec<f64> = x.iter().map(|v| 10.0 * v + 0.05).collect();
    assert!(stat::fligner_killeen_upper(&x, &wide).unwrap() < 1e-3);
}
