//! Samplers and targets that live in another program, spoken to in JSON Lines over pipes.

pub mod child;
pub mod sampler;
pub mod target;

pub use sampler::ExternalSampler;
pub use target::ExternalTarget;
