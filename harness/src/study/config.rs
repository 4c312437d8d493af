//! Reading and validating a study file. Everything is checked here, before any run starts and
//! before any output file is touched; every error names the file, line and column.

use std::fmt;
use std::path::{Path, PathBuf};

use assay_targets::{ParamError, Target, build_target, nearest};
use serde_json::{Map, Value};
use std::sync::Arc;
use std::time::Duration;

use crate::external::target::{ExternalTarget, FAMILY as EXTERNAL_FAMILY};

use super::locate::{Seg, locate};
use crate::results::{StudyInfo, SweepInfo, TargetInfo, cell_key};
use crate::settings::SamplerSettings;

/// Keys of the `[study]` table.
pub const STUDY_KEYS: &[&str] = &[
    "name",
    "replicates",
    "seed",
    "timeout_s",
    "race",
    "race_start",
];
/// Default of `[study] race_start`: replicates of every cell in a race's first round (at most
/// the study's replicates).
pub const DEFAULT_RACE_START: u64 = 8;
/// Most cells a grid may have (the product of its axes' lengths).
pub const MAX_CELLS: usize = 100_000;
/// Longest study name and target label: they name files (`<name>.jsonl.logs/`,
/// `<label>-<seed>.log`, `references/<label>-<key>.json`), whose names may not exceed 255
/// bytes on common file systems.
pub const MAX_NAME_LEN: usize = 200;
/// Top-level tables of a study file.
pub const TOP_KEYS: &[&str] = &["study", "sampler", "grid", "target", "reference"];

/// A study-file error with its location.
#[derive(Debug, Clone)]
pub struct StudyError {
    pub file: PathBuf,
    pub line: Option<(usize, usize)>,
    pub message: String,
}

impl fmt::Display for StudyError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self.line {
            Some((l, c)) => write!(f, "{}:{l}:{c}: {}", self.file.display(), self.message),
            None => write!(f, "{}: {}", self.file.display(), self.message),
        }
    }
}

impl std::error::Error for StudyError {}

/// One cell of the grid: a value for every axis, and the sampler settings it gives.
#[derive(Debug, Clone)]
pub struct Cell {
    /// The cell's value for each grid axis (sorted keys).
    pub settings: Map<String, Value>,
    /// Canonical string of `settings`, used in seeds and to match records.
    pub key: String,
    /// The full sampler settings of the cell (base table with the axis values applied).
    pub sampler: SamplerSettings,
}

/// One target of the study.
pub struct StudyTarget {
    pub info: TargetInfo,
    pub target: Arc<dyn Target>,
    /// The same target when it is an external program (to direct its logs).
    pub external: Option<Arc<ExternalTarget>>,
}

/// Builds the sampler of a cell: the hook through which a library user scores a sampler of
/// their own with a study (see `examples/` of the harness crate).
pub type SamplerFactory =
    Arc<dyn Fn(&Cell) -> Result<Box<dyn crate::sampler::Sampler>, String> + Send + Sync>;

/// The `[reference]` table: the configuration whose pooled runs stand in for exact reference
/// values of targets that have none.
#[derive(Debug, Clone)]
pub struct ReferenceSpec {
    pub sampler: SamplerSettings,
    /// Independent reference runs to pool (>= 2, so that the reference has a standard error).
    pub runs: u64,
}

/// A validated study.
pub struct Study {
    pub file: PathBuf,
    pub info: StudyInfo,
    pub cells: Vec<Cell>,
    pub targets: Vec<StudyTarget>,
    pub reference: Option<ReferenceSpec>,
    /// When set, builds every cell's sampler instead of the built-in or external one.
    pub sampler_factory: Option<SamplerFactory>,
    /// `[study] race`: run the study as a race (see the `race` module).
    pub race: bool,
    /// `[study] race_start`: replicates of every cell in a race's first round, in
    /// [2, replicates] (default [`DEFAULT_RACE_START`], or the replicates when fewer).
    pub race_start: u64,
}

