//! The race's comparisons of two cells: a two-sample permutation test of their ranking metric.
//!
//! The runs of the two cells on a target are pooled; a random split of the pool into groups of
//! the two cells' sizes gives one value of each cell's metric, recomputed as the table computes
//! it ([`MetricResampler`]). If the two cells' runs have the same law (exchangeable: for the
//! race's null, cells equally good because they sample alike), every split is as likely as the
//! observed one, so the observed statistic is distributed as the statistic of a random split
//! (Fisher 1935, The Design of Experiments, ch. 2-3; Pitman 1937, JRSS Supplement 4; chapters
//! from memory). With B random splits, the p-value (1 + #{splits at least as extreme}) /
//! (B + 1) is valid, P(p <= a) <= a at every a and every number of replicates, and only a
//! little conservative when the pool has few distinct splits (Phipson & Smyth 2010,
//! "Permutation p-values should never be zero", Statistical Applications in Genetics and
//! Molecular Biology 9(1)). A split on which a metric is undefined counts as at least as
//! extreme, which can only raise the p-value. A split's statistic is summed in the split's
//! order, so the split that draws the observed groups may differ from the observed statistic
//! in its last bits; "at least as extreme" allows a relative [`TIE`] for that ([`as_extreme`]),
//! which can only raise the p-value too.
//!
//! Why not a bootstrap: at 8 replicates a cell, the percentile bootstrap of a ratio of two mean
//! squared errors is far too narrow (measured in `race/rates.rs` with the previous rules: two
//! equal cells lost one in 13.5 % of races at a nominal 5 %); the permutation test needs no
//! model of the metric's law and no large sample. What it assumes instead: when two cells have
//! the same metric but runs of different law (heavier tails, or for `ess_per_second` a
//! different cost per run and spread), exchangeability fails and the level is approximate;
//! `rates.rs` measures two such cases.

use rand::RngExt;
use rand_chacha::ChaCha8Rng;

use crate::results::TargetInfo;
use crate::scores::{CellRuns, Metric, MetricResampler};

/// Two cells' finished runs on one target, pooled and ready to be split at random.
pub(super) struct Split<'a> {
    pooled: MetricResampler<'a>,
    /// Runs of the first cell; those of the second follow them in the pool.
    first: usize,
    /// The current split: `order[..first]` is the first group, the rest the second.
    order: Vec<usize>,
}

impl<'a> Split<'a> {
    pub(super) fn new(
        a: &CellRuns,
        b: &CellRuns,
        target: &'a TargetInfo,
        metric: Metric,
    ) -> Split<'a> {
        let pooled = MetricResampler::new(&a.pooled(b), target, metric);
        let n = pooled.len();
        Split {
            pooled,
            first: (a.ok as usize).min(n),
            order: (0..n).collect(),
        }
    }

    /// Finished runs of the two cells.
    pub(super) fn sizes(&self) -> (usize, usize) {
        (self.first, self.order.len() - self.first)
    }

    /// The two cells' metric on their own runs (the observed split).
    pub(super) fn observed(&self) -> (Option<f64>, Option<f64>) {
        let identity: Vec<usize> = (0..self.order.len()).collect();
        (
            self.pooled.value(&identity[..self.first]),
            self.pooled.value(&identity[self.first..]),
        )
    }

    /// The two groups' metric on a uniformly random split of the pool: a partial
    /// Fisher-Yates shuffle picks the first group (Knuth, The Art of Computer Programming,
    /// vol. 2, section 3.4.2, algorithm P; from memory).
    pub(super) fn draw(&mut self, rng: &mut ChaCha8Rng) -> (Option<f64>, Option<f64>) {
        let n = self.order.len();
        for i in 0..self.first.min(n.saturating_sub(1)) {
            let j = rng.random_range(i..n);
            self.order.swap(i, j);
        }
        (
            self.pooled.value(&self.order[..self.first]),
            self.pooled.value(&self.order[self.first..]),
        )
    }
}

/// Relative tolerance of "at least as extreme": far above the rounding of a sum of a few
/// thousand terms in another order (about 1e-13 relative), far below any difference between
/// two splits' statistics that are not the same subsets.
pub(super) const TIE: f64 = 1e-9;

/// Whether a split's statistic `split` is at least as extreme as the `observed` one (larger is
/// more extreme), up to the relative [`TIE`]; an undefined `split` counts as extreme.
pub(super) fn as_extreme(split: f64, observed: f64) -> bool {
    split.is_nan() || split >= observed - TIE * observed.abs()
}

/// (1 + #{splits on which `as_extreme()`}) / (B + 1) over B = `splits` random splits, stopping
/// early, with a lower bound, once it must exceed `give_up_above` (no Holm step can then reject
/// it, so its exact value decides nothing).
pub(super) fn permutation_p(
    splits: u64,
    give_up_above: f64,
    mut as_extreme: impl FnMut() -> bool,
) -> f64 {
    let denominator = (splits + 1) as f64;
    let mut count = 0u64;
    for _ in 0..splits {
        if as_extreme() {
            count += 1;
            if (1 + count) as f64 / denominator > give_up_above {
                break;
            }
        }
    }
    (1 + count) as f64 / denominator
}

