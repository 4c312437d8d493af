//! The registry of target families: their names, parameters (for `assay targets`), and
//! [`build_target`], which turns a study file's `[[target]]` table into a [`Target`].

use std::path::Path;

use crate::banana::Banana;
use crate::error::ParamError;
use crate::funnel::Funnel;
use crate::gaussian::Gaussian;
use crate::linear_regression::LinearRegression;
use crate::mixture::Mixture;
use crate::params::show;
use crate::student_t::StudentT;
use crate::target::Target;

/// Family name of [`Gaussian`] in study files.
pub const GAUSSIAN: &str = "gaussian";
/// Family name of [`Banana`] in study files.
pub const BANANA: &str = "banana";
/// Family name of [`Mixture`] in study files.
pub const MIXTURE: &str = "mixture";
/// Family name of [`StudentT`] in study files.
pub const STUDENT_T: &str = "student-t";
/// Family name of [`Funnel`] in study files.
pub const FUNNEL: &str = "funnel";
/// Family name of [`LinearRegression`] in study files.
pub const LINEAR_REGRESSION: &str = "linear-regression";

/// One parameter of a family, for `assay targets`.
#[derive(Debug, Clone, Copy)]
pub struct ParamInfo {
    /// Config key.
    pub name: &'static str,
    /// Default value as text, or `"required"`.
    pub default: &'static str,
    /// Allowed range as text.
    pub allowed: &'static str,
    /// One line of meaning.
    pub doc: &'static str,
    /// True when the parameter is a single number, so that a study file may give it as a list
    /// of numbers to sweep over (one target per value). Vector-valued parameters (`mean`,
    /// `scale` as an array of d) and tables are never sweepable: a list there is a vector.
    pub sweepable: bool,
}

/// One family, for `assay targets`.
#[derive(Debug, Clone, Copy)]
pub struct FamilyInfo {
    /// Family name as used in study files.
    pub name: &'static str,
    /// One line of meaning.
    pub summary: &'static str,
    /// Published source of the family and its reference values.
    pub source: &'static str,
    /// Parameters (besides `family` and `label`).
    pub params: &'static [ParamInfo],
}

const fn p(
    name: &'static str,
    default: &'static str,
    allowed: &'static str,
    doc: &'static str,
) -> ParamInfo {
    ParamInfo {
        name,
        default,
        allowed,
        doc,
        sweepable: false,
    }
}

/// A scalar numeric parameter, sweepable in study files (see [`sweepable`]).
const fn sp(
    name: &'static str,
    default: &'static str,
    allowed: &'static str,
    doc: &'static str,
) -> ParamInfo {
    ParamInfo {
        sweepable: true,
        ..p(name, default, allowed, doc)
    }
}

const DIM: ParamInfo = sp("dim", "required", "integer >= 1", "dimension d");
const DIM2: ParamInfo = sp("dim", "required", "integer >= 2", "dimension d");