impl Study {
    /// Add a target defined in code (e.g. a user's own model implementing [`Target`]).
    /// Its label must be unique in the study.
    pub fn add_target(&mut self, target: Arc<dyn Target>) -> Result<(), StudyError> {
        if !valid_name(target.label()) {
            return Err(StudyError {
                file: self.file.clone(),
                line: None,
                message: format!(
                    "target label `{}` is not allowed; allowed: a non-empty string of at most \
                     {MAX_NAME_LEN} letters, digits, `-`, `_` and `.` (it names files)",
                    target.label()
                ),
            });
        }
        if self.targets.iter().any(|t| t.info.label == target.label()) {
            return Err(StudyError {
                file: self.file.clone(),
                line: None,
                message: format!(
                    "two targets are labelled `{}`; labels must be unique",
                    target.label()
                ),
            });
        }
        let mut spec = toml::Table::new();
        spec.insert(
            "family".into(),
            toml::Value::String(target.family().to_string()),
        );
        spec.insert("dim".into(), toml::Value::Integer(target.dim() as i64));
        self.targets.push(StudyTarget {
            info: target_info(target.as_ref(), &spec),
            target,
            external: None,
        });
        Ok(())
    }

    /// Number of runs: targets x cells x replicates.
    pub fn total_runs(&self) -> u64 {
        (self.targets.len() * self.cells.len()) as u64 * self.info.replicates
    }

    /// The default results path, `results/<name>.jsonl`.
    pub fn default_output(&self) -> PathBuf {
        PathBuf::from("results").join(format!("{}.jsonl", self.info.name))
    }
}

struct Ctx<'a> {
    file: &'a Path,
    src: &'a str,
}

impl Ctx<'_> {
    fn err(&self, path: &[Seg], message: impl Into<String>) -> StudyError {
        StudyError {
            file: self.file.to_path_buf(),
            line: locate(self.src, path),
            message: message.into(),
        }
    }
}

fn suggest(word: &str, allowed: &[&str]) -> String {
    match nearest(word, allowed) {
        Some(s) => format!(" (did you mean `{s}`?)"),
        None => String::new(),
    }
}

/// Convert a TOML value to JSON (datetimes become strings).
pub fn toml_to_json(v: &toml::Value) -> Value {
    match v {
        toml::Value::String(s) => Value::String(s.clone()),
        toml::Value::Integer(i) => Value::from(*i),
        toml::Value::Float(f) => serde_json::Number::from_f64(*f)
            .map(Value::Number)
            .unwrap_or(Value::Null),
        toml::Value::Boolean(b) => Value::Bool(*b),
        toml::Value::Datetime(d) => Value::String(d.to_string()),
        toml::Value::Array(a) => Value::Array(a.iter().map(toml_to_json).collect()),
        toml::Value::Table(t) => Value::Object(
            t.iter()
                .map(|(k, v)| (k.clone(), toml_to_json(v)))
                .collect(),
        ),
    }
}

/// A TOML value for a message: numbers in their shortest form (a plain `{}` of 1e300 prints
/// 301 digits), anything else as TOML.
fn value_text(v: &toml::Value) -> String {
    match v {
        toml::Value::Float(f) => crate::settings::number_text(*f),
        other => other.to_string(),
    }
}

/// Turn a serde message about one sampler key into a user-facing sentence, adding the nearest
/// variant when the message lists the expected ones.
fn explain_setting_error(key: &str, value: &toml::Value, message: &str) -> String {
    let mut out = format!("sampler setting `{key}` = {}: {message}", value_text(value));
    if let (Some(given), Some(pos)) = (value.as_str(), message.find("expected one of")) {
        let variants: Vec<&str> = message[pos..].split('`').skip(1).step_by(2).collect();
        out.push_str(&suggest(given, &variants));
    }
    out
}

/// Parse one sampler key on its own, so that a bad value is reported against its own key.
fn check_setting(key: &str, value: &toml::Value) -> Result<(), String> {
    let mut t = toml::Table::new();
    t.insert(key.to_string(), value.clone());
    toml::Value::Table(t)
        .try_into::<SamplerSettings>()
        .map(|_| ())
        .map_err(|e| explain_setting_error(key, value, e.message()))
}

/// Read and validate a study file.
pub fn load_study(file: &Path) -> Result<Study, StudyError> {
    let src = std::fs::read_to_string(file).map_err(|e| StudyError {
        file: file.to_path_buf(),
        line: None,
        message: format!("cannot read the study file: {e}"),
    })?;
    parse_study(file, &src)
}

/// Validate a study given as text (`file` is used in messages and to resolve data paths).
pub fn parse_study(file: &Path, src: &str) -> Result<Study, StudyError> {
    parse_study_inner(file, src, true)
}

/// As [`parse_study`], for a study whose targets will be added in code with
/// [`Study::add_target`]: a file without `[[target]]` tables is accepted.
pub fn parse_study_for_code(file: &Path, src: &str) -> Result<Study, StudyError> {
    parse_study_inner(file, src, false)
}

