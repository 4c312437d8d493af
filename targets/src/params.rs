//! Reading typed parameter values from a `[[target]]` table.
//!
//! Conventions shared by every family:
//! * The keys `family` and `label` belong to the registry and are skipped here.
//! * Any other key not in the family's list is rejected with [`ParamError::UnknownKey`], with
//!   the nearest valid key as a suggestion (see [`crate::registry::nearest`]).
//! * Integer parameters (`dim`, `observations`, `data_seed`) accept a TOML integer, or a TOML
//!   float whose value is integral (`dim = 2.0` is read as 2; `dim = 2.5` is a
//!   [`ParamError::WrongType`]). Float parameters accept TOML integers and floats alike.
//! * Vector parameters accept either a number (broadcast to every coordinate) or an array of
//!   numbers of exactly the required length.

use toml::Value;

use crate::error::ParamError;
use crate::registry::nearest;

/// Largest dimension accepted by any family. Every target stores its dense d x d reference
/// covariance, so this bounds memory (10^8 entries, 800 MB) instead of failing on allocation.
pub const MAX_DIM: usize = 10_000;

/// Keys consumed by the registry rather than by a family.
pub const REGISTRY_KEYS: &[&str] = &["family", "label"];

/// A view of a parameter table for one family, with typed getters that produce
/// [`ParamError`]s naming the family and key.
#[derive(Debug, Clone, Copy)]
pub struct Params<'a> {
    table: &'a toml::Table,
    family: &'a str,
    prefix: &'a str,
}

/// Short text form of a TOML value for error messages.
pub fn show(v: &Value) -> String {
    match v {
        Value::String(s) => format!("{s:?}"),
        other => {
            let s = other.to_string();
            if s.chars().count() > 60 {
                format!("{}...", s.chars().take(57).collect::<String>())
            } else {
                s
            }
        }
    }
}

/// Text form of a float for error messages.
pub fn show_f64(x: f64) -> String {
    // Shortest round-trip form; exponent notation when very large or small (a plain `{}` of
    // 1e308 prints 309 digits).
    let a = x.abs();
    if x.is_finite() && a != 0.0 && !(1e-6..1e16).contains(&a) {
        format!("{x:e}")
    } else {
        format!("{x}")
    }
}

impl<'a> Params<'a> {
    /// A view of `table` for `family`, after checking that every key is one of `allowed`
    /// (or a registry key).
    pub fn new(
        table: &'a toml::Table,
        family: &'a str,
        allowed: &[&str],
    ) -> Result<Self, ParamError> {
        Self::with_prefix(table, family, "", allowed)
    }

    /// Like [`Params::new`] for a nested table (e.g. one mixture component); `prefix` is put in
    /// front of every key in errors, e.g. `"components[1]."`. Registry keys are not skipped in
    /// nested tables.
    pub fn with_prefix(
        table: &'a toml::Table,
        family: &'a str,
        prefix: &'a str,
        allowed: &[&str],
    ) -> Result<Self, ParamError> {
        for key in table.keys() {
            let reserved = prefix.is_empty() && REGISTRY_KEYS.contains(&key.as_str());
            if !reserved && !allowed.contains(&key.as_str()) {
                return Err(ParamError::UnknownKey {
                    family: family.to_string(),
                    key: format!("{prefix}{key}"),
                    suggestion: nearest(key, allowed),
                    allowed: allowed.iter().map(|s| s.to_string()).collect(),
                });
            }
        }
        Ok(Params {
            table,
            family,
            prefix,
        })
    }

    /// The family name used in errors.
    pub fn family(&self) -> &str {
        self.family
    }

    /// The full key as shown in errors.
    pub fn key(&self, key: &str) -> String {
        format!("{}{key}", self.prefix)
    }

