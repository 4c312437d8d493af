//! A target whose log density is computed by another program, over a JSON Lines pipe.
//!
//! Protocol: assay writes `{"kind":"evaluate","points":[[x1,..,xd],..]}` (one batch per
//! population step) and reads `{"kind":"log_density","values":[..]}` with one value per point,
//! in order (null for a non-finite value). The process stays alive across batches and runs;
//! each worker thread talks to its own process. A malformed answer, a wrong number of values,
//! an early exit or a batch slower than `[study] timeout_s` kills the process and fails the run
//! that asked, with the reason; the next batch starts a fresh process.

use std::path::PathBuf;
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::{Mutex, OnceLock};
use std::time::{Duration, Instant};

use assay_targets::{ParamError, Target};
use nalgebra::DMatrix;
use serde_json::{Value, json};

use super::child::ChildProcess;

/// Family name of external targets in study files.
pub const FAMILY: &str = "external";
/// Keys of an external `[[target]]` table.
pub const KEYS: &[&str] = &[
    "family",
    "label",
    "command",
    "dim",
    "log_z",
    "mean",
    "covariance",
];

/// A target evaluated by an external program.
pub struct ExternalTarget {
    label: String,
    argv: Vec<String>,
    dim: usize,
    log_z: Option<f64>,
    mean: Option<Vec<f64>>,
    covariance: Option<DMatrix<f64>>,
    timeout: Option<Duration>,
    idle: Mutex<Vec<ChildProcess>>,
    log_dir: OnceLock<PathBuf>,
    started: AtomicUsize,
}

fn perr(key: &str, value: impl std::fmt::Display, allowed: &str) -> ParamError {
    ParamError::OutOfRange {
        family: FAMILY.to_string(),
        key: key.to_string(),
        value: value.to_string(),
        allowed: allowed.to_string(),
    }
}

fn float_list(v: &toml::Value, key: &str) -> Result<Vec<f64>, ParamError> {
    let a = v
        .as_array()
        .ok_or_else(|| perr(key, v, "a list of numbers"))?;
    a.iter()
        .map(|x| {
            x.as_float()
                .or(x.as_integer().map(|i| i as f64))
                .filter(|f| f.is_finite())
                .ok_or_else(|| perr(key, x, "finite numbers"))
        })
        .collect()
}

impl ExternalTarget {
    /// Build from a `[[target]]` table with `family = "external"`.
    pub fn from_table(
        spec: &toml::Table,
        label: &str,
        timeout: Option<Duration>,
    ) -> Result<Self, ParamError> {
        for k in spec.keys() {
            if !KEYS.contains(&k.as_str()) {
                return Err(ParamError::UnknownKey {
                    family: FAMILY.to_string(),
                    key: k.clone(),
                    suggestion: assay_targets::nearest(k, KEYS),
                    allowed: KEYS.iter().map(|s| s.to_string()).collect(),
                });
            }
        }
        let argv: Vec<String> = match spec.get("command") {
            None => {
                return Err(ParamError::Missing {
                    family: FAMILY.to_string(),
                    key: "command".to_string(),
                });
            }
            Some(toml::Value::Array(a)) if !a.is_empty() && a.iter().all(|x| x.is_str()) => a
                .iter()
                .filter_map(|x| x.as_str().map(str::to_string))
                .collect(),
            Some(v) => {
                return Err(perr(
                    "command",
                    v,
                    "a non-empty list of strings [\"program\", \"arg\", ...] (never a shell string)",
                ));
            }
        };
        let dim = match spec.get("dim") {
            None => {
                return Err(ParamError::Missing {
                    family: FAMILY.to_string(),
                    key: "dim".to_string(),
                });
            }
            Some(toml::Value::Integer(d)) if *d >= 1 => *d as usize,
            Some(v) => return Err(perr("dim", v, "an integer >= 1")),
        };
        let log_z = match spec.get("log_z") {
            None => None,
            Some(v) => Some(
                v.as_float()
                    .or(v.as_integer().map(|i| i as f64))
                    .filter(|f| f.is_finite())
                    .ok_or_else(|| perr("log_z", v, "a finite number"))?,
            ),
        };
        let mean = match spec.get("mean") {
            None => None,
            Some(v) => {
                let m = float_list(v, "mean")?;
                if m.len() != dim {
                    return Err(ParamError::LengthMismatch {
                        family: FAMILY.to_string(),
                        key: "mean".to_string(),
                        len: m.len(),
                        expected: dim,
                    });
                }
                Some(m)
            }
        };
        let covariance = match spec.get("covariance") {
            None => None,
            Some(v) => {
                let rows = v
                    .as_array()
                    .ok_or_else(|| perr("covariance", v, "a list of dim rows of dim numbers"))?;
                if rows.len() != dim {
                    return Err(ParamError::LengthMismatch {
                        family: FAMILY.to_string(),
                        key: "covariance".to_string(),
                        len: rows.len(),
                        expected: dim,
                    });
                }
                let mut flat = Vec::with_capacity(dim * dim);
                for r in rows {
                    let r = float_list(r, "covariance")?;
                    if r.len() != dim {
                        return Err(ParamError::LengthMismatch {
                            family: FAMILY.to_string(),
                            key: "covariance".to_string(),
                            len: r.len(),
                            expected: dim,
                        });
                    }
                    flat.extend(r);
                }
                Some(DMatrix::from_row_slice(dim, dim, &flat))
            }
        };
        Ok(ExternalTarget {
            label: label.to_string(),
            argv,
            dim,
            log_z,
            mean,
            covariance,
            timeout,
            idle: Mutex::new(Vec::new()),
            log_dir: OnceLock::new(),
            started: AtomicUsize::new(0),
        })
    }

