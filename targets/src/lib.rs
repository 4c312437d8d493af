//! Analytic target distributions with exact reference values, for scoring SMC samplers.
//!
//! Every family lives in its own file with a validated constructor; [`registry`] builds a
//! target from a study file's `[[target]]` table and lists the families for `assay targets`.

pub mod error;
pub mod registry;
pub mod target;

pub use error::ParamError;
pub use registry::{FamilyInfo, ParamInfo, build_target, families, family_names, nearest};
pub use target::{DiagGaussian, Target};