    /// The raw value of `key`, if present.
    pub fn raw(&self, key: &str) -> Option<&'a Value> {
        self.table.get(key)
    }

    /// True when `key` is present.
    pub fn has(&self, key: &str) -> bool {
        self.table.contains_key(key)
    }

    /// A [`ParamError::Missing`] for `key`.
    pub fn missing(&self, key: &str) -> ParamError {
        ParamError::Missing {
            family: self.family.to_string(),
            key: self.key(key),
        }
    }

    /// A [`ParamError::WrongType`] for `key`.
    pub fn wrong_type(&self, key: &str, value: &Value, expected: &str) -> ParamError {
        ParamError::WrongType {
            family: self.family.to_string(),
            key: self.key(key),
            value: show(value),
            expected: expected.to_string(),
        }
    }

    /// A [`ParamError::OutOfRange`] for `key`.
    pub fn out_of_range(&self, key: &str, value: String, allowed: &str) -> ParamError {
        ParamError::OutOfRange {
            family: self.family.to_string(),
            key: self.key(key),
            value,
            allowed: allowed.to_string(),
        }
    }

    /// A number (integer or float) value of `key`, if present.
    pub fn f64_opt(&self, key: &str) -> Result<Option<f64>, ParamError> {
        match self.raw(key) {
            None => Ok(None),
            Some(v) => as_f64(v)
                .map(Some)
                .ok_or_else(|| self.wrong_type(key, v, "a number")),
        }
    }

    /// A number value of `key`, or `default`.
    pub fn f64_or(&self, key: &str, default: f64) -> Result<f64, ParamError> {
        Ok(self.f64_opt(key)?.unwrap_or(default))
    }

    /// A required number value of `key`.
    pub fn f64_req(&self, key: &str) -> Result<f64, ParamError> {
        self.f64_opt(key)?.ok_or_else(|| self.missing(key))
    }

    /// A non-negative integer value of `key`, if present (integral floats are accepted).
    /// Negative integers are [`ParamError::OutOfRange`] with the given `allowed` text.
    pub fn u64_opt(&self, key: &str, allowed: &str) -> Result<Option<u64>, ParamError> {
        let Some(v) = self.raw(key) else {
            return Ok(None);
        };
        let i = match v {
            Value::Integer(i) => *i,
            Value::Float(x) if x.is_finite() && x.fract() == 0.0 => {
                if x.abs() >= 9.0e15 {
                    return Err(self.out_of_range(key, show(v), allowed));
                }
                *x as i64
            }
            _ => return Err(self.wrong_type(key, v, "an integer")),
        };
        if i < 0 {
            return Err(self.out_of_range(key, i.to_string(), allowed));
        }
        Ok(Some(i as u64))
    }

    /// A required integer `key` that must be at least `min`.
    pub fn usize_req_min(&self, key: &str, min: usize) -> Result<usize, ParamError> {
        let allowed = format!("integer >= {min}");
        let n = self
            .u64_opt(key, &allowed)?
            .ok_or_else(|| self.missing(key))?;
        check_min_usize(self.family, &self.key(key), n as usize, min)?;
        Ok(n as usize)
    }

    /// The required `dim`, checked to lie in `min..=MAX_DIM`.
    pub fn dim(&self, min: usize) -> Result<usize, ParamError> {
        let d = self.usize_req_min("dim", min)?;
        check_dim(self.family, d, min)?;
        Ok(d)
    }

    /// A string value of `key`, if present.
    pub fn str_opt(&self, key: &str) -> Result<Option<&'a str>, ParamError> {
        match self.raw(key) {
            None => Ok(None),
            Some(Value::String(s)) => Ok(Some(s.as_str())),
            Some(v) => Err(self.wrong_type(key, v, "a string")),
        }
    }

    /// A number or an array of exactly `len` numbers. A number (or the `default`, when the key
    /// is absent) is returned as a vector of length 1, for the constructor to broadcast (so
    /// that its range errors name `key` rather than `key[0]`); see [`broadcast`].
    pub fn vec_or(&self, key: &str, len: usize, default: f64) -> Result<Vec<f64>, ParamError> {
        match self.raw(key) {
            None => Ok(vec![default]),
            Some(v) => {
                if let Some(x) = as_f64(v) {
                    return Ok(vec![x]);
                }
                let Value::Array(a) = v else {
                    return Err(self.wrong_type(key, v, "a number or an array of numbers"));
                };
                let mut out = Vec::with_capacity(a.len());
                for (i, e) in a.iter().enumerate() {
                    let x = as_f64(e)
                        .ok_or_else(|| self.wrong_type(&format!("{key}[{i}]"), e, "a number"))?;
                    out.push(x);
                }
                if out.len() != len {
                    return Err(ParamError::LengthMismatch {
                        family: self.family.to_string(),
                        key: self.key(key),
                        len: out.len(),
                        expected: len,
                    });
                }
                Ok(out)
            }
        }
    }

    /// An array of tables (e.g. mixture components), if present.
    pub fn tables_opt(&self, key: &str) -> Result<Option<Vec<&'a toml::Table>>, ParamError> {
        let Some(v) = self.raw(key) else {
            return Ok(None);
        };
        let Value::Array(a) = v else {
            return Err(self.wrong_type(key, v, "an array of tables"));
        };
        let mut out = Vec::with_capacity(a.len());
        for (i, e) in a.iter().enumerate() {
            match e {
                Value::Table(t) => out.push(t),
                other => {
                    return Err(self.wrong_type(&format!("{key}[{i}]"), other, "a table"));
                }
            }
        }
        Ok(Some(out))
    }
}