fn parse_study_inner(file: &Path, src: &str, need_targets: bool) -> Result<Study, StudyError> {
    let cx = Ctx { file, src };
    let doc: toml::Table = src.parse().map_err(|e: toml::de::Error| {
        let line = e.span().map(|s| super::locate::line_col(src, s.start));
        StudyError {
            file: file.to_path_buf(),
            line,
            message: format!("not valid TOML: {}", e.message()),
        }
    })?;
    for k in doc.keys() {
        if !TOP_KEYS.contains(&k.as_str()) {
            return Err(cx.err(
                &[k.as_str().into()],
                format!(
                    "unknown table `{k}`{}; a study has [study], [sampler], [grid], [[target]] and [reference]",
                    suggest(k, TOP_KEYS)
                ),
            ));
        }
    }
    let table_of = |name: &str| -> Result<toml::Table, StudyError> {
        match doc.get(name) {
            None => Ok(toml::Table::new()),
            Some(toml::Value::Table(t)) => Ok(t.clone()),
            Some(_) => Err(cx.err(&[name.into()], format!("`{name}` must be a table [{name}]"))),
        }
    };

    // [study]
    let study = table_of("study")?;
    for k in study.keys() {
        if !STUDY_KEYS.contains(&k.as_str()) {
            return Err(cx.err(
                &["study".into(), k.as_str().into()],
                format!(
                    "unknown key `{k}` in [study]{}; allowed: {}",
                    suggest(k, STUDY_KEYS),
                    STUDY_KEYS.join(", ")
                ),
            ));
        }
    }
    let at = |k: &str| vec![Seg::from("study"), Seg::from(k)];
    let name = match study.get("name") {
        None => file
            .file_stem()
            .map(|s| s.to_string_lossy().into_owned())
            .unwrap_or_else(|| "study".to_string()),
        Some(toml::Value::String(s)) if valid_name(s) => s.clone(),
        Some(v) => {
            return Err(cx.err(
                &at("name"),
                format!(
                    "`name` = {v} is not allowed; allowed: a non-empty string of at most \
                     {MAX_NAME_LEN} letters, digits, `-`, `_` and `.` (it names files)"
                ),
            ));
        }
    };
    let int_key = |k: &str, default: i64, min: i64| -> Result<i64, StudyError> {
        match study.get(k) {
            None => Ok(default),
            Some(toml::Value::Integer(i)) if *i >= min => Ok(*i),
            Some(v) => Err(cx.err(
                &at(k),
                format!("`{k}` = {v} is not allowed; allowed: an integer >= {min}"),
            )),
        }
    };
    let replicates = int_key("replicates", 16, 1)? as u64;
    if replicates > 1_000_000 {
        return Err(cx.err(
            &at("replicates"),
            format!(
                "`replicates` = {replicates} is not allowed; allowed: an integer in [1, 1000000]"
            ),
        ));
    }
    let seed = int_key("seed", 1, 0)? as u64;
    let race = match study.get("race") {
        None => false,
        Some(toml::Value::Boolean(b)) => *b,
        Some(v) => {
            return Err(cx.err(
                &at("race"),
                format!(
                    "`race` = {} is not allowed; allowed: true or false",
                    value_text(v)
                ),
            ));
        }
    };
    let race_start = match study.get("race_start") {
        None => DEFAULT_RACE_START.min(replicates),
        Some(toml::Value::Integer(i)) if *i >= 2 && (*i as u64) <= replicates => *i as u64,
        Some(v) => {
            return Err(cx.err(
                &at("race_start"),
                format!(
                    "`race_start` = {} is not allowed; allowed: an integer in [2, {replicates}] \
                     (2 to `replicates`: the replicates of every cell in a race's first round)",
                    value_text(v)
                ),
            ));
        }
    };
    if race && replicates < 2 {
        return Err(cx.err(
            &at("replicates"),
            format!(
                "`replicates` = {replicates} is not allowed with `race = true`; allowed: an \
                 integer >= 2 (a race decides on at least two replicates a cell)"
            ),
        ));
    }
    let timeout_s = match study.get("timeout_s") {
        None => None,
        Some(v) => {
            match v.as_float().or(v.as_integer().map(|i| i as f64)) {
                Some(t) if t.is_finite() && t > 0.0 && t <= 1e9 => Some(t),
                _ => {
                    return Err(cx.err(
                    &at("timeout_s"),
                    format!("`timeout_s` = {} is not allowed; allowed: a number of seconds in (0, 1e9]", value_text(v)),
                ));
                }
            }
        }
    };

    // [sampler] and [grid]
    let sampler = table_of("sampler")?;
    let grid = table_of("grid")?;
    for (section, t) in [("sampler", &sampler), ("grid", &grid)] {
        for (k, v) in t {
            if !SamplerSettings::KEYS.contains(&k.as_str()) {
                return Err(cx.err(
                    &[section.into(), k.as_str().into()],
                    format!(
                        "unknown sampler setting `{k}` in [{section}]{}; allowed: {}",
                        suggest(k, SamplerSettings::KEYS),
                        SamplerSettings::KEYS.join(", ")
                    ),
                ));
            }
            if section == "sampler" {
                if v.is_array() && k != "external" {
                    return Err(cx.err(
                        &["sampler".into(), k.as_str().into()],
                        format!(
                            "`{k}` in [sampler] is a list; to compare several values, move it to \
                             [grid]"
                        ),
                    ));
                }
                check_setting(k, v)
                    .map_err(|m| cx.err(&["sampler".into(), k.as_str().into()], m))?;
            }
        }
    }
    let mut axes: Vec<(String, Vec<toml::Value>)> = Vec::new();
    for (k, v) in &grid {
        let here = [Seg::from("grid"), Seg::from(k.as_str())];
        if sampler.contains_key(k) {
            return Err(cx.err(
                &here,
                format!("`{k}` is set in both [sampler] and [grid]; keep one"),
            ));
        }
        let values = match v {
            toml::Value::Array(a) if !a.is_empty() => a.clone(),
            _ => {
                return Err(cx.err(
                    &here,
                    format!("grid axis `{k}` must be a non-empty list of values, e.g. {k} = [..]"),
                ));
            }
        };
        for (i, x) in values.iter().enumerate() {
            check_setting(k, x).map_err(|m| {
                cx.err(&[Seg::from("grid"), Seg::from(k.as_str()), Seg::from(i)], m)
            })?;
            let same = |a: &toml::Value, b: &toml::Value| match (a, b) {
                (toml::Value::Integer(p), toml::Value::Float(q))
                | (toml::Value::Float(q), toml::Value::Integer(p)) => *p as f64 == *q,
                _ => a == b,
            };
            if values[..i].iter().any(|v| same(v, x)) {
                return Err(cx.err(
                    &[Seg::from("grid"), Seg::from(k.as_str()), Seg::from(i)],
                    format!("grid axis `{k}` lists {x} twice"),
                ));
            }
        }
        axes.push((k.clone(), values));
    }
    // toml::Table keeps keys sorted; restore the file order of the axes for reports.
    axes.sort_by_key(|(k, _)| {
        locate(src, &[Seg::from("grid"), Seg::from(k.as_str())]).unwrap_or((usize::MAX, 0))
    });

    // Cells: the cartesian product of the axes, first axis slowest.
    let n_cells = axes.iter().try_fold(1usize, |n, (_, v)| {
        n.checked_mul(v.len()).filter(|&n| n <= MAX_CELLS)
    });
    let Some(n_cells) = n_cells else {
        let sizes: Vec<String> = axes.iter().map(|(_, v)| v.len().to_string()).collect();
        return Err(cx.err(
            &["grid".into()],
            format!(
                "the grid has more than {MAX_CELLS} cells ({} values per axis); allowed: at \
                 most {MAX_CELLS} cells",
                sizes.join(" x ")
            ),
        ));
    };
    let mut cells = Vec::with_capacity(n_cells);
    for c in 0..n_cells {
        let mut rest = c;
        let mut table = sampler.clone();
        let mut settings = Map::new();
        let mut picks = Vec::with_capacity(axes.len());
        for (k, values) in axes.iter().rev() {
            let i = rest % values.len();
            rest /= values.len();
            picks.push((k.clone(), i));
            table.insert(k.clone(), values[i].clone());
            // As the sampler reads it (`1` and `1.0` are one value), so that the cell's key,
            // and with it every seed, does not depend on how a number was written.
            settings.insert(
                k.clone(),
                SamplerSettings::normalise_value(k, &toml_to_json(&values[i])),
            );
        }
        let s: SamplerSettings = toml::Value::Table(table)
            .try_into()
            .map_err(|e| cx.err(&["sampler".into()], e.message().to_string()))?;
        if let Err(e) = s.validate() {
            let path = match picks.iter().find(|(k, _)| *k == e.key) {
                Some((k, i)) => vec![Seg::from("grid"), Seg::from(k.as_str()), Seg::from(*i)],
                None => vec![Seg::from("sampler"), Seg::from(e.key.as_str())],
            };
            let cell = if settings.is_empty() {
                String::new()
            } else {
                format!(" (in the grid cell {})", cell_key(&settings))
            };
            return Err(cx.err(&path, format!("{e}{cell}")));
        }
        let key = cell_key(&settings);
        cells.push(Cell {
            settings,
            key,
            sampler: s,
        });
    }

    // [[target]]
    let specs: Vec<toml::Table> = match doc.get("target") {
        None => Vec::new(),
        Some(toml::Value::Array(a)) => a
            .iter()
            .enumerate()
            .map(|(i, v)| match v {
                toml::Value::Table(t) => Ok(t.clone()),
                _ => Err(cx.err(
                    &["target".into(), i.into()],
                    "each target must be a [[target]] table",
                )),
            })
            .collect::<Result<_, _>>()?,
        Some(_) => {
            return Err(cx.err(
                &["target".into()],
                "targets are given as [[target]] tables (an array of tables)",
            ));
        }
    };
    if specs.is_empty() && need_targets {
        return Err(cx.err(&[], "the study has no [[target]] table; add at least one"));
    }
    let (reference, reference_json) = parse_reference(&cx, &doc)?;
    let base_dir = file.parent().map(Path::to_path_buf).unwrap_or_default();
    let timeout = timeout_s.map(Duration::from_secs_f64);
    let targets = build_targets(&cx, &specs, &base_dir, timeout)?;

    let info = StudyInfo {
        name,
        replicates,
        seed,
        timeout_s,
        sampler: sampler
            .iter()
            .map(|(k, v)| {
                (
                    k.clone(),
                    SamplerSettings::normalise_value(k, &toml_to_json(v)),
                )
            })
            .collect(),
        grid: axes
            .iter()
            .map(|(k, v)| {
                let values = v
                    .iter()
                    .map(|x| SamplerSettings::normalise_value(k, &toml_to_json(x)))
                    .collect();
                (k.clone(), values)
            })
            .collect(),
        reference: reference_json,
        race: None,
    };
    Ok(Study {
        file: file.to_path_buf(),
        info,
        cells,
        targets,
        reference,
        sampler_factory: None,
        race,
        race_start,
    })
}

