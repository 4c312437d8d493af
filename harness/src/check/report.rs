//! Rendering of a [`CheckReport`]: markdown for a pull-request comment, JSON for machines.

use serde_json::{Value, json};

use super::{CheckReport, Finding, FindingKind, SideFigures, settings_text};

/// A number in a short, readable form (p-values and thresholds in scientific notation).
fn num(x: f64) -> String {
    if x == 0.0 {
        "0".to_string()
    } else if x.is_infinite() {
        if x > 0.0 { "inf" } else { "-inf" }.to_string()
    } else if x.abs() >= 1e4 || x.abs() < 1e-3 {
        format!("{x:.2e}")
    } else {
        format!("{x:.4}")
    }
}

fn opt(x: Option<f64>) -> String {
    x.map(num).unwrap_or_else(|| "-".to_string())
}

/// The figures of one side as shown in a table cell.
fn side_text(kind: FindingKind, s: &SideFigures) -> String {
    match kind {
        FindingKind::Bias => format!("error {} (SE {}), n={}", opt(s.mean_error), opt(s.se), s.n),
        FindingKind::Spread => format!("sd {}, n={}", opt(s.sd), s.n),
        FindingKind::Failures => format!("{} of {} failed", s.failures, s.runs),
        FindingKind::Missing if s.n > 0 || s.runs > s.failures => {
            format!("{} of {} usable runs report it", s.n, s.runs - s.failures)
        }
        FindingKind::Missing => {
            if s.runs == 0 {
                "absent".to_string()
            } else {
                format!("{} runs", s.runs)
            }
        }
        FindingKind::Speed => format!("median Kish ESS/s {}, n={}", opt(s.median_speed), s.n),
        FindingKind::Overflow => format!("n={}", s.n),
    }
}

fn evidence_text(f: &Finding) -> String {
    match (f.p_value, f.threshold) {
        (Some(p), Some(t)) => {
            let mut s = format!("p={} <= {}", num(p), num(t));
            if let Some(c) = f.confirm_p {
                s.push_str(&format!(" (rank test p={})", num(c)));
            }
            s
        }
        _ => match f.kind {
            FindingKind::Missing if f.quantity.is_some() => {
                "the candidate no longer reports it in every run".to_string()
            }
            FindingKind::Missing => "cell not in candidate".to_string(),
            FindingKind::Overflow => {
                "estimates too large for their mean or spread to be computed".to_string()
            }
            _ => "none failed before".to_string(),
        },
    }
}

/// Escape the characters that would break a markdown table cell.
fn cell(s: &str) -> String {
    s.replace('|', "\\|").replace('\n', " ")
}

impl CheckReport {
    /// One-line verdict, a table of regressions, and a compact count of what was compared.
    pub fn to_markdown(&self) -> String {
        let mut out = String::new();
        let b = self.baseline.display();
        let c = self.candidate.display();
        if self.regressed() {
            out.push_str(&format!(
                "**assay check: regression** in {} of {} cells (`{c}` against baseline `{b}`).\n\n",
                self.cells_regressed(),
                self.cells_compared
            ));
            out.push_str(
                "| target | settings | what | quantity | baseline | candidate | evidence |\n",
            );
            out.push_str("|---|---|---|---|---|---|---|\n");
            for f in &self.findings {
                out.push_str(&format!(
                    "| {} | {} | {} | {} | {} | {} | {} |\n",
                    cell(&f.target),
                    cell(&settings_text(&f.settings)),
                    f.kind.name(),
                    f.quantity.as_deref().unwrap_or("-"),
                    side_text(f.kind, &f.baseline),
                    side_text(f.kind, &f.candidate),
                    evidence_text(f)
                ));
            }
            out.push('\n');
        } else {
            out.push_str(&format!(
                "**assay check: no regression** in {} cells (`{c}` against baseline `{b}`).\n\n",
                self.cells_compared
            ));
        }
        let speed = match self.speed_tolerance {
            Some(t) => format!("speed judged at a {}% tolerance", num(t * 100.0)),
            None => "speed not judged".to_string(),
        };
        out.push_str(&format!(
            "{} cells compared, {} regressed, {} only in the candidate (not judged), {} with too \
             few usable runs to test; {} tests, family-wise false-alarm rate {} (Holm); \
             {speed}.\n",
            self.cells_compared,
            self.cells_regressed(),
            self.cells_only_in_candidate,
            self.cells_unjudged,
            self.tests,
            num(self.family_alpha)
        ));
        if !self.sensitivity.is_empty() {
            out.push_str(&format!(
                "\n**What this check can see** (caught with probability {}, one quantity at a \
                 time, at Holm's first threshold {}):\n\n",
                num(super::SENSITIVITY_POWER),
                num(self.sensitivity[0].level)
            ));
            out.push_str(
                "| target | replicates (baseline / candidate) | shift of a mean | in units | \
                 sd ratio | replicates a side to halve the shift |\n|---|---|---|---|---|---|\n",
            );
            for s in &self.sensitivity {
                let units =
                    if (s.shift_units.1 - s.shift_units.0).abs() <= 1e-9 * s.shift_units.1.abs() {
                        num(s.shift_units.0)
                    } else {
                        format!("{} to {}", num(s.shift_units.0), num(s.shift_units.1))
                    };
                out.push_str(&format!(
                    "| {} | {} / {} | {} SE | {units} | {}x | {} |\n",
                    cell(&s.target),
                    s.baseline_n,
                    s.candidate_n,
                    num(s.shift_se),
                    num(s.spread_ratio),
                    s.replicates_to_halve
                        .map_or("-".to_string(), |n| n.to_string())
                ));
            }
        }
        out
    }

    /// The same content as [`CheckReport::to_markdown`] for machines.
    pub fn to_json(&self) -> Value {
        let side = |s: &SideFigures| {
            json!({
                "runs": s.runs,
                "failures": s.failures,
                "n": s.n,
                "mean_error": s.mean_error,
                "se": s.se,
                "sd": s.sd,
                "median_speed": s.median_speed,
            })
        };
        // serde_json writes non-finite numbers as null; p-values here are always finite.
        let findings: Vec<Value> = self
            .findings
            .iter()
            .map(|f| {
                json!({
                    "target": f.target,
                    "settings": f.settings,
                    "kind": f.kind.name(),
                    "quantity": f.quantity,
                    "baseline": side(&f.baseline),
                    "candidate": side(&f.candidate),
                    "p_value": f.p_value,
                    "threshold": f.threshold,
                    "adjusted_p": f.adjusted_p,
                    "confirm_p": f.confirm_p,
                })
            })
            .collect();
        json!({
            "verdict": if self.regressed() { "regression" } else { "pass" },
            "baseline": self.baseline.display().to_string(),
            "candidate": self.candidate.display().to_string(),
            "family_alpha": self.family_alpha,
            "speed_tolerance": self.speed_tolerance,
            "cells_compared": self.cells_compared,
            "cells_regressed": self.cells_regressed(),
            "cells_only_in_candidate": self.cells_only_in_candidate,
            "cells_unjudged": self.cells_unjudged,
            "tests": self.tests,
            "regressions": findings,
            "sensitivity": self.sensitivity.iter().map(|s| json!({
                "target": s.target,
                "baseline_n": s.baseline_n,
                "candidate_n": s.candidate_n,
                "level": s.level,
                "power": super::SENSITIVITY_POWER,
                "shift_se": s.shift_se,
                "shift_units": [s.shift_units.0, s.shift_units.1],
                "replicates_to_halve": s.replicates_to_halve,
                "spread_ratio": s.spread_ratio,
            })).collect::<Vec<Value>>(),
        })
    }
}
