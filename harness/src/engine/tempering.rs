//! The tempered path pi_phi proportional to ref^(1 - phi) target^phi: its reference
//! distribution and its two temperature schedules.

use rand::RngExt;
use rand_distr::StandardNormal;

use assay_targets::DiagGaussian;

/// Temperatures closer than this to 1 are rounded up to 1. // common practice
const PHI_EPS: f64 = 1e-12;
/// Bisection halvings of the adaptive schedule (2^-60 is below f64 resolution on [0, 1]).
const BISECTIONS: usize = 60;

/// The normalised diagonal Gaussian reference N(mean, diag(sd^2)) of a tempered path.
#[derive(Debug, Clone)]
pub(crate) struct Reference {
    mean: Vec<f64>,
    sd: Vec<f64>,
    inv_sd: Vec<f64>,
    /// -sum ln sd - d/2 ln 2 pi.
    log_norm: f64,
}

impl Reference {
    /// N(0, s0^2 I) in dimension d.
    pub fn isotropic(d: usize, s0: f64) -> Self {
        let df = d as f64;
        Reference {
            mean: vec![0.0; d],
            sd: vec![s0; d],
            inv_sd: vec![1.0 / s0; d],
            log_norm: -df * s0.ln() - 0.5 * df * (2.0 * std::f64::consts::PI).ln(),
        }
    }

    /// A reference from a target's own diagonal Gaussian; an error names what is wrong.
    pub fn from_target(g: &DiagGaussian, d: usize) -> Result<Self, String> {
        if g.mean.len() != d || g.sd.len() != d {
            return Err(format!(
                "the target's tempering reference has dimension {} (mean) / {} (sd) but the \
                 target has dimension {d}",
                g.mean.len(),
                g.sd.len()
            ));
        }
        Self::diag(&g.mean, &g.sd)
    }

    fn diag(mean: &[f64], sd: &[f64]) -> Result<Self, String> {
        if mean.iter().any(|m| !m.is_finite()) || sd.iter().any(|s| !(s.is_finite() && *s > 0.0)) {
            return Err(
                "the target's tempering reference needs finite means and finite sd > 0".into(),
            );
        }
        let d = mean.len() as f64;
        let log_norm =
            -sd.iter().map(|s| s.ln()).sum::<f64>() - 0.5 * d * (2.0 * std::f64::consts::PI).ln();
        Ok(Reference {
            mean: mean.to_vec(),
            sd: sd.to_vec(),
            inv_sd: sd.iter().map(|s| 1.0 / s).collect(),
            log_norm,
        })
    }

    /// Normalised log density at `x`.
    #[inline]
    pub fn log_density(&self, x: &[f64]) -> f64 {
        let q: f64 = x
            .iter()
            .zip(&self.mean)
            .zip(&self.inv_sd)
            .map(|((xi, m), is)| {
                let z = (xi - m) * is;
                z * z
            })
            .sum();
        self.log_norm - 0.5 * q
    }

    /// One exact draw into `out`.
    pub fn sample(&self, rng: &mut impl rand::Rng, out: &mut [f64]) {
        for ((o, m), s) in out.iter_mut().zip(&self.mean).zip(&self.sd) {
            let z: f64 = rng.sample(StandardNormal);
            *o = m + s * z;
        }
    }
}

/// Conditional ESS of the incremental weights w_i = exp(delta * b_i) under the normalised
/// weights W (Zhou, Johansen & Aston 2016, eq. for CESS):
/// CESS = N (sum_i W_i w_i)^2 / sum_i W_i w_i^2. Particles with W_i = 0 or b_i = -inf drop out.
pub(crate) fn cess(w: &[f64], b: &[f64], delta: f64) -> f64 {
    let mut m = f64::NEG_INFINITY;
    for (&wi, &bi) in w.iter().zip(b) {
        if wi > 0.0 {
            let v = delta * bi;
            if v > m {
                m = v;
            }
        }
    }
    if !m.is_finite() {
        return 0.0;
    }
    let (mut s1, mut s2) = (0.0, 0.0);
    for (&wi, &bi) in w.iter().zip(b) {
        if wi > 0.0 {
            let e = (delta * bi - m).exp();
            s1 += wi * e;
            s2 += wi * e * e;
        }
    }
    if s2 > 0.0 {
        w.len() as f64 * s1 * s1 / s2
    } else {
        0.0
    }
}

