//! Gaussian mixtures with full covariances fitted to a (weighted) pilot by EM (Dempster,
//! Laird & Rubin 1977, "Maximum likelihood from incomplete data via the EM algorithm", JRSS B
//! 39; the mixture updates as in McLachlan & Peel 2000, *Finite Mixture Models*, Wiley,
//! section 2.8), started from k-means++ seeding (Arthur & Vassilvitskii 2007, "k-means++: the
//! advantages of careful seeding", SODA) with fixed seeds followed by Lloyd (1982)
//! iterations, so the fit is reproducible. The number of components is chosen by BIC.
//!
//! Each component covariance gets a ridge of `RIDGE` times the pilot's variance of each
//! coordinate on its diagonal, so that a component cannot collapse onto a few draws (common
//! practice); it is far below any variance a pilot can resolve.

use nalgebra::{DMatrix, DVector};
use rand::{RngExt, SeedableRng};
use rand_chacha::ChaCha8Rng;

use super::csv::Pilot;
use super::fit::{Mvn, bic, gaussian_params, scatter_with, sum_with};

/// Relative ridge on the component covariances.
pub const RIDGE: f64 = 1e-6;
/// Starts per number of components (k-means++ seeds 0, 1, ...); the best likelihood wins.
pub const STARTS: u64 = 4;

/// EM stops when the mean log-likelihood changes by less than `TOL (1 + |ll|)`, or after
/// `MAX_ITER` iterations: BIC differences that matter are in whole units of n_e ll, far above
/// what the last iterations change.
const MAX_ITER: usize = 200;
const TOL: f64 = 1e-8;
const LLOYD_ITER: usize = 10;

/// One fitted component.
#[derive(Debug, Clone)]
pub struct Component {
    /// Mixing weight (the weights sum to 1).
    pub weight: f64,
    /// Mean.
    pub mean: DVector<f64>,
    /// Covariance.
    pub cov: DMatrix<f64>,
}

/// A fitted mixture.
#[derive(Debug, Clone)]
pub struct MixtureFit {
    /// Components, in decreasing weight.
    pub components: Vec<Component>,
    /// Weighted mean log-likelihood.
    pub mean_ll: f64,
    /// BIC (K - 1 + K (d + d(d+1)/2) parameters).
    pub bic: f64,
}

/// Free parameters of a K-component mixture in d dimensions.
pub fn mixture_params(k: usize, d: usize) -> usize {
    k - 1 + k * gaussian_params(d)
}

/// Squared Euclidean distance.
fn dist2(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| (x - y) * (x - y)).sum()
}

/// k-means++ centres (draws chosen with probability proportional to weight times squared
/// distance to the nearest centre so far), then Lloyd iterations; returns the hard labels.
fn kmeans_labels(p: &Pilot, k: usize, seed: u64) -> Vec<usize> {
    let (n, d) = (p.rows(), p.dim());
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let pick = |rng: &mut ChaCha8Rng, mass: &[f64]| -> usize {
        let total: f64 = mass.iter().sum();
        let mut u = rng.random::<f64>() * total;
        for (i, &m) in mass.iter().enumerate() {
            if u < m {
                return i;
            }
            u -= m;
        }
        mass.iter().rposition(|&m| m > 0.0).unwrap_or(0)
    };
    let mut centres: Vec<Vec<f64>> = vec![p.row(pick(&mut rng, &p.w)).to_vec()];
    let mut near = vec![f64::INFINITY; n];
    while centres.len() < k {
        let last = centres.last().cloned().unwrap_or_default();
        for (i, m) in near.iter_mut().enumerate() {
            *m = m.min(dist2(p.row(i), &last));
        }
        let mass: Vec<f64> = near.iter().zip(&p.w).map(|(a, b)| a * b).collect();
        centres.push(p.row(pick(&mut rng, &mass)).to_vec());
    }
    let mut labels = vec![0; n];
    for _ in 0..LLOYD_ITER {
        for (i, l) in labels.iter_mut().enumerate() {
            *l = (0..k)
                .min_by(|&a, &b| {
                    dist2(p.row(i), &centres[a]).total_cmp(&dist2(p.row(i), &centres[b]))
                })
                .unwrap_or(0);
        }
        for (c, centre) in centres.iter_mut().enumerate() {
            let mut s = vec![0.0; d];
            let mut m = 0.0;
            for i in (0..n).filter(|&i| labels[i] == c) {
                m += p.w[i];
                for (a, &v) in s.iter_mut().zip(p.row(i)) {
                    *a += p.w[i] * v;
                }
            }
            if m > 0.0 {
                *centre = s.into_iter().map(|v| v / m).collect();
            }
        }
    }
    labels
}

