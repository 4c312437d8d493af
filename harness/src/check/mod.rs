//! The regression gate: compare a candidate results file with a baseline of the same study
//! design, cell by cell (cell = target label x grid settings), and say whether the candidate
//! regressed.
//!
//! Layers: [`stat`] holds the tests on plain numbers, this module gathers the runs of each cell
//! and decides, and [`report`] renders the decision as markdown or JSON.
//!
//! # Rules
//!
//! For every cell of the baseline, over the usable runs of each side (status `ok` with every
//! estimate finite; a run that is not usable counts as a failure), and for every quantity q
//! (each coordinate of the posterior-mean estimate, and the log evidence):
//!
//! 1. **Bias** (only where the header gives the exact reference value r). First the baseline is
//!    screened: its own bias test (one-sample t for a coordinate, the E[Z-hat] = Z test of
//!    [`crate::inference::evidence_bias`] for the evidence) at [`BASELINE_BIAS_SCREEN`].
//!    * Baseline not measurably biased: the candidate is judged against r alone, by Student's t
//!      with the pooled variance of both sides ([`stat::pooled_one_sample_t`]: full
//!      noncentrality, n_b + n_c - 2 df) or by the evidence test. Its p-value enters the
//!      family; a rejection counts only if the candidate is also farther from r than the
//!      baseline and differs from it by Welch's test at [`BASELINE_DIFFERENCE_LEVEL`] (a guard
//!      against a bias both share that the screen missed; it only removes alarms).
//!    * Baseline measurably biased: the intersection-union test (Berger 1982, Technometrics
//!      24(4)): the candidate must be off r (one-sample test), off the baseline (Welch 1947)
//!      and farther from r; its p-value is the larger of the two. A bias the baseline had
//!      equally is not flagged.
//! 2. **Spread.** One-sided F test of the candidate's spread against the baseline's with both
//!    degrees of freedom reduced for the larger sample kurtosis of the two sides
//!    ([`stat::f_upper_kurtosis_adjusted`]; Layard 1973, Shoemaker 2003), confirmed by the
//!    one-sided Fligner-Killeen rank test at level [`SPREAD_CONFIRM_LEVEL`]. The confirmation
//!    only removes alarms.
//! 3. **Failures.** Where the baseline cell had no failed run, any failed run in the candidate
//!    is a regression: a sampler that never failed on an analytic target and now does has
//!    changed behaviour. (This rule is not a statistical test and is outside the alpha budget;
//!    it assumes the baseline's failure-free cells are failure-free by design.) Where the
//!    baseline already failed sometimes, a higher failure count is judged by a one-sided Fisher
//!    exact test inside the family. A baseline cell absent from the candidate is a regression.
//! 4. **Speed** (only when [`CheckOptions::speed_tolerance`] is set). Speed of a run = Kish ESS
//!    per wall-clock second (runs per second where Kish ESS is not reported); the table's
//!    `ess_per_second` is variance ESS per second, a different measure. The cell regresses
//!    when the candidate's median speed is below (1 - tolerance) times the baseline's *and* a
//!    one-sided Welch test on log speed says the candidate is slower.
//! 5. **Overflow.** Finite estimates whose mean or variance overflows are a regression.
//!
//! A baseline without runs, or files in which no test can be made (no cell with two usable
//! runs a side), are refused ([`CheckError`]) rather than passed.
//!
//! # Family-wise false-alarm rate
//!
//! Every p-value computed (bias, spread, failure-count and speed tests, over all cells and
//! quantities) enters one family, and Holm's step-down procedure (Holm 1979) is applied at
//! [`CheckOptions::family_alpha`] (default 1e-3). So a rerun of the same study with another
//! master seed raises a false alarm with probability at most `family_alpha` in all, whatever
//! the number of cells, as long as the estimates are close to normal (exactly so for the t and
//! F tests under normality; the t tests are robust for equal replicate counts because the
//! difference of two equally distributed means is symmetric).
//!
//! # Power
//!
//! Normal estimates, 30 replicates a side, family alpha 1e-3, a family of m = 2200 tests (100
//! cells x 11 quantities x 2 kinds), so a single quantity is held to 4.5e-7; simulated in the
//! unit tests: one coordinate shifted by 8 standard errors is caught with probability 0.95; one
//! quantity's sd tripled with probability 0.57 (the F test alone, the most powerful unbiased test
//! under normality, would give 0.73; the kurtosis adjustment and the rank confirmation cost the
//! rest, and buy a far-tail false-alarm rate under t(5) estimates of about 6x nominal instead of
//! about 1200x). [`Sensitivity`] states these figures for the study at hand.
//!
//! Zero spread (a deterministic estimate) never yields NaN: a side whose standard deviation is
//! below 1e-12 of its magnitude is treated as exactly constant, and the tests then give p = 1
//! (no difference) or p = 0 (a certain difference).

