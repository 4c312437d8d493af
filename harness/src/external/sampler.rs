//! A sampler in another program, spoken to over its stdin and stdout in JSON Lines.
//!
//! Protocol, one JSON object per line:
//! 1. assay writes `{"kind":"job","dim":d,"particles":N,"seed":S,"target":"<label>","settings":{..}}`;
//! 2. the program may write `{"kind":"evaluate","points":[[x1,..,xd],..]}` any number of times;
//!    assay answers each with `{"kind":"log_density","values":[..]}` in the same order
//!    (non-finite values as null); every point counts as one target evaluation;
//! 3. the program writes `{"kind":"result","mean":[..],"covariance":[[..]],"log_evidence":x,
//!    "kish_ess":x,"resamples":k}` (only `mean` is required) and exits with status 0.
//!
//! A malformed line, a point of the wrong length, a non-zero exit or an expired deadline kills
//! the program and fails the run with the reason.

use std::path::PathBuf;
use std::time::Instant;

use assay_targets::Target;
use serde_json::{Map, Value, json};

use super::child::{ChildProcess, density_json, parse_points};
use crate::sampler::{RunContext, RunOutput, RunStatus, Sampler};

/// An external sampler: a command line and the settings passed to it in the job line.
#[derive(Debug, Clone)]
pub struct ExternalSampler {
    argv: Vec<String>,
    particles: usize,
    settings: Map<String, Value>,
    log_dir: Option<PathBuf>,
}

impl ExternalSampler {
    /// `argv` is the program and its arguments; `settings` every effective sampler setting
    /// (passed through in the job line); stderr of each run goes to
    /// `<log_dir>/<target>-<seed>.log` when `log_dir` is given.
    pub fn new(
        argv: Vec<String>,
        particles: usize,
        settings: Map<String, Value>,
        log_dir: Option<PathBuf>,
    ) -> Result<Self, String> {
        if argv.is_empty() || argv[0].is_empty() {
            return Err("`external` must name a program: [\"program\", \"arg\", ...]".to_string());
        }
        Ok(ExternalSampler {
            argv,
            particles,
            settings,
            log_dir,
        })
    }

    fn run_inner(
        &self,
        target: &dyn Target,
        ctx: &RunContext,
        evaluations: &mut u64,
    ) -> Result<RunOutput, String> {
        let d = target.dim();
        let log = self
            .log_dir
            .as_ref()
            .map(|dir| dir.join(format!("{}-{}.log", target.label(), ctx.seed)));
        let mut child = ChildProcess::spawn(&self.argv, log.as_deref())?;
        child.send(&json!({
            "kind": "job",
            "dim": d,
            "particles": self.particles,
            "seed": ctx.seed,
            "target": target.label(),
            "settings": self.settings,
        }))?;
        let mut points = Vec::new();
        let mut values = Vec::new();
        loop {
            let msg = child.receive(ctx.deadline)?;
            let line = child.lines_read;
            match msg.get("kind").and_then(Value::as_str) {
                Some("evaluate") => {
                    let n = parse_points(msg.get("points").unwrap_or(&Value::Null), d, &mut points)
                        .map_err(|e| format!("`{}` line {line}: {e}", child.program()))?;
                    values.clear();
                    values.resize(n, 0.0);
                    target
                        .try_log_density_batch(&points, &mut values)
                        .map_err(|e| format!("target evaluation failed: {e}"))?;
                    *evaluations += n as u64;
                    let out: Vec<Value> = values.iter().map(|&x| density_json(x)).collect();
                    child.send(&json!({ "kind": "log_density", "values": out }))?;
                }
                Some("result") => {
                    let out = parse_result(&msg, d)
                        .map_err(|e| format!("`{}` line {line}: {e}", child.program()))?;
                    child.finish(ctx.deadline)?;
                    return Ok(out);
                }
                other => {
                    return Err(format!(
                        "`{}` line {line}: unknown kind {}; expected \"evaluate\" or \"result\"",
                        child.program(),
                        other.map_or("(missing)".to_string(), |k| format!("\"{k}\""))
                    ));
                }
            }
        }
    }
}

fn numbers(v: &Value, what: &str, len: usize) -> Result<Vec<f64>, String> {
    let a = v
        .as_array()
        .ok_or_else(|| format!("`{what}` must be a list of numbers"))?;
    if a.len() != len {
        return Err(format!("`{what}` has {} values; {len} expected", a.len()));
    }
    a.iter()
        .map(|x| {
            x.as_f64()
                .ok_or_else(|| format!("`{what}` holds {x}, which is not a number"))
        })
        .collect()
}

fn optional_f64(msg: &Value, key: &str) -> Result<Option<f64>, String> {
    match msg.get(key) {
        None | Some(Value::Null) => Ok(None),
        Some(v) => v
            .as_f64()
            .map(Some)
            .ok_or_else(|| format!("`{key}` must be a number, not {v}")),
    }
}

/// Parse a result line into a run output (the caller fills in timing and evaluations).
fn parse_result(msg: &Value, d: usize) -> Result<RunOutput, String> {
    let mean = numbers(
        msg.get("mean").ok_or("the result line has no `mean`")?,
        "mean",
        d,
    )?;
    let covariance = match msg.get("covariance") {
        None | Some(Value::Null) => None,
        Some(v) => {
            let rows = v.as_array().ok_or("`covariance` must be a list of rows")?;
            if rows.len() != d {
                return Err(format!(
                    "`covariance` has {} rows; {d} expected",
                    rows.len()
                ));
            }
            Some(
                rows.iter()
                    .map(|r| numbers(r, "covariance row", d))
                    .collect::<Result<Vec<_>, _>>()?,
            )
        }
    };
    let resamples = match msg.get("resamples") {
        None | Some(Value::Null) => 0,
        Some(v) => v
            .as_u64()
            .ok_or_else(|| format!("`resamples` must be a whole number, not {v}"))?,
    };
    Ok(RunOutput {
        status: RunStatus::Ok,
        error: None,
        mean: Some(mean),
        covariance,
        log_evidence: optional_f64(msg, "log_evidence")?,
        kish_ess: optional_f64(msg, "kish_ess")?,
        resamples,
        evaluations: 0,
        seconds: 0.0,
        trace: Vec::new(),
    })
}

impl Sampler for ExternalSampler {
    fn name(&self) -> &str {
        &self.argv[0]
    }

    fn run(&self, target: &dyn Target, ctx: &RunContext) -> RunOutput {
        let t0 = Instant::now();
        let mut evaluations = 0;
        let mut out = match self.run_inner(target, ctx, &mut evaluations) {
            Ok(o) => o,
            Err(e) => RunOutput::failed(e),
        };
        out.evaluations = evaluations;
        out.seconds = t0.elapsed().as_secs_f64();
        out
    }
}
