//! The random-number choices of the engine, measured: ChaCha8 against ChaCha12 and ChaCha20
//! (raw 64-bit words), and rand_distr's ziggurat `StandardNormal` against the Box-Muller and
//! Marsaglia polar methods (written here only as the comparison; the engine uses
//! `StandardNormal`). Each fills a buffer of 10 000 values, the engine's batch size at
//! N = 1000, d = 10.

use std::hint::black_box;
use std::time::Duration;

use criterion::{BenchmarkId, Criterion, Throughput, criterion_group, criterion_main};
use rand::{Rng, RngExt, SeedableRng};
use rand_chacha::{ChaCha8Rng, ChaCha12Rng, ChaCha20Rng};
use rand_distr::StandardNormal;

const LEN: usize = 10_000;

fn words<R: Rng>(rng: &mut R, out: &mut [u64]) {
    for o in out.iter_mut() {
        *o = rng.next_u64();
    }
}

fn ziggurat<R: Rng>(rng: &mut R, out: &mut [f64]) {
    for o in out.iter_mut() {
        *o = rng.sample(StandardNormal);
    }
}

/// Box-Muller (1958): two normals from two uniforms, with ln, sqrt, sin and cos.
fn box_muller<R: Rng>(rng: &mut R, out: &mut [f64]) {
    for pair in out.chunks_exact_mut(2) {
        let u1: f64 = 1.0 - rng.random::<f64>();
        let u2: f64 = rng.random();
        let r = (-2.0 * u1.ln()).sqrt();
        let (s, c) = (std::f64::consts::TAU * u2).sin_cos();
        pair[0] = r * c;
        pair[1] = r * s;
    }
}

/// Marsaglia & Bray (1964) polar method: rejection from the square to the unit disc, then one
/// ln and one sqrt per pair.
fn polar<R: Rng>(rng: &mut R, out: &mut [f64]) {
    for pair in out.chunks_exact_mut(2) {
        loop {
            let u: f64 = 2.0 * rng.random::<f64>() - 1.0;
            let v: f64 = 2.0 * rng.random::<f64>() - 1.0;
            let s = u * u + v * v;
            if s > 0.0 && s < 1.0 {
                let f = (-2.0 * s.ln() / s).sqrt();
                pair[0] = u * f;
                pair[1] = v * f;
                break;
            }
        }
    }
}

fn bench(c: &mut Criterion) {
    let mut g = c.benchmark_group("rng");
    g.warm_up_time(Duration::from_millis(300))
        .measurement_time(Duration::from_secs(1))
        .throughput(Throughput::Elements(LEN as u64));
    let mut w = vec![0u64; LEN];
    let mut x = vec![0.0f64; LEN];
    let (mut r8, mut r12, mut r20) = (
        ChaCha8Rng::seed_from_u64(1),
        ChaCha12Rng::seed_from_u64(1),
        ChaCha20Rng::seed_from_u64(1),
    );
    g.bench_function(BenchmarkId::new("u64", "chacha8"), |b| {
        b.iter(|| words(&mut r8, black_box(&mut w)))
    });
    g.bench_function(BenchmarkId::new("u64-fill", "chacha8"), |b| {
        b.iter(|| r8.fill(black_box(&mut w[..])))
    });
    g.bench_function(BenchmarkId::new("u64", "chacha12"), |b| {
        b.iter(|| words(&mut r12, black_box(&mut w)))
    });
    g.bench_function(BenchmarkId::new("u64", "chacha20"), |b| {
        b.iter(|| words(&mut r20, black_box(&mut w)))
    });
    g.bench_function(BenchmarkId::new("normal", "ziggurat-chacha8"), |b| {
        b.iter(|| ziggurat(&mut r8, black_box(&mut x)))
    });
    g.bench_function(BenchmarkId::new("normal", "ziggurat-chacha20"), |b| {
        b.iter(|| ziggurat(&mut r20, black_box(&mut x)))
    });
    g.bench_function(BenchmarkId::new("normal", "box-muller-chacha8"), |b| {
        b.iter(|| box_muller(&mut r8, black_box(&mut x)))
    });
    g.bench_function(BenchmarkId::new("normal", "polar-chacha8"), |b| {
        b.iter(|| polar(&mut r8, black_box(&mut x)))
    });
    g.finish();
}

criterion_group!(benches, bench);
criterion_main!(benches);
