//! The engine's hot paths at d = 10, N = 1000 on the AR(1) Gaussian (rho = 0.5): the
//! approximately optimal L-kernel's fit and score, one full static iteration for the proposal
//! and the approximately optimal backward kernels, and one full static run of 50 iterations.

use std::time::Duration;

use assay::engine::Smc;
use assay::engine::bench_api::{OptimalKernel, StaticIteration};
use assay::settings::{BackwardKernel, SamplerSettings};
use assay::{RunContext, Sampler};
use assay_targets::{Gaussian, Target};
use criterion::{Criterion, Throughput, criterion_group, criterion_main};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};

const N: usize = 1000;
const D: usize = 10;

fn settings(kernel: BackwardKernel, iterations: usize) -> SamplerSettings {
    SamplerSettings {
        particles: N,
        iterations,
        initial_scale: 4.0,
        proposal_scale: 0.5,
        backward_kernel: kernel,
        ..Default::default()
    }
}

const KERNELS: [(&str, BackwardKernel); 2] = [
    ("proposal", BackwardKernel::Proposal),
    ("gaussian-optimal", BackwardKernel::GaussianOptimal),
];

fn lkernel(c: &mut Criterion) {
    let mut rng = ChaCha8Rng::seed_from_u64(3);
    let old: Vec<f64> = (0..N * D)
        .map(|_| StandardNormal.sample(&mut rng))
        .collect();
    let new: Vec<f64> = old
        .iter()
        .map(|x| x + 0.5 * <StandardNormal as Distribution<f64>>::sample(&StandardNormal, &mut rng))
        .collect();
    let log_q = vec![-1.0; N];
    let mut log_inc = vec![0.0; N];
    let mut k = OptimalKernel::new(N, D);
    let mut g = c.benchmark_group("lkernel-d10-n1000");
    g.warm_up_time(Duration::from_millis(300))
        .measurement_time(Duration::from_secs(1))
        .throughput(Throughput::Elements(N as u64));
    g.bench_function("gaussian-fit", |b| b.iter(|| k.fit(&old, &new, D).unwrap()));
    k.fit(&old, &new, D).unwrap();
    g.bench_function("gaussian-score", |b| {
        b.iter(|| k.score(&old, &new, &log_q, D, &mut log_inc))
    });
    g.finish();
}

fn iteration(c: &mut Criterion) {
    let t = Gaussian::new(D, &[0.0], &[1.0], 0.5).unwrap();
    let mut g = c.benchmark_group("iteration-d10-n1000");
    g.warm_up_time(Duration::from_millis(300))
        .measurement_time(Duration::from_secs(1))
        .throughput(Throughput::Elements(N as u64));
    for (name, kernel) in KERNELS {
        let mut it = StaticIteration::new(settings(kernel, 50), &t, 1);
        g.bench_function(name, |b| b.iter(|| it.iterate(&t)));
    }
    g.finish();
}

fn run(c: &mut Criterion) {
    let t = Gaussian::new(D, &[0.0], &[1.0], 0.5).unwrap();
    let mut g = c.benchmark_group("static-d10-n1000-t50");
    g.sample_size(10)
        .warm_up_time(Duration::from_millis(300))
        .measurement_time(Duration::from_secs(2));
    for (name, kernel) in KERNELS {
        let smc = Smc::new(settings(kernel, 50)).unwrap();
        let ctx = RunContext::with_seed(1);
        g.bench_function(name, |b| b.iter(|| smc.run(&t as &dyn Target, &ctx)));
    }
    g.finish();
}

criterion_group!(benches, lkernel, iteration, run);
criterion_main!(benches);
