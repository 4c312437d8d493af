//! Studies: a grid of sampler settings crossed with targets, run over replicates.

pub mod config;
pub mod limits;
pub mod locate;
pub mod merge;
pub mod reference;
pub mod runner;

pub use config::{
    Cell, ReferenceSpec, SamplerFactory, Study, StudyError, StudyTarget, load_study, parse_study,
    parse_study_for_code,
};
pub use runner::{RunError, RunOptions, RunSummary, Shard, run_study};