static FAMILIES: &[FamilyInfo] = &[
    FamilyInfo {
        name: GAUSSIAN,
        summary: "Gaussian N(mu, Sigma), Sigma_ij = s_i s_j rho^|i-j| (AR(1) correlation) or a \
                  full `covariance`; \
                  unnormalised, log_z = d/2 log 2pi + 1/2 log|Sigma|",
        source: "closed form",
        params: &[
            DIM,
            p("mean", "0", "finite number or array of d", "mean vector mu"),
            p(
                "scale",
                "1",
                "number > 0 or array of d",
                "marginal standard deviations s_i",
            ),
            sp(
                "ar1",
                "0",
                "(-1, 1)",
                "AR(1) correlation rho between neighbours",
            ),
            p(
                "covariance",
                "none",
                "d x d symmetric positive definite; not with scale or ar1",
                "full covariance Sigma, replacing scale and ar1",
            ),
        ],
    },
    FamilyInfo {
        name: BANANA,
        summary: "twisted Gaussian: y2 = x2 + b x1^2 - b v; Var x1 = v, Var x2 = 1 + 2 b^2 v^2; \
                  unnormalised, log_z = d/2 log 2pi + 1/2 log v",
        source: "Haario, Saksman & Tamminen (1999), Computational Statistics 14",
        params: &[
            DIM2,
            sp("curvature", "0.1", "finite number", "twist b"),
            sp("spread", "100", "number > 0", "variance v of x1"),
        ],
    },
    FamilyInfo {
        name: MIXTURE,
        summary: "mixture sum_k w_k N(mu_k, s_k^2 I or Sigma_k) of normalised components; \
                  log_z = log sum_k w_k",
        source: "closed form (law of total variance)",
        params: &[
            DIM,
            p(
                "components",
                "required",
                "non-empty array of { weight, mean, scale }",
                "mixture components",
            ),
            p(
                "components[].weight",
                "1",
                "number > 0",
                "unnormalised weight w_k",
            ),
            p(
                "components[].mean",
                "required",
                "finite number or array of d",
                "component mean mu_k",
            ),
            p(
                "components[].scale",
                "1",
                "number > 0",
                "isotropic standard deviation s_k",
            ),
            p(
                "components[].covariance",
                "none",
                "d x d symmetric positive definite; not with scale",
                "full covariance Sigma_k, replacing s_k^2 I",
            ),
        ],
    },
    FamilyInfo {
        name: STUDENT_T,
        summary: "multivariate Student-t, Sigma = s^2 I or a full `covariance`; unnormalised, log_z = lnG(nu/2) + \
                  d/2 log(nu pi) + d log s - lnG((nu+d)/2); mean for nu > 1, cov for nu > 2",
        source: "closed form (Kotz & Nadarajah 2004, Multivariate t Distributions)",
        params: &[
            DIM,
            sp("dof", "required", "number > 0", "degrees of freedom nu"),
            sp("scale", "1", "number > 0", "isotropic scale s"),
            p("mean", "0", "finite number or array of d", "location mu"),
            p(
                "covariance",
                "none",
                "d x d symmetric positive definite; not with scale",
                "full scale matrix Sigma, replacing s^2 I",
            ),
        ],
    },
    FamilyInfo {
        name: FUNNEL,
        summary: "funnel: x1 ~ N(0, sigma^2), x_i | x1 ~ N(0, e^x1); normalised, log_z = 0; \
                  Var x_i = e^(sigma^2/2)",
        source: "Neal (2003), Slice sampling, Annals of Statistics 31",
        params: &[
            DIM2,
            sp("sigma", "3", "number > 0", "standard deviation of x1"),
        ],
    },
    FamilyInfo {
        name: LINEAR_REGRESSION,
        summary: "posterior of conjugate Bayesian linear regression (prior N(0, tau^2 I), \
                  Gaussian likelihood); log_z is the evidence",
        source: "Bishop (2006), Pattern Recognition and Machine Learning, sections 3.3, 3.5",
        params: &[
            sp(
                "dim",
                "required",
                "integer >= 1",
                "number of coefficients p",
            ),
            sp(
                "observations",
                "required without `data`",
                "integer >= 1 (equal to the file's rows with `data`)",
                "number of observations n",
            ),
            sp("noise", "1", "number > 0", "noise standard deviation sigma"),
            sp(
                "prior_scale",
                "1",
                "number > 0",
                "prior standard deviation tau",
            ),
            sp(
                "data_seed",
                "0",
                "integer >= 0 (not with `data`)",
                "seed of the synthetic design and response",
            ),
            p(
                "data",
                "none (synthetic)",
                "CSV path, header row, last column the response",
                "the user's own data, relative to the study file",
            ),
        ],
    },
];

/// All families.
pub fn families() -> &'static [FamilyInfo] {
    FAMILIES
}

/// True when `key` of `family` is a single number that a study file may sweep (give as a
/// list of numbers, one target per value). False for unknown families and keys, for vector
/// and table parameters, and for families outside the registry (e.g. `external`).
pub fn sweepable(family: &str, key: &str) -> bool {
    families()
        .iter()
        .find(|f| f.name == family)
        .and_then(|f| f.params.iter().find(|p| p.name == key))
        .is_some_and(|p| p.sweepable)
}

/// The default of parameter `key` of `family` when it is a number (`scale`'s 1, `ar1`'s 0);
/// `None` for required parameters, defaults that are not one number (`none`, `required`),
/// unknown families and keys.
pub fn default_number(family: &str, key: &str) -> Option<f64> {
    families()
        .iter()
        .find(|f| f.name == family)
        .and_then(|f| f.params.iter().find(|p| p.name == key))
        .and_then(|p| p.default.parse::<f64>().ok())
        .filter(|x| x.is_finite())
}