pub mod report;
pub mod stat;

#[cfg(test)]
mod unit_tests;

use std::collections::{BTreeMap, HashMap};
use std::fmt;
use std::path::PathBuf;

use serde_json::{Map, Value};

use crate::results::{Results, RunRecord, TargetInfo};
use crate::stats;
use stat::Summary;

/// Level of the Fligner-Killeen rank test that must confirm a spread regression flagged by the
/// F test (not multiplicity-adjusted: it can only remove alarms).
pub const SPREAD_CONFIRM_LEVEL: f64 = 1e-3;

/// Default family-wise false-alarm rate.
pub const DEFAULT_FAMILY_ALPHA: f64 = 1e-3;

/// Suggested speed tolerance when the speed check is asked for without a value: a 50% drop.
pub const DEFAULT_SPEED_TOLERANCE: f64 = 0.5;

/// Options of [`check`].
#[derive(Debug, Clone, PartialEq)]
pub struct CheckOptions {
    /// `Some(f)`: flag cells whose median speed dropped by more than the fraction `f` (in
    /// (0, 1)). `None` (the default): speed is not judged.
    pub speed_tolerance: Option<f64>,
    /// Family-wise false-alarm rate over every test performed, in (0, 1).
    pub family_alpha: f64,
}

impl Default for CheckOptions {
    fn default() -> Self {
        CheckOptions {
            speed_tolerance: None,
            family_alpha: DEFAULT_FAMILY_ALPHA,
        }
    }
}

/// Inputs the gate cannot judge. The message names the file concerned.
#[derive(Debug, Clone, PartialEq)]
pub struct CheckError {
    pub message: String,
}

impl fmt::Display for CheckError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.message)
    }
}

impl std::error::Error for CheckError {}

fn err<T>(message: String) -> Result<T, CheckError> {
    Err(CheckError { message })
}

/// What a finding is about.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum FindingKind {
    Bias,
    Spread,
    Failures,
    Missing,
    Speed,
    Overflow,
}

impl FindingKind {
    /// Lower-case name used in reports.
    pub fn name(self) -> &'static str {
        match self {
            FindingKind::Bias => "bias",
            FindingKind::Spread => "spread",
            FindingKind::Failures => "failures",
            FindingKind::Missing => "missing cell",
            FindingKind::Speed => "speed",
            FindingKind::Overflow => "overflow",
        }
    }
}

/// The figures of one side of a comparison.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct SideFigures {
    /// Runs in the cell.
    pub runs: usize,
    /// Runs that failed or lack an estimate.
    pub failures: usize,
    /// Values of the quantity used (usable runs).
    pub n: usize,
    /// Mean error against the exact reference (bias findings).
    pub mean_error: Option<f64>,
    /// Standard error of the mean.
    pub se: Option<f64>,
    /// Standard deviation across replicates.
    pub sd: Option<f64>,
    /// Median speed (speed findings).
    pub median_speed: Option<f64>,
}

/// One regression of one cell.
#[derive(Debug, Clone, PartialEq)]
pub struct Finding {
    pub target: String,
    pub settings: Map<String, Value>,
    pub kind: FindingKind,
    /// `mean[i]` or `log_evidence` for bias and spread findings.
    pub quantity: Option<String>,
    pub baseline: SideFigures,
    pub candidate: SideFigures,
    /// The test's p-value (`None` for rules that are not tests).
    pub p_value: Option<f64>,
    /// The Holm level it was held to.
    pub threshold: Option<f64>,
    /// Holm-adjusted p-value.
    pub adjusted_p: Option<f64>,
    /// p-value of the confirming rank test (spread findings).
    pub confirm_p: Option<f64>,
}

/// The gate's decision.
#[derive(Debug, Clone, PartialEq)]
pub struct CheckReport {
    pub baseline: PathBuf,
    pub candidate: PathBuf,
    pub family_alpha: f64,
    pub speed_tolerance: Option<f64>,
    /// Baseline cells compared (including missing ones).
    pub cells_compared: usize,
    /// Cells of the candidate that the baseline does not have (not judged).
    pub cells_only_in_candidate: usize,
    /// Baseline cells on which no test could be made (fewer than two usable runs on a side, and
    /// no failure or overflow finding).
    pub cells_unjudged: usize,
    /// Number of p-values in the Holm family.
    pub tests: usize,
    /// Every regression, cell by cell in baseline order.
    pub findings: Vec<Finding>,
    /// Per target, the smallest regressions the gate catches with probability 0.9.
    pub sensitivity: Vec<Sensitivity>,
}

