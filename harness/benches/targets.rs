//! Log density throughput of every target family at N = 1000 points through
//! `log_density_batch`, the call the engine makes once per iteration.

use std::hint::black_box;
use std::path::Path;
use std::time::Duration;

use assay_targets::{Target, build_target};
use criterion::{BenchmarkId, Criterion, Throughput, criterion_group, criterion_main};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};

const N: usize = 1000;

fn target(spec: &str) -> Box<dyn Target> {
    let t: toml::Table = spec.parse().unwrap();
    build_target(&t, "bench", Path::new(".")).unwrap()
}

fn bench(c: &mut Criterion) {
    let specs = [
        ("gaussian-ar1", "family = 'gaussian'\ndim = 10\nar1 = 0.5"),
        (
            "gaussian-ar1-d100",
            "family = 'gaussian'\ndim = 100\nar1 = 0.5",
        ),
        (
            "banana",
            "family = 'banana'\ndim = 10\ncurvature = 0.03\nspread = 25.0",
        ),
        (
            "mixture",
            "family = 'mixture'\ndim = 10\ncomponents = [{ weight = 0.5, mean = 1.0, scale = 1.0 }, { weight = 0.5, mean = -1.0, scale = 0.5 }]",
        ),
        ("student-t", "family = 'student-t'\ndim = 10\ndof = 5.0"),
        ("funnel", "family = 'funnel'\ndim = 10\nsigma = 3.0"),
        (
            "linear-regression",
            "family = 'linear-regression'\ndim = 10\nobservations = 50\nnoise = 1.0\nprior_scale = 2.0\ndata_seed = 1",
        ),
    ];
    let mut g = c.benchmark_group("log-density-batch");
    g.warm_up_time(Duration::from_millis(300))
        .measurement_time(Duration::from_secs(1));
    let mut rng = ChaCha8Rng::seed_from_u64(1);
    for (name, spec) in specs {
        let t = target(spec);
        let d = t.dim();
        let x: Vec<f64> = (0..N * d)
            .map(|_| StandardNormal.sample(&mut rng))
            .collect();
        let mut out = vec![0.0; N];
        g.throughput(Throughput::Elements(N as u64));
        g.bench_with_input(BenchmarkId::new(name, d), &x, |b, x| {
            b.iter(|| {
                t.log_density_batch(black_box(x), &mut out);
                black_box(&out);
            })
        });
    }
    g.finish();
}

criterion_group!(benches, bench);
criterion_main!(benches);