/// Names of all families.
pub fn family_names() -> Vec<&'static str> {
    families().iter().map(|f| f.name).collect()
}

/// Levenshtein (edit) distance between two strings, counted in chars: the minimum number of
/// single-character insertions, deletions and substitutions (Levenshtein 1966, "Binary codes
/// capable of correcting deletions, insertions, and reversals", Soviet Physics Doklady 10),
/// by the two-row Wagner-Fischer dynamic programme (Wagner & Fischer 1974, JACM 21).
pub fn levenshtein(a: &str, b: &str) -> usize {
    let b: Vec<char> = b.chars().collect();
    let mut prev: Vec<usize> = (0..=b.len()).collect();
    let mut cur = vec![0; b.len() + 1];
    for (i, ca) in a.chars().enumerate() {
        cur[0] = i + 1;
        for (j, &cb) in b.iter().enumerate() {
            let sub = prev[j] + usize::from(ca != cb);
            cur[j + 1] = sub.min(prev[j + 1] + 1).min(cur[j] + 1);
        }
        std::mem::swap(&mut prev, &mut cur);
    }
    prev[b.len()]
}

/// The candidate nearest to `name` by edit distance, if it is close enough to be a likely typo:
/// distance <= max(2, len / 3), where len is the number of chars of `name`. Ties go to the
/// earlier candidate.
pub fn nearest(name: &str, candidates: &[&str]) -> Option<String> {
    let limit = 2.max(name.chars().count() / 3);
    let mut best: Option<(usize, &str)> = None;
    for &c in candidates {
        let d = levenshtein(name, c);
        if d <= limit && best.is_none_or(|(bd, _)| d < bd) {
            best = Some((d, c));
        }
    }
    best.map(|(_, c)| c.to_string())
}

