//! The results file: JSON Lines, one header line and then one line per run.
//!
//! ```text
//! {"schema":"assay-results/1","study":{...},"targets":[{"label":..,"family":..,"dim":..,"log_z":..,"mean":..,"covariance":..}]}
//! {"target":"..","settings":{..},"replicate":0,"seed":..,"status":"ok","error":null,"mean":[..],...}
//! ```
//!
//! This module only reads and writes records; it knows nothing of how runs are made or scored.

use std::fmt;
use std::fs::File;
use std::io::{BufRead, BufReader};
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};
use serde_json::{Map, Value};

use crate::sampler::RunOutput;

/// Schema tag of the header line.
pub const SCHEMA: &str = "assay-results/1";
/// Schema tag of a raced study's results file: schema 1 plus elimination records and the
/// header's `study.race` table. A reader of schema 1 only refuses it by its tag, instead of
/// stumbling on the first elimination line.
pub const SCHEMA_RACE: &str = "assay-results/2";

/// How a raced study was raced (`study.race` in the header): everything that decides which
/// runs are made, so that `--resume` and `merge` refuse a file raced another way.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct RaceInfo {
    /// Replicates of every cell in round 1 (`[study] race_start`).
    pub start: u64,
    /// The ranking metric cells are compared by.
    pub metric: String,
    /// Total level of the bias eliminations over all rounds, per target.
    pub bias_alpha: f64,
    /// Total level of the metric eliminations over all rounds, per target.
    pub worse_alpha: f64,
    /// Random splits of the comparisons' permutation tests (the fewest; see `comparison`).
    pub resamples: u64,
    /// The test of the metric comparison and of the recommendation clause: `permutation`;
    /// absent in files raced before it, whose comparisons were percentile-bootstrap tests.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub comparison: Option<String>,
    /// The recommendation clause (a cell stays in on every target while it can still be the
    /// recommended configuration): the rule of the aggregate (`worst` or `geometric-mean`);
    /// absent when the race kept cells per target only (a sharded race).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub recommend_by: Option<String>,
    /// Total level of the recommendation clause's test over all rounds; absent with
    /// `recommend_by`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub recommend_alpha: Option<f64>,
}

/// Why a cell can no longer be the recommended configuration of a race.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum ExitReason {
    /// Eliminated as biased on a target.
    Biased,
    /// Some of its runs failed on a target.
    Failed,
    /// Its aggregate relative efficiency is significantly below the leading cell's.
    Behind,
}

/// When and why a cell left the recommendation (the race's recommendation clause), attached
/// to its `worse` eliminations: until then the cell stayed in on every target.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct RecommendationExit {
    /// The round after which it left.
    pub round: u64,
    pub reason: ExitReason,
    /// For `biased` and `failed`: the target that ruled it out.
    pub target: Option<String>,
    /// For `behind`: the leading cell's settings.
    pub than: Option<Map<String, Value>>,
    /// For `behind`: the leader's aggregate over the cell's (above 1).
    pub statistic: Option<f64>,
    /// For `behind`: the test's p-value.
    pub p: Option<f64>,
    /// For `behind`: the Holm level it passed.
    pub level: Option<f64>,
}

/// Why a cell was eliminated from a race.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum EliminationReason {
    /// Significantly biased (the `biased` flag's tests, at the round's level).
    Biased,
    /// Its ranking metric is significantly worse than the round's best unbiased cell's.
    Worse,
    /// Its runs fail significantly more often than half the time (see `race::decide`).
    Failed,
}

/// Tag of an elimination line.
pub const ELIMINATION_TAG: &str = "elimination";

/// One line per cell eliminated from a race, written after the round that decided it:
/// `{"record":"elimination","round":r,"replicates":n,"target":..,"settings":{..},"reason":"biased"|"worse"|"failed","statistic":x,"p":x,"level":x,"than":{..}|null}`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Elimination {
    /// Always [`ELIMINATION_TAG`].
    pub record: String,
    /// The round (1-based) after which the cell was eliminated.
    pub round: u64,
    /// Replicates per cell that round's decision saw.
    pub replicates: u64,
    /// Target label.
    pub target: String,
    /// The eliminated cell's value for each grid axis.
    pub settings: Map<String, Value>,
    pub reason: EliminationReason,
    /// For `biased`: the deciding quantity's bias share; for `worse`: the ratio of the two
    /// cells' metric, oriented so that values above 1 mean worse; for `failed`: the share of
    /// its runs that failed. `null` when not finite.
    pub statistic: Option<f64>,
    /// The p-value of the test that eliminated the cell.
    pub p: f64,
    /// The Holm level it was held to.
    pub level: f64,
    /// For `worse`: the cell it lost to (the round's best unbiased cell).
    pub than: Option<Map<String, Value>>,
    /// For `worse`, in a race with the recommendation clause: when the cell stopped being a
    /// possible recommended configuration (absent otherwise).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub left_recommendation: Option<RecommendationExit>,
}

