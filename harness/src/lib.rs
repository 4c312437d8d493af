//! assay: benchmark and regression gate for sequential Monte Carlo sampler configurations.
//!
//! Layers, from the bottom: [`settings`] and [`sampler`] (the sampler engine's vocabulary),
//! [`resampling`], [`engine`] (the built-in SMC sampler), [`results`] (the results file),
//! [`study`] (grids, seeds, the runner), [`scores`] (statistics of a results file), [`table`]
//! (ranked reports), [`recommend`] (one configuration across the targets), [`check`] (the regression gate between two results files), [`plot`] (SVG
//! charts) and [`report`] (the markdown study report). The `assay` binary ties them to the
//! command line.

pub mod check;
pub mod engine;
pub mod external;
pub mod inference;
pub mod plot;
pub mod proxy;
pub mod race;
pub mod recommend;
pub mod report;
pub mod resampling;
pub mod results;
pub mod sampler;
pub mod scores;
pub mod seed;
pub mod settings;
pub mod stats;
pub mod study;
pub mod table;

pub use assay_targets as targets;
pub use sampler::{RunContext, RunOutput, RunStatus, Sampler, TraceRow};
pub use settings::SamplerSettings;