/// Build a target from a `[[target]]` table (`family`, `dim` and the family's parameters; a
/// `label` key is ignored here, the given `label` is used). Relative data paths are resolved
/// against `base_dir`.
pub fn build_target(
    spec: &toml::Table,
    label: &str,
    base_dir: &Path,
) -> Result<Box<dyn Target>, ParamError> {
    let family = match spec.get("family") {
        None => {
            return Err(ParamError::Missing {
                family: "target".to_string(),
                key: "family".to_string(),
            });
        }
        Some(toml::Value::String(s)) => s.as_str(),
        Some(other) => {
            return Err(ParamError::WrongType {
                family: "target".to_string(),
                key: "family".to_string(),
                value: show(other),
                expected: format!("a string, one of {}", family_names().join(", ")),
            });
        }
    };
    Ok(match family {
        GAUSSIAN => Box::new(Gaussian::from_table(spec, label, base_dir)?),
        BANANA => Box::new(Banana::from_table(spec, label, base_dir)?),
        MIXTURE => Box::new(Mixture::from_table(spec, label, base_dir)?),
        STUDENT_T => Box::new(StudentT::from_table(spec, label, base_dir)?),
        FUNNEL => Box::new(Funnel::from_table(spec, label, base_dir)?),
        LINEAR_REGRESSION => Box::new(LinearRegression::from_table(spec, label, base_dir)?),
        other => {
            return Err(ParamError::UnknownFamily {
                family: other.to_string(),
                suggestion: nearest(other, &family_names()),
            });
        }
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn numeric_defaults_are_read_from_the_table() {
        assert_eq!(default_number(GAUSSIAN, "scale"), Some(1.0));
        assert_eq!(default_number(GAUSSIAN, "ar1"), Some(0.0));
        assert_eq!(default_number(GAUSSIAN, "dim"), None, "required");
        assert_eq!(default_number(GAUSSIAN, "covariance"), None, "none");
        assert_eq!(default_number("no-such-family", "scale"), None);
    }

    #[test]
    fn levenshtein_basics() {
        assert_eq!(levenshtein("", ""), 0);
        assert_eq!(levenshtein("abc", ""), 3);
        // The textbook example (e.g. Wikipedia "Levenshtein distance"; from memory).
        assert_eq!(levenshtein("kitten", "sitting"), 3);
        assert_eq!(levenshtein("funnel", "funnel"), 0);
        assert_eq!(levenshtein("gaussain", "gaussian"), 2);
    }

    #[test]
    fn nearest_threshold() {
        let names = family_names();
        assert_eq!(nearest("gausian", &names).as_deref(), Some("gaussian"));
        assert_eq!(nearest("studentt", &names).as_deref(), Some("student-t"));
        assert_eq!(
            nearest("linear_regresion", &names).as_deref(),
            Some("linear-regression")
        );
        assert_eq!(nearest("zzzzzz", &names), None);
        assert_eq!(nearest("x", &["dim"]), None);
        assert_eq!(nearest("dm", &["dim"]).as_deref(), Some("dim"));
    }

    #[test]
    fn every_family_builds_with_minimal_spec() {
        let dir = Path::new(".");
        let specs = [
            "family = 'gaussian'\ndim = 3",
            "family = 'banana'\ndim = 2",
            "family = 'mixture'\ndim = 2\ncomponents = [{ mean = [0, 0] }]",
            "family = 'student-t'\ndim = 2\ndof = 5",
            "family = 'funnel'\ndim = 3",
            "family = 'linear-regression'\ndim = 2\nobservations = 5",
        ];
        for (s, info) in specs.iter().zip(families()) {
            let t: toml::Table = s.parse().unwrap();
            let target = build_target(&t, "lbl", dir).unwrap();
            assert_eq!(target.family(), info.name);
            assert_eq!(target.label(), "lbl");
        }
    }

    #[test]
    fn family_errors() {
        let dir = Path::new(".");
        let t: toml::Table = "family = 'gausian'\ndim = 2".parse().unwrap();
        match build_target(&t, "x", dir) {
            Err(ParamError::UnknownFamily { family, suggestion }) => {
                assert_eq!(family, "gausian");
                assert_eq!(suggestion.as_deref(), Some("gaussian"));
            }
            other => panic!("{:?}", other.err()),
        }
        let t: toml::Table = "dim = 2".parse().unwrap();
        assert!(matches!(
            build_target(&t, "x", dir),
            Err(ParamError::Missing { .. })
        ));
        let t: toml::Table = "family = 3".parse().unwrap();
        assert!(matches!(
            build_target(&t, "x", dir),
            Err(ParamError::WrongType { .. })
        ));
    }

    #[test]
    fn only_scalar_parameters_are_sweepable() {
        // Scalars of each family (common practice: a sweep varies one number at a time).
        for (family, key) in [
            (GAUSSIAN, "dim"),
            (GAUSSIAN, "ar1"),
            (BANANA, "curvature"),
            (STUDENT_T, "dof"),
            (STUDENT_T, "scale"),
            (FUNNEL, "sigma"),
            (LINEAR_REGRESSION, "observations"),
        ] {
            assert!(sweepable(family, key), "{family} {key}");
        }
        // Vectors, tables, text, unknown keys and families outside the registry.
        for (family, key) in [
            (GAUSSIAN, "mean"),
            (GAUSSIAN, "scale"),
            (GAUSSIAN, "covariance"),
            (MIXTURE, "components"),
            (STUDENT_T, "mean"),
            (LINEAR_REGRESSION, "data"),
            (GAUSSIAN, "label"),
            (GAUSSIAN, "bogus"),
            ("external", "dim"),
        ] {
            assert!(!sweepable(family, key), "{family} {key}");
        }
    }

    #[test]
    fn families_list_every_key_the_builders_accept() {
        // Each family rejects an unknown key and suggests a listed one.
        let dir = Path::new(".");
        for info in families() {
            let s = format!("family = '{}'\ndim = 2\nbogus_key = 1", info.name);
            let t: toml::Table = s.parse().unwrap();
            match build_target(&t, "x", dir) {
                Err(ParamError::UnknownKey { allowed, .. }) => {
                    for a in &allowed {
                        assert!(
                            info.params.iter().any(|p| p.name == a),
                            "{}: {a} not listed",
                            info.name
                        );
                    }
                }
                other => panic!("{}: {:?}", info.name, other.err()),
            }
        }
    }
}
