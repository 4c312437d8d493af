//! Settings of the built-in SMC sampler. The field names are the pinned config keys of the
//! `[sampler]` and `[grid]` tables of a study file.

use std::fmt;

use serde::{Deserialize, Serialize};

/// Which sequence of distributions the sampler follows.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Path {
    /// The target stays fixed for all iterations.
    Static,
    /// Geometric bridge ref^(1-phi) target^phi from phi = 0 to 1.
    Tempered,
}

/// How the temperatures of a tempered path are chosen.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Schedule {
    /// Bisection on the conditional ESS (Zhou, Johansen & Aston 2016).
    Adaptive,
    /// `steps` geometrically spaced temperatures.
    Fixed,
}

/// The move applied to every particle at each iteration.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Move {
    /// Gaussian step with no accept/reject; the importance weights correct for it.
    RandomWalk,
    /// The same step as a Metropolis-Hastings proposal, invariant for the current target.
    Metropolis,
}

/// Covariance of the Gaussian step.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum ProposalShape {
    /// proposal_scale^2 I.
    Identity,
    /// proposal_scale^2 times the weighted covariance of the current population.
    ParticleCovariance,
}

/// The backward kernel L(x_{k-1} | x_k) of the weight update.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum BackwardKernel {
    /// L = the forward proposal q(x_{k-1} | x_k).
    Proposal,
    /// Gaussian fit of the joint (x_{k-1}, x_k), conditioned on x_k (Green et al. 2022).
    GaussianOptimal,
    /// As `GaussianOptimal`, each half of the particles scored with the other half's fit.
    GaussianOptimalCrossfit,
    /// Reversal of a target-invariant move (Del Moral, Doucet & Jasra 2006).
    Mcmc,
}

/// Resampling scheme (Douc, Cappe & Moulines 2005).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Resampling {
    Multinomial,
    Systematic,
    Stratified,
    Residual,
}

/// Every setting of the built-in sampler, with defaults.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct SamplerSettings {
    /// Number of particles N (>= 2).
    pub particles: usize,
    /// Standard deviation s0 of the initial proposal / tempering reference N(0, s0^2 I).
    /// Ignored as a tempering reference for targets that have their own (e.g. a prior).
    pub initial_scale: f64,
    /// Static or tempered path.
    pub path: Path,
    /// Number of iterations of the static path, the initial draw included (>= 1).
    pub iterations: usize,
    /// Temperature schedule of the tempered path.
    pub schedule: Schedule,
    /// Target conditional ESS fraction of the adaptive schedule, in (0, 1).
    pub cess_target: f64,
    /// Number of temperatures after phi = 0 of the fixed schedule (>= 1).
    pub steps: usize,
    /// Safety cap on the number of temperatures of the adaptive schedule (>= 1).
    pub max_steps: usize,
    /// Move kernel.
    #[serde(rename = "move")]
    pub move_kind: Move,
    /// Number of Metropolis steps per iteration (>= 1).
    pub move_steps: usize,
    /// Scale of the Gaussian step (> 0).
    pub proposal_scale: f64,
    /// Covariance of the Gaussian step.
    pub proposal_shape: ProposalShape,
    /// Backward kernel of the weight update.
    pub backward_kernel: BackwardKernel,
    /// Resampling scheme.
    pub resampling: Resampling,
    /// Resample when ESS < ess_threshold * N; in [0, 1].
    pub ess_threshold: f64,
    /// Run this program (argv list, never a shell string) as the sampler instead of the
    /// built-in one, over the JSON Lines protocol of [`crate::external`].
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub external: Option<Vec<String>>,
}

impl Default for SamplerSettings {
    fn default() -> Self {
        SamplerSettings {
            particles: 1000,
            initial_scale: 1.0,
            path: Path::Static,
            iterations: 50,
            schedule: Schedule::Adaptive,
            cess_target: 0.9,
            steps: 20,
            max_steps: 500,
            move_kind: Move::RandomWalk,
            move_steps: 1,
            proposal_scale: 0.5,
            proposal_shape: ProposalShape::Identity,
            backward_kernel: BackwardKernel::Proposal,
            resampling: Resampling::Systematic,
            ess_threshold: 0.5,
            external: None,
        }
    }
}

/// An invalid sampler setting or combination of settings.
#[derive(Debug, Clone, PartialEq)]
pub struct SettingsError {
    /// The config key at fault.
    pub key: String,
    /// The value given.
    pub value: String,
    /// What is allowed.
    pub allowed: String,
}

impl fmt::Display for SettingsError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(
            f,
            "sampler setting `{}` = {} is not allowed; allowed: {}",
            self.key, self.value, self.allowed
        )
    }
}

