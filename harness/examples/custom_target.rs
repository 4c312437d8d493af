//! A target of your own, scored by a study through the library API.
//!
//! Invented scenario (all numbers made up): a lab fits an invented two-step decay model
//! c(t) = exp(-k1 t) + 0.5 exp(-k2 t) to eight concentration readings, with log-normal priors
//! on the rate constants. The posterior of (log k1, log k2) has no closed form, so the study
//! names a `[reference]` configuration: assay pools a few long tempered runs once, stores the
//! result under results/references/, and scores every cell against it.
//!
//! Run with `cargo run --release --example custom_target`.

use std::path::Path;
use std::sync::Arc;

use assay::results::read_results;
use assay::scores::Metric;
use assay::study::{RunOptions, parse_study_for_code, run_study};
use assay::table::{rank, render_markdown};
use assay::targets::{DiagGaussian, Target};

/// Posterior of (log k1, log k2) for the invented decay readings.
struct DecayModel {
    times: Vec<f64>,
    readings: Vec<f64>,
    noise: f64,
    prior: DiagGaussian,
}

impl DecayModel {
    fn new() -> Self {
        DecayModel {
            times: vec![0.25, 0.5, 1.0, 1.5, 2.0, 3.0, 4.0, 6.0],
            // Invented readings.
            readings: vec![1.21, 0.98, 0.70, 0.52, 0.41, 0.27, 0.19, 0.10],
            noise: 0.04,
            prior: DiagGaussian {
                mean: vec![0.0, -1.0],
                sd: vec![1.0, 1.0],
            },
        }
    }
}

impl Target for DecayModel {
    fn dim(&self) -> usize {
        2
    }

    fn log_density(&self, x: &[f64]) -> f64 {
        let (k1, k2) = (x[0].exp(), x[1].exp());
        let mut ll = 0.0;
        for (t, y) in self.times.iter().zip(&self.readings) {
            let c = (-k1 * t).exp() + 0.5 * (-k2 * t).exp();
            let r = (y - c) / self.noise;
            ll -= 0.5 * r * r;
        }
        let lp: f64 = x
            .iter()
            .zip(self.prior.mean.iter().zip(&self.prior.sd))
            .map(|(v, (m, s))| -0.5 * ((v - m) / s).powi(2))
            .sum();
        ll + lp
    }

    // Nothing is known exactly about this posterior: `log_z`, `mean` and `covariance` keep the
    // trait's default (unknown), and the study's [reference] table supplies reference values.
    fn label(&self) -> &str {
        "decay-rates"
    }
    fn family(&self) -> &str {
        "decay-model"
    }
    // Temper from the prior.
    fn tempering_reference(&self) -> Option<&DiagGaussian> {
        Some(&self.prior)
    }
}

const STUDY: &str = r#"
[study]
name = "example-custom-target"
replicates = 12
seed = 5

[sampler]
particles = 500
path = "tempered"
move = "metropolis"
backward_kernel = "mcmc"
proposal_shape = "particle-covariance"

[grid]
cess_target = [0.5, 0.9]
move_steps = [1, 4]

[reference]
runs = 4
particles = 4000
path = "tempered"
cess_target = 0.95
move = "metropolis"
move_steps = 10
backward_kernel = "mcmc"
proposal_shape = "particle-covariance"
"#;

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let mut study = parse_study_for_code(Path::new("example-custom-target.toml"), STUDY)?;
    study.add_target(Arc::new(DecayModel::new()))?;
    let opts = RunOptions {
        out: Some("results/example-custom-target.jsonl".into()),
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