impl CheckReport {
    /// True when at least one cell regressed.
    pub fn regressed(&self) -> bool {
        !self.findings.is_empty()
    }

    /// Number of distinct cells with at least one finding.
    pub fn cells_regressed(&self) -> usize {
        let mut keys: Vec<(String, String)> = self
            .findings
            .iter()
            .map(|f| (f.target.clone(), crate::results::cell_key(&f.settings)))
            .collect();
        keys.sort();
        keys.dedup();
        keys.len()
    }
}

/// The runs of one cell in one file, by replicate.
struct CellRuns<'a> {
    settings: &'a Map<String, Value>,
    runs: BTreeMap<u64, &'a RunRecord>,
}

type CellId = (String, String);

/// Group a file's runs by cell, in order of first appearance, checking that each run belongs to
/// a target of the header and that no replicate appears twice.
fn group(results: &Results) -> Result<(Vec<CellId>, HashMap<CellId, CellRuns<'_>>), CheckError> {
    let file = results.path.display();
    let mut order = Vec::new();
    let mut cells: HashMap<CellId, CellRuns> = HashMap::new();
    let replicates = results.header.study.replicates;
    for (i, r) in results.runs.iter().enumerate() {
        if !results.header.targets.iter().any(|t| t.label == r.target) {
            return err(format!(
                "{file}: run record {} names target `{}`, which the header does not list",
                i + 1,
                r.target
            ));
        }
        if r.replicate >= replicates {
            return err(format!(
                "{file}: run record {} (target `{}`, cell {}) has replicate {} but the header \
                 declares {replicates} replicates",
                i + 1,
                r.target,
                settings_text(&r.settings),
                r.replicate
            ));
        }
        let id = (r.target.clone(), r.cell_key());
        let cell = cells.entry(id.clone()).or_insert_with(|| {
            order.push(id.clone());
            CellRuns {
                settings: &r.settings,
                runs: BTreeMap::new(),
            }
        });
        if cell.runs.insert(r.replicate, r).is_some() {
            return err(format!(
                "{file}: replicate {} of target `{}`, cell {} appears twice",
                r.replicate,
                r.target,
                settings_text(&r.settings)
            ));
        }
    }
    Ok((order, cells))
}

/// `key=value, ..` for messages and reports (strings unquoted).
pub fn settings_text(settings: &Map<String, Value>) -> String {
    if settings.is_empty() {
        return "(no grid)".to_string();
    }
    settings
        .iter()
        .map(|(k, v)| format!("{k}={}", crate::results::value_text(v)))
        .collect::<Vec<_>>()
        .join(", ")
}

fn incomplete(results: &Results, id: &CellId, cell: &CellRuns) -> Result<(), CheckError> {
    let want = results.header.study.replicates;
    let have = cell.runs.len() as u64;
    if have < want {
        return err(format!(
            "{}: incomplete file: target `{}`, cell {} has {have} of {want} runs (was the study \
             interrupted? finish it before checking)",
            results.path.display(),
            id.0,
            settings_text(cell.settings)
        ));
    }
    Ok(())
}

/// Which estimates a cell reports: the mean vector and/or the log evidence.
#[derive(Clone, Copy)]
struct Expected {
    mean: bool,
    log_evidence: bool,
}

fn usable(r: &RunRecord, dim: usize, e: Expected) -> bool {
    let o = &r.output;
    if !o.is_ok() {
        return false;
    }
    if e.mean {
        match &o.mean {
            Some(m) if m.len() == dim && m.iter().all(|x| x.is_finite()) => {}
            _ => return false,
        }
    }
    // A missing evidence is not a failed run: the evidence quantity is judged on the runs
    // that report one (and a candidate that stopped reporting it is a finding of its own).
    if e.log_evidence && o.log_evidence.is_some_and(|l| !l.is_finite()) {
        return false;
    }
    true
}

/// One side of a cell prepared for the tests.
struct Side<'a> {
    runs: usize,
    failures: usize,
    good: Vec<&'a RunRecord>,
}