impl Elimination {
    /// Canonical key of the eliminated cell.
    pub fn cell_key(&self) -> String {
        cell_key(&self.settings)
    }
}

/// The study as it was run: everything needed to tell whether two files are of one design.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct StudyInfo {
    /// Study name.
    pub name: String,
    /// Replicates per cell.
    pub replicates: u64,
    /// Master seed.
    pub seed: u64,
    /// Per-run time limit in seconds, if any.
    #[serde(default)]
    pub timeout_s: Option<f64>,
    /// The `[sampler]` table as given (settings common to every cell).
    pub sampler: Map<String, Value>,
    /// The `[grid]` axes in file order: `[[name, [values..]], ..]`.
    pub grid: Vec<(String, Vec<Value>)>,
    /// The `[reference]` table: how reference values are computed for targets without exact
    /// ones.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub reference: Option<Map<String, Value>>,
    /// Present when the study was raced (`[study] race = true` or `--race`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub race: Option<RaceInfo>,
}

/// How a target's reference values were obtained when they are not known exactly: pooled
/// independent runs of a reference configuration, with their own standard errors.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ReferenceRun {
    /// The file the reference values are stored in (reused while the definition is unchanged).
    pub file: String,
    /// Number of pooled reference runs.
    pub runs: u64,
    /// Particles per reference run.
    pub particles: usize,
    /// Standard error of each reference mean coordinate.
    pub mean_se: Option<Vec<f64>>,
    /// Standard error of the reference log Z.
    pub log_z_se: Option<f64>,
}

/// Membership of a target in a sweep: one `[[target]]` entry of the study file that gave some
/// scalar parameters as lists and was expanded into one target per combination of values.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SweepInfo {
    /// The sweep's base label (the entry's `label`, or the one derived for it); every target of
    /// the sweep is labelled from it.
    pub label: String,
    /// The swept keys in file order with this target's value of each:
    /// `[["dim", 10], ["ar1", 0.9]]`.
    pub values: Vec<(String, Value)>,
}

/// A target as recorded in the header, with its reference values.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TargetInfo {
    pub label: String,
    pub family: String,
    pub dim: usize,
    pub log_z: Option<f64>,
    pub mean: Option<Vec<f64>>,
    pub covariance: Option<Vec<Vec<f64>>>,
    /// The target's parameters as given in the study file (its `[[target]]` table).
    #[serde(default)]
    pub params: Map<String, Value>,
    /// Present when the reference values come from a reference run rather than a closed form.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub reference_run: Option<ReferenceRun>,
    /// Present when the target is one of a sweep's expanded targets (files written before
    /// sweeps existed have no such field and read unchanged).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub sweep: Option<SweepInfo>,
}

/// The targets of one sweep, as the header lists them.
#[derive(Debug, Clone, PartialEq)]
pub struct Sweep {
    /// The sweep's base label.
    pub label: String,
    /// The swept keys, in file order (first listed key slowest).
    pub keys: Vec<String>,
    /// Indices into the header's targets, in expansion order.
    pub targets: Vec<usize>,
}

/// The first line of a results file.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Header {
    pub schema: String,
    pub study: StudyInfo,
    pub targets: Vec<TargetInfo>,
}

impl Header {
    /// The sweeps of the study, in the order of their first target. A header without sweep
    /// fields (every file written before sweeps existed) has none.
    pub fn sweeps(&self) -> Vec<Sweep> {
        let mut out: Vec<Sweep> = Vec::new();
        for (i, t) in self.targets.iter().enumerate() {
            let Some(sw) = &t.sweep else { continue };
            match out.iter_mut().find(|s| s.label == sw.label) {
                Some(s) => s.targets.push(i),
                None => out.push(Sweep {
                    label: sw.label.clone(),
                    keys: sw.values.iter().map(|(k, _)| k.clone()).collect(),
                    targets: vec![i],
                }),
            }
        }
        out
    }

    /// True when `other` is of the same design: same targets (label, family, dim, parameters)
    /// and the same sampler table and grid. Seed and replicate count may differ.
    ///
    /// Values are compared as the sampler reads them, defaults filled in: `1` and `1.0` are one
    /// number, and `initial_scale = 1.0` written out is the same design as left out.
    pub fn same_design(&self, other: &Header) -> bool {
        self.design_difference(other).is_none()
    }