/// A TOML number as f64 (integers are converted).
pub fn as_f64(v: &Value) -> Option<f64> {
    match v {
        Value::Integer(i) => Some(*i as f64),
        Value::Float(x) => Some(*x),
        _ => None,
    }
}

/// Check `value > 0` and finite.
pub fn check_positive(family: &str, key: &str, value: f64) -> Result<(), ParamError> {
    if value.is_finite() && value > 0.0 {
        Ok(())
    } else {
        Err(out_of_range(family, key, value, "finite number > 0"))
    }
}

/// Check that `value` is finite.
pub fn check_finite(family: &str, key: &str, value: f64) -> Result<(), ParamError> {
    if value.is_finite() {
        Ok(())
    } else {
        Err(out_of_range(family, key, value, "finite number"))
    }
}

/// Check `lo < value < hi`.
pub fn check_open(
    family: &str,
    key: &str,
    value: f64,
    lo: f64,
    hi: f64,
    allowed: &str,
) -> Result<(), ParamError> {
    if value > lo && value < hi {
        Ok(())
    } else {
        Err(out_of_range(family, key, value, allowed))
    }
}

/// Check `min <= dim <= MAX_DIM` for the key `dim`.
pub fn check_dim(family: &str, dim: usize, min: usize) -> Result<(), ParamError> {
    if (min..=MAX_DIM).contains(&dim) {
        Ok(())
    } else {
        Err(ParamError::OutOfRange {
            family: family.to_string(),
            key: "dim".to_string(),
            value: dim.to_string(),
            allowed: format!("integer from {min} to {MAX_DIM}"),
        })
    }
}

/// Check `value >= min`.
pub fn check_min_usize(
    family: &str,
    key: &str,
    value: usize,
    min: usize,
) -> Result<(), ParamError> {
    if value >= min {
        Ok(())
    } else {
        Err(ParamError::OutOfRange {
            family: family.to_string(),
            key: key.to_string(),
            value: value.to_string(),
            allowed: format!("integer >= {min}"),
        })
    }
}

/// Check every entry of a vector parameter with `check`, naming the entry (`key[i]`) on failure.
pub fn check_each(
    family: &str,
    key: &str,
    values: &[f64],
    check: fn(&str, &str, f64) -> Result<(), ParamError>,
) -> Result<(), ParamError> {
    for (i, &x) in values.iter().enumerate() {
        if values.len() == 1 {
            check(family, key, x)?;
        } else {
            check(family, &format!("{key}[{i}]"), x)?;
        }
    }
    Ok(())
}

/// Check that a vector parameter has length `expected`.
pub fn check_len(family: &str, key: &str, len: usize, expected: usize) -> Result<(), ParamError> {
    if len == expected {
        Ok(())
    } else {
        Err(ParamError::LengthMismatch {
            family: family.to_string(),
            key: key.to_string(),
            len,
            expected,
        })
    }
}

/// A [`ParamError::OutOfRange`] for a float value.
pub fn out_of_range(family: &str, key: &str, value: f64, allowed: &str) -> ParamError {
    ParamError::OutOfRange {
        family: family.to_string(),
        key: key.to_string(),
        value: show_f64(value),
        allowed: allowed.to_string(),
    }
}