impl<'a> Side<'a> {
    fn new(cell: &CellRuns<'a>, dim: usize, e: Expected) -> Side<'a> {
        let good: Vec<&RunRecord> = cell
            .runs
            .values()
            .copied()
            .filter(|r| usable(r, dim, e))
            .collect();
        Side {
            runs: cell.runs.len(),
            failures: cell.runs.len() - good.len(),
            good,
        }
    }

    fn values(&self, q: Quantity) -> Vec<f64> {
        self.good
            .iter()
            .filter_map(|r| match q {
                Quantity::Coord(i) => r.output.mean.as_ref().and_then(|m| m.get(i).copied()),
                Quantity::LogEvidence => r.output.log_evidence,
            })
            .collect()
    }

    fn figures(&self) -> SideFigures {
        SideFigures {
            runs: self.runs,
            failures: self.failures,
            n: self.good.len(),
            ..SideFigures::default()
        }
    }

    /// Speeds (Kish ESS per second, or runs per second) of the usable runs.
    fn speeds(&self, kish: bool) -> Vec<f64> {
        self.good
            .iter()
            .filter_map(|r| {
                let s = r.output.seconds;
                let num = if kish { r.output.kish_ess? } else { 1.0 };
                let v = num / s;
                (s > 0.0 && v.is_finite() && v > 0.0).then_some(v)
            })
            .collect()
    }
}

#[derive(Clone, Copy)]
enum Quantity {
    Coord(usize),
    LogEvidence,
}

impl Quantity {
    fn name(self) -> String {
        match self {
            Quantity::Coord(i) => format!("mean[{i}]"),
            Quantity::LogEvidence => "log_evidence".to_string(),
        }
    }
}

/// A test waiting for the Holm step: its p-value and the finding it becomes if rejected.
struct Pending {
    p: f64,
    finding: Finding,
    /// Extra condition besides the Holm rejection (confirmation, practical size, direction).
    also: bool,
}

/// Level at which the baseline counts as measurably biased for a quantity (two-sided, per
/// quantity, not adjusted: a screen that picks the test, not a finding).
pub const BASELINE_BIAS_SCREEN: f64 = 0.05;

/// Level of the guard on a bias found against the exact value: the candidate must also differ
/// from the baseline (Welch's t test, two-sided, not adjusted) and be farther from the exact
/// value. It only removes alarms: it stops a bias that both files share, but that the screen
/// missed, from being flagged, at a cost in power of under 0.001 for an 8-SE shift.
pub const BASELINE_DIFFERENCE_LEVEL: f64 = 1e-3;

/// The reference value's own standard error and degrees of freedom (targets scored against a
/// reference run), or (0, 0).
fn reference_se(t: &TargetInfo, q: Quantity) -> (f64, f64) {
    let Some(r) = &t.reference_run else {
        return (0.0, 0.0);
    };
    let df = r.runs.saturating_sub(1) as f64;
    let se = match q {
        Quantity::Coord(i) => r.mean_se.as_ref().and_then(|v| v.get(i).copied()),
        Quantity::LogEvidence => r.log_z_se,
    };
    (se.filter(|s| s.is_finite() && *s >= 0.0).unwrap_or(0.0), df)
}

/// An intersection-union test (Berger 1982): both tests must reject, so its p-value is the
/// larger of the two; a candidate that is not farther from the exact value is never flagged.
fn intersection_union(p_exact: f64, p_baseline: f64, farther: bool) -> (f64, bool) {
    let p = if farther {
        p_exact.max(p_baseline)
    } else {
        1.0
    };
    (p, farther)
}

/// The bias test of one quantity: its p-value and whether a rejection counts (see the module
/// documentation, rule 1).
#[allow(clippy::too_many_arguments)]
fn bias_p(
    q: Quantity,
    bv: &[f64],
    cv: &[f64],
    b: &Summary,
    c: &Summary,
    r: f64,
    ref_se: f64,
    ref_df: f64,
) -> (f64, bool) {
    let errors = |v: &[f64]| v.iter().map(|x| x - r).collect::<Vec<f64>>();
    match q {
        Quantity::Coord(_) => {
            let screen = crate::inference::mean_bias(&errors(bv), ref_se, ref_df);
            if screen.is_none_or(|s| s.p >= BASELINE_BIAS_SCREEN) {
                let t = stat::pooled_one_sample_t(b, c, r, ref_se, ref_df);
                let guard = (c.mean - r).abs() > (b.mean - r).abs()
                    && stat::welch_t(c, b).p_two_sided <= BASELINE_DIFFERENCE_LEVEL;
                (t.p_two_sided, guard)
            } else {
                let one = stat::one_sample_t(c, r);
                let two = stat::welch_t(c, b);
                let farther = (c.mean - r).abs() > (b.mean - r).abs();
                intersection_union(one.p_two_sided, two.p_two_sided, farther)
            }
        }
        Quantity::LogEvidence => {
            let (eb, ec) = (errors(bv), errors(cv));
            let screen = crate::inference::evidence_bias(&eb, ref_se);
            let Some(cand) = crate::inference::evidence_bias(&ec, ref_se) else {
                return (1.0, false);
            };
            if screen.is_none_or(|s| s.p >= BASELINE_BIAS_SCREEN) {
                let guard = screen.is_none_or(|s| cand.bias.abs() > s.bias.abs())
                    && stat::welch_t(c, b).p_two_sided <= BASELINE_DIFFERENCE_LEVEL;
                (cand.p, guard)
            } else {
                // The baseline's evidence is itself off: flag only a candidate that is off
                // by more, on the scale of the lognormal-corrected bias.
                let two = stat::welch_t(c, b);
                let farther = screen.is_some_and(|s| cand.bias.abs() > s.bias.abs());
                intersection_union(cand.p, two.p_two_sided, farther)
            }
        }
    }
}

fn validate(opts: &CheckOptions) -> Result<(), CheckError> {
    if !(opts.family_alpha > 0.0 && opts.family_alpha < 1.0) {
        return err(format!(
            "family alpha must lie strictly between 0 and 1 (got {})",
            opts.family_alpha
        ));
    }
    if let Some(t) = opts.speed_tolerance
        && !(t > 0.0 && t < 1.0)
    {
        return err(format!(
            "speed tolerance must lie strictly between 0 and 1, a fraction of the baseline's \
             speed that may be lost (got {t})"
        ));
    }
    Ok(())
}

fn check_reference(results: &Results, t: &TargetInfo) -> Result<(), CheckError> {
    if let Some(m) = &t.mean
        && m.len() != t.dim
    {
        return err(format!(
            "{}: header target `{}` has dim {} but a reference mean of {} entries",
            results.path.display(),
            t.label,
            t.dim,
            m.len()
        ));
    }
    Ok(())
}

/// Compare `candidate` with `baseline`. See the module documentation for the rules.
pub fn check(
    baseline: &Results,
    candidate: &Results,
    opts: &CheckOptions,
) -> Result<CheckReport, CheckError> {
    validate(opts)?;
    for r in [baseline, candidate] {
        if r.header.study.race.is_some() {
            return err(format!(
                "{} is a raced study: its eliminated cells stopped early, so it has fewer \
                 replicates (or none) where the other file may have all, and the gate would \
                 read the missing ones as regressions; gate a full-grid run (`race = false`) \
                 of the study",
                r.path.display()
            ));
        }
    }
    if !baseline.header.same_design(&candidate.header) {
        return err(format!(
            "{} and {} are not of the same study design ({}); a check compares two runs of one \
             study, which may differ only in master seed, replicate count and sampler code",
            baseline.path.display(),
            candidate.path.display(),
            baseline
                .header
                .design_difference(&candidate.header)
                .unwrap_or_else(|| design_difference(baseline, candidate))
        ));
    }
    for t in &baseline.header.targets {
        check_reference(baseline, t)?;
    }
    let (b_order, b_cells) = group(baseline)?;
    let (c_order, c_cells) = group(candidate)?;
    for id in &b_order {
        incomplete(baseline, id, &b_cells[id])?;
    }
    for id in &c_order {
        incomplete(candidate, id, &c_cells[id])?;
    }
    let cells_only_in_candidate = c_order
        .iter()
        .filter(|id| !b_cells.contains_key(*id))
        .count();

    let mut sure: Vec<Finding> = Vec::new();
    let mut pending: Vec<Pending> = Vec::new();
    let mut unjudged = 0usize;
    // Per target: (baseline n, candidate n, pooled standard error) of every quantity tested.
    let mut seen: BTreeMap<String, Vec<(usize, usize, f64)>> = BTreeMap::new();
    if b_order.is_empty() {
        return err(format!(
            "{}: the baseline holds no runs (a header only?), so there is nothing to compare \
             against; run the study to make a baseline",
            baseline.path.display()
        ));
    }
    for id in &b_order {
        let bc = &b_cells[id];
        let Some(target) = baseline.header.targets.iter().find(|t| t.label == id.0) else {
            continue; // group() guarantees the target exists
        };
        let finding = |kind, quantity: Option<String>, b: SideFigures, c: SideFigures| Finding {
            target: id.0.clone(),
            settings: bc.settings.clone(),
            kind,
            quantity,
            baseline: b,
            candidate: c,
            p_value: None,
            threshold: None,
            adjusted_p: None,
            confirm_p: None,
        };
        let Some(cc) = c_cells.get(id) else {
            let b = SideFigures {
                runs: bc.runs.len(),
                ..SideFigures::default()
            };
            sure.push(finding(
                FindingKind::Missing,
                None,
                b,
                SideFigures::default(),
            ));
            continue;
        };
        let reports = |f: &dyn Fn(&RunRecord) -> bool| {
            bc.runs
                .values()
                .chain(cc.runs.values())
                .any(|r| r.output.is_ok() && f(r))
        };
        let expected = Expected {
            mean: reports(&|r| r.output.mean.is_some()),
            log_evidence: reports(&|r| r.output.log_evidence.is_some()),
        };
        let bs = Side::new(bc, target.dim, expected);
        let cs = Side::new(cc, target.dim, expected);

        // Failures.
        if cs.failures * bs.runs > bs.failures * cs.runs {
            if bs.failures == 0 {
                sure.push(finding(
                    FindingKind::Failures,
                    None,
                    bs.figures(),
                    cs.figures(),
                ));
            } else {
                let p = stat::fisher_exact_upper(
                    bs.failures as u64,
                    bs.runs as u64,
                    cs.failures as u64,
                    cs.runs as u64,
                );
                pending.push(Pending {
                    p,
                    finding: finding(FindingKind::Failures, None, bs.figures(), cs.figures()),
                    also: true,
                });
            }
        } else if bs.failures > 0 {
            // Counted in the family all the same, so that the family does not depend on which
            // way the failure counts happened to go.
            pending.push(Pending {
                p: 1.0,
                finding: finding(FindingKind::Failures, None, bs.figures(), cs.figures()),
                also: false,
            });
        }

        // Bias and spread, quantity by quantity.
        let mut judged_here = false;
        let mut quantities = Vec::new();
        if expected.mean {
            quantities.extend((0..target.dim).map(Quantity::Coord));
        }
        if expected.log_evidence {
            quantities.push(Quantity::LogEvidence);
        }
        for q in quantities {
            let bv = bs.values(q);
            let cv = cs.values(q);
            // A finding about this quantity that is not a test, with the values counted.
            let quantity_finding = |kind, nb: usize, nc: usize| {
                let mut f = finding(kind, Some(q.name()), bs.figures(), cs.figures());
                f.baseline.n = nb;
                f.candidate.n = nc;
                f
            };
            if matches!(q, Quantity::LogEvidence)
                && bv.len() >= 2
                && bv.len() == bs.good.len()
                && cv.len() < cs.good.len()
            {
                // Every usable baseline run estimated the evidence and some candidate runs no
                // longer do: a finding of its own, not a count of failed runs.
                sure.push(quantity_finding(FindingKind::Missing, bv.len(), cv.len()));
                continue;
            }
            let (b, c) = (Summary::of(&bv), Summary::of(&cv));
            if c.is_none() && cv.len() >= 2 {
                // Finite estimates whose mean or spread overflows (values near 1e200 and
                // beyond): no test can be computed, and no sampler of an analytic target
                // produces them. Never a silent pass.
                sure.push(quantity_finding(
                    FindingKind::Overflow,
                    bs.good.len(),
                    cv.len(),
                ));
                continue;
            }
            let (Some(b), Some(c)) = (b, c) else {
                continue;
            };
            judged_here = true;
            let (nb, nc) = (b.n as f64, c.n as f64);
            let sp2 = ((nb - 1.0) * b.var + (nc - 1.0) * c.var) / (nb + nc - 2.0);
            seen.entry(id.0.clone())
                .or_default()
                .push((b.n, c.n, (sp2 / nc).sqrt()));
            let reference = match q {
                Quantity::Coord(i) => target.mean.as_ref().and_then(|m| m.get(i).copied()),
                Quantity::LogEvidence => target.log_z,
            }
            .filter(|r| r.is_finite());
            let side = |s: &Side, x: &Summary, r: Option<f64>| SideFigures {
                n: x.n,
                mean_error: r.map(|r| x.mean - r),
                se: Some(x.se()),
                sd: Some(x.sd()),
                ..s.figures()
            };
            if let Some(r) = reference {
                let (ref_se, ref_df) = reference_se(target, q);
                let (p, also) = bias_p(q, &bv, &cv, &b, &c, r, ref_se, ref_df);
                pending.push(Pending {
                    p,
                    finding: finding(
                        FindingKind::Bias,
                        Some(q.name()),
                        side(&bs, &b, Some(r)),
                        side(&cs, &c, Some(r)),
                    ),
                    also,
                });
            }
            if let Some(p) = stat::f_upper_kurtosis_adjusted(&b, &c, &bv, &cv) {
                let confirm = stat::fligner_killeen_upper(&bv, &cv).unwrap_or(1.0);
                let mut f = finding(
                    FindingKind::Spread,
                    Some(q.name()),
                    side(&bs, &b, None),
                    side(&cs, &c, None),
                );
                f.confirm_p = Some(confirm);
                pending.push(Pending {
                    p,
                    finding: f,
                    also: confirm <= SPREAD_CONFIRM_LEVEL,
                });
            }
        }

        if !judged_here
            && !sure
                .iter()
                .any(|f| f.target == id.0 && f.settings == *bc.settings)
        {
            unjudged += 1;
        }

        // Speed.
        if let Some(tol) = opts.speed_tolerance {
            let kish = bs
                .good
                .iter()
                .chain(cs.good.iter())
                .all(|r| r.output.kish_ess.is_some_and(|k| k.is_finite() && k > 0.0));
            let bsp = bs.speeds(kish);
            let csp = cs.speeds(kish);
            let ln = |v: &[f64]| v.iter().map(|x| x.ln()).collect::<Vec<f64>>();
            if let (Some(lb), Some(lc), Some(mb), Some(mc)) = (
                Summary::of(&ln(&bsp)),
                Summary::of(&ln(&csp)),
                stats::quantile(&bsp, 0.5),
                stats::quantile(&csp, 0.5),
            ) {
                let p = stat::welch_t(&lc, &lb).p_lower();
                let mut f = finding(FindingKind::Speed, None, bs.figures(), cs.figures());
                f.baseline.median_speed = Some(mb);
                f.candidate.median_speed = Some(mc);
                f.baseline.n = bsp.len();
                f.candidate.n = csp.len();
                pending.push(Pending {
                    p,
                    finding: f,
                    also: mc < (1.0 - tol) * mb,
                });
            }
        }
    }

    if pending.is_empty() && sure.is_empty() {
        return err(format!(
            "cannot judge {} against {}: no cell has two usable runs on both sides (with one \
             replicate, or with every run failed, neither bias nor spread can be tested); \
             give the study at least 2 replicates (30 for useful power)",
            candidate.path.display(),
            baseline.path.display()
        ));
    }
    let ps: Vec<f64> = pending.iter().map(|t| t.p).collect();
    let level = opts.family_alpha / ps.len().max(1) as f64;
    let sensitivity = baseline
        .header
        .targets
        .iter()
        .filter_map(|t| sensitivity(&t.label, seen.get(&t.label)?, level))
        .collect();
    let verdicts = stat::holm(&ps, opts.family_alpha);
    let mut flagged: Vec<Finding> = pending
        .into_iter()
        .zip(verdicts)
        .filter(|(t, v)| v.rejected && t.also)
        .map(|(t, v)| Finding {
            p_value: Some(t.p),
            threshold: Some(v.threshold),
            adjusted_p: Some(v.adjusted),
            ..t.finding
        })
        .collect();
    flagged.extend(sure);
    // Report in baseline cell order, then by kind.
    let rank: HashMap<&CellId, usize> = b_order.iter().enumerate().map(|(i, id)| (id, i)).collect();
    let key = |f: &Finding| {
        let id = (f.target.clone(), crate::results::cell_key(&f.settings));
        (rank.get(&id).copied().unwrap_or(usize::MAX), f.kind as u8)
    };
    flagged.sort_by_key(key);

    Ok(CheckReport {
        baseline: baseline.path.clone(),
        candidate: candidate.path.clone(),
        family_alpha: opts.family_alpha,
        speed_tolerance: opts.speed_tolerance,
        cells_compared: b_order.len(),
        cells_only_in_candidate,
        cells_unjudged: unjudged,
        tests: ps.len(),
        findings: flagged,
        sensitivity,
    })
}

/// What a green gate means for one target: the smallest regressions it catches with
/// probability [`SENSITIVITY_POWER`] at the present replicate counts, held to Holm's first
/// threshold (the level a single regressed quantity must reach).
#[derive(Debug, Clone, PartialEq)]
pub struct Sensitivity {
    pub target: String,
    /// Smallest usable replicate counts over the target's cells and quantities.
    pub baseline_n: usize,
    pub candidate_n: usize,
    /// The per-test level used: family alpha / number of tests.
    pub level: f64,
    /// Smallest shift of one quantity's mean caught, in standard errors of the candidate's
    /// mean (pooled sd / sqrt n_c).
    pub shift_se: f64,
    /// The same in the quantities' own units: smallest and largest over the target's cells
    /// and quantities.
    pub shift_units: (f64, f64),
    /// Replicates a side that would halve the detectable shift in units.
    pub replicates_to_halve: Option<usize>,
    /// Smallest ratio of standard deviations caught by the F test (before its kurtosis
    /// adjustment and rank confirmation, which ask for somewhat more).
    pub spread_ratio: f64,
}

/// Power at which [`Sensitivity`] is stated.
pub const SENSITIVITY_POWER: f64 = 0.9;

/// Smallest noncentrality caught with probability [`SENSITIVITY_POWER`] by a two-sided t test at
/// `level` on `df` degrees of freedom, by the normal approximation to the noncentral t
/// (Johnson, Kotz & Balakrishnan 1995, Continuous Univariate Distributions 2, ch. 31):
/// delta = c + z_0.9 sqrt(1 + c^2 / (2 df)), c the critical value.
pub fn detectable_shift(level: f64, df: f64) -> f64 {
    let c = crate::inference::t_isf(level / 2.0, df);
    let z = crate::inference::normal_isf(1.0 - SENSITIVITY_POWER);
    c + z * (1.0 + c * c / (2.0 * df)).sqrt()
}

/// Smallest sd ratio caught with probability [`SENSITIVITY_POWER`] by the one-sided F test at
/// `level`: sqrt(F_crit / F_q) with F_q the (1 - power) quantile, on (dfc, dfb) df.
pub fn detectable_spread_ratio(level: f64, dfc: f64, dfb: f64) -> f64 {
    let sf = |x: f64| {
        statrs::distribution::FisherSnedecor::new(dfc, dfb)
            .map(|d| statrs::distribution::ContinuousCDF::sf(&d, x))
            .unwrap_or(0.0)
    };
    let crit = crate::inference::bisect_decreasing(sf, level, 0.0, 1e12);
    let q = crate::inference::bisect_decreasing(sf, SENSITIVITY_POWER, 0.0, 1e6);
    (crit / q).sqrt()
}

fn sensitivity(label: &str, seen: &[(usize, usize, f64)], level: f64) -> Option<Sensitivity> {
    let nb = seen.iter().map(|x| x.0).min()?;
    let nc = seen.iter().map(|x| x.1).min()?;
    if nb < 2 || nc < 2 {
        return None;
    }
    let df = (nb + nc - 2) as f64;
    let shift_se = detectable_shift(level, df);
    let (lo, hi) = seen.iter().fold((f64::INFINITY, 0.0f64), |(l, h), x| {
        (l.min(shift_se * x.2), h.max(shift_se * x.2))
    });
    // Units scale as shift(n) / sqrt(n) with n replicates a side (the sd stays).
    let at = |n: usize| detectable_shift(level, (2 * n - 2) as f64) / (n as f64).sqrt();
    let now = shift_se / (nc as f64).sqrt();
    let replicates_to_halve = (nc..=nc.saturating_mul(100)).find(|&n| at(n) <= now / 2.0);
    Some(Sensitivity {
        target: label.to_string(),
        baseline_n: nb,
        candidate_n: nc,
        level,
        shift_se,
        shift_units: (lo, hi),
        replicates_to_halve,
        spread_ratio: detectable_spread_ratio(level, (nc - 1) as f64, (nb - 1) as f64),
    })
}

/// A short account of how two headers differ in design.
fn design_difference(baseline: &Results, candidate: &Results) -> String {
    let (b, c) = (&baseline.header, &candidate.header);
    let mut parts = Vec::new();
    let labels = |h: &crate::results::Header| {
        h.targets
            .iter()
            .map(|t| t.label.clone())
            .collect::<Vec<_>>()
    };
    if labels(b) != labels(c) {
        parts.push(format!(
            "targets [{}] vs [{}]",
            labels(b).join(", "),
            labels(c).join(", ")
        ));
    } else {
        for (tb, tc) in b.targets.iter().zip(&c.targets) {
            if tb.family != tc.family || tb.dim != tc.dim || tb.params != tc.params {
                parts.push(format!("target `{}` is defined differently", tb.label));
            }
        }
    }
    if b.study.sampler != c.study.sampler {
        parts.push("the [sampler] tables differ".to_string());
    }
    if b.study.grid != c.study.grid {
        parts.push("the [grid] axes differ".to_string());
    }
    if parts.is_empty() {
        parts.push("headers differ".to_string());
    }
    parts.join("; ")
}