    /// True when `other` is the same study exactly (design, seed and replicates).
    pub fn same_study(&self, other: &Header) -> bool {
        self.study_difference(other).is_none()
    }

    /// What makes `other` another study, naming the first differing key (`None`: the same).
    pub fn study_difference(&self, other: &Header) -> Option<String> {
        let (a, b) = (&self.study, &other.study);
        if a.name != b.name {
            return Some(format!("[study] name: `{}` against `{}`", a.name, b.name));
        }
        if a.seed != b.seed {
            return Some(format!("[study] seed: {} against {}", a.seed, b.seed));
        }
        if a.replicates != b.replicates {
            return Some(format!(
                "[study] replicates: {} against {}",
                a.replicates, b.replicates
            ));
        }
        if a.race != b.race {
            let show = |r: &Option<RaceInfo>| match r {
                None => "not raced".to_string(),
                Some(r) => format!(
                    "raced (race_start {}, metric {}, bias alpha {}, worse alpha {}, {} tests \
                     with {} resamples, recommendation clause {})",
                    r.start,
                    r.metric,
                    r.bias_alpha,
                    r.worse_alpha,
                    r.comparison.as_deref().unwrap_or("bootstrap"),
                    r.resamples,
                    match (&r.recommend_by, r.recommend_alpha) {
                        (Some(by), Some(a)) => format!("by {by} at alpha {a}"),
                        _ => "off".to_string(),
                    }
                ),
            };
            return Some(format!(
                "[study] race: {} against {}",
                show(&a.race),
                show(&b.race)
            ));
        }
        self.design_difference(other)
    }

    /// What makes `other` another design, naming the first differing key: a setting of the
    /// `[sampler]` or `[reference]` table (with defaults filled in), a grid axis or its values,
    /// a target or one of its parameters. `None` when they are of one design.
    pub fn design_difference(&self, other: &Header) -> Option<String> {
        let (a, b) = (&self.study, &other.study);
        if let Some(d) = table_difference("[sampler]", &a.sampler, &b.sampler, &[]) {
            return Some(d);
        }
        let axes =
            |g: &[(String, Vec<Value>)]| g.iter().map(|(k, _)| k.clone()).collect::<Vec<_>>();
        if axes(&a.grid) != axes(&b.grid) {
            return Some(format!(
                "[grid] axes: [{}] against [{}]",
                axes(&a.grid).join(", "),
                axes(&b.grid).join(", ")
            ));
        }
        for ((k, va), (_, vb)) in a.grid.iter().zip(&b.grid) {
            let norm = |v: &[Value]| -> Vec<Value> {
                v.iter()
                    .map(|x| crate::settings::SamplerSettings::normalise_value(k, x))
                    .collect()
            };
            let (na, nb) = (norm(va), norm(vb));
            if na.len() != nb.len() || na.iter().zip(&nb).any(|(x, y)| !same_value(x, y)) {
                return Some(format!(
                    "[grid] {k}: {} against {}",
                    Value::Array(va.clone()),
                    Value::Array(vb.clone())
                ));
            }
        }
        match (&a.reference, &b.reference) {
            (None, None) => {}
            (Some(ra), Some(rb)) => {
                if let Some(d) =
                    table_difference("[reference]", ra, rb, &[("runs", Value::from(4))])
                {
                    return Some(d);
                }
            }
            (Some(_), None) | (None, Some(_)) => {
                return Some("[reference]: a table on one side only".to_string());
            }
        }
        let labels = |h: &Header| {
            h.targets
                .iter()
                .map(|t| t.label.clone())
                .collect::<Vec<_>>()
        };
        if labels(self) != labels(other) {
            return Some(format!(
                "targets: [{}] against [{}]",
                labels(self).join(", "),
                labels(other).join(", ")
            ));
        }
        for (ta, tb) in self.targets.iter().zip(&other.targets) {
            if ta.family != tb.family || ta.dim != tb.dim {
                return Some(format!(
                    "target `{}`: {} of dim {} against {} of dim {}",
                    ta.label, ta.family, ta.dim, tb.family, tb.dim
                ));
            }
            let keys: std::collections::BTreeSet<&String> =
                ta.params.keys().chain(tb.params.keys()).collect();
            for k in keys {
                let (x, y) = (ta.params.get(k), tb.params.get(k));
                let same = same_param(&ta.family, k, x, y);
                if !same {
                    let show =
                        |v: Option<&Value>| v.map_or("not set".to_string(), Value::to_string);
                    return Some(format!(
                        "target `{}` parameter `{k}`: {} against {}",
                        ta.label,
                        show(x),
                        show(y)
                    ));
                }
            }
        }
        None
    }
}