    /// Send the stderr of the processes started from now on to files in `dir`.
    pub fn set_log_dir(&self, dir: PathBuf) {
        let _ = self.log_dir.set(dir);
    }

    /// A process for one batch: an idle one (`true`) or a new one (`false`).
    fn checkout(&self) -> Result<(ChildProcess, bool), String> {
        if let Some(c) = self.idle.lock().ok().and_then(|mut v| v.pop()) {
            return Ok((c, true));
        }
        self.spawn().map(|c| (c, false))
    }

    fn spawn(&self) -> Result<ChildProcess, String> {
        let n = self.started.fetch_add(1, Ordering::Relaxed);
        let log = self
            .log_dir
            .get()
            .map(|d| d.join(format!("{}-target-{n}.log", self.label)));
        ChildProcess::spawn(&self.argv, log.as_deref())
    }

    fn evaluate(
        &self,
        child: &mut ChildProcess,
        points: &[f64],
        out: &mut [f64],
    ) -> Result<(), String> {
        let pts: Vec<Value> = points
            .chunks_exact(self.dim)
            .map(|p| {
                json!(
                    p.iter()
                        .map(|&x| if x.is_finite() { json!(x) } else { Value::Null })
                        .collect::<Vec<_>>()
                )
            })
            .collect();
        child.send(&json!({ "kind": "evaluate", "points": pts }))?;
        let msg = child.receive(self.timeout.map(|t| Instant::now() + t))?;
        let line = child.lines_read;
        let prog = child.program().to_string();
        if msg.get("kind").and_then(Value::as_str) != Some("log_density") {
            return Err(format!(
                "`{prog}` line {line}: expected kind \"log_density\""
            ));
        }
        let values = msg
            .get("values")
            .and_then(Value::as_array)
            .ok_or_else(|| format!("`{prog}` line {line}: `values` must be a list"))?;
        if values.len() != out.len() {
            return Err(format!(
                "`{prog}` line {line}: {} values for {} points",
                values.len(),
                out.len()
            ));
        }
        for (o, v) in out.iter_mut().zip(values) {
            *o = match v {
                Value::Null => f64::NAN,
                v => v.as_f64().ok_or_else(|| {
                    format!("`{prog}` line {line}: value {v} is not a number or null")
                })?,
            };
        }
        Ok(())
    }
}

impl Target for ExternalTarget {
    fn dim(&self) -> usize {
        self.dim
    }

    fn log_density(&self, x: &[f64]) -> f64 {
        let mut out = [f64::NAN];
        let _ = self.try_log_density_batch(x, &mut out);
        out[0]
    }

    fn log_density_batch(&self, points: &[f64], out: &mut [f64]) {
        if self.try_log_density_batch(points, out).is_err() {
            out.fill(f64::NAN);
        }
    }

    fn try_log_density_batch(&self, points: &[f64], out: &mut [f64]) -> Result<(), String> {
        if points.len() != out.len() * self.dim {
            return Err(format!(
                "{} coordinates for {} points of dimension {}",
                points.len(),
                out.len(),
                self.dim
            ));
        }
        let (mut child, reused) = self.checkout()?;
        // On error the process is dropped, which stops it. A process that sat idle between
        // runs may have died meanwhile, through no fault of the run now asking: that run gets
        // one fresh process before its batch counts as failed (a slow answer is not retried).
        if let Err(e) = self.evaluate(&mut child, points, out) {
            if !reused || e.contains("time limit") {
                return Err(e);
            }
            drop(child);
            child = self.spawn()?;
            self.evaluate(&mut child, points, out)?;
        }
        if let Ok(mut idle) = self.idle.lock() {
            idle.push(child);
        }
        Ok(())
    }

    fn log_z(&self) -> Option<f64> {
        self.log_z
    }

    fn mean(&self) -> Option<&[f64]> {
        self.mean.as_deref()
    }

    fn covariance(&self) -> Option<&DMatrix<f64>> {
        self.covariance.as_ref()
    }

    fn label(&self) -> &str {
        &self.label
    }

    fn family(&self) -> &str {
        FAMILY
    }
}
