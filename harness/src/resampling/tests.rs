//! Statistical and edge-case tests of the resampling schemes. All seeds are fixed
//! (`ChaCha8Rng`), so every run is identical; the tolerances are chosen so that a correct
//! implementation would fail only with negligible probability over the choice of seed.

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use super::*;

const ALL: [Resampling; 4] = [
    Resampling::Multinomial,
    Resampling::Systematic,
    Resampling::Stratified,
    Resampling::Residual,
];

/// A fixed non-uniform weight vector: zeros at the start, middle and end, one dominant weight
/// (0.5), and `10 W_i` mostly non-integer so that every scheme is random at most indices.
const W: [f64; 10] = [0.0, 0.02, 0.05, 0.0, 0.5, 0.1, 0.13, 0.07, 0.13, 0.0];

/// Per-index moments of the offspring counts over `reps` calls.
struct Moments {
    mean: Vec<f64>,
    /// Sample variance (divisor reps - 1).
    var: Vec<f64>,
    /// Fourth central sample moment.
    m4: Vec<f64>,
    reps: usize,
}

/// Resamples `m` ancestors from `weights` `reps` times and collects the offspring counts;
/// also checks on every call that the ancestors are in range and non-decreasing, and passes
/// the counts of every call to `each`.
fn offspring_moments(
    kind: Resampling,
    weights: &[f64],
    m: usize,
    reps: usize,
    seed: u64,
    mut each: impl FnMut(&[usize]),
) -> Moments {
    let n = weights.len();
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut ancestors = vec![usize::MAX; m];
    let mut counts = vec![0usize; n];
    let mut all = vec![0u32; n * reps];
    for r in 0..reps {
        scheme(kind).resample(weights, &mut rng, &mut ancestors);
        assert!(
            ancestors.windows(2).all(|p| p[0] <= p[1]),
            "{kind:?}: not sorted"
        );
        counts.fill(0);
        for &a in &ancestors {
            assert!(a < n, "{kind:?}: ancestor {a} out of range");
            counts[a] += 1;
        }
        assert_eq!(counts.iter().sum::<usize>(), m);
        each(&counts);
        for (i, &c) in counts.iter().enumerate() {
            all[i * reps + r] = c as u32;
        }
    }
    let mut mean = vec![0.0; n];
    let mut var = vec![0.0; n];
    let mut m4 = vec![0.0; n];
    for i in 0..n {
        let xs = &all[i * reps..(i + 1) * reps];
        let mu = xs.iter().map(|&x| x as f64).sum::<f64>() / reps as f64;
        let (mut s2, mut s4) = (0.0, 0.0);
        for &x in xs {
            let d = x as f64 - mu;
            s2 += d * d;
            s4 += d * d * d * d;
        }
        mean[i] = mu;
        var[i] = s2 / (reps - 1) as f64;
        m4[i] = s4 / reps as f64;
    }
    Moments {
        mean,
        var,
        m4,
        reps,
    }
}

#[test]
fn registry_maps_each_setting_to_its_scheme() {
    // Distinct schemes give distinct draws from the same seed on this vector (checked by
    // running them, since the registry returns trait objects).
    let mut seen = Vec::new();
    for kind in ALL {
        let mut rng = ChaCha8Rng::seed_from_u64(7);
        let mut a = vec![0usize; 10];
        let mut draws = Vec::new();
        for _ in 0..20 {
            scheme(kind).resample(&W, &mut rng, &mut a);
            draws.extend_from_slice(&a);
        }
        assert!(!seen.contains(&draws), "{kind:?} duplicates another scheme");
        seen.push(draws);
    }
}

#[test]
fn expected_offspring_is_m_times_weight() {
    // Unbiasedness E[O_i] = M W_i: Douc, Cappe & Moulines 2005 (each of the four schemes is
    // defined so that it holds). Checked for M = N = 10 and for M != N.
    //
    // Tolerance: the mean of `reps` i.i.d. counts has standard error sqrt(Var(O_i) / reps);
    // Var(O_i) is estimated by the sample variance, which with 200 000 replications is within
    // a few per cent of the truth. 5 standard errors leave a two-sided normal tail of 6e-7 per
    // check. Where the count is deterministic (e.g. systematic at 10 * 0.5 = 5) the sample
    // variance is 0 and the check is exact up to 1e-9 for the rounding of M W_i.
    let reps = 200_000;
    for (seed, m) in [(1u64, 10usize), (2, 7), (3, 23)] {
        for kind in ALL {
            let mo = offspring_moments(kind, &W, m, reps, seed, |_| {});
            for (i, &w) in W.iter().enumerate() {
                let expected = m as f64 * w;
                let se = (mo.var[i] / reps as f64).sqrt();
                let tol = 5.0 * se + 1e-9;
                assert!(
                    (mo.mean[i] - expected).abs() <= tol,
                    "{kind:?} M={m} i={i}: mean {} vs {expected} (tol {tol})",
                    mo.mean[i]
                );
            }
        }
    }
}

