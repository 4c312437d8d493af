//! Analytic target distributions with exact reference values, for scoring SMC samplers.
//!
//! Every family lives in its own file with a validated constructor; [`registry`] builds a
//! target from a study file's `[[target]]` table and lists the families for `assay targets`.

pub mod banana;
pub mod dense;
pub mod error;
pub mod funnel;
pub mod gaussian;
pub mod linear_regression;
pub mod mixture;
pub mod params;
pub mod registry;
pub mod student_t;
pub mod target;

pub use banana::Banana;
pub use funnel::Funnel;
pub use gaussian::Gaussian;
pub use linear_regression::LinearRegression;
pub use mixture::{Mixture, MixtureComponent};
pub use student_t::StudentT;

pub use error::ParamError;
pub use registry::{
    BANANA, FUNNEL, FamilyInfo, GAUSSIAN, LINEAR_REGRESSION, MIXTURE, ParamInfo, STUDENT_T,
    build_target, default_number, families, family_names, levenshtein, nearest, sweepable,
};
pub use target::{DiagGaussian, Target};