impl std::error::Error for SettingsError {}

/// Upper bound of every count setting (`particles`, `iterations`, `steps`, `max_steps`,
/// `move_steps`): far beyond any useful study, and small enough that no product of counts
/// overflows. What a run may really use is bounded by the memory estimate of
/// [`SamplerSettings::memory_estimate`], checked against the machine before a study starts.
pub const MAX_COUNT: usize = 1_000_000_000;

/// A number for a message: shortest round-trip form, in exponent notation when very large or
/// very small (a plain `{}` of 1e300 prints 301 digits).
pub fn number_text(x: f64) -> String {
    let a = x.abs();
    if x.is_finite() && a != 0.0 && !(1e-6..1e16).contains(&a) {
        format!("{x:e}")
    } else {
        format!("{x}")
    }
}

fn err(key: &str, value: impl fmt::Display, allowed: &str) -> SettingsError {
    SettingsError {
        key: key.to_string(),
        value: value.to_string(),
        allowed: allowed.to_string(),
    }
}

impl SamplerSettings {
    /// The config keys, in documentation order.
    pub const KEYS: &'static [&'static str] = &[
        "particles",
        "initial_scale",
        "path",
        "iterations",
        "schedule",
        "cess_target",
        "steps",
        "max_steps",
        "move",
        "move_steps",
        "proposal_scale",
        "proposal_shape",
        "backward_kernel",
        "resampling",
        "ess_threshold",
        "external",
    ];

    /// Check every value and every combination; the first problem found is returned.
    pub fn validate(&self) -> Result<(), SettingsError> {
        let counts = [
            ("particles", self.particles, 2),
            ("iterations", self.iterations, 1),
            ("steps", self.steps, 1),
            ("max_steps", self.max_steps, 1),
            ("move_steps", self.move_steps, 1),
        ];
        for (key, value, min) in counts {
            if !(min..=MAX_COUNT).contains(&value) {
                return Err(err(
                    key,
                    value,
                    &format!("an integer from {min} to {MAX_COUNT}"),
                ));
            }
        }
        if !(self.initial_scale.is_finite() && self.initial_scale > 0.0) {
            return Err(err(
                "initial_scale",
                number_text(self.initial_scale),
                "a finite number > 0",
            ));
        }
        if !(self.cess_target > 0.0 && self.cess_target < 1.0) {
            return Err(err(
                "cess_target",
                number_text(self.cess_target),
                "a number in (0, 1)",
            ));
        }
        if !(self.proposal_scale.is_finite() && self.proposal_scale > 0.0) {
            return Err(err(
                "proposal_scale",
                number_text(self.proposal_scale),
                "a finite number > 0",
            ));
        }
        if !(0.0..=1.0).contains(&self.ess_threshold) {
            return Err(err(
                "ess_threshold",
                number_text(self.ess_threshold),
                "a number in [0, 1]",
            ));
        }
        if let Some(argv) = &self.external
            && argv.first().is_some_and(|p| p.is_empty())
        {
            return Err(err(
                "external",
                format!("{argv:?}"),
                "a list [\"program\", \"arg\", ...] whose first item names a program, or [] \
                 for the built-in sampler",
            ));
        }
        if self.backward_kernel == BackwardKernel::Mcmc && self.move_kind != Move::Metropolis {
            return Err(err(
                "backward_kernel",
                "\"mcmc\" with move = \"random-walk\"",
                "\"mcmc\" only with move = \"metropolis\" (the reversal is valid only for a \
                 target-invariant move)",
            ));
        }
        // The approximately optimal L-kernels need a move with a density: the Metropolis
        // kernel has an atom at the current point, so q(x_k | x_{k-1}) in their weight does
        // not exist.
        if self.move_kind == Move::Metropolis
            && matches!(
                self.backward_kernel,
                BackwardKernel::GaussianOptimal | BackwardKernel::GaussianOptimalCrossfit
            )
        {
            let name = if self.backward_kernel == BackwardKernel::GaussianOptimal {
                "gaussian-optimal"
            } else {
                "gaussian-optimal-crossfit"
            };
            return Err(err(
                "backward_kernel",
                format!("\"{name}\" with move = \"metropolis\""),
                "\"gaussian-optimal\" and \"gaussian-optimal-crossfit\" only with move = \
                 \"random-walk\" (the Metropolis kernel has no density); use \"mcmc\" or \
                 \"proposal\" with Metropolis moves",
            ));
        }
        Ok(())
    }
}

