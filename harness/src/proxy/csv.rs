//! The pilot file: a CSV with a header row and one draw per line, with an optional `weight`
//! column of non-negative (linear) weights.
//!
//! A small reader of our own rather than a CSV crate: the allowed dependencies have none, and
//! a pilot is plain numbers (no quoting beyond optional double quotes around header names, no
//! embedded commas or line breaks). Blank lines are skipped; a UTF-8 byte-order mark and `\r\n`
//! line ends are accepted.

use std::fmt;
use std::path::{Path, PathBuf};

/// Name of the optional weight column.
pub const WEIGHT_COLUMN: &str = "weight";

/// The draws of a pilot run.
#[derive(Debug, Clone)]
pub struct Pilot {
    /// Names of the coordinate columns, in order (the weight column removed).
    pub names: Vec<String>,
    /// Draws, row-major: row i is `x[i * dim..(i + 1) * dim]`.
    pub x: Vec<f64>,
    /// Weights normalised to sum to 1 (all equal without a weight column).
    pub w: Vec<f64>,
    /// Whether the file had a weight column.
    pub weighted: bool,
}

impl Pilot {
    /// Number of coordinates d.
    pub fn dim(&self) -> usize {
        self.names.len()
    }

    /// Number of draws n.
    pub fn rows(&self) -> usize {
        self.w.len()
    }

    /// Draw i.
    pub fn row(&self, i: usize) -> &[f64] {
        let d = self.dim();
        &self.x[i * d..(i + 1) * d]
    }

    /// Kish effective sample size `1 / sum w_i^2` of the normalised weights (n when unweighted).
    pub fn kish_ess(&self) -> f64 {
        1.0 / self.w.iter().map(|w| w * w).sum::<f64>()
    }
}

/// Why a pilot file cannot be used; `Display` names the file and, where there is one, the
/// line (1-based, the header is line 1) and column (1-based, with its name).
#[derive(Debug, Clone, PartialEq)]
pub struct PilotError {
    /// The file.
    pub path: PathBuf,
    /// Line, when the problem is on one.
    pub line: Option<usize>,
    /// Column (1-based) and its name, when the problem is in one.
    pub column: Option<(usize, String)>,
    /// What is wrong and what is allowed.
    pub message: String,
}

impl fmt::Display for PilotError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "pilot {}", self.path.display())?;
        if let Some(l) = self.line {
            write!(f, ", line {l}")?;
        }
        if let Some((c, name)) = &self.column {
            write!(f, ", column {c} (`{name}`)")?;
        }
        write!(f, ": {}", self.message)
    }
}

impl std::error::Error for PilotError {}

fn fail(path: &Path, line: Option<usize>, column: Option<(usize, &str)>, m: String) -> PilotError {
    PilotError {
        path: path.to_path_buf(),
        line,
        column: column.map(|(c, n)| (c, n.to_string())),
        message: m,
    }
}

/// Read and check a pilot file.
pub fn read_pilot(path: &Path) -> Result<Pilot, PilotError> {
    let text = std::fs::read_to_string(path)
        .map_err(|e| fail(path, None, None, format!("cannot read it: {e}")))?;
    parse_pilot(path, &text)
}

