//! Studies: a grid of sampler settings crossed with targets, run over replicates.

pub mod config;
pub mod locate;
pub mod merge;
pub mod runner;

pub use config::{Cell, Study, StudyError, StudyTarget, load_study, parse_study};
pub use runner::{RunError, RunOptions, RunSummary, Shard, run_study};