#[test]
fn zero_weights_never_get_offspring() {
    // Follows from inverting the CDF: a zero weight has an empty interval. Common practice.
    let zeros = [0usize, 3, 9];
    for (seed, kind) in ALL.into_iter().enumerate() {
        for m in [1usize, 10, 37] {
            offspring_moments(kind, &W, m, 20_000, 100 + seed as u64, |c| {
                for &z in &zeros {
                    assert_eq!(c[z], 0, "{kind:?} M={m}: zero weight {z} got offspring");
                }
            });
        }
    }
}

#[test]
fn systematic_counts_are_floor_or_ceil() {
    // Every draw of systematic resampling gives index i floor(M W_i) or ceil(M W_i) offspring:
    // the points are 1/M apart, so an interval of length W_i holds one of those counts (exact
    // arithmetic; see the rustdoc of `Systematic` for the rounding caveat). Common practice.
    for m in [10usize, 7, 23, 1000] {
        offspring_moments(Resampling::Systematic, &W, m, 20_000, 11, |c| {
            for (i, &w) in W.iter().enumerate() {
                let x = m as f64 * w;
                let (lo, hi) = (x.floor() as usize, x.ceil() as usize);
                assert!(
                    lo <= c[i] && c[i] <= hi,
                    "M={m} i={i}: {} not in [{lo}, {hi}]",
                    c[i]
                );
            }
        });
    }
}

#[test]
fn residual_counts_are_at_least_floor() {
    // Residual resampling gives at least floor(M W_i) copies by construction (Liu & Chen 1998);
    // unlike systematic, the remainder may add more than one. Common practice.
    let mut above_ceil = false;
    for m in [10usize, 7, 23, 1000] {
        offspring_moments(Resampling::Residual, &W, m, 20_000, 12, |c| {
            for (i, &w) in W.iter().enumerate() {
                let x = m as f64 * w;
                assert!(
                    c[i] >= x.floor() as usize,
                    "M={m} i={i}: {} < floor({x})",
                    c[i]
                );
                above_ceil |= c[i] > x.ceil() as usize;
            }
        });
    }
    // The remainder is multinomial, so some draw exceeds the ceiling (e.g. index 6 at M = 10
    // takes both remainder draws with probability 0.15^2 = 2.25%).
    assert!(above_ceil);
}

#[test]
fn multinomial_has_the_largest_offspring_variance() {
    // Douc, Cappe & Moulines 2005: residual and stratified resampling have a conditional
    // variance no larger than multinomial resampling; systematic is not covered by their
    // ordering in general (they give a counterexample) but is far below it here. (Statement of
    // the paper's results from memory.) Expected totals sum_i Var(O_i) on W with M = 10, by
    // hand:
    //   multinomial  M (1 - sum W_i^2) = 10 (1 - 0.3016) = 6.984 (binomial marginals)
    //   systematic   sum_i f_i (1 - f_i), f_i = frac(10 W_i), = 1.04 (floor/ceil property and
    //                unbiasedness make O_i a two-point variable)
    //   stratified   sum over (index, stratum) pairs of p (1 - p), p the fraction of the
    //                stratum [k/10, (k+1)/10) covered by the index's CDF interval (independent
    //                strata): 0.16 + 0.25 + 0.42 + 0.42 + 0.21 + 0.21 + 0.21 = 1.88
    //   residual     R (1 - sum q_i^2), R = 2, q_i = f_i / 2, = 2 (1 - 0.24) = 1.52
    // Observed with this seed: 6.979, 1.041, 1.879, 1.519.
    // The margin asked for, multinomial > 2 x each other total, is thousands of standard errors
    // of the total variance (relative SE at most 0.5%, see below).
    let reps = 200_000;
    let totals: Vec<f64> = ALL
        .iter()
        .map(|&k| {
            offspring_moments(k, &W, 10, reps, 21, |_| {})
                .var
                .iter()
                .sum()
        })
        .collect();
    let multinomial = totals[0];
    for (kind, &t) in ALL.iter().zip(&totals).skip(1) {
        assert!(
            multinomial > 2.0 * t,
            "{kind:?}: total variance {t} vs multinomial {multinomial}"
        );
    }
    // Each total matches the hand computation. A sample variance has relative SE
    // sqrt((kurtosis - 1) / reps) (large-sample result, from memory); the counts here are
    // Bernoulli, two-point or binomial with success probabilities in [0.1, 0.9], whose kurtosis
    // is at most about 6, so each term's relative SE is at most sqrt(5 / 200 000) = 0.5%, and
    // so is the total's (SEs add at worst linearly). 5 SE = 2.5%; the tolerance is 5%.
    let expected = [6.984, 1.04, 1.88, 1.52];
    for ((kind, &t), e) in ALL.iter().zip(&totals).zip(expected) {
        assert!(
            (t / e - 1.0).abs() < 0.05,
            "{kind:?}: total variance {t} vs {e}"
        );
    }
}

