//! `assay proxy`: an analytic target with the geometry of a user's pilot run.
//!
//! A pilot is a CSV of draws from a short run of the user's own model ([`csv`]). Three
//! families are fitted ([`fit`]: a Gaussian by its weighted moments; [`student`]: a Student-t
//! by ECME; [`mixture`]: Gaussian mixtures by EM, 1 to K components) and compared by BIC; the
//! chosen one is printed as a `[[target]]` block for a study file, with TOML comments on the
//! comparison and on what the proxy does not capture ([`render`]).

pub mod csv;
pub mod fit;
pub mod mixture;
pub mod render;
pub mod student;

use std::path::Path;

pub use csv::{Pilot, PilotError, read_pilot};
use fit::{GaussianFit, fit_gaussian};
use mixture::{MixtureFit, fit_mixture};
use student::{StudentFit, fit_student};

/// Which family to fit.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Family {
    /// The family with the lowest BIC.
    Auto,
    /// A Gaussian with the pilot's mean and covariance.
    Gaussian,
    /// A Student-t fitted by maximum likelihood.
    StudentT,
    /// A Gaussian mixture, its number of components chosen by BIC.
    Mixture,
}

/// Options of `assay proxy`.
#[derive(Debug, Clone)]
pub struct ProxyOptions {
    /// Family to fit.
    pub family: Family,
    /// Largest number of mixture components tried (>= 1).
    pub max_components: usize,
    /// Label of the target; default `<pilot file stem>-proxy`.
    pub label: Option<String>,
}

/// Default of `--max-components`.
pub const DEFAULT_MAX_COMPONENTS: usize = 4;

/// Largest `--max-components` accepted.
pub const MAX_COMPONENTS_LIMIT: usize = 20;

impl Default for ProxyOptions {
    fn default() -> Self {
        ProxyOptions {
            family: Family::Auto,
            max_components: DEFAULT_MAX_COMPONENTS,
            label: None,
        }
    }
}

/// The chosen fit.
#[derive(Debug, Clone)]
pub enum Fitted {
    /// Gaussian.
    Gaussian(GaussianFit),
    /// Student-t.
    StudentT(StudentFit),
    /// Mixture.
    Mixture(MixtureFit),
}

/// One candidate of the BIC comparison.
#[derive(Debug, Clone)]
pub struct Candidate {
    /// Name as printed, e.g. `mixture (K = 2)`.
    pub name: String,
    /// Its BIC, or why it could not be fitted.
    pub bic: Result<f64, String>,
    /// Free parameters.
    pub params: usize,
}

/// Every fit tried and the chosen one.
#[derive(Debug, Clone)]
pub struct Proxy {
    /// The pilot.
    pub pilot: Pilot,
    /// The Gaussian fit (always made: it starts the t and provides the moments).
    pub gaussian: GaussianFit,
    /// The candidates compared, in the order tried.
    pub candidates: Vec<Candidate>,
    /// The chosen fit.
    pub chosen: Fitted,
}

/// Fit the requested family (or all, for [`Family::Auto`]) to a pilot.
pub fn fit_pilot(pilot: Pilot, opts: &ProxyOptions) -> Result<Proxy, String> {
    fit_pilot_with(pilot, opts, &mut |_| {})
}

/// [`fit_pilot`], calling `stage` with the name of each fit as it starts (for progress).
pub fn fit_pilot_with(
    pilot: Pilot,
    opts: &ProxyOptions,
    stage: &mut dyn FnMut(&str),
) -> Result<Proxy, String> {
    if !(1..=MAX_COMPONENTS_LIMIT).contains(&opts.max_components) {
        return Err(format!(
            "--max-components {} is out of range; allowed: 1 to {MAX_COMPONENTS_LIMIT}",
            opts.max_components
        ));
    }
    let d = pilot.dim();
    stage("gaussian");
    let g = fit_gaussian(&pilot)?;
    let mut candidates = vec![Candidate {
        name: "gaussian".into(),
        bic: Ok(g.bic),
        params: fit::gaussian_params(d),
    }];
    let want = |f: Family| opts.family == Family::Auto || opts.family == f;
    let mut student = None;
    if want(Family::StudentT) {
        stage("student-t");
        let t = fit_student(&pilot, &g);
        candidates.push(Candidate {
            name: "student-t".into(),
            bic: t.as_ref().map(|t| t.bic).map_err(Clone::clone),
            params: fit::gaussian_params(d) + 1,
        });
        match t {
            Ok(t) => student = Some(t),
            Err(e) if opts.family == Family::StudentT => return Err(e),
            Err(_) => {}
        }
    }
    let mut best_mix: Option<MixtureFit> = None;
    if want(Family::Mixture) {
        let var: Vec<f64> = (0..d).map(|j| g.cov[(j, j)]).collect();
        // With `auto`, one component is the Gaussian, already a candidate.
        let first = if opts.family == Family::Auto { 2 } else { 1 };
        for k in first..=opts.max_components {
            stage(&format!("mixture (K = {k})"));
            let m = fit_mixture(&pilot, k, &var);
            candidates.push(Candidate {
                name: format!("mixture (K = {k})"),
                bic: m.as_ref().map(|m| m.bic).ok_or_else(|| {
                    "EM lost a component or a covariance became singular".to_string()
                }),
                params: mixture::mixture_params(k, d),
            });
            if let Some(m) = m
                && best_mix.as_ref().is_none_or(|b| m.bic < b.bic)
            {
                best_mix = Some(m);
            }
        }
        if best_mix.is_none() && opts.family == Family::Mixture {
            return Err(format!(
                "no mixture of 1 to {} components could be fitted",
                opts.max_components
            ));
        }
    }
    let mut chosen = (g.bic, Fitted::Gaussian(g.clone()));
    if let Some(t) = student
        && (opts.family == Family::StudentT || t.bic < chosen.0)
    {
        chosen = (t.bic, Fitted::StudentT(t));
    }
    if let Some(m) = best_mix
        && (opts.family == Family::Mixture || m.bic < chosen.0)
    {
        chosen = (m.bic, Fitted::Mixture(m));
    }
    let chosen = chosen.1;
    Ok(Proxy {
        pilot,
        gaussian: g,
        candidates,
        chosen,
    })
}

/// Read a pilot file, fit it and render the `[[target]]` block with its comments.
pub fn propose(
    path: &Path,
    opts: &ProxyOptions,
    stage: &mut dyn FnMut(&str),
) -> Result<String, ProxyError> {
    let pilot = read_pilot(path).map_err(ProxyError::Pilot)?;
    let proxy = fit_pilot_with(pilot, opts, stage)
        .map_err(|e| ProxyError::Fit(format!("pilot {}: {e}", path.display())))?;
    let label = opts.label.clone().unwrap_or_else(|| {
        let stem = path
            .file_stem()
            .map(|s| s.to_string_lossy().into_owned())
            .unwrap_or_else(|| "pilot".into());
        format!("{stem}-proxy")
    });
    Ok(render::render(&proxy, path, &label))
}

/// Why no proxy was made. Both kinds are unusable input (exit 2).
#[derive(Debug, Clone)]
pub enum ProxyError {
    /// The pilot file is unreadable or malformed.
    Pilot(PilotError),
    /// No fit of the requested family could be made.
    Fit(String),
}

impl std::fmt::Display for ProxyError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            ProxyError::Pilot(e) => write!(f, "{e}"),
            ProxyError::Fit(e) => write!(f, "{e}"),
        }
    }
}

impl std::error::Error for ProxyError {}