/// Parse and check the text of a pilot file (`path` is for messages).
pub fn parse_pilot(path: &Path, text: &str) -> Result<Pilot, PilotError> {
    let text = text.strip_prefix('\u{feff}').unwrap_or(text);
    let mut lines = text
        .lines()
        .enumerate()
        .map(|(i, l)| (i + 1, l.trim_end_matches('\r')))
        .filter(|(_, l)| !l.trim().is_empty());
    let Some((hline, header)) = lines.next() else {
        return Err(fail(
            path,
            None,
            None,
            "the file is empty; expected a header row of column names and one draw per line".into(),
        ));
    };
    let names: Vec<String> = header
        .split(',')
        .map(|s| s.trim().trim_matches('"').to_string())
        .collect();
    for (c, n) in names.iter().enumerate() {
        if n.is_empty() {
            return Err(fail(
                path,
                Some(hline),
                Some((c + 1, "")),
                "empty column name in the header row".into(),
            ));
        }
        if n.parse::<f64>().is_ok() {
            return Err(fail(
                path,
                Some(hline),
                Some((c + 1, n)),
                "the first line must be a header of column names, not numbers".into(),
            ));
        }
        if names[..c].contains(n) {
            return Err(fail(
                path,
                Some(hline),
                Some((c + 1, n)),
                "duplicate column name".into(),
            ));
        }
    }
    let wcol = names.iter().position(|n| n == WEIGHT_COLUMN);
    let coords: Vec<String> = names
        .iter()
        .enumerate()
        .filter(|(c, _)| Some(*c) != wcol)
        .map(|(_, n)| n.clone())
        .collect();
    if coords.is_empty() {
        return Err(fail(
            path,
            Some(hline),
            None,
            "no coordinate columns (only a weight column)".into(),
        ));
    }
    let mut x = Vec::new();
    let mut w = Vec::new();
    for (ln, line) in lines {
        let fields: Vec<&str> = line.split(',').collect();
        if fields.len() != names.len() {
            return Err(fail(
                path,
                Some(ln),
                None,
                format!(
                    "{} fields, but the header has {} columns (ragged row)",
                    fields.len(),
                    names.len()
                ),
            ));
        }
        for (c, f) in fields.iter().enumerate() {
            let at = Some((c + 1, names[c].as_str()));
            let v: f64 = f.trim().parse().map_err(|_| {
                fail(
                    path,
                    Some(ln),
                    at,
                    format!("`{}` is not a number", f.trim()),
                )
            })?;
            if !v.is_finite() {
                return Err(fail(
                    path,
                    Some(ln),
                    at,
                    format!("{v} is not finite; every value must be a finite number"),
                ));
            }
            if Some(c) == wcol {
                if v < 0.0 {
                    return Err(fail(
                        path,
                        Some(ln),
                        at,
                        format!("weight {v} is negative; weights must be >= 0 (linear, not log)"),
                    ));
                }
                w.push(v);
            } else {
                x.push(v);
            }
        }
        if wcol.is_none() {
            w.push(1.0);
        }
    }
    let d = coords.len();
    let n = w.len();
    if n < 2 * d {
        return Err(fail(
            path,
            None,
            None,
            format!(
                "{n} draws of {d} columns; at least 2 x {d} = {} draws are needed (and many \
                 more for a useful fit)",
                2 * d
            ),
        ));
    }
    let total: f64 = w.iter().sum();
    if !(total > 0.0 && total.is_finite()) {
        return Err(fail(
            path,
            None,
            wcol.map(|c| (c + 1, WEIGHT_COLUMN)),
            format!("the weights sum to {total}; at least one must be > 0 and their sum finite"),
        ));
    }
    w.iter_mut().for_each(|v| *v /= total);
    for (j, name) in coords.iter().enumerate() {
        let first = x[j];
        if (0..n).all(|i| x[i * d + j] == first) {
            let c = names.iter().position(|m| m == name).unwrap_or(j) + 1;
            return Err(fail(
                path,
                None,
                Some((c, name)),
                format!(
                    "the column is constant ({first} in every draw); drop it, a proxy needs \
                     coordinates that vary"
                ),
            ));
        }
    }
    Ok(Pilot {
        names: coords,
        x,
        w,
        weighted: wcol.is_some(),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn parse(s: &str) -> Result<Pilot, PilotError> {
        parse_pilot(Path::new("p.csv"), s)
    }

    #[test]
    fn reads_weights_and_skips_blank_lines() {
        let p = parse("\u{feff}a,weight,b\r\n1,1,2\r\n\n3,3,5\n2,0,1\n0,4,0\n").unwrap();
        assert_eq!(p.names, ["a", "b"]);
        assert_eq!(p.x, [1.0, 2.0, 3.0, 5.0, 2.0, 1.0, 0.0, 0.0]);
        assert_eq!(p.w, [0.125, 0.375, 0.0, 0.5]);
        assert!(p.weighted);
    }

    #[test]
    fn errors_name_line_and_column() {
        let cases = [
            ("", "the file is empty"),
            ("a,b\n1,2\n3\n", "line 3: 1 fields"),
            (
                "a,b\n1,2\n3,x\n4,5\n6,1\n",
                "line 3, column 2 (`b`): `x` is not a number",
            ),
            (
                "a,b\n1,2\n3,inf\n4,5\n6,1\n",
                "line 3, column 2 (`b`): inf is not finite",
            ),
            (
                "a,weight\n1,2\n3,-1\n",
                "line 3, column 2 (`weight`): weight -1 is negative",
            ),
            (
                "a,weight\n1,0\n3,0\n",
                "column 2 (`weight`): the weights sum to 0",
            ),
            ("a,b\n1,2\n3,4\n5,6\n", "3 draws of 2 columns"),
            (
                "a,b\n1,2\n3,2\n5,2\n6,2\n",
                "column 2 (`b`): the column is constant",
            ),
            (
                "1,2\n3,4\n",
                "line 1, column 1 (`1`): the first line must be a header",
            ),
            ("a,a\n1,2\n", "duplicate column name"),
        ];
        for (text, want) in cases {
            let e = parse(text).unwrap_err().to_string();
            assert!(e.starts_with("pilot p.csv"), "{e}");
            assert!(e.contains(want), "{text:?}: {e}");
        }
    }
}