/// Keys of the `[reference]` table besides the sampler settings.
pub const REFERENCE_KEYS: &[&str] = &["runs"];

type ParsedReference = (Option<ReferenceSpec>, Option<Map<String, Value>>);

fn parse_reference(cx: &Ctx<'_>, doc: &toml::Table) -> Result<ParsedReference, StudyError> {
    let t = match doc.get("reference") {
        None => return Ok((None, None)),
        Some(toml::Value::Table(t)) => t,
        Some(_) => {
            return Err(cx.err(
                &["reference".into()],
                "`reference` must be a table [reference]",
            ));
        }
    };
    let mut settings = toml::Table::new();
    let mut runs = 4u64;
    for (k, v) in t {
        let here = [Seg::from("reference"), Seg::from(k.as_str())];
        if k == "runs" {
            let max = super::limits::MAX_REFERENCE_RUNS;
            match v.as_integer() {
                Some(r) if r >= 2 && r as u64 <= max => runs = r as u64,
                _ => {
                    return Err(cx.err(
                        &here,
                        format!("`runs` = {} is not allowed; allowed: an integer from 2 to {max} (pooled reference runs)", value_text(v)),
                    ))
                }
            }
            continue;
        }
        if !SamplerSettings::KEYS.contains(&k.as_str()) || k == "external" {
            let mut allowed: Vec<&str> = SamplerSettings::KEYS
                .iter()
                .copied()
                .filter(|k| *k != "external")
                .collect();
            allowed.extend(REFERENCE_KEYS);
            return Err(cx.err(
                &here,
                format!(
                    "unknown key `{k}` in [reference]{}; allowed: {}",
                    suggest(k, &allowed),
                    allowed.join(", ")
                ),
            ));
        }
        check_setting(k, v).map_err(|m| cx.err(&here, m))?;
        settings.insert(k.clone(), v.clone());
    }
    let s: SamplerSettings = toml::Value::Table(settings)
        .try_into()
        .map_err(|e| cx.err(&["reference".into()], e.message().to_string()))?;
    s.validate().map_err(|e| {
        cx.err(
            &[Seg::from("reference"), Seg::from(e.key.as_str())],
            format!("[reference]: {e}"),
        )
    })?;
    let json = t
        .iter()
        .map(|(k, v)| {
            let j = toml_to_json(v);
            let j = if k == "runs" {
                j
            } else {
                SamplerSettings::normalise_value(k, &j)
            };
            (k.clone(), j)
        })
        .collect();
    Ok((Some(ReferenceSpec { sampler: s, runs }), Some(json)))
}

