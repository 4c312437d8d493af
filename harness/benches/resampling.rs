//! Throughput of the resampling schemes at N = 1000 and N = 100 000 (M = N), on skewed
//! weights. Each call takes the next of 32 different weight vectors: on one fixed vector the
//! branch predictor learns the walk at N = 1000 and the figure is several times better than
//! in a sampler, where the weights are new at every step.

use std::hint::black_box;
use std::time::Duration;

use assay::resampling::scheme;
use assay::settings::Resampling;
use criterion::{BenchmarkId, Criterion, Throughput, criterion_group, criterion_main};
use rand::{RngExt, SeedableRng};
use rand_chacha::ChaCha8Rng;

const SCHEMES: [(Resampling, &str); 4] = [
    (Resampling::Multinomial, "multinomial"),
    (Resampling::Systematic, "systematic"),
    (Resampling::Stratified, "stratified"),
    (Resampling::Residual, "residual"),
];

/// Normalised weights proportional to squared uniforms (skewed), a fifth of them zero.
fn weights(n: usize, rng: &mut ChaCha8Rng) -> Vec<f64> {
    let mut w: Vec<f64> = (0..n)
        .map(|i| {
            let u: f64 = rng.random();
            if i % 5 == 0 { 0.0 } else { u * u }
        })
        .collect();
    let total: f64 = w.iter().sum();
    w.iter_mut().for_each(|x| *x /= total);
    w
}

fn bench(c: &mut Criterion) {
    let mut group = c.benchmark_group("resampling");
    group
        .warm_up_time(Duration::from_secs(1))
        .measurement_time(Duration::from_secs(2));
    let mut rng = ChaCha8Rng::seed_from_u64(1);
    for n in [1000usize, 100_000] {
        let ws: Vec<Vec<f64>> = (0..32).map(|_| weights(n, &mut rng)).collect();
        let mut ancestors = vec![0usize; n];
        group.throughput(Throughput::Elements(n as u64));
        for (kind, name) in SCHEMES {
            let mut next = 0usize;
            group.bench_with_input(BenchmarkId::new(name, n), &ws, |b, ws| {
                b.iter(|| {
                    next = (next + 1) % ws.len();
                    scheme(kind).resample(black_box(&ws[next]), &mut rng, &mut ancestors);
                    black_box(&ancestors);
                })
            });
        }
    }
    group.finish();
}

criterion_group!(benches, bench);
criterion_main!(benches);
