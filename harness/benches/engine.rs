//! One full static run, d = 10, N = 1000, 50 iterations, random walk, for the proposal and the
//! approximately optimal backward kernels.

use std::time::Duration;

use assay::engine::Smc;
use assay::settings::{BackwardKernel, SamplerSettings};
use assay::{RunContext, Sampler};
use assay_targets::Target;
use criterion::{Criterion, criterion_group, criterion_main};
use nalgebra::DMatrix;
use rand::Rng;

/// Standard normal in d dimensions (unnormalised log density).
struct StdGauss(usize, DMatrix<f64>, Vec<f64>);

impl Target for StdGauss {
    fn dim(&self) -> usize {
        self.0
    }
    fn log_density(&self, x: &[f64]) -> f64 {
        -0.5 * x.iter().map(|v| v * v).sum::<f64>()
    }
    fn log_z(&self) -> Option<f64> {
        Some(0.5 * self.0 as f64 * (2.0 * std::f64::consts::PI).ln())
    }
    fn mean(&self) -> Option<&[f64]> {
        Some(&self.2)
    }
    fn covariance(&self) -> Option<&DMatrix<f64>> {
        Some(&self.1)
    }
    fn sample(&self, _rng: &mut dyn Rng, _out: &mut [f64]) -> bool {
        false
    }
    fn label(&self) -> &str {
        "bench-std-gauss-10"
    }
    fn family(&self) -> &str {
        "bench"
    }
}

fn bench(c: &mut Criterion) {
    let d = 10;
    let t = StdGauss(d, DMatrix::identity(d, d), vec![0.0; d]);
    let mut g = c.benchmark_group("static-d10-n1000-t50");
    g.sample_size(20)
        .warm_up_time(Duration::from_millis(500))
        .measurement_time(Duration::from_secs(3));
    for (name, kernel) in [
        ("proposal", BackwardKernel::Proposal),
        ("gaussian-optimal", BackwardKernel::GaussianOptimal),
    ] {
        let smc = Smc::new(SamplerSettings {
            particles: 1000,
            iterations: 50,
            initial_scale: 2.0,
            proposal_scale: 0.5,
            backward_kernel: kernel,
            ..Default::default()
        })
        .unwrap();
        let ctx = RunContext::with_seed(1);
        g.bench_function(name, |b| b.iter(|| smc.run(&t, &ctx)));
    }
    g.finish();
}

criterion_group!(benches, bench);
criterion_main!(benches);