impl SamplerSettings {
    /// An estimate, in bytes, of the memory one run of the built-in sampler with these
    /// settings takes on a target of dimension `d`: the particle buffers (population, proposal
    /// and resampling copies, O(N d)), the per-particle vectors (O(N)), the fitted kernels and
    /// step covariance (O(d^2)), the bounded trace, and a fixed allowance. Computed in `f64`,
    /// so that it cannot overflow. An external sampler's own memory is its program's; assay's
    /// side of it is bounded by the protocol's line cap and is not counted here.
    pub fn memory_estimate(&self, d: usize) -> f64 {
        if self.external.as_ref().is_some_and(|a| !a.is_empty()) {
            return (1u64 << 20) as f64;
        }
        let (n, d) = (self.particles as f64, d as f64);
        let trace_rows = crate::sampler::TRACE_LIMIT as f64 + 1.0;
        8.0 * (4.0 * n * d + 16.0 * n + 48.0 * d * d + 16.0 * d)
            + 64.0 * trace_rows
            + (1u64 << 20) as f64
    }

    /// The same settings with every key of `table` that the file gives normalised to its typed
    /// value (`1` and `1.0` are one number for a number setting): the canonical JSON of the
    /// setting as the sampler reads it. A key that does not parse is left as given (validation
    /// reports it).
    pub fn normalise_value(key: &str, value: &serde_json::Value) -> serde_json::Value {
        let mut one = serde_json::Map::new();
        one.insert(key.to_string(), value.clone());
        match serde_json::from_value::<SamplerSettings>(serde_json::Value::Object(one))
            .ok()
            .and_then(|s| serde_json::to_value(s).ok())
        {
            Some(serde_json::Value::Object(mut m)) => m.remove(key).unwrap_or(value.clone()),
            _ => value.clone(),
        }
    }

    /// Every setting of a `[sampler]`-style table with the defaults filled in, as JSON: two
    /// tables are the same configuration exactly when these are equal (a default written out
    /// is the same as a default left out). `None` when the table does not parse.
    pub fn effective(
        table: &serde_json::Map<String, serde_json::Value>,
    ) -> Option<serde_json::Value> {
        let mut s: SamplerSettings =
            serde_json::from_value(serde_json::Value::Object(table.clone())).ok()?;
        // `external = []` is the built-in sampler, as is no `external`.
        if s.external.as_ref().is_some_and(Vec::is_empty) {
            s.external = None;
        }
        serde_json::to_value(s).ok()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn defaults_are_valid() {
        SamplerSettings::default().validate().unwrap();
    }

    #[test]
    fn keys_match_serialised_fields() {
        let s = SamplerSettings {
            external: Some(vec!["prog".into()]),
            ..Default::default()
        };
        let v = serde_json::to_value(s).unwrap();
        let obj = v.as_object().unwrap();
        assert_eq!(obj.len(), SamplerSettings::KEYS.len());
        for k in SamplerSettings::KEYS {
            assert!(obj.contains_key(*k), "{k}");
        }
    }

    #[test]
    fn mcmc_needs_metropolis() {
        let s = SamplerSettings {
            backward_kernel: BackwardKernel::Mcmc,
            ..Default::default()
        };
        let e = s.validate().unwrap_err();
        assert_eq!(e.key, "backward_kernel");
        let s = SamplerSettings {
            backward_kernel: BackwardKernel::Mcmc,
            move_kind: Move::Metropolis,
            ..Default::default()
        };
        s.validate().unwrap();
    }

    #[test]
    fn out_of_range_values_are_named() {
        let cases: Vec<(SamplerSettings, &str)> = vec![
            (
                SamplerSettings {
                    particles: 1,
                    ..Default::default()
                },
                "particles",
            ),
            (
                SamplerSettings {
                    initial_scale: 0.0,
                    ..Default::default()
                },
                "initial_scale",
            ),
            (
                SamplerSettings {
                    iterations: 0,
                    ..Default::default()
                },
                "iterations",
            ),
            (
                SamplerSettings {
                    cess_target: 1.0,
                    ..Default::default()
                },
                "cess_target",
            ),
            (
                SamplerSettings {
                    steps: 0,
                    ..Default::default()
                },
                "steps",
            ),
            (
                SamplerSettings {
                    move_steps: 0,
                    ..Default::default()
                },
                "move_steps",
            ),
            (
                SamplerSettings {
                    proposal_scale: f64::NAN,
                    ..Default::default()
                },
                "proposal_scale",
            ),
            (
                SamplerSettings {
                    ess_threshold: 1.5,
                    ..Default::default()
                },
                "ess_threshold",
            ),
        ];
        for (s, key) in cases {
            assert_eq!(s.validate().unwrap_err().key, key);
        }
    }
}
