//! Reference values for targets without exact ones (a user's own model): pooled independent
//! runs of the study's `[reference]` configuration, computed once, stored in a file keyed by
//! the target's definition and the reference configuration, and reused while both stay the
//! same. Scores against such values are relative to the reference run, whose own standard
//! errors the scores carry along.

use std::path::{Path, PathBuf};

use rayon::prelude::*;
use serde::{Deserialize, Serialize};
use serde_json::{Value, json};

use super::config::{ReferenceSpec, Study, StudyTarget};
use crate::engine::Smc;
use crate::results::{ReferenceRun, TargetInfo};
use crate::sampler::{RunContext, Sampler};
use crate::seed::{fnv1a64, run_seed};
use crate::stats::{mean, sd};

/// Master seed of reference runs: fixed, so that reruns of a study with other master seeds share
/// one reference.
const REFERENCE_SEED: u64 = 0x7265_6665_7265_6e63;

/// What is stored in a reference file.
#[derive(Debug, Clone, Serialize, Deserialize)]
struct Stored {
    definition: Value,
    runs: u64,
    particles: usize,
    log_z: Option<f64>,
    log_z_se: Option<f64>,
    mean: Vec<f64>,
    mean_se: Vec<f64>,
    covariance: Vec<Vec<f64>>,
}

/// Whether a target needs a reference run: it lacks an exact mean or log Z.
pub fn needs_reference(info: &TargetInfo) -> bool {
    info.mean.is_none() || info.log_z.is_none()
}

/// The target infos of a study with reference values filled in from reference runs where
/// needed (computing and storing them in `dir` when not stored yet). Targets with exact values,
/// and every target when the study has no `[reference]` table, are returned unchanged.
pub fn complete_infos(
    study: &Study,
    dir: &Path,
    threads: Option<usize>,
) -> Result<Vec<TargetInfo>, String> {
    let Some(spec) = &study.reference else {
        return Ok(study.targets.iter().map(|t| t.info.clone()).collect());
    };
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(threads.unwrap_or(0))
        .build()
        .map_err(|e| format!("cannot start worker threads: {e}"))?;
    study
        .targets
        .iter()
        .map(|t| {
            if needs_reference(&t.info) {
                pool.install(|| reference_for(t, spec, study, dir))
            } else {
                Ok(t.info.clone())
            }
        })
        .collect()
}

fn reference_for(
    t: &StudyTarget,
    spec: &ReferenceSpec,
    study: &Study,
    dir: &Path,
) -> Result<TargetInfo, String> {
    let definition = json!({
        "label": t.info.label,
        "family": t.info.family,
        "dim": t.info.dim,
        "params": t.info.params,
        "reference": study.info.reference,
    });
    let key = fnv1a64(definition.to_string().as_bytes());
    let file: PathBuf = dir.join(format!("{}-{key:016x}.json", t.info.label));
    let stored = match std::fs::read_to_string(&file) {
        Ok(text) => {
            let s: Stored = serde_json::from_str(&text).map_err(|e| {
                format!(
                    "{}: not a reference file ({e}); delete it to recompute",
                    file.display()
                )
            })?;
            if s.definition != definition {
                return Err(format!(
                    "{}: stored for another definition of target `{}`; delete it to recompute",
                    file.display(),
                    t.info.label
                ));
            }
            if let Some(why) = implausible(&s, t.info.dim) {
                return Err(format!(
                    "{}: not a usable reference for target `{}` (dim {}): {why}; delete it to \
                     recompute",
                    file.display(),
                    t.info.label,
                    t.info.dim
                ));
            }
            s
        }
        Err(_) => {
            let s = compute(t, spec, definition)?;
            std::fs::create_dir_all(dir)
                .map_err(|e| format!("cannot create {}: {e}", dir.display()))?;
            let text = serde_json::to_string_pretty(&s).map_err(|e| e.to_string())?;
            // Write aside and rename, so that shards starting at the same time never read a
            // half-written file.
            let tmp = file.with_extension(format!("json.tmp{}", std::process::id()));
            std::fs::write(&tmp, text + "\n")
                .and_then(|_| std::fs::rename(&tmp, &file))
                .map_err(|e| format!("cannot write {}: {e}", file.display()))?;
            s
        }
    };
    let mut info = t.info.clone();
    let fill_mean = info.mean.is_none();
    let fill_log_z = info.log_z.is_none();
    if fill_mean {
        info.mean = Some(stored.mean.clone());
        if info.covariance.is_none() {
            info.covariance = Some(stored.covariance.clone());
        }
    }
    if fill_log_z {
        info.log_z = stored.log_z;
    }
    info.reference_run = Some(ReferenceRun {
        file: file.to_string_lossy().into_owned(),
        runs: stored.runs,
        particles: stored.particles,
        mean_se: fill_mean.then(|| stored.mean_se.clone()),
        log_z_se: if fill_log_z { stored.log_z_se } else { None },
    });
    Ok(info)
}