#[test]
fn multinomial_marginals_are_binomial() {
    // O_i ~ Binomial(M, W_i), so Var(O_i) = M W_i (1 - W_i) (binomial marginal of the
    // multinomial; textbook, e.g. Johnson, Kotz & Balakrishnan 1997, "Discrete Multivariate
    // Distributions" — from memory). Tolerance: the sample variance of reps i.i.d.
    // values has standard error sqrt((mu_4 - sigma^4) / reps) (large-sample result, from
    // memory), estimated with the sample fourth moment; 5 SE.
    let reps = 200_000;
    for (seed, m) in [(31u64, 10usize), (32, 23)] {
        let mo = offspring_moments(Resampling::Multinomial, &W, m, reps, seed, |_| {});
        assert_eq!(mo.reps, reps);
        for (i, &w) in W.iter().enumerate() {
            let expected = m as f64 * w * (1.0 - w);
            let se = ((mo.m4[i] - mo.var[i] * mo.var[i]).max(0.0) / reps as f64).sqrt();
            let tol = 5.0 * se + 1e-9;
            assert!(
                (mo.var[i] - expected).abs() <= tol,
                "M={m} i={i}: variance {} vs {expected} (tol {tol})",
                mo.var[i]
            );
        }
    }
}

#[test]
fn sorted_uniforms_have_uniform_order_statistic_means() {
    // E[U_(k)] = k / (n + 1) for the order statistics of n uniforms (David & Nagaraja 2003,
    // "Order Statistics", 3rd ed. — from memory). Var(U_(k)) <= 1 / (4 (n + 2)), so the SE
    // of a mean over reps draws is at most 1 / sqrt(4 (n + 2) reps); 5 SE.
    let (n, reps) = (8usize, 100_000);
    let mut rng = ChaCha8Rng::seed_from_u64(41);
    let mut sums = vec![0.0; n];
    for _ in 0..reps {
        let mut s = multinomial::SortedUniforms::new(n);
        let mut prev = 0.0;
        for sum in sums.iter_mut() {
            let u = s.next(&mut rng).unwrap();
            assert!((0.0..1.0).contains(&u) && u >= prev);
            prev = u;
            *sum += u;
        }
        assert!(s.next(&mut rng).is_none());
    }
    let tol = 5.0 / (4.0 * (n + 2) as f64 * reps as f64).sqrt();
    for (k, &s) in sums.iter().enumerate() {
        let expected = (k + 1) as f64 / (n + 1) as f64;
        assert!((s / reps as f64 - expected).abs() <= tol, "k={k}");
    }
}

/// Runs every scheme on `weights` for several M and checks range and order.
fn check_total(weights: &[f64], ms: &[usize]) -> Vec<Vec<usize>> {
    let mut out = Vec::new();
    for (s, kind) in ALL.into_iter().enumerate() {
        for &m in ms {
            let mut rng = ChaCha8Rng::seed_from_u64(50 + s as u64);
            let mut a = vec![usize::MAX; m];
            for _ in 0..50 {
                scheme(kind).resample(weights, &mut rng, &mut a);
                if !weights.is_empty() {
                    assert!(
                        a.iter().all(|&i| i < weights.len()),
                        "{kind:?} {weights:?} M={m}"
                    );
                }
                assert!(
                    a.windows(2).all(|p| p[0] <= p[1]),
                    "{kind:?} {weights:?} M={m}"
                );
            }
            out.push(a);
        }
    }
    out
}

