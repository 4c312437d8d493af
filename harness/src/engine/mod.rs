//! The built-in SMC sampler (stub: filled in by the engine work).

use assay_targets::Target;

use crate::sampler::{RunContext, RunOutput, Sampler};
use crate::settings::{SamplerSettings, SettingsError};

/// The built-in SMC sampler, configured by [`SamplerSettings`].
#[derive(Debug, Clone)]
pub struct Smc {
    settings: SamplerSettings,
}

impl Smc {
    /// Validate the settings and build the sampler.
    pub fn new(settings: SamplerSettings) -> Result<Self, SettingsError> {
        settings.validate()?;
        Ok(Smc { settings })
    }

    /// The settings in effect.
    pub fn settings(&self) -> &SamplerSettings {
        &self.settings
    }
}

impl Sampler for Smc {
    fn name(&self) -> &str {
        "smc"
    }

    fn run(&self, _target: &dyn Target, _ctx: &RunContext) -> RunOutput {
        RunOutput::failed("engine not implemented yet")
    }
}
