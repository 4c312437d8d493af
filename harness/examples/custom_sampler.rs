//! A sampler of your own, scored by a study through the library API, on the built-in targets.
//!
//! The sampler here is plain importance sampling from N(0, s0^2 I) — deliberately simple, so
//! that the example is about the [`Sampler`] trait and not the method. The study's
//! `sampler_factory` builds it for every cell from the cell's settings (here `particles` and
//! `initial_scale` on the grid).
//!
//! Run with `cargo run --release --example custom_sampler`.

use std::path::Path;
use std::sync::Arc;
use std::time::Instant;

use assay::results::read_results;
use assay::scores::Metric;
use assay::study::{RunOptions, parse_study, run_study};
use assay::table::{rank, render_markdown};
use assay::targets::Target;
use assay::{RunContext, RunOutput, RunStatus, Sampler};
use rand::{RngExt, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;

/// Importance sampling with an isotropic Gaussian proposal.
struct ImportanceSampler {
    particles: usize,
    scale: f64,
}

impl Sampler for ImportanceSampler {
    fn name(&self) -> &str {
        "importance"
    }

    fn run(&self, target: &dyn Target, ctx: &RunContext) -> RunOutput {
        let t0 = Instant::now();
        let d = target.dim();
        let mut rng = ChaCha8Rng::seed_from_u64(ctx.seed);
        let mut x = vec![0.0; self.particles * d];
        for v in x.iter_mut() {
            *v = self.scale * rng.sample::<f64, _>(StandardNormal);
        }
        let mut lp = vec![0.0; self.particles];
        if let Err(e) = target.try_log_density_batch(&x, &mut lp) {
            return RunOutput::failed(e);
        }
        // log w = log pi - log q, with q = N(0, s^2 I).
        let c = -(d as f64) * (self.scale.ln() + 0.5 * (2.0 * std::f64::consts::PI).ln());
        let logw: Vec<f64> = lp
            .iter()
            .zip(x.chunks_exact(d))
            .map(|(l, p)| {
                let q = c - 0.5 * p.iter().map(|v| v * v).sum::<f64>() / (self.scale * self.scale);
                if l.is_finite() {
                    l - q
                } else {
                    f64::NEG_INFINITY
                }
            })
            .collect();
        let m = logw.iter().copied().fold(f64::NEG_INFINITY, f64::max);
        if !m.is_finite() {
            return RunOutput::failed("every importance weight is zero");
        }
        let w: Vec<f64> = logw.iter().map(|l| (l - m).exp()).collect();
        let sum: f64 = w.iter().sum();
        let mut mean = vec![0.0; d];
        for (wi, p) in w.iter().zip(x.chunks_exact(d)) {
            for (m, v) in mean.iter_mut().zip(p) {
                *m += wi / sum * v;
            }
        }
        let mut cov = vec![vec![0.0; d]; d];
        for (wi, p) in w.iter().zip(x.chunks_exact(d)) {
            for i in 0..d {
                for j in 0..d {
                    cov[i][j] += wi / sum * (p[i] - mean[i]) * (p[j] - mean[j]);
                }
            }
        }
        RunOutput {
            status: RunStatus::Ok,
            error: None,
            mean: Some(mean),
            covariance: Some(cov),
            log_evidence: Some(m + (sum / self.particles as f64).ln()),
            kish_ess: Some(sum * sum / w.iter().map(|v| v * v).sum::<f64>()),
            resamples: 0,
            evaluations: self.particles as u64,
            seconds: t0.elapsed().as_secs_f64(),
            trace: Vec::new(),
        }
    }
}

const STUDY: &str = r#"
[study]
name = "example-custom-sampler"
replicates = 16
seed = 2

[grid]
particles = [1000, 10000]
initial_scale = [1.5, 3.0]

[[target]]
label = "corr-gauss-3"
family = "gaussian"
dim = 3
ar1 = 0.5

[[target]]
label = "heavy-tails-2"
family = "student-t"
dim = 2
dof = 5.0
"#;

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let mut study = parse_study(Path::new("example-custom-sampler.toml"), STUDY)?;
    study.sampler_factory = Some(Arc::new(|cell| {
        Ok(Box::new(ImportanceSampler {
            particles: cell.sampler.particles,
            scale: cell.sampler.initial_scale,
        }) as Box<dyn Sampler>)
    }));
    let opts = RunOptions {
        out: Some("results/example-custom-sampler.jsonl".into()),
        replace: true,
        ..Default::default()
    };
    let summary = run_study(&study, &opts)?;
    let results = read_results(&summary.out, false)?;
    print!(
        "{}",
        render_markdown(&results, &rank(&results, Metric::RmseMean))
    );
    Ok(())
}