#[test]
fn edge_cases_do_not_panic() {
    let ms = [0usize, 1, 2, 5, 100];
    // Empty weights: nothing is valid, ancestors are left unchanged.
    for a in check_total(&[], &ms) {
        assert!(a.iter().all(|&i| i == usize::MAX));
    }
    // N = 1.
    for a in check_total(&[1.0], &ms) {
        assert!(a.iter().all(|&i| i == 0));
    }
    // A single nonzero weight.
    for a in check_total(&[0.0, 0.0, 1.0, 0.0], &ms) {
        assert!(a.iter().all(|&i| i == 2));
    }
    // All-zero weights: every ancestor is 0 (documented).
    for a in check_total(&[0.0; 6], &ms) {
        assert!(a.iter().all(|&i| i == 0));
    }
    // Sums off 1 by rounding, with trailing zero weights: zero weights still get nothing.
    let s = 1.0 - 1e-12;
    for w in [
        [0.25, 0.25, 0.5 - 1e-12, 0.0],
        [0.25, 0.25, 0.5 + 1e-12, 0.0],
        [s / 3.0, s / 3.0, s / 3.0, 0.0],
        [0.1, 0.2, 0.7 - 1e-12, 0.0],
    ] {
        for a in check_total(&w, &ms) {
            assert!(a.iter().all(|&i| i != 3), "{w:?}: {a:?}");
        }
    }
    // Invalid weights are treated as zero.
    for a in check_total(&[f64::NAN, 0.5, f64::INFINITY, -1.0, 0.5, f64::NAN], &ms) {
        assert!(a.iter().all(|&i| i == 1 || i == 4), "{a:?}");
    }
    for a in check_total(&[f64::NAN; 3], &ms) {
        assert!(a.iter().all(|&i| i == 0));
    }
    // Badly unnormalised, tiny and huge weights: only range and order are promised.
    check_total(&[3.0, 5.0, 0.0, 1e300], &ms);
    check_total(&[1e-300, 5e-324, 0.0], &ms);
    check_total(&[f64::MAX, f64::MAX], &ms);
    check_total(&[0.1; 3], &ms);
}

/// Systematic resampling as the plain walk over points and running sums computes it: the
/// inverse of the weights' distribution function at the points (k + V) / M, as defined by
/// Kitagawa 1996 and Carpenter, Clifford & Fearnhead 1999 (see `systematic.rs`), which the
/// counting form must reproduce exactly.
fn systematic_by_walk(weights: &[f64], v: f64, ancestors: &mut [usize]) {
    let mut walk = CdfWalk::new(weights).expect("weights");
    let m = ancestors.len() as f64;
    for (k, a) in ancestors.iter_mut().enumerate() {
        *a = walk.locate((k as f64 + v) / m);
    }
}