/// One line per run.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct RunRecord {
    /// Target label.
    pub target: String,
    /// The cell's value for each grid axis.
    pub settings: Map<String, Value>,
    /// Replicate index, 0-based.
    pub replicate: u64,
    /// Seed of the run's random stream.
    pub seed: u64,
    #[serde(flatten)]
    pub output: RunOutput,
}

impl RunRecord {
    /// Canonical key of the record's cell (settings are kept with sorted keys).
    pub fn cell_key(&self) -> String {
        cell_key(&self.settings)
    }
}

/// A setting's value as text for tables, charts and reports: strings unquoted; a command line
/// (the `external` setting) as typed, the empty one as `built-in`.
pub fn value_text(v: &Value) -> String {
    match v {
        Value::String(s) => s.clone(),
        Value::Array(a) if a.is_empty() => "built-in".to_string(),
        Value::Array(a) if a.iter().all(Value::is_string) => a
            .iter()
            .filter_map(Value::as_str)
            .collect::<Vec<_>>()
            .join(" "),
        other => other.to_string(),
    }
}

/// Canonical string of a cell's settings (keys sorted, compact JSON).
pub fn cell_key(settings: &Map<String, Value>) -> String {
    serde_json::to_string(settings).unwrap_or_default()
}

/// A results file read back.
#[derive(Debug, Clone)]
pub struct Results {
    pub path: PathBuf,
    pub header: Header,
    pub runs: Vec<RunRecord>,
    /// Elimination records of a raced study, in file order.
    pub eliminations: Vec<Elimination>,
    /// True when the last line was torn (an interrupted write) and was skipped.
    pub torn_tail: bool,
}

/// A temporary name beside `path` (same directory, so that a rename is atomic), unique to this
/// process: `.<name>.tmp-<pid>`.
pub fn temporary_path(path: &Path) -> PathBuf {
    let name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    path.with_file_name(format!(".{name}.tmp-{}", std::process::id()))
}

/// Write `bytes` to `path` atomically: to a temporary file beside it, flushed to disk, then
/// renamed over `path`. On any failure the temporary file is removed and `path` is untouched
/// (no torn or empty file is ever left under its name).
pub fn write_atomically(path: &Path, bytes: &[u8]) -> std::io::Result<()> {
    use std::io::Write;
    let tmp = temporary_path(path);
    let written = File::create(&tmp).and_then(|mut f| {
        f.write_all(bytes)?;
        f.flush()?;
        f.sync_all()
    });
    let done = written.and_then(|_| std::fs::rename(&tmp, path));
    if done.is_err() {
        let _ = std::fs::remove_file(&tmp);
    }
    done
}

/// Why a results file could not be used.
#[derive(Debug)]
pub struct ResultsError {
    pub path: PathBuf,
    pub line: Option<usize>,
    pub message: String,
}

impl fmt::Display for ResultsError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self.line {
            Some(l) => write!(f, "{}, line {}: {}", self.path.display(), l, self.message),
            None => write!(f, "{}: {}", self.path.display(), self.message),
        }
    }
}

impl std::error::Error for ResultsError {}

/// Read a results file. With `allow_torn_tail`, an unparsable last line without a trailing
/// newline (the mark of an interrupted write) is skipped instead of being an error.
pub fn read_results(path: &Path, allow_torn_tail: bool) -> Result<Results, ResultsError> {
    read_with_lines(path, allow_torn_tail).map(|(r, _, _)| r)
}

/// Read a results file and check that it is one study's results: the reader every command
/// uses (`table`, `plot`, `report`, `merge`, `check`, the table after `run`, `--resume`).
/// Beyond the syntax checked by [`read_results`], it refuses, naming the file and the line:
/// a header with no targets, twice the same label, or reference values of the wrong shape; a
/// record of a target the header does not list, with settings that are not a cell of the
/// grid, with a replicate outside `0..replicates`, appearing twice, or finished (`ok`)
/// without a mean of the target's dimension or with a covariance of the wrong shape.
pub fn read_validated(path: &Path, allow_torn_tail: bool) -> Result<Results, ResultsError> {
    let (results, lines, elimination_lines) = read_with_lines(path, allow_torn_tail)?;
    validate(&results, &lines)?;
    validate_eliminations(&results, &elimination_lines)?;
    Ok(results)
}

