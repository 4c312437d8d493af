//! Charts of a results file, written as SVG.
//!
//! | file | what it shows |
//! |------|---------------|
//! | `error-vs-cost.svg` | a score (default `rmse_mean`) against mean seconds per run, log-log, one point per cell, the Pareto front of each target as a step line ([`cost`]) |
//! | `evidence-error.svg` | log_evidence - log Z of every replicate, per cell, as box and jittered strip, one panel per target ([`evidence`]) |
//! | `traces.svg` | per-iteration ESS / N, median and 10-90 % band over replicates, with temperature and acceptance panels when runs report them; one row of panels per target ([`traces`]) |
//! | `heatmap-<a>-<b>.svg` | a score over two grid axes, averaged over the others, one panel per target ([`heatmap`]) |
//! | `sweep-<label>.svg` | per sweep, a score (default `ess_per_second`) against the swept value, one line per cell, biased points hollow ([`sweep`]) |
//!
//! Charts that cannot be drawn (no runs, no finished runs, a grid with fewer than two varying
//! axes, ...) are skipped with a note; nothing here panics on any results file. Scores of
//! different targets are never put on one colour scale or one category axis: targets get their
//! own panels, except on the error-vs-cost chart, where each target has its own marker, colour
//! and Pareto front.

use std::fmt;
use std::path::{Path, PathBuf};

use serde_json::{Map, Value};

use crate::results::{Results, RunRecord, TargetInfo, cell_key};
use crate::scores::{CellRuns, CellScores, Metric, score_cell};
use crate::settings::SamplerSettings;

pub mod canvas;
pub mod cost;
pub mod evidence;
pub mod heatmap;
pub mod palette;
pub mod sweep;
pub mod traces;

#[cfg(test)]
pub(crate) mod testkit;

/// A drawn chart.
#[derive(Debug, Clone)]
pub struct Chart {
    /// File name (no directory).
    pub file: String,
    /// Title, also the SVG `<title>`.
    pub title: String,
    /// One sentence on what the chart shows (for reports and alt text).
    pub caption: String,
    /// The SVG document.
    pub svg: String,
}

/// Charts of a study and notes on those that were skipped or shortened.
#[derive(Debug, Clone, Default)]
pub struct ChartSet {
    pub charts: Vec<Chart>,
    pub notes: Vec<String>,
}

/// Why charts could not be written.
#[derive(Debug)]
pub struct PlotError {
    pub path: PathBuf,
    pub message: String,
}

impl fmt::Display for PlotError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}: {}", self.path.display(), self.message)
    }
}

impl std::error::Error for PlotError {}

/// Default score of the error-vs-cost chart.
pub const DEFAULT_ERROR_SCORE: Metric = Metric::RmseMean;
/// Default score of the heat maps (the default ranking metric), and its fallback when no cell
/// has a value of it.
pub const DEFAULT_HEATMAP_SCORE: Metric = Metric::EssPerSecond;
pub const FALLBACK_HEATMAP_SCORE: Metric = Metric::RmseMean;

/// Draw every chart of `results`. `score` replaces the default score of the error-vs-cost chart
/// and the heat maps.
pub fn render_charts(results: &Results, score: Option<Metric>) -> ChartSet {
    let view = View::new(results);
    let mut set = ChartSet::default();
    if view.cells.is_empty() {
        set.notes.push(
            "No charts: the results file has no run records (of the targets in its header)."
                .to_string(),
        );
        return set;
    }
    let take = |r: Result<Chart, String>, set: &mut ChartSet| match r {
        Ok(c) => set.charts.push(c),
        Err(note) => set.notes.push(note),
    };
    take(
        cost::chart(&view, score.unwrap_or(DEFAULT_ERROR_SCORE)),
        &mut set,
    );
    take(evidence::chart(&view), &mut set);
    let (tr, tr_notes) = traces::chart(&view);
    take(tr, &mut set);
    set.notes.extend(tr_notes);
    let (maps, notes) = heatmap::charts(&view, score);
    for m in maps {
        take(m, &mut set);
    }
    set.notes.extend(notes);
    let (sweeps, notes) = sweep::charts(&view, score);
    for c in sweeps {
        take(c, &mut set);
    }
    set.notes.extend(notes);
    set
}