/// Broadcast a vector given as one value or `dim` values to `dim` values; other lengths are a
/// [`ParamError::LengthMismatch`].
pub fn broadcast(family: &str, key: &str, v: &[f64], dim: usize) -> Result<Vec<f64>, ParamError> {
    if v.len() == dim {
        Ok(v.to_vec())
    } else if v.len() == 1 {
        Ok(vec![v[0]; dim])
    } else {
        Err(ParamError::LengthMismatch {
            family: family.to_string(),
            key: key.to_string(),
            len: v.len(),
            expected: dim,
        })
    }
}

/// Test helper for every family: `result` must be a `ParamError` of the given variant (by
/// its debug name) about the given key.
#[cfg(test)]
pub(crate) fn assert_rejected<T: std::fmt::Debug>(
    result: Result<T, ParamError>,
    spec: &str,
    variant: &str,
    key: &str,
) {
    let e = result.unwrap_err();
    let v = format!("{e:?}");
    assert!(v.starts_with(variant), "{spec}: {v}");
    assert_eq!(e.key(), Some(key), "{spec}: {v}");
}

#[cfg(test)]
mod tests {
    use super::*;

    fn table(s: &str) -> toml::Table {
        s.parse().unwrap()
    }

    #[test]
    fn unknown_key_suggests_nearest() {
        let t = table("family = 'x'\nlabel = 'y'\ndmi = 3");
        let e = Params::new(&t, "fam", &["dim", "mean"]).unwrap_err();
        match e {
            ParamError::UnknownKey {
                key, suggestion, ..
            } => {
                assert_eq!(key, "dmi");
                assert_eq!(suggestion.as_deref(), Some("dim"));
            }
            other => panic!("{other:?}"),
        }
    }

    #[test]
    fn integral_floats_accepted() {
        let t = table("dim = 2.0");
        let p = Params::new(&t, "fam", &["dim"]).unwrap();
        assert_eq!(p.usize_req_min("dim", 1).unwrap(), 2);
        let t = table("dim = 2.5");
        let p = Params::new(&t, "fam", &["dim"]).unwrap();
        assert!(matches!(
            p.usize_req_min("dim", 1),
            Err(ParamError::WrongType { .. })
        ));
        let t = table("dim = -3");
        let p = Params::new(&t, "fam", &["dim"]).unwrap();
        assert!(matches!(
            p.usize_req_min("dim", 1),
            Err(ParamError::OutOfRange { .. })
        ));
        let t = table("dim = 0");
        let p = Params::new(&t, "fam", &["dim"]).unwrap();
        assert!(matches!(
            p.usize_req_min("dim", 1),
            Err(ParamError::OutOfRange { .. })
        ));
        let t = table("");
        let p = Params::new(&t, "fam", &["dim"]).unwrap();
        assert!(matches!(
            p.usize_req_min("dim", 1),
            Err(ParamError::Missing { .. })
        ));
    }

    #[test]
    fn vectors_broadcast_and_check_length() {
        let t = table("a = 2\nb = [1, 2.5]\nc = [1]\nd = 'x'\ne = [1, 'x']");
        let p = Params::new(&t, "fam", &["a", "b", "c", "d", "e"]).unwrap();
        assert_eq!(p.vec_or("a", 3, 0.0).unwrap(), vec![2.0]);
        assert_eq!(p.vec_or("b", 2, 0.0).unwrap(), vec![1.0, 2.5]);
        assert_eq!(p.vec_or("z", 2, 7.0).unwrap(), vec![7.0]);
        assert!(matches!(
            p.vec_or("c", 2, 0.0),
            Err(ParamError::LengthMismatch {
                len: 1,
                expected: 2,
                ..
            })
        ));
        assert!(matches!(
            p.vec_or("d", 2, 0.0),
            Err(ParamError::WrongType { .. })
        ));
        match p.vec_or("e", 2, 0.0) {
            Err(ParamError::WrongType { key, .. }) => assert_eq!(key, "e[1]"),
            other => panic!("{other:?}"),
        }
    }
}