/// The first key in which two sampler-style tables differ once every setting is read as the
/// sampler reads it and defaults are filled in (`extra`: keys besides the sampler settings,
/// with their defaults).
fn table_difference(
    name: &str,
    a: &Map<String, Value>,
    b: &Map<String, Value>,
    extra: &[(&str, Value)],
) -> Option<String> {
    use crate::settings::SamplerSettings;
    let split = |t: &Map<String, Value>| {
        let mut settings = t.clone();
        let mut rest = Map::new();
        for (k, default) in extra {
            rest.insert(
                k.to_string(),
                settings.remove(*k).unwrap_or_else(|| default.clone()),
            );
        }
        (settings, rest)
    };
    let ((sa, ra), (sb, rb)) = (split(a), split(b));
    for (k, x) in &ra {
        if !rb.get(k).is_some_and(|y| same_value(x, y)) {
            return Some(format!("{name} {k}: {x} against {}", rb[k]));
        }
    }
    match (
        SamplerSettings::effective(&sa),
        SamplerSettings::effective(&sb),
    ) {
        (Some(Value::Object(ea)), Some(Value::Object(eb))) => {
            for k in SamplerSettings::KEYS {
                let (x, y) = (ea.get(*k), eb.get(*k));
                let same = match (x, y) {
                    (Some(x), Some(y)) => same_value(x, y),
                    (None, None) => true,
                    _ => false,
                };
                if !same {
                    let shown = |t: &Map<String, Value>, e: Option<&Value>| match t.get(*k) {
                        Some(v) => v.to_string(),
                        None => format!(
                            "{} (the default)",
                            e.map_or("not set".to_string(), Value::to_string)
                        ),
                    };
                    return Some(format!(
                        "{name} {k}: {} against {}",
                        shown(&sa, x),
                        shown(&sb, y)
                    ));
                }
            }
            None
        }
        // A table that does not parse (written by another version): compare it as written.
        _ => {
            let keys: std::collections::BTreeSet<&String> = sa.keys().chain(sb.keys()).collect();
            keys.into_iter()
                .find(|k| match (sa.get(*k), sb.get(*k)) {
                    (Some(x), Some(y)) => !same_value(x, y),
                    _ => true,
                })
                .map(|k| format!("{name} {k} differs"))
        }
    }
}

/// Two setting values are the same value: equal JSON, or equal numbers (`1` and `1.0`).
pub fn same_value(a: &Value, b: &Value) -> bool {
    match (a, b) {
        (Value::Number(x), Value::Number(y)) => x.as_f64() == y.as_f64(),
        (Value::Array(x), Value::Array(y)) => {
            x.len() == y.len() && x.iter().zip(y).all(|(p, q)| same_value(p, q))
        }
        _ => a == b,
    }
}

/// Whether two targets' values of parameter `key` of `family` give the same target: equal
/// values, a number and an array of that number (a scalar is broadcast over coordinates), or
/// a parameter set on one side only to the family's numeric default
/// ([`assay_targets::default_number`]), so that `scale = 1` written out is the same design as
/// `scale` left out.
fn same_param(family: &str, key: &str, x: Option<&Value>, y: Option<&Value>) -> bool {
    let broadcast = |v: &Value, n: f64| match v {
        Value::Number(x) => x.as_f64() == Some(n),
        Value::Array(xs) => !xs.is_empty() && xs.iter().all(|x| x.as_f64() == Some(n)),
        _ => false,
    };
    match (x, y) {
        (Some(x), Some(y)) => {
            same_value(x, y)
                || match (x, y) {
                    (Value::Number(n), other) | (other, Value::Number(n)) => {
                        n.as_f64().is_some_and(|n| broadcast(other, n))
                    }
                    _ => false,
                }
        }
        (Some(v), None) | (None, Some(v)) => {
            assay_targets::default_number(family, key).is_some_and(|d| broadcast(v, d))
        }
        (None, None) => true,
    }
}