/// Next temperature of the adaptive schedule (Zhou, Johansen & Aston 2016, "Toward automatic
/// model comparison: an adaptive sequential Monte Carlo approach", Journal of Computational
/// and Graphical Statistics 25(3)): the phi in (phi_prev, 1] at which the conditional ESS of
/// the incremental weights pi_phi / pi_phi_prev = exp((phi - phi_prev) b_i), with
/// b_i = log target - log reference, equals `cess_target * N`, found by bisection; 1 when
/// phi = 1 keeps the CESS at or above the target. The result is always > phi_prev.
pub(crate) fn next_adaptive(w: &[f64], b: &[f64], phi_prev: f64, cess_target: f64) -> f64 {
    let goal = cess_target * w.len() as f64;
    let span = 1.0 - phi_prev;
    if span <= PHI_EPS || cess(w, b, span) >= goal {
        return 1.0;
    }
    let (mut lo, mut hi) = (0.0, span);
    for _ in 0..BISECTIONS {
        let mid = 0.5 * (lo + hi);
        if cess(w, b, mid) >= goal {
            lo = mid;
        } else {
            hi = mid;
        }
    }
    let delta = if lo > 0.0 { lo } else { hi };
    let phi = phi_prev + delta;
    if phi >= 1.0 - PHI_EPS { 1.0 } else { phi }
}

/// Temperature j (1..=steps) of the fixed schedule: phi_j = 10^(-4 (1 - j / steps)), so the
/// temperatures after phi_0 = 0 run geometrically from 10^(-4 (1 - 1/steps)) to phi_steps = 1.
pub(crate) fn fixed(j: usize, steps: usize) -> f64 {
    if j >= steps {
        1.0
    } else {
        10f64.powf(-4.0 * (1.0 - j as f64 / steps as f64))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn cess_equals_ess_for_uniform_previous_weights() {
        // Zhou, Johansen & Aston 2016: with W_i = 1/N, CESS reduces to the ESS of the
        // incremental weights, (sum w)^2 / sum w^2 (Kong 1992).
        let n = 5;
        let w = vec![1.0 / n as f64; n];
        let b = [0.0, 1.0, 2.0, -1.0, 0.5];
        let inc: Vec<f64> = b.iter().map(|v: &f64| (0.3 * v).exp()).collect();
        let ess = inc.iter().sum::<f64>().powi(2) / inc.iter().map(|v| v * v).sum::<f64>();
        assert!((cess(&w, &b, 0.3) - ess).abs() < 1e-12);
        assert!((cess(&w, &b, 0.0) - n as f64).abs() < 1e-12);
    }

    #[test]
    fn adaptive_step_hits_the_cess_target() {
        // Defining property of the schedule (Zhou et al. 2016): CESS(phi_next) = target * N.
        let n = 100;
        let w = vec![1.0 / n as f64; n];
        let b: Vec<f64> = (0..n).map(|i| -((i as f64) * 0.37 % 7.0) * 50.0).collect();
        let phi = next_adaptive(&w, &b, 0.0, 0.9);
        assert!(phi > 0.0 && phi < 1.0);
        assert!((cess(&w, &b, phi) - 90.0).abs() < 1e-6);
        // A flat increment lets the schedule jump straight to 1.
        assert_eq!(next_adaptive(&w, &vec![3.0; n], 0.2, 0.9), 1.0);
    }

    #[test]
    fn fixed_schedule_is_geometric() {
        // phi_j = 10^(-4 (1 - j/steps)): consecutive ratios are 10^(4/steps). // common practice
        let steps = 8;
        for j in 1..steps - 1 {
            let r = fixed(j + 1, steps) / fixed(j, steps);
            assert!((r - 10f64.powf(0.5)).abs() < 1e-12);
        }
        assert_eq!(fixed(steps, steps), 1.0);
        assert_eq!(fixed(1, 1), 1.0);
    }

    #[test]
    fn reference_density_is_normalised() {
        // Outside reference: statrs' univariate normal density, multiplied over coordinates.
        use statrs::distribution::{Continuous, Normal};
        let r = Reference::diag(&[1.0, -2.0], &[0.5, 3.0]).unwrap();
        let x = [0.3, 1.0];
        let want = Normal::new(1.0, 0.5).unwrap().ln_pdf(0.3)
            + Normal::new(-2.0, 3.0).unwrap().ln_pdf(1.0);
        assert!((r.log_density(&x) - want).abs() < 1e-12);
    }
}
