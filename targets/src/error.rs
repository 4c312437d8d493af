//! Typed errors for invalid target parameters.

use std::fmt;

/// An invalid or unknown target parameter. Every variant names what a user needs to fix it.
#[derive(Debug, Clone, PartialEq)]
pub enum ParamError {
    /// A parameter value outside its allowed range.
    OutOfRange {
        family: String,
        key: String,
        value: String,
        allowed: String,
    },
    /// A parameter of the wrong type (e.g. a string where a number is expected).
    WrongType {
        family: String,
        key: String,
        value: String,
        expected: String,
    },
    /// A required parameter that was not given.
    Missing { family: String, key: String },
    /// A key that the family does not know.
    UnknownKey {
        family: String,
        key: String,
        suggestion: Option<String>,
        allowed: Vec<String>,
    },
    /// A family name that does not exist.
    UnknownFamily {
        family: String,
        suggestion: Option<String>,
    },
    /// Vector parameters whose lengths disagree with each other or with `dim`.
    LengthMismatch {
        family: String,
        key: String,
        len: usize,
        expected: usize,
    },
    /// A data file that could not be read or parsed.
    Data {
        family: String,
        path: String,
        line: Option<usize>,
        message: String,
    },
}

impl ParamError {
    /// The parameter key the error is about, if any (used to point at a line of a study file).
    pub fn key(&self) -> Option<&str> {
        match self {
            ParamError::OutOfRange { key, .. }
            | ParamError::WrongType { key, .. }
            | ParamError::Missing { key, .. }
            | ParamError::UnknownKey { key, .. }
            | ParamError::LengthMismatch { key, .. } => Some(key),
            ParamError::UnknownFamily { .. } => Some("family"),
            ParamError::Data { .. } => Some("data"),
        }
    }
}

impl fmt::Display for ParamError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            ParamError::OutOfRange {
                family,
                key,
                value,
                allowed,
            } => write!(
                f,
                "{family}: `{key}` = {value} is out of range; allowed: {allowed}"
            ),
            ParamError::WrongType {
                family,
                key,
                value,
                expected,
            } => write!(
                f,
                "{family}: `{key}` = {value} has the wrong type; expected {expected}"
            ),
            ParamError::Missing { family, key } => {
                write!(f, "{family}: required parameter `{key}` is missing")
            }
            ParamError::UnknownKey {
                family,
                key,
                suggestion,
                allowed,
            } => {
                write!(f, "{family}: unknown parameter `{key}`")?;
                if let Some(s) = suggestion {
                    write!(f, " (did you mean `{s}`?)")?;
                }
                write!(f, "; allowed: {}", allowed.join(", "))
            }
            ParamError::UnknownFamily { family, suggestion } => {
                write!(f, "unknown target family `{family}`")?;
                if let Some(s) = suggestion {
                    write!(f, " (did you mean `{s}`?)")?;
                }
                write!(
                    f,
                    "; known families: {}",
                    crate::registry::family_names().join(", ")
                )
            }
            ParamError::LengthMismatch {
                family,
                key,
                len,
                expected,
            } => write!(
                f,
                "{family}: `{key}` has length {len} but {expected} values are needed"
            ),
            ParamError::Data {
                family,
                path,
                line,
                message,
            } => match line {
                Some(l) => write!(f, "{family}: data file {path}, line {l}: {message}"),
                None => write!(f, "{family}: data file {path}: {message}"),
            },
        }
    }
}

impl std::error::Error for ParamError {}
