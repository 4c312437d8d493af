//! Studies: a grid of sampler settings crossed with targets, run over replicates.

pub mod config;
pub mod locate;
pub mod merge;
pub mod runner;

pub use config::{load_study, parse_study, Cell, Study, StudyError, StudyTarget};
pub use runner::{run_study, RunError, RunOptions, RunSummary, Shard};