/// Draw every chart of `results` and write them into `dir` (created if missing).
pub fn write_charts(
    results: &Results,
    dir: &Path,
    score: Option<Metric>,
) -> Result<ChartSet, PlotError> {
    std::fs::create_dir_all(dir).map_err(|e| PlotError {
        path: dir.to_path_buf(),
        message: format!("cannot create the output directory: {e}"),
    })?;
    let set = render_charts(results, score);
    for c in &set.charts {
        let path = dir.join(&c.file);
        // Aside and renamed: a full disk leaves the old chart (or none), never a torn one.
        crate::results::write_atomically(&path, c.svg.as_bytes()).map_err(|e| PlotError {
            path: path.clone(),
            message: format!("cannot write the chart: {e}"),
        })?;
    }
    Ok(set)
}

/// A grid axis with more than one value.
#[derive(Debug, Clone)]
pub struct GridAxis {
    pub name: String,
    /// Abbreviation used in compact cell labels.
    pub short: String,
    pub values: Vec<Value>,
}

/// One (target, cell) of the study with its runs and scores.
#[derive(Debug, Clone)]
pub struct CellView<'a> {
    /// Index of the target in the header.
    pub target: usize,
    pub settings: Map<String, Value>,
    /// Index of the cell's settings among the distinct cells of the study (the same settings
    /// get the same style on every target).
    pub style: usize,
    /// Compact label from the varying axes, e.g. `scale=0.5 L=gopt`.
    pub label: String,
    /// Full label, e.g. `proposal_scale = 0.5, backward_kernel = gaussian-optimal`.
    pub long_label: String,
    pub runs: Vec<&'a RunRecord>,
    pub scores: CellScores,
    /// Particles of the cell, when its settings are known.
    pub particles: Option<usize>,
}

/// Runs of one (target index, cell key, settings) in order of appearance.
type Group<'a> = (usize, String, Map<String, Value>, Vec<&'a RunRecord>);

/// The study as the charts see it.
#[derive(Debug, Clone)]
pub struct View<'a> {
    pub results: &'a Results,
    /// Grid axes with more than one value, in grid order.
    pub axes: Vec<GridAxis>,
    /// Cells by target (header order), then grid order.
    pub cells: Vec<CellView<'a>>,
    /// Number of distinct cell settings.
    pub styles: usize,
}

impl<'a> View<'a> {
    pub fn new(results: &'a Results) -> View<'a> {
        let study = &results.header.study;
        let axes = varying_axes(&study.grid);
        let targets = &results.header.targets;
        // Group runs by (target, cell) in order of first appearance.
        let mut groups: Vec<Group> = Vec::new();
        let mut index = std::collections::HashMap::new();
        for r in &results.runs {
            let Some(ti) = targets.iter().position(|t| t.label == r.target) else {
                continue;
            };
            let key = r.cell_key();
            let slot = *index.entry((ti, key.clone())).or_insert_with(|| {
                groups.push((ti, key, r.settings.clone(), Vec::new()));
                groups.len() - 1
            });
            groups[slot].3.push(r);
        }
        // Grid order: position of each value on each grid axis.
        let order = |s: &Map<String, Value>| -> Vec<usize> {
            study
                .grid
                .iter()
                .map(|(k, vals)| {
                    s.get(k)
                        .and_then(|v| vals.iter().position(|x| x == v))
                        .unwrap_or(usize::MAX)
                })
                .collect()
        };
        groups.sort_by(|a, b| (a.0, order(&a.2), &a.1).cmp(&(b.0, order(&b.2), &b.1)));
        let mut keys: Vec<(Vec<usize>, String)> =
            groups.iter().map(|g| (order(&g.2), g.1.clone())).collect();
        keys.sort();
        keys.dedup();
        let cells = groups
            .into_iter()
            .map(|(ti, key, settings, runs)| {
                let t: &TargetInfo = &targets[ti];
                let collected = CellRuns::collect(&runs, t);
                let scores = score_cell(&collected, t);
                let style = keys.iter().position(|(_, k)| *k == key).unwrap_or(0);
                CellView {
                    target: ti,
                    label: compact_label(&axes, &settings),
                    long_label: long_label(&axes, &settings),
                    particles: particles_of(&study.sampler, &settings),
                    settings,
                    style,
                    runs,
                    scores,
                }
            })
            .collect();
        View {
            results,
            axes,
            cells,
            styles: keys.len(),
        }
    }

    /// The header's target `i`.
    pub fn target(&self, i: usize) -> &TargetInfo {
        &self.results.header.targets[i]
    }

    /// Indices of the targets that have cells, in header order.
    pub fn targets_with_cells(&self) -> Vec<usize> {
        let mut t: Vec<usize> = self.cells.iter().map(|c| c.target).collect();
        t.dedup();
        t
    }

    /// Cells of target `t`.
    pub fn cells_of(&self, t: usize) -> Vec<&CellView<'a>> {
        self.cells.iter().filter(|c| c.target == t).collect()
    }