/// Split a parameter path such as `components[1].mean[0]` into its segments.
fn key_path(key: &str) -> Vec<Seg> {
    let mut out = Vec::new();
    for part in key.split('.') {
        let mut rest = part;
        if let Some(b) = rest.find('[') {
            out.push(Seg::from(&rest[..b]));
            rest = &rest[b..];
            while let Some(stripped) = rest.strip_prefix('[') {
                let Some(end) = stripped.find(']') else { break };
                if let Ok(i) = stripped[..end].parse::<usize>() {
                    out.push(Seg::from(i));
                }
                rest = &stripped[end + 1..];
            }
        } else {
            out.push(Seg::from(rest));
        }
    }
    out
}

fn valid_name(s: &str) -> bool {
    !s.is_empty()
        && s.len() <= MAX_NAME_LEN
        && s.chars()
            .all(|c| c.is_ascii_alphanumeric() || matches!(c, '-' | '_' | '.'))
}

/// Derive a label `family-dim` for an unlabelled target, made unique with a suffix.
fn derive_label(spec: &toml::Table, taken: &[String]) -> String {
    let family = spec
        .get("family")
        .and_then(|v| v.as_str())
        .unwrap_or("target");
    let base = match spec.get("dim").and_then(|v| v.as_integer()) {
        Some(d) => format!("{family}-{d}"),
        None => family.to_string(),
    };
    if !taken.contains(&base) {
        return base;
    }
    (2..)
        .map(|i| format!("{base}-{i}"))
        .find(|l| !taken.contains(l))
        .unwrap_or(base)
}