/// The checks of [`read_validated`] on a file already read; `lines[i]` is the line number of
/// `results.runs[i]` (an empty slice: record numbers are reported instead).
pub fn validate(results: &Results, lines: &[usize]) -> Result<(), ResultsError> {
    let fail = |line: Option<usize>, message: String| ResultsError {
        path: results.path.clone(),
        line,
        message,
    };
    let h = &results.header;
    let raced = h.study.race.is_some();
    if raced != (h.schema == SCHEMA_RACE) {
        return Err(fail(
            Some(1),
            format!(
                "schema `{}` {} a `study.race` table; a raced study's file has schema \
                 `{SCHEMA_RACE}` and the table, any other has schema `{SCHEMA}` and none",
                h.schema,
                if raced { "with" } else { "without" }
            ),
        ));
    }
    if h.targets.is_empty() {
        return Err(fail(
            Some(1),
            "the header lists no targets; a results file holds the runs of at least one target"
                .to_string(),
        ));
    }
    if h.study.replicates == 0 {
        return Err(fail(
            Some(1),
            "the header declares 0 replicates".to_string(),
        ));
    }
    let mut dims: std::collections::HashMap<&str, usize> = std::collections::HashMap::new();
    for t in &h.targets {
        if dims.insert(t.label.as_str(), t.dim).is_some() {
            return Err(fail(
                Some(1),
                format!("the header lists target `{}` twice", t.label),
            ));
        }
        let d = t.dim;
        let bad = if d == 0 {
            Some("dimension 0".to_string())
        } else if let Some(m) = t.mean.as_ref().filter(|m| m.len() != d) {
            Some(format!("a reference mean of {} values", m.len()))
        } else if let Some(c) = t
            .covariance
            .as_ref()
            .filter(|c| c.len() != d || c.iter().any(|r| r.len() != d))
        {
            Some(format!(
                "a reference covariance of {} rows, not {d} x {d}",
                c.len()
            ))
        } else {
            t.reference_run
                .as_ref()
                .and_then(|r| r.mean_se.as_ref())
                .filter(|se| se.len() != d || se.iter().any(|x| !x.is_finite() || *x < 0.0))
                .map(|_| "reference standard errors of the wrong length or sign".to_string())
        };
        if let Some(what) = bad {
            return Err(fail(
                Some(1),
                format!("header target `{}` (dim {d}) has {what}", t.label),
            ));
        }
    }
    let grid = &h.study.grid;
    let mut seen: std::collections::HashMap<(&str, String, u64), usize> =
        std::collections::HashMap::new();
    for (i, r) in results.runs.iter().enumerate() {
        let line = lines.get(i).copied();
        let at = |m: String| {
            if line.is_some() {
                fail(line, m)
            } else {
                fail(None, format!("run record {}: {m}", i + 1))
            }
        };
        let Some(&d) = dims.get(r.target.as_str()) else {
            let known: Vec<&str> = h.targets.iter().map(|t| t.label.as_str()).collect();
            return Err(at(format!(
                "a run of target `{}`, which the header does not list (it lists {})",
                r.target,
                known.join(", ")
            )));
        };
        let on_grid = r.settings.len() == grid.len()
            && grid.iter().all(|(k, values)| {
                r.settings
                    .get(k)
                    .is_some_and(|v| values.iter().any(|g| same_value(g, v)))
            });
        if !on_grid {
            let axes: Vec<&str> = grid.iter().map(|(k, _)| k.as_str()).collect();
            return Err(at(format!(
                "settings {} are not a cell of the header's grid (axes: {})",
                r.cell_key(),
                if axes.is_empty() {
                    "none".to_string()
                } else {
                    axes.join(", ")
                }
            )));
        }
        if r.replicate >= h.study.replicates {
            return Err(at(format!(
                "replicate {} of target `{}`, but the header declares {} replicates (0 to {})",
                r.replicate,
                r.target,
                h.study.replicates,
                h.study.replicates - 1
            )));
        }
        let key = (r.target.as_str(), r.cell_key(), r.replicate);
        if let Some(first) = seen.insert(key, line.unwrap_or(i + 1)) {
            return Err(at(format!(
                "replicate {} of target `{}`, cell {} appears twice (first at {} {first})",
                r.replicate,
                r.target,
                r.cell_key(),
                if line.is_some() { "line" } else { "record" }
            )));
        }
        if r.output.is_ok() {
            match &r.output.mean {
                None => {
                    return Err(at(
                        "a finished (\"ok\") run without a mean; an ok run always reports one"
                            .to_string(),
                    ));
                }
                Some(m) if m.len() != d => {
                    return Err(at(format!(
                        "a mean of {} values for target `{}` of dimension {d}",
                        m.len(),
                        r.target
                    )));
                }
                _ => {}
            }
            if let Some(c) = &r.output.covariance
                && (c.len() != d || c.iter().any(|row| row.len() != d))
            {
                return Err(at(format!(
                    "a covariance that is not {d} x {d} for target `{}`",
                    r.target
                )));
            }
        }
    }
    Ok(())
}