    /// The key of abbreviations used in compact labels, e.g.
    /// `scale = proposal_scale; gopt = gaussian-optimal`, or `None` when nothing is shortened.
    pub fn abbreviation_key(&self) -> Option<String> {
        let all: Vec<&GridAxis> = self.axes.iter().collect();
        abbreviation_key(&all, true)
    }
}

/// The key of abbreviations used for the values of `axes` (and for their names, with
/// `names`), or `None` when nothing is shortened.
pub fn abbreviation_key(axes: &[&GridAxis], names: bool) -> Option<String> {
    {
        let mut parts: Vec<String> = Vec::new();
        for a in axes.iter().filter(|_| names) {
            if a.short != a.name {
                parts.push(format!("{} = {}", a.short, a.name));
            }
        }
        let mut vals: Vec<String> = Vec::new();
        for a in axes {
            for v in &a.values {
                let (full, short) = (value_text(v), short_value(v));
                let item = format!("{short} = {full}");
                if short != full && !vals.contains(&item) {
                    vals.push(item);
                }
            }
        }
        parts.extend(vals);
        (!parts.is_empty()).then(|| format!("Cell labels: {}.", parts.join(", ")))
    }
}

/// Grid axes with more than one value.
pub fn varying_axes(grid: &[(String, Vec<Value>)]) -> Vec<GridAxis> {
    let names: Vec<&str> = grid
        .iter()
        .filter(|(_, v)| v.len() > 1)
        .map(|(k, _)| k.as_str())
        .collect();
    let shorts: Vec<String> = names.iter().map(|n| short_axis(n)).collect();
    let unique = shorts
        .iter()
        .enumerate()
        .all(|(i, s)| !shorts[..i].contains(s));
    grid.iter()
        .filter(|(_, v)| v.len() > 1)
        .zip(shorts)
        .map(|((k, v), s)| GridAxis {
            name: k.clone(),
            short: if unique { s } else { k.clone() },
            values: v.clone(),
        })
        .collect()
}

/// Abbreviation of a setting name: hand-picked for the built-in sampler's keys, otherwise the
/// initials of the name's `_`-separated parts (names of one short part are kept).
pub fn short_axis(name: &str) -> String {
    let known = match name {
        "particles" => "N",
        "initial_scale" => "s0",
        "iterations" => "iters",
        "schedule" => "sched",
        "cess_target" => "cess",
        "max_steps" => "maxsteps",
        "move_steps" => "msteps",
        "proposal_scale" => "scale",
        "proposal_shape" => "shape",
        "backward_kernel" => "L",
        "resampling" => "resamp",
        "ess_threshold" => "ess_thr",
        _ => "",
    };
    if !known.is_empty() {
        return known.to_string();
    }
    let parts: Vec<&str> = name.split(['_', '-']).filter(|p| !p.is_empty()).collect();
    if parts.len() <= 1 && name.chars().count() <= 8 {
        return name.to_string();
    }
    if parts.len() <= 1 {
        return name.chars().take(6).collect();
    }
    parts.iter().filter_map(|p| p.chars().next()).collect()
}

