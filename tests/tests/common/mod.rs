//! Small private targets with closed-form moments and normalising constants, for the engine
//! tests, and helpers to run many seeds.
#![allow(dead_code)]

use assay::engine::Smc;
use assay::settings::{BackwardKernel, Move, Path, ProposalShape, SamplerSettings, Schedule};
use assay::{RunContext, RunOutput, Sampler};
use assay_targets::{DiagGaussian, Target};
use nalgebra::{DMatrix, DVector};
use rand::{Rng, RngExt};

/// ln(2 pi).
pub const LN_2PI: f64 = 1.837_877_066_409_345_4;

/// Diagonal Gaussian N(mean, diag(sd^2)) with an unnormalised log density
/// -|(x - mean) / sd|^2 / 2 + offset, so that (Gaussian integral, any probability textbook)
/// log Z = offset + sum ln sd + d ln(2 pi) / 2.
pub struct DiagGauss {
    pub mean: Vec<f64>,
    pub sd: Vec<f64>,
    pub offset: f64,
    cov: DMatrix<f64>,
}

impl DiagGauss {
    pub fn new(mean: Vec<f64>, sd: Vec<f64>, offset: f64) -> Self {
        let cov =
            DMatrix::from_diagonal(&DVector::from_iterator(sd.len(), sd.iter().map(|s| s * s)));
        DiagGauss {
            mean,
            sd,
            offset,
            cov,
        }
    }
}

impl Target for DiagGauss {
    fn dim(&self) -> usize {
        self.mean.len()
    }
    fn log_density(&self, x: &[f64]) -> f64 {
        let q: f64 = x
            .iter()
            .zip(&self.mean)
            .zip(&self.sd)
            .map(|((x, m), s)| ((x - m) / s).powi(2))
            .sum();
        self.offset - 0.5 * q
    }
    fn log_z(&self) -> Option<f64> {
        Some(
            self.offset
                + self.sd.iter().map(|s| s.ln()).sum::<f64>()
                + 0.5 * self.dim() as f64 * LN_2PI,
        )
    }
    fn mean(&self) -> Option<&[f64]> {
        Some(&self.mean)
    }
    fn covariance(&self) -> Option<&DMatrix<f64>> {
        Some(&self.cov)
    }
    fn label(&self) -> &str {
        "test-diag-gauss"
    }
    fn family(&self) -> &str {
        "test"
    }
}

/// Conjugate Bayesian linear regression with known noise sd sigma and prior beta ~ N(0, tau^2 I):
/// the (unnormalised) posterior density is prior(beta) * likelihood(y | beta), so Z is the
/// marginal likelihood y ~ N(0, sigma^2 I + tau^2 X X^T) and the posterior is
/// N(S X^T y / sigma^2, S) with S = (X^T X / sigma^2 + I / tau^2)^{-1}
/// (Bishop 2006, Pattern Recognition and Machine Learning, eqs. 3.49-3.51 and 3.86).
pub struct ConjugateRegression {
    x: DMatrix<f64>,
    y: Vec<f64>,
    sigma: f64,
    tau: f64,
    prior: DiagGaussian,
    post_mean: Vec<f64>,
    post_cov: DMatrix<f64>,
    log_z: f64,
}

impl ConjugateRegression {
    /// A fixed design of `m` rows in dimension `d`, with a response drawn from the model.
    pub fn new(m: usize, d: usize, sigma: f64, tau: f64, rng: &mut impl Rng) -> Self {
        let x = DMatrix::from_fn(m, d, |_, _| normal(rng));
        let beta: Vec<f64> = (0..d).map(|j| 0.5 + 0.25 * j as f64).collect();
        let y: Vec<f64> = (0..m)
            .map(|i| (0..d).map(|j| x[(i, j)] * beta[j]).sum::<f64>() + sigma * normal(rng))
            .collect();
        let yv = DVector::from_column_slice(&y);
        let prec = x.transpose() * &x / (sigma * sigma) + DMatrix::identity(d, d) / (tau * tau);
        let post_cov = prec.clone().try_inverse().unwrap();
        let post_mean = (&post_cov * x.transpose() * &yv / (sigma * sigma))
            .iter()
            .copied()
            .collect();
        let marg = DMatrix::identity(m, m) * (sigma * sigma) + &x * x.transpose() * (tau * tau);
        let chol = marg.clone().cholesky().unwrap();
        let alpha = chol.solve(&yv);
        let log_det: f64 = chol.l().diagonal().iter().map(|v| 2.0 * v.ln()).sum();
        let log_z = -0.5 * (yv.dot(&alpha) + log_det + m as f64 * LN_2PI);
        ConjugateRegression {
            x,
            y,
            sigma,
            tau,
            prior: DiagGaussian {
                mean: vec![0.0; d],
                sd: vec![tau; d],
            },
            post_mean,
            post_cov,
            log_z,
        }
    }