/// Why a stored reference cannot be what `compute` wrote for a target of dimension `d` (a file
/// edited by hand or by another program): shapes, finiteness and signs.
fn implausible(s: &Stored, d: usize) -> Option<String> {
    let finite = |v: &[f64]| v.iter().all(|x| x.is_finite());
    if s.mean.len() != d || !finite(&s.mean) {
        return Some(format!(
            "its mean has {} values, or non-finite ones",
            s.mean.len()
        ));
    }
    if s.mean_se.len() != d || s.mean_se.iter().any(|x| !x.is_finite() || *x < 0.0) {
        return Some("its standard errors are not d finite values >= 0".to_string());
    }
    if s.covariance.len() != d || s.covariance.iter().any(|r| r.len() != d || !finite(r)) {
        return Some(format!("its covariance is not a finite {d} x {d} matrix"));
    }
    if s.runs < 2 || s.particles < 2 {
        return Some(format!(
            "it pools {} runs of {} particles (at least 2 of 2 expected)",
            s.runs, s.particles
        ));
    }
    if s.log_z.is_some_and(|z| !z.is_finite())
        || s.log_z_se.is_some_and(|x| !x.is_finite() || x < 0.0)
    {
        return Some("its log Z or the standard error of it is not finite (or negative)".into());
    }
    None
}

/// Pool `spec.runs` independent reference runs: the mean and covariance are averaged over runs;
/// the evidence is averaged on the Z scale (the SMC estimate of Z is unbiased, Del Moral 2004),
/// and every standard error is the spread across runs / sqrt(runs).
fn compute(t: &StudyTarget, spec: &ReferenceSpec, definition: Value) -> Result<Stored, String> {
    let sampler = Smc::new(spec.sampler.clone()).map_err(|e| format!("[reference]: {e}"))?;
    let outs: Vec<_> = (0..spec.runs)
        .into_par_iter()
        .map(|r| {
            let seed = run_seed(REFERENCE_SEED, &t.info.label, "reference", r);
            sampler.run(t.target.as_ref(), &RunContext::with_seed(seed))
        })
        .collect();
    let d = t.info.dim;
    let mut means: Vec<Vec<f64>> = Vec::new();
    let mut covs: Vec<Vec<Vec<f64>>> = Vec::new();
    let mut log_zs: Vec<f64> = Vec::new();
    for (r, o) in outs.iter().enumerate() {
        if !o.is_ok() {
            return Err(format!(
                "reference run {r} of target `{}` failed: {}",
                t.info.label,
                o.error.as_deref().unwrap_or("no reason given")
            ));
        }
        if let Some(m) = &o.mean {
            means.push(m.clone());
        }
        if let Some(c) = &o.covariance {
            covs.push(c.clone());
        }
        if let Some(z) = o.log_evidence {
            log_zs.push(z);
        }
    }
    let n = means.len().max(1) as f64;
    let col = |j: usize| -> Vec<f64> { means.iter().map(|m| m[j]).collect() };
    let mean_v: Vec<f64> = (0..d).map(|j| mean(&col(j)).unwrap_or(f64::NAN)).collect();
    let mean_se: Vec<f64> = (0..d)
        .map(|j| sd(&col(j)).unwrap_or(f64::NAN) / n.sqrt())
        .collect();
    let covariance: Vec<Vec<f64>> = (0..d)
        .map(|i| {
            (0..d)
                .map(|j| covs.iter().map(|c| c[i][j]).sum::<f64>() / covs.len().max(1) as f64)
                .collect()
        })
        .collect();
    let (log_z, log_z_se) = if log_zs.len() == outs.len() && !log_zs.is_empty() {
        let m = log_zs.iter().copied().fold(f64::NEG_INFINITY, f64::max);
        let lme =
            m + (log_zs.iter().map(|z| (z - m).exp()).sum::<f64>() / log_zs.len() as f64).ln();
        (
            Some(lme),
            sd(&log_zs).map(|s| s / (log_zs.len() as f64).sqrt()),
        )
    } else {
        (None, None)
    };
    if mean_v.iter().any(|x| !x.is_finite()) {
        return Err(format!(
            "the reference runs of target `{}` gave a non-finite mean",
            t.info.label
        ));
    }
    Ok(Stored {
        definition,
        runs: spec.runs,
        particles: spec.sampler.particles,
        log_z,
        log_z_se,
        mean: mean_v,
        mean_se,
        covariance,
    })
}