/// The checks of [`read_validated`] on the elimination records: only in a raced file, of a
/// listed target and a cell of the grid (and a cell lost to, for `worse`), round at least 1, p
/// and level in [0, 1], and at most one per target and cell. `lines[i]` is the line of
/// `results.eliminations[i]` (empty: record numbers are reported).
pub fn validate_eliminations(results: &Results, lines: &[usize]) -> Result<(), ResultsError> {
    let h = &results.header;
    let on_grid = |s: &Map<String, Value>| {
        s.len() == h.study.grid.len()
            && h.study.grid.iter().all(|(k, values)| {
                s.get(k)
                    .is_some_and(|v| values.iter().any(|g| same_value(g, v)))
            })
    };
    let mut seen: std::collections::HashMap<(&str, String), usize> =
        std::collections::HashMap::new();
    for (i, e) in results.eliminations.iter().enumerate() {
        let line = lines.get(i).copied();
        let at = |m: String| ResultsError {
            path: results.path.clone(),
            line,
            message: if line.is_some() {
                m
            } else {
                format!("elimination record {}: {m}", i + 1)
            },
        };
        if h.study.race.is_none() {
            return Err(at(
                "an elimination record in a study that was not raced".to_string()
            ));
        }
        if e.record != ELIMINATION_TAG {
            return Err(at(format!(
                "a record tagged `{}`; allowed: `{ELIMINATION_TAG}`",
                e.record
            )));
        }
        if !h.targets.iter().any(|t| t.label == e.target) {
            return Err(at(format!(
                "an elimination on target `{}`, which the header does not list",
                e.target
            )));
        }
        if !on_grid(&e.settings) || e.than.as_ref().is_some_and(|t| !on_grid(t)) {
            return Err(at(format!(
                "an elimination of settings {} (or against settings) that are not a cell of \
                 the header's grid",
                e.cell_key()
            )));
        }
        let bad_number = |x: f64| !(0.0..=1.0).contains(&x);
        if e.round == 0
            || bad_number(e.p)
            || bad_number(e.level)
            || (e.reason == EliminationReason::Worse) != e.than.is_some()
        {
            return Err(at(format!(
                "elimination of {} on `{}`: round {}, p {}, level {}, reason {:?} with{} a cell \
                 lost to; allowed: round >= 1, p and level in [0, 1], a cell lost to exactly \
                 for reason `worse`",
                e.cell_key(),
                e.target,
                e.round,
                e.p,
                e.level,
                e.reason,
                if e.than.is_some() { "" } else { "out" }
            )));
        }
        if let Some(first) = seen.insert((e.target.as_str(), e.cell_key()), line.unwrap_or(i + 1)) {
            return Err(at(format!(
                "cell {} of target `{}` is eliminated twice (first at {} {first})",
                e.cell_key(),
                e.target,
                if line.is_some() { "line" } else { "record" }
            )));
        }
    }
    Ok(())
}

/// A file read line by line: the results, and the line of each run and elimination record.
type ReadLines = (Results, Vec<usize>, Vec<usize>);

fn read_with_lines(path: &Path, allow_torn_tail: bool) -> Result<ReadLines, ResultsError> {
    let fail = |line: Option<usize>, message: String| ResultsError {
        path: path.to_path_buf(),
        line,
        message,
    };
    let file = File::open(path).map_err(|e| fail(None, format!("cannot open: {e}")))?;
    let mut reader = BufReader::new(file);
    let mut header: Option<Header> = None;
    let mut runs = Vec::new();
    let mut lines = Vec::new();
    let mut eliminations = Vec::new();
    let mut elimination_lines = Vec::new();
    let mut torn_tail = false;
    let mut buf = String::new();
    let mut lineno = 0usize;
    loop {
        buf.clear();
        let n = reader
            .read_line(&mut buf)
            .map_err(|e| fail(Some(lineno + 1), format!("cannot read: {e}")))?;
        if n == 0 {
            break;
        }
        lineno += 1;
        let complete = buf.ends_with('\n');
        let text = buf.trim();
        if text.is_empty() {
            continue;
        }
        if header.is_none() {
            let h: Header = serde_json::from_str(text).map_err(|e| {
                fail(
                    Some(lineno),
                    format!("not an assay results header ({e}); is this a results file?"),
                )
            })?;
            if h.schema != SCHEMA && h.schema != SCHEMA_RACE {
                return Err(fail(
                    Some(lineno),
                    format!(
                        "schema `{}` is not supported (expected `{SCHEMA}` or `{SCHEMA_RACE}`)",
                        h.schema
                    ),
                ));
            }
            header = Some(h);
            continue;
        }
        // Elimination lines are written with their tag first; any other line is a run record
        // (or, hand-edited with its keys reordered, an elimination after all).
        let parsed = if text.starts_with("{\"record\":") {
            serde_json::from_str::<Elimination>(text).map(|e| Line::Elimination(Box::new(e)))
        } else {
            serde_json::from_str::<RunRecord>(text)
                .map(|r| Line::Run(Box::new(r)))
                .or_else(|e| {
                    serde_json::from_str::<Elimination>(text)
                        .map(|e| Line::Elimination(Box::new(e)))
                        .map_err(|_| e)
                })
        };
        match parsed {
            Ok(Line::Run(r)) => {
                runs.push(*r);
                lines.push(lineno);
            }
            Ok(Line::Elimination(e)) => {
                eliminations.push(*e);
                elimination_lines.push(lineno);
            }
            Err(_) if allow_torn_tail && !complete => {
                torn_tail = true;
            }
            Err(e) => {
                let hint = if complete {
                    "garbled run record"
                } else {
                    "truncated run record (the file ends mid-line)"
                };
                return Err(fail(Some(lineno), format!("{hint}: {e}")));
            }
        }
    }
    let header = header.ok_or_else(|| fail(None, "empty file: no header line".to_string()))?;
    Ok((
        Results {
            path: path.to_path_buf(),
            header,
            runs,
            eliminations,
            torn_tail,
        },
        lines,
        elimination_lines,
    ))
}