    pub fn post_cov(&self) -> &DMatrix<f64> {
        &self.post_cov
    }
}

impl Target for ConjugateRegression {
    fn dim(&self) -> usize {
        self.x.ncols()
    }
    fn log_density(&self, b: &[f64]) -> f64 {
        let (m, d) = self.x.shape();
        let mut ll = 0.0;
        for i in 0..m {
            let r = self.y[i] - (0..d).map(|j| self.x[(i, j)] * b[j]).sum::<f64>();
            ll += r * r;
        }
        let s2 = self.sigma * self.sigma;
        let t2 = self.tau * self.tau;
        -0.5 * ll / s2
            - 0.5 * m as f64 * (LN_2PI + s2.ln())
            - 0.5 * b.iter().map(|v| v * v).sum::<f64>() / t2
            - 0.5 * d as f64 * (LN_2PI + t2.ln())
    }
    fn log_z(&self) -> Option<f64> {
        Some(self.log_z)
    }
    fn mean(&self) -> Option<&[f64]> {
        Some(&self.post_mean)
    }
    fn covariance(&self) -> Option<&DMatrix<f64>> {
        Some(&self.post_cov)
    }
    fn label(&self) -> &str {
        "test-conjugate-regression"
    }
    fn family(&self) -> &str {
        "test"
    }
    fn tempering_reference(&self) -> Option<&DiagGaussian> {
        Some(&self.prior)
    }
}

/// A target whose log density is `value` everywhere (NaN, -inf, ...).
pub struct Constant(pub usize, pub f64);

impl Target for Constant {
    fn dim(&self) -> usize {
        self.0
    }
    fn log_density(&self, _x: &[f64]) -> f64 {
        self.1
    }
    fn label(&self) -> &str {
        "test-constant"
    }
    fn family(&self) -> &str {
        "test"
    }
}

/// Run `reps` seeds 1..=reps of `settings` on `target`; panics (test only) on a failed run.
pub fn runs(settings: &SamplerSettings, target: &dyn Target, reps: u64) -> Vec<RunOutput> {
    let smc = Smc::new(settings.clone()).unwrap();
    (1..=reps)
        .map(|seed| {
            let out = smc.run(target, &RunContext::with_seed(seed * 7919));
            assert!(out.is_ok(), "seed {seed}: {:?}", out.error);
            out
        })
        .collect()
}

/// Mean and standard error of the mean.
pub fn mean_se(xs: &[f64]) -> (f64, f64) {
    (
        assay::stats::mean(xs).unwrap(),
        assay::stats::standard_error(xs).unwrap(),
    )
}

/// Draws from an rng for builders of test data.
pub fn rng(seed: u64) -> rand_chacha::ChaCha8Rng {
    use rand::SeedableRng;
    rand_chacha::ChaCha8Rng::seed_from_u64(seed)
}

/// A standard normal draw by the Box-Muller transform (Box & Muller 1958, Ann. Math.
/// Statist. 29(2)), for test data only.
pub fn normal(r: &mut impl Rng) -> f64 {
    let u1: f64 = 1.0 - r.random::<f64>();
    let u2: f64 = r.random();
    (-2.0 * u1.ln()).sqrt() * (2.0 * std::f64::consts::PI * u2).cos()
}

/// Every valid combination of path, schedule, proposal shape, move and backward kernel, at
/// small sizes (64 particles, 6 iterations or 5 temperatures, 2 Metropolis steps).
pub fn all_configurations() -> Vec<SamplerSettings> {
    let base = SamplerSettings {
        particles: 64,
        iterations: 6,
        steps: 5,
        initial_scale: 2.0,
        ..Default::default()
    };
    let mut out = Vec::new();
    for path in [Path::Static, Path::Tempered] {
        for schedule in [Schedule::Adaptive, Schedule::Fixed] {
            for shape in [ProposalShape::Identity, ProposalShape::ParticleCovariance] {
                for (mv, kernel) in [
                    (Move::RandomWalk, BackwardKernel::Proposal),
                    (Move::RandomWalk, BackwardKernel::GaussianOptimal),
                    (Move::RandomWalk, BackwardKernel::GaussianOptimalCrossfit),
                    (Move::Metropolis, BackwardKernel::Proposal),
                    (Move::Metropolis, BackwardKernel::Mcmc),
                ] {
                    out.push(SamplerSettings {
                        path,
                        schedule,
                        proposal_shape: shape,
                        move_kind: mv,
                        backward_kernel: kernel,
                        move_steps: 2,
                        ..base.clone()
                    });
                }
            }
        }
    }
    out
}