/// Most targets one sweep (one `[[target]]` entry with lists) may expand into: the product of
/// its lists' lengths. A sweep is for reading a trend along a few values; beyond this a study
/// is better split, and every expanded target is built (and holds its reference values) before
/// the first run.
pub const MAX_SWEEP_TARGETS: usize = 1000;

/// One swept key of a `[[target]]` entry: its name and its list of values.
type SweptKey = (String, Vec<toml::Value>);

/// The keys of `spec` that sweep: sweepable scalars of the family (see
/// [`assay_targets::sweepable`]) given as lists, in file order, each list checked to be a
/// non-empty list of distinct numbers.
fn swept_keys(cx: &Ctx<'_>, i: usize, spec: &toml::Table) -> Result<Vec<SweptKey>, StudyError> {
    let Some(family) = spec.get("family").and_then(|f| f.as_str()) else {
        return Ok(Vec::new());
    };
    let name = spec
        .get("label")
        .and_then(|l| l.as_str())
        .map_or_else(|| format!("number {}", i + 1), |l| format!("`{l}`"));
    let mut keys: Vec<SweptKey> = Vec::new();
    for (k, v) in spec {
        let toml::Value::Array(values) = v else {
            continue;
        };
        if !assay_targets::sweepable(family, k) {
            continue;
        }
        let at = |j: Option<usize>| {
            let mut path = vec![Seg::from("target"), Seg::from(i), Seg::from(k.as_str())];
            path.extend(j.map(Seg::from));
            path
        };
        let allowed = format!(
            "allowed: a non-empty list of distinct numbers, one target per value, e.g. {k} = [2, 5, 10]"
        );
        if values.is_empty() {
            return Err(cx.err(
                &at(None),
                format!("target {name}: sweep `{k}` = [] is an empty list; {allowed}"),
            ));
        }
        for (j, x) in values.iter().enumerate() {
            let Some(xf) = sweep_number(x) else {
                return Err(cx.err(
                    &at(Some(j)),
                    format!(
                        "target {name}: sweep `{k}` element {j} is {}, not a number; {allowed}",
                        value_text(x)
                    ),
                ));
            };
            let same = |y: &toml::Value| match (x, y) {
                (toml::Value::Integer(a), toml::Value::Integer(b)) => a == b,
                _ => sweep_number(y) == Some(xf),
            };
            if values[..j].iter().any(same) {
                return Err(cx.err(
                    &at(Some(j)),
                    format!(
                        "target {name}: sweep `{k}` lists {} twice; {allowed}",
                        value_text(x)
                    ),
                ));
            }
        }
        keys.push((k.clone(), values.clone()));
    }
    // toml::Table keeps keys sorted; restore the file order (first listed key slowest).
    keys.sort_by_key(|(k, _)| {
        locate(
            cx.src,
            &[Seg::from("target"), Seg::from(i), Seg::from(k.as_str())],
        )
        .unwrap_or((usize::MAX, 0))
    });
    let count = keys.iter().try_fold(1usize, |n, (_, v)| {
        n.checked_mul(v.len()).filter(|&n| n <= MAX_SWEEP_TARGETS)
    });
    if count.is_none() {
        let sizes: Vec<String> = keys
            .iter()
            .map(|(k, v)| format!("{k}: {}", v.len()))
            .collect();
        let first = &keys[0].0;
        return Err(cx.err(
            &[Seg::from("target"), Seg::from(i), Seg::from(first.as_str())],
            format!(
                "target {name}: the sweep expands into more than {MAX_SWEEP_TARGETS} targets ({} \
                 values); allowed: at most {MAX_SWEEP_TARGETS} targets per sweep \
                 (MAX_SWEEP_TARGETS), split the study",
                sizes.join(" x ")
            ),
        ));
    }
    Ok(keys)
}