/// How much worse `cell` is than `best` by the metric, as a ratio above 1 when worse (best
/// over cell when higher is better, cell over best otherwise); `None` when either is undefined
/// or the ratio is not a number.
pub(super) fn worse_ratio(best: Option<f64>, cell: Option<f64>, metric: Metric) -> Option<f64> {
    let (b, c) = (best?, cell?);
    let r = if metric.higher_is_better() {
        b / c
    } else {
        c / b
    };
    (!r.is_nan()).then_some(r)
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;
    use serde_json::Map;

    fn target() -> TargetInfo {
        TargetInfo {
            label: "t".into(),
            family: "gaussian".into(),
            dim: 1,
            log_z: None,
            mean: Some(vec![0.0]),
            covariance: Some(vec![vec![1.0]]),
            params: Map::new(),
            reference_run: None,
            sweep: None,
        }
    }

    fn runs(errors: &[f64]) -> CellRuns {
        let mut r = CellRuns::default();
        for &e in errors {
            r.means.push(vec![e]);
            r.seconds.push(1.0);
            r.resamples.push(0.0);
            r.evaluations.push(0.0);
            r.ok += 1;
        }
        r
    }

    #[test]
    fn splits_are_uniform_over_the_subsets() {
        // Pools of 2 + 2 runs with distinct squared errors 1, 4, 9, 16: the first group's mean
        // squared error identifies its subset, and a uniform split gives each of the
        // C(4, 2) = 6 subsets probability 1/6. 60 000 splits: SE of a frequency
        // sqrt(1/6 * 5/6 / 60000) = 0.0015; tolerance 5 SE = 0.0076 (common practice).
        let t = target();
        let (a, b) = (runs(&[1.0, 2.0]), runs(&[3.0, 4.0]));
        let mut s = Split::new(&a, &b, &t, Metric::RmseMean);
        assert_eq!(s.sizes(), (2, 2));
        let mut rng = ChaCha8Rng::seed_from_u64(7);
        let mut seen = std::collections::BTreeMap::<u64, u64>::new();
        let n = 60_000;
        for _ in 0..n {
            let (x, _) = s.draw(&mut rng);
            let mse = x.expect("defined").powi(2);
            *seen.entry((mse * 2.0).round() as u64).or_default() += 1;
        }
        assert_eq!(seen.len(), 6, "{seen:?}");
        for (&k, &count) in &seen {
            let f = count as f64 / n as f64;
            assert!((f - 1.0 / 6.0).abs() < 0.0076, "subset {k}: {f}");
        }
    }

    #[test]
    fn the_observed_split_is_each_cells_own_metric() {
        let t = target();
        let (a, b) = (runs(&[0.1, -0.2, 0.3]), runs(&[1.0, 2.0]));
        let s = Split::new(&a, &b, &t, Metric::VarianceEss);
        let (x, y) = s.observed();
        let own = |r: &CellRuns| Metric::VarianceEss.of_runs(r, &t);
        approx::assert_relative_eq!(x.unwrap(), own(&a).unwrap(), max_relative = 1e-12);
        approx::assert_relative_eq!(y.unwrap(), own(&b).unwrap(), max_relative = 1e-12);
        assert_eq!(s.sizes(), (3, 2));
    }

    #[test]
    fn a_split_that_draws_the_observed_groups_is_as_extreme_as_the_observed_split() {
        // 3 + 3 runs: 20 subsets, so 2000 splits draw the observed first group about 100
        // times; in whatever order it is drawn, its statistic must count as extreme.
        let t = target();
        let (a, b) = (runs(&[0.1, -0.7, 0.3]), runs(&[1.1, 0.2, -2.3]));
        let mut s = Split::new(&a, &b, &t, Metric::VarianceEss);
        let (oa, ob) = s.observed();
        let observed = ob.unwrap() / oa.unwrap();
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        let mut hits = 0;
        for _ in 0..2000 {
            let (x, y) = s.draw(&mut rng);
            let mut first = s.order[..3].to_vec();
            first.sort_unstable();
            if first == [0, 1, 2] {
                hits += 1;
                assert!(as_extreme(y.unwrap() / x.unwrap(), observed));
            }
        }
        assert!(hits > 50, "{hits}");
        assert!(as_extreme(f64::NAN, 1.0) && !as_extreme(0.99, 1.0));
    }

    #[test]
    fn p_values_count_the_observed_split() {
        // Phipson & Smyth 2010: p = (1 + b) / (B + 1), never 0.
        assert_eq!(permutation_p(9, 1.0, || false), 0.1);
        assert_eq!(permutation_p(9, 1.0, || true), 1.0);
        // Gives up once above the level, with a lower bound.
        assert!(permutation_p(1000, 0.01, || true) > 0.01);
    }
}