/// Text of a setting value.
pub use crate::results::value_text;

/// Short text of a setting value: hand-picked for the built-in sampler's option names,
/// otherwise the value itself, cut at 10 characters.
pub fn short_value(v: &Value) -> String {
    let Value::String(s) = v else {
        return value_text(v);
    };
    let known = match s.as_str() {
        "random-walk" => "rw",
        "metropolis" => "mh",
        "tempered" => "temp",
        "adaptive" => "adapt",
        "identity" => "id",
        "particle-covariance" => "pcov",
        "proposal" => "prop",
        "gaussian-optimal" => "gopt",
        "gaussian-optimal-crossfit" => "gopt-cf",
        "multinomial" => "multi",
        "systematic" => "syst",
        "stratified" => "strat",
        "residual" => "resid",
        _ => "",
    };
    if !known.is_empty() {
        return known.to_string();
    }
    if s.chars().count() <= 10 {
        s.clone()
    } else {
        let mut t: String = s.chars().take(9).collect();
        t.push('…');
        t
    }
}

/// Compact label of a cell: `short=value` for each varying axis.
pub fn compact_label(axes: &[GridAxis], settings: &Map<String, Value>) -> String {
    if axes.is_empty() {
        return "the only cell".to_string();
    }
    axes.iter()
        .map(|a| {
            let v = settings
                .get(&a.name)
                .map_or_else(|| "?".to_string(), short_value);
            format!("{}={v}", a.short)
        })
        .collect::<Vec<_>>()
        .join(" ")
}

/// Full label of a cell: `name = value` for each varying axis.
pub fn long_label(axes: &[GridAxis], settings: &Map<String, Value>) -> String {
    if axes.is_empty() {
        return "the only cell".to_string();
    }
    axes.iter()
        .map(|a| {
            let v = settings
                .get(&a.name)
                .map_or_else(|| "?".to_string(), value_text);
            format!("{} = {v}", a.name)
        })
        .collect::<Vec<_>>()
        .join(", ")
}

/// Particles of a cell: the cell's settings over the `[sampler]` table over the defaults.
fn particles_of(sampler: &Map<String, Value>, settings: &Map<String, Value>) -> Option<usize> {
    let mut table = sampler.clone();
    for (k, v) in settings {
        table.insert(k.clone(), v.clone());
    }
    serde_json::from_value::<SamplerSettings>(Value::Object(table))
        .ok()
        .map(|s| s.particles)
        .filter(|n| *n > 0)
}

/// The canonical key of a cell's settings (re-exported for the chart modules).
pub fn key_of(settings: &Map<String, Value>) -> String {
    cell_key(settings)
}

/// A file-name-safe form of a setting name.
pub fn file_part(name: &str) -> String {
    let s: String = name
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || c == '_' || c == '-' {
                c
            } else {
                '_'
            }
        })
        .collect();
    if s.is_empty() { "axis".to_string() } else { s }
}

/// The `q`-quantile of sorted, finite `v` by linear interpolation: type 7 of Hyndman & Fan
/// (1996), "Sample quantiles in statistical packages", *The American Statistician* 50(4).
/// `None` when empty.
pub fn sorted_quantile(v: &[f64], q: f64) -> Option<f64> {
    if v.is_empty() {
        return None;
    }
    let h = (v.len() - 1) as f64 * q.clamp(0.0, 1.0);
    let (lo, hi) = (h.floor() as usize, h.ceil() as usize);
    Some(v[lo] + (h - lo as f64) * (v[hi] - v[lo]))
}