/// A TOML number as f64 (`None` for anything else).
fn sweep_number(v: &toml::Value) -> Option<f64> {
    match v {
        toml::Value::Integer(i) => Some(*i as f64),
        toml::Value::Float(f) => Some(*f),
        _ => None,
    }
}

/// The label part of one swept value: `<key>_<number>`, the number in its shortest text
/// (`dim_10`, `ar1_0.9`, `noise_1e-7`).
pub fn sweep_label_part(key: &str, v: &toml::Value) -> String {
    let n = match v {
        toml::Value::Integer(i) => i.to_string(),
        toml::Value::Float(f) => crate::settings::number_text(*f),
        other => other.to_string(),
    };
    format!("{key}_{n}")
}

/// One target to build: its `[[target]]` entry, its label, its table (swept keys replaced by
/// one value each) and, for an expanded target, its sweep and the index of its value in each
/// swept list.
struct Planned {
    entry: usize,
    label: String,
    spec: toml::Table,
    sweep: Option<SweepInfo>,
    picks: Vec<(String, usize)>,
}

/// The targets of one entry: itself, or its sweep's expansion (cartesian product of the lists,
/// the first listed key slowest), each labelled `<base>-<key>_<value>-...`.
fn plan_entry(i: usize, spec: &toml::Table, base: &str, keys: &[SweptKey]) -> Vec<Planned> {
    if keys.is_empty() {
        return vec![Planned {
            entry: i,
            label: base.to_string(),
            spec: spec.clone(),
            sweep: None,
            picks: Vec::new(),
        }];
    }
    let n: usize = keys.iter().map(|(_, v)| v.len()).product();
    let mut out = Vec::with_capacity(n);
    for c in 0..n {
        let mut rest = c;
        let mut idx = vec![0usize; keys.len()];
        for (slot, (_, values)) in idx.iter_mut().zip(keys).rev() {
            *slot = rest % values.len();
            rest /= values.len();
        }
        let mut spec = spec.clone();
        let mut label = base.to_string();
        let mut values = Vec::with_capacity(keys.len());
        let mut picks = Vec::with_capacity(keys.len());
        for ((k, list), &j) in keys.iter().zip(&idx) {
            let v = &list[j];
            label.push('-');
            label.push_str(&sweep_label_part(k, v));
            spec.insert(k.clone(), v.clone());
            values.push((k.clone(), toml_to_json(v)));
            picks.push((k.clone(), j));
        }
        if spec.contains_key("label") {
            spec.insert("label".into(), toml::Value::String(label.clone()));
        }
        out.push(Planned {
            entry: i,
            label,
            spec,
            sweep: Some(SweepInfo {
                label: base.to_string(),
                values,
            }),
            picks,
        });
    }
    out
}