/// M-step from responsibilities `r` (n x k, row-major). `None` when a component has no mass
/// or a singular covariance.
fn m_step(p: &Pilot, r: &[f64], k: usize, ridge: &[f64]) -> Option<Vec<(Component, Mvn)>> {
    let n = p.rows();
    let mut out = Vec::with_capacity(k);
    for c in 0..k {
        let mass: f64 = (0..n).map(|i| p.w[i] * r[i * k + c]).sum();
        if mass <= 1e-12 {
            return None;
        }
        let coef = |i: usize| p.w[i] * r[i * k + c];
        let mean = sum_with(p, coef) / mass;
        let mut cov = scatter_with(p, &mean, coef) / mass;
        for (j, &rj) in ridge.iter().enumerate() {
            cov[(j, j)] += rj;
        }
        let mvn = Mvn::new(mean.clone(), cov.clone())?;
        out.push((
            Component {
                weight: mass,
                mean,
                cov,
            },
            mvn,
        ));
    }
    Some(out)
}

/// E-step: responsibilities into `r` and the weighted mean log-likelihood.
fn e_step(p: &Pilot, comps: &[(Component, Mvn)], r: &mut [f64]) -> f64 {
    let (n, k) = (p.rows(), comps.len());
    let mut z = vec![0.0; p.dim()];
    let mut ll = 0.0;
    for i in 0..n {
        let row = &mut r[i * k..(i + 1) * k];
        for (c, (comp, mvn)) in comps.iter().enumerate() {
            row[c] = comp.weight.ln() + mvn.log_pdf(p.row(i), &mut z);
        }
        let m = row.iter().copied().fold(f64::NEG_INFINITY, f64::max);
        let s: f64 = row.iter().map(|v| (v - m).exp()).sum();
        let lse = m + s.ln();
        row.iter_mut().for_each(|v| *v = (*v - lse).exp());
        ll += p.w[i] * lse;
    }
    ll
}

/// One EM run from the k-means labels of `seed`.
fn em(p: &Pilot, k: usize, seed: u64, ridge: &[f64]) -> Option<(Vec<Component>, f64)> {
    let n = p.rows();
    let labels = kmeans_labels(p, k, seed);
    let mut r = vec![0.0; n * k];
    for (i, &l) in labels.iter().enumerate() {
        r[i * k + l] = 1.0;
    }
    let mut comps = m_step(p, &r, k, ridge)?;
    let mut prev = f64::NEG_INFINITY;
    for _ in 0..MAX_ITER {
        let ll = e_step(p, &comps, &mut r);
        if !ll.is_finite() {
            return None;
        }
        let done = (ll - prev).abs() <= TOL * (1.0 + ll.abs());
        prev = ll;
        if done {
            break;
        }
        comps = m_step(p, &r, k, ridge)?;
    }
    Some((comps.into_iter().map(|(c, _)| c).collect(), prev))
}

/// The best of [`STARTS`] EM runs with `k` components; `None` when every start lost a
/// component or a covariance became singular.
pub fn fit_mixture(p: &Pilot, k: usize, column_var: &[f64]) -> Option<MixtureFit> {
    let ridge: Vec<f64> = column_var.iter().map(|v| RIDGE * v).collect();
    let (mut comps, ll) = (0..STARTS)
        .filter_map(|s| em(p, k, s, &ridge))
        .max_by(|a, b| a.1.total_cmp(&b.1))?;
    comps.sort_by(|a, b| b.weight.total_cmp(&a.weight));
    Some(MixtureFit {
        components: comps,
        mean_ll: ll,
        bic: bic(ll, mixture_params(k, p.dim()), p.kish_ess()),
    })
}