/// A few words on what a metric measures, with its unit.
pub fn metric_description(m: Metric) -> &'static str {
    match m {
        Metric::EssPerSecond => "variance-implied ESS per second of run time",
        Metric::VarianceEss => "iid sample size with the same mean-squared error",
        Metric::RmseMean => "root mean squared error of the posterior-mean estimate",
        Metric::LogZErrorSd => "sd over replicates of the log-evidence error, nats",
        Metric::LogZErrorAbs => "absolute mean log-evidence error, nats",
        Metric::CovarianceError => "relative Frobenius error of the covariance estimate",
        Metric::KishEss => "the sampler's own final Kish ESS",
        Metric::Seconds => "mean wall-clock seconds per run",
    }
}

/// Format a value for a chart label.
pub fn fmt_value(x: f64) -> String {
    crate::table::fmt_num(x, 3)
}

#[cfg(test)]
mod tests {
    use super::testkit;
    use super::*;

    #[test]
    fn labels_are_compact_and_keyed() {
        let r = testkit::demo_study();
        let v = View::new(&r);
        assert_eq!(v.axes.len(), 3);
        assert_eq!(v.cells.len(), 24);
        assert_eq!(v.styles, 12);
        assert_eq!(v.cells[0].label, "scale=0.25 move=rw path=static");
        let key = v.abbreviation_key().unwrap();
        assert!(key.contains("scale = proposal_scale"), "{key}");
        assert!(key.contains("rw = random-walk"), "{key}");
        // The same settings get the same style on both targets.
        let a = &v.cells[3];
        let b = v
            .cells
            .iter()
            .find(|c| c.target == 1 && c.settings == a.settings)
            .unwrap();
        assert_eq!(a.style, b.style);
        assert_eq!(a.particles, Some(400));
    }

    #[test]
    fn empty_study_gives_notes_not_charts() {
        let r = testkit::empty_study();
        let set = render_charts(&r, None);
        assert!(set.charts.is_empty());
        assert_eq!(set.notes.len(), 1);
    }

    #[test]
    fn every_chart_of_the_demo_is_well_formed() {
        let r = testkit::demo_study();
        let set = render_charts(&r, None);
        let names: Vec<&str> = set.charts.iter().map(|c| c.file.as_str()).collect();
        assert!(names.contains(&"error-vs-cost.svg"), "{names:?}");
        assert!(names.contains(&"evidence-error.svg"));
        assert!(names.contains(&"traces.svg"));
        assert!(names.contains(&"heatmap-proposal_scale-move.svg"));
        for c in &set.charts {
            testkit::check_svg(&c.svg).unwrap_or_else(|e| panic!("{}: {e}", c.file));
        }
    }

    #[test]
    fn write_charts_names_the_unwritable_path() {
        let r = testkit::demo_study();
        let dir = std::env::temp_dir().join(format!("assay-plot-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let file = dir.join("not-a-dir");
        std::fs::write(&file, "x").unwrap();
        let e = write_charts(&r, &file.join("sub"), None).unwrap_err();
        assert!(e.to_string().contains("not-a-dir"), "{e}");
        let set = write_charts(&r, &dir, None).unwrap();
        assert!(dir.join("traces.svg").exists());
        assert!(!set.charts.is_empty());
        let _ = std::fs::remove_dir_all(&dir);
    }

    /// Write the demo study, its charts and its report into `$ASSAY_PLOT_PREVIEW` for viewing.
    #[test]
    fn preview_when_asked() {
        let Some(dir) = std::env::var_os("ASSAY_PLOT_PREVIEW") else {
            return;
        };
        let dir = PathBuf::from(dir);
        for (name, r) in [
            ("demo", testkit::demo_study()),
            ("single", testkit::single_cell_study()),
            ("failed", testkit::failed_study()),
            ("one-axis", testkit::one_axis_study()),
        ] {
            let d = dir.join(name);
            std::fs::create_dir_all(&d).unwrap();
            testkit::write_jsonl(&r, &d.join("results.jsonl"));
            crate::report::write_report(&r, &d, None, None).unwrap();
        }
    }
}