fn build_targets(
    cx: &Ctx<'_>,
    specs: &[toml::Table],
    base_dir: &Path,
    timeout: Option<Duration>,
) -> Result<Vec<StudyTarget>, StudyError> {
    // Given labels first, so that derived ones avoid them.
    let mut taken: Vec<String> = Vec::new();
    for (i, spec) in specs.iter().enumerate() {
        if let Some(v) = spec.get("label") {
            let here = [Seg::from("target"), Seg::from(i), Seg::from("label")];
            let Some(l) = v.as_str().filter(|l| valid_name(l)) else {
                return Err(cx.err(
                    &here,
                    format!(
                        "`label` = {v} is not allowed; allowed: a non-empty string of at most \
                         {MAX_NAME_LEN} letters, digits, `-`, `_` and `.` (it names files)"
                    ),
                ));
            };
            if taken.iter().any(|t| t == l) {
                return Err(cx.err(
                    &here,
                    format!("two targets are labelled `{l}`; labels must be unique"),
                ));
            }
            taken.push(l.to_string());
        }
    }
    // Every target to build, sweeps expanded, with labels checked to be unique.
    let mut planned: Vec<Planned> = Vec::with_capacity(specs.len());
    for (i, spec) in specs.iter().enumerate() {
        let keys = swept_keys(cx, i, spec)?;
        let base = match spec.get("label").and_then(|v| v.as_str()) {
            Some(l) => l.to_string(),
            None => {
                let l = derive_label(spec, &taken);
                taken.push(l.clone());
                l
            }
        };
        for p in plan_entry(i, spec, &base, &keys) {
            let mut here = vec![Seg::from("target"), Seg::from(i)];
            match p.picks.last() {
                Some((k, j)) => here.extend([Seg::from(k.as_str()), Seg::from(*j)]),
                None => here.push(Seg::from("label")),
            }
            if p.sweep.is_some() && !valid_name(&p.label) {
                return Err(cx.err(
                    &here,
                    format!(
                        "target label `{}` of the sweep `{base}` is not allowed; allowed: at \
                         most {MAX_NAME_LEN} letters, digits, `-`, `_` and `.` (it names files): \
                         shorten the entry's `label`",
                        p.label
                    ),
                ));
            }
            if let Some(other) = planned.iter().find(|q| q.label == p.label) {
                let what = |q: &Planned| match &q.sweep {
                    Some(s) => format!("the sweep `{}`", s.label),
                    None => format!("target entry {}", q.entry + 1),
                };
                return Err(cx.err(
                    &here,
                    format!(
                        "two targets are labelled `{}` ({} and {}); labels must be unique: \
                         change a `label`",
                        p.label,
                        what(other),
                        what(&p)
                    ),
                ));
            }
            planned.push(p);
        }
    }
    let mut out = Vec::with_capacity(planned.len());
    for p in planned {
        let (i, label, spec) = (p.entry, &p.label, &p.spec);
        let fail = |e: ParamError| {
            let key = e.key().unwrap_or("family").to_string();
            let mut path = vec![Seg::from("target"), Seg::from(i)];
            path.extend(key_path(&key));
            // A value the family rejects is pointed at in its sweep list.
            if let Some((_, j)) = p.picks.iter().find(|(k, _)| *k == key) {
                path.push(Seg::from(*j));
            }
            cx.err(&path, format!("target `{label}`: {e}"))
        };
        let (target, external): (Arc<dyn Target>, _) =
            if spec.get("family").and_then(|f| f.as_str()) == Some(EXTERNAL_FAMILY) {
                let t = Arc::new(ExternalTarget::from_table(spec, label, timeout).map_err(fail)?);
                (t.clone(), Some(t))
            } else {
                (
                    Arc::from(build_target(spec, label, base_dir).map_err(fail)?),
                    None,
                )
            };
        let mut info = target_info(target.as_ref(), spec);
        info.sweep = p.sweep;
        out.push(StudyTarget {
            info,
            target,
            external,
        });
    }
    Ok(out)
}

/// The header record of a target: identity, parameters and exact reference values.
pub fn target_info(t: &dyn Target, spec: &toml::Table) -> TargetInfo {
    TargetInfo {
        label: t.label().to_string(),
        family: t.family().to_string(),
        dim: t.dim(),
        log_z: t.log_z(),
        mean: t.mean().map(<[f64]>::to_vec),
        covariance: t.covariance().map(|c| {
            (0..c.nrows())
                .map(|i| (0..c.ncols()).map(|j| c[(i, j)]).collect())
                .collect()
        }),
        params: spec
            .iter()
            .map(|(k, v)| (k.clone(), toml_to_json(v)))
            .collect(),
        reference_run: None,
        sweep: None,
    }
}