#[test]
fn systematic_counting_equals_the_walk() {
    // The counting form must give, index for index, what the walk over the floating-point
    // points gives: on random weights, on weights whose sums land exactly on points (dyadic
    // weights with v = 0 and v = 1/2, where C M - v is an integer), and on the edge cases.
    use rand::RngExt;
    let mut rng = ChaCha8Rng::seed_from_u64(77);
    let mut cases: Vec<(Vec<f64>, usize, f64)> = Vec::new();
    for _ in 0..3000 {
        let n = rng.random_range(1..300usize);
        let m = rng.random_range(1..300usize);
        let zeros = rng.random_range(0.0..0.9);
        let power = rng.random_range(1..6);
        let mut w: Vec<f64> = (0..n)
            .map(|_| {
                if rng.random::<f64>() < zeros {
                    0.0
                } else {
                    rng.random::<f64>().powi(power)
                }
            })
            .collect();
        let total: f64 = w.iter().sum();
        if total > 0.0 && rng.random::<f64>() < 0.9 {
            w.iter_mut().for_each(|x| *x /= total);
        }
        cases.push((w, m, rng.random()));
    }
    for m in [1usize, 2, 4, 8, 64, 1024] {
        for n in [1usize, 2, 3, 8, 64, 1000] {
            // Equal dyadic weights: every running sum j/n is exact, and so is C M - v.
            let w = vec![1.0 / n as f64; n];
            for v in [0.0, 0.5, 0.25, 1.0 - f64::EPSILON] {
                cases.push((w.clone(), m, v));
            }
        }
    }
    for n in [3usize, 5, 7, 10, 49, 100, 1000] {
        // Equal non-dyadic weights with M a multiple of N: every running sum is within
        // rounding of a point, so plain ceil(C M - v) would be off by one at some of them.
        let w = vec![1.0 / n as f64; n];
        for m in [n, 2 * n, 3 * n, 10 * n] {
            for v in [0.0, 0.5] {
                cases.push((w.clone(), m, v));
            }
        }
    }
    for w in [
        vec![f64::NAN, 0.5, f64::INFINITY, -1.0, 0.5, f64::NAN],
        vec![0.0; 5],
        vec![3.0, 5.0, 0.0, 1e300],
        vec![1e-300, 5e-324, 0.0],
        vec![f64::MAX, f64::MAX, 1.0],
        vec![0.1; 3],
        vec![0.25, 0.25, 0.5 - 1e-12, 0.0],
        vec![0.25, 0.25, 0.5 + 1e-12, 0.0],
    ] {
        for m in [1usize, 3, 4, 5, 100] {
            for v in [0.0, 0.3, 0.5, 0.999] {
                cases.push((w.clone(), m, v));
            }
        }
    }
    for (w, m, v) in &cases {
        let mut want = vec![usize::MAX; *m];
        let mut got = vec![usize::MAX; *m];
        systematic_by_walk(w, *v, &mut want);
        super::systematic::fill_from(w, *v, &mut got);
        assert_eq!(got, want, "weights {w:?}, M = {m}, v = {v}");
    }
}

#[test]
fn systematic_point_counts_are_exact_for_large_m() {
    // `PointCounter::below` against a binary search over the (monotone) floating-point points,
    // for M far beyond what a whole resampling call in a test can use, with sums placed on
    // and within a few units in the last place of points and of multiples of 1/M, where the
    // closed form ceil(C M - v) is off by one unless the count is settled on the points.
    use super::systematic::PointCounter;
    use rand::RngExt;
    fn by_search(pc: &PointCounter, m: usize, cum: f64) -> usize {
        // First k with point(k) >= cum (M if none).
        let (mut lo, mut hi) = (0usize, m);
        while lo < hi {
            let mid = lo + (hi - lo) / 2;
            if pc.point(mid) < cum {
                lo = mid + 1;
            } else {
                hi = mid;
            }
        }
        lo
    }
    fn ulps(x: f64, k: i64) -> f64 {
        if !x.is_finite() || x == 0.0 && k < 0 {
            return x;
        }
        f64::from_bits((x.to_bits() as i64 + k) as u64)
    }
    let mut rng = ChaCha8Rng::seed_from_u64(2024);
    let mut checked = 0u64;
    for m in [
        1usize,
        2,
        7,
        1000,
        1 << 20,
        100_000_000,
        (1 << 40) + 3,
        1 << 52,
    ] {
        for v in [
            0.0,
            0.5,
            1.0 - f64::EPSILON / 2.0,
            1.0 / 16.0,
            5e-324,
            rng.random(),
        ] {
            let pc = PointCounter::new(m, v);
            let mut cums = vec![0.0, 5e-324, 1e-300, 1.0, 1.0 + 1e-12, 2.0, f64::INFINITY];
            for _ in 0..40 {
                let k = rng.random_range(0..m);
                let on_point = pc.point(k);
                let on_grid = k as f64 / m as f64;
                for d in -3..=3 {
                    cums.push(ulps(on_point, d));
                    cums.push(ulps(on_grid, d));
                }
                cums.push(rng.random_range(0.0..1.5));
            }
            for &cum in &cums {
                let want = by_search(&pc, m, cum);
                for floor in [0, want / 2, want] {
                    assert_eq!(
                        pc.below(cum, floor),
                        want,
                        "M = {m}, v = {v}, cum = {cum:e}"
                    );
                    checked += 1;
                }
            }
        }
    }
    assert!(checked > 10_000);
}