/// A record line after the header.
enum Line {
    Run(Box<RunRecord>),
    Elimination(Box<Elimination>),
}

#[cfg(test)]
mod sweep_tests {
    use super::*;
    use serde_json::json;

    fn header_of(targets: Value) -> Header {
        serde_json::from_value(json!({
            "schema": SCHEMA,
            "study": { "name": "s", "replicates": 2, "seed": 1, "sampler": {}, "grid": [] },
            "targets": targets
        }))
        .unwrap()
    }

    fn swept(label: &str, d: u64, ar1: f64) -> Value {
        json!({
            "label": label, "family": "gaussian", "dim": d, "log_z": 0.0, "mean": null,
            "covariance": null, "params": { "dim": d, "ar1": ar1, "family": "gaussian" },
            "sweep": { "label": "g", "values": [["dim", d], ["ar1", ar1]] }
        })
    }

    #[test]
    fn headers_without_sweeps_read_unchanged_and_write_no_sweep_field() {
        // A target as written before sweeps existed.
        let old = json!([{ "label": "a", "family": "gaussian", "dim": 2, "log_z": 0.0,
                           "mean": [0.0, 0.0], "covariance": null }]);
        let h = header_of(old);
        assert_eq!(h.targets[0].sweep, None);
        assert!(h.sweeps().is_empty());
        let text = serde_json::to_string(&h).unwrap();
        assert!(!text.contains("sweep"), "{text}");
    }

    #[test]
    fn sweep_membership_round_trips_and_groups() {
        let h = header_of(json!([
            swept("g-dim_2-ar1_0.9", 2, 0.9),
            { "label": "other", "family": "banana", "dim": 2, "log_z": 0.0, "mean": null,
              "covariance": null },
            swept("g-dim_5-ar1_0.9", 5, 0.9),
        ]));
        let back: Header = serde_json::from_str(&serde_json::to_string(&h).unwrap()).unwrap();
        assert_eq!(back, h);
        let sw = h.targets[0].sweep.as_ref().unwrap();
        assert_eq!(sw.values[1], ("ar1".to_string(), json!(0.9)));
        // The swept value keeps its bits through the file.
        assert_eq!(sw.values[1].1.as_f64().unwrap().to_bits(), 0.9f64.to_bits());
        assert_eq!(
            h.sweeps(),
            vec![Sweep {
                label: "g".into(),
                keys: vec!["dim".into(), "ar1".into()],
                targets: vec![0, 2],
            }]
        );
        // Design comparison: the same header is one design; another swept value is not, and
        // the difference names the parameter.
        assert_eq!(h.design_difference(&back), None);
        let other = header_of(json!([
            swept("g-dim_2-ar1_0.9", 2, 0.5),
            { "label": "other", "family": "banana", "dim": 2, "log_z": 0.0, "mean": null,
              "covariance": null },
            swept("g-dim_5-ar1_0.9", 5, 0.9),
        ]));
        let d = h.design_difference(&other).unwrap();
        assert!(d.contains("`ar1`"), "{d}");
    }
}
