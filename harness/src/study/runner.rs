//! The study runner: every (target, cell, replicate) run, in parallel, written as it finishes.
//!
//! Each run's seed is a function of the master seed, the target label, the cell and the
//! replicate alone ([`crate::seed::run_seed`]), so the records do not depend on the thread
//! count, the order of execution, sharding or resumption. Records are written one line at a
//! time and flushed, so an interrupted study loses only the runs in flight.

use std::collections::HashSet;
use std::fmt;
use std::fs::{File, OpenOptions};
use std::io::{IsTerminal, Write};
use std::panic::{AssertUnwindSafe, catch_unwind};
use std::path::{Path, PathBuf};
use std::sync::Mutex;
use std::time::{Duration, Instant};

use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};

use super::config::Study;
use crate::engine::Smc;
use crate::external::ExternalSampler;
use crate::results::{Header, RunRecord, SCHEMA, SCHEMA_RACE, read_validated};
use crate::sampler::{RunContext, RunOutput, Sampler};
use crate::seed::run_seed;

/// A deterministic part of a study: runs whose index i satisfies i mod `count` == `index` - 1.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Shard {
    /// 1-based shard number K.
    pub index: u64,
    /// Number of shards N.
    pub count: u64,
}

impl Shard {
    /// Parse `K/N` with 1 <= K <= N.
    pub fn parse(s: &str) -> Result<Shard, String> {
        let bad =
            || format!("--shard `{s}` is not allowed; allowed: K/N with 1 <= K <= N, e.g. 2/8");
        let (k, n) = s.split_once('/').ok_or_else(bad)?;
        let index: u64 = k.trim().parse().map_err(|_| bad())?;
        let count: u64 = n.trim().parse().map_err(|_| bad())?;
        if index == 0 || count == 0 || index > count {
            return Err(bad());
        }
        Ok(Shard { index, count })
    }

    /// Whether run `i` belongs to this shard.
    pub fn contains(&self, i: u64) -> bool {
        i % self.count == self.index - 1
    }
}

/// How to run a study.
#[derive(Debug, Clone, Default)]
pub struct RunOptions {
    /// Results file; default `results/<name>.jsonl`.
    pub out: Option<PathBuf>,
    /// Worker threads; default all cores.
    pub threads: Option<usize>,
    /// Run only this part of the study.
    pub shard: Option<Shard>,
    /// Continue an existing results file of the same study.
    pub resume: bool,
    /// Replace an existing results file.
    pub replace: bool,
    /// No progress bar.
    pub quiet: bool,
}

/// Why a study could not run.
#[derive(Debug)]
pub struct RunError(pub String);

impl fmt::Display for RunError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.0)
    }
}

impl std::error::Error for RunError {}

/// What a finished study did.
#[derive(Debug, Clone)]
pub struct RunSummary {
    pub out: PathBuf,
    pub ran: u64,
    pub skipped: u64,
    pub failed: u64,
    pub seconds: f64,
}

/// The identity of run number `i`: (target index, cell index, replicate).
pub fn run_identity(study: &Study, i: u64) -> (usize, usize, u64) {
    let r = study.info.replicates;
    let cells = study.cells.len() as u64;
    let rep = i % r;
    let c = (i / r) % cells;
    let t = i / (r * cells);
    (t as usize, c as usize, rep)
}

/// The run number executed `j`-th: replicate-major, then target, then cell, so that one
/// replicate of every cell of every target runs before the next replicate of any. The runs of
/// a cell are then spread over the whole study, and a slow spell of the machine slows every
/// cell a little instead of a few cells a lot (ESS per second is a score). Run numbers, which
/// decide shards, keep the replicate fastest, so that a shard takes the same share of every
/// cell; a bijection of `0..total` onto itself.
pub fn run_at_turn(study: &Study, j: u64) -> u64 {
    let r = study.info.replicates;
    let cells = study.cells.len() as u64;
    let targets = study.targets.len() as u64;
    if cells == 0 || targets == 0 {
        return j;
    }
    let c = j % cells;
    let t = (j / cells) % targets;
    let rep = j / (cells * targets);
    (t * cells + c) * r + rep
}

/// The header line of a study's results file, with the given target records.
pub fn header_of(study: &Study, targets: Vec<crate::results::TargetInfo>) -> Header {
    Header {
        schema: if study.info.race.is_some() {
            SCHEMA_RACE
        } else {
            SCHEMA
        }
        .to_string(),
        study: study.info.clone(),
        targets,
    }
}

/// Where reference values of a results file's targets are stored: `references/` beside it.
pub fn reference_dir_for(out: &Path) -> PathBuf {
    out.parent()
        .map(|p| p.join("references"))
        .unwrap_or_else(|| PathBuf::from("references"))
}

/// A results file open for appending records: the file, the first write error, and the
/// temporary file of a `--replace` that has not yet been renamed into place, under one lock.
/// Once a write has failed nothing more is written, so a torn record can only be the last
/// line.
pub struct Sink {
    out: PathBuf,
    state: Mutex<(File, Option<String>, Option<PathBuf>)>,
}

impl Sink {
    /// The results file.
    pub fn out(&self) -> &Path {
        &self.out
    }

    /// True once a write has failed (or a worker panicked holding the lock).
    fn failed(&self) -> bool {
        self.state.lock().map(|w| w.1.is_some()).unwrap_or(true)
    }

    /// Write one line (its newline included) in one write, and flush. False when writing has
    /// failed, now or before: nothing more is written then.
    pub fn write_line(&self, line: &str) -> bool {
        let Ok(mut w) = self.state.lock() else {
            return false;
        };
        let (f, error, pending) = &mut *w;
        // After a failed write nothing more is written: a record that fits once space is
        // freed again would otherwise follow the torn fragment on the same line, in the
        // middle of the file, where resume cannot repair it.
        if error.is_some() {
            return false;
        }
        // One write per record, newline included: a kill leaves at most one torn line,
        // never a complete record without its newline.
        if let Err(e) = f.write_all(line.as_bytes()).and_then(|_| f.flush()) {
            *error = Some(format!("cannot write {}: {e}", self.out.display()));
            return false;
        }
        if let Some(tmp) = pending.take() {
            // The first record is written: the study has started cleanly, and the new
            // file takes the old one's place.
            if let Err(e) = std::fs::rename(&tmp, &self.out) {
                *error = Some(format!("cannot replace {}: {e}", self.out.display()));
                *pending = Some(tmp);
                return false;
            }
        }
        true
    }

    /// Remove the temporary file of a replacement that will not happen.
    fn discard(&self) {
        if let Ok(mut w) = self.state.lock()
            && let Some(tmp) = w.2.take()
        {
            let _ = std::fs::remove_file(tmp);
        }
    }

    /// Close the file: report the first write error, or put a pending replacement in place
    /// (a study with nothing left to run is complete as it stands).
    pub fn finish(self) -> Result<(), RunError> {
        let out = self.out;
        let (_, error, pending) = self
            .state
            .into_inner()
            .map_err(|_| RunError(format!("a worker failed while writing {}", out.display())))?;
        if let Some(e) = error {
            if let Some(tmp) = pending {
                let _ = std::fs::remove_file(tmp);
            }
            return Err(RunError(e));
        }
        if let Some(tmp) = pending {
            std::fs::rename(&tmp, &out).map_err(|e| {
                let _ = std::fs::remove_file(&tmp);
                RunError(format!("cannot replace {}: {e}", out.display()))
            })?;
        }
        Ok(())
    }
}

/// A results file opened for a study.
pub struct Opened {
    pub sink: Sink,
    /// Worker threads to start (settled, with the memory check, before any file was touched).
    pub threads: usize,
    /// What the file already held, when resumed.
    pub existing: Option<crate::results::Results>,
    /// The file's header (with the reference values the runs are scored against).
    pub header: Header,
}

/// Open the results file of a study: settle threads and memory, then either resume an
/// existing file of the same study (its torn last line cut off) or write a new header (under
/// a temporary name when replacing).
pub fn open_results(study: &Study, opts: &RunOptions) -> Result<Opened, RunError> {
    let out = opts.out.clone().unwrap_or_else(|| study.default_output());
    for t in &study.targets {
        if let Some(x) = &t.external {
            x.set_log_dir(log_dir_for(&out));
        }
    }
    // Reference values do not enter the comparison of studies, so the check against an existing
    // file needs no reference run; references are computed only once the output is settled.
    let declared = header_of(
        study,
        study.targets.iter().map(|t| t.info.clone()).collect(),
    );
    // Threads and memory are settled before any file is touched: a study that cannot fit is
    // refused with the figure, instead of aborting on an allocation failure mid-way.
    let threads = super::limits::worker_threads(opts.threads, study.total_runs());
    super::limits::check_memory(study, threads, super::limits::available_memory())
        .map_err(RunError)?;
    // A replaced file is written under a temporary name and renamed over the old one only
    // once the study has started cleanly (its first record written, or its end reached), so
    // that a refused or failed start leaves the old results as they were.
    let mut replacing: Option<PathBuf> = None;
    let mut existing_runs = None;
    let header;

    let file = if out.exists() && opts.resume {
        let existing =
            read_validated(&out, true).map_err(|e| RunError(format!("cannot resume: {e}")))?;
        if let Some(what) = existing.header.study_difference(&declared) {
            return Err(RunError(format!(
                "cannot resume {}: it holds results of a different study ({what}: the file \
                 against the study file); use --replace to start afresh or --out to write \
                 elsewhere",
                out.display()
            )));
        }
        if existing.torn_tail {
            drop_torn_tail(&out)?;
        }
        end_with_newline(&out)?;
        header = existing.header.clone();
        existing_runs = Some(existing);
        OpenOptions::new()
            .append(true)
            .open(&out)
            .map_err(|e| RunError(format!("cannot open {} for appending: {e}", out.display())))?
    } else {
        if out.exists() && !opts.replace {
            return Err(RunError(format!(
                "{} already exists; pass --resume to continue it, --replace to start it \
                 afresh, or --out FILE to write elsewhere",
                out.display()
            )));
        }
        let infos =
            super::reference::complete_infos(study, &reference_dir_for(&out), Some(threads))
                .map_err(RunError)?;
        header = header_of(study, infos);
        if let Some(dir) = out.parent().filter(|d| !d.as_os_str().is_empty()) {
            std::fs::create_dir_all(dir)
                .map_err(|e| RunError(format!("cannot create {}: {e}", dir.display())))?;
        }
        let path = if out.exists() {
            let tmp = crate::results::temporary_path(&out);
            replacing = Some(tmp.clone());
            tmp
        } else {
            out.clone()
        };
        let line = serde_json::to_string(&header)
            .map_err(|e| RunError(format!("cannot encode the header: {e}")))?;
        let made = File::create(&path).and_then(|mut f| {
            writeln!(f, "{line}").and_then(|_| f.flush())?;
            Ok(f)
        });
        match made {
            Ok(f) => f,
            Err(e) => {
                if replacing.is_some() {
                    let _ = std::fs::remove_file(&path);
                }
                return Err(RunError(format!("cannot write {}: {e}", out.display())));
            }
        }
    };
    Ok(Opened {
        sink: Sink {
            out,
            state: Mutex::new((file, None, replacing)),
        },
        threads,
        existing: existing_runs,
        header,
    })
}

/// The worker threads of a study (on failure, a pending replacement is given up).
pub fn worker_pool(threads: usize, sink: &Sink) -> Result<rayon::ThreadPool, RunError> {
    rayon::ThreadPoolBuilder::new()
        .num_threads(threads)
        .build()
        .map_err(|e| {
            sink.discard();
            RunError(format!("cannot start worker threads: {e}"))
        })
}

/// Make every run `wanted` accepts, in the order of [`run_at_turn`], on the pool's threads,
/// writing each record as it finishes and handing it to `keep`; returns the number of failed
/// runs. Stops handing out runs once a write has failed (the error is in the sink).
pub fn run_wanted(
    study: &Study,
    sink: &Sink,
    pool: &rayon::ThreadPool,
    wanted: &(dyn Fn(u64) -> bool + Sync),
    bar: &ProgressBar,
    keep: &(dyn Fn(&RunRecord) + Sync),
) -> u64 {
    let total = study.total_runs();
    let log_dir = log_dir_for(sink.out());
    let failed = std::sync::atomic::AtomicU64::new(0);
    // Runs are handed out one at a time from a shared counter, so a thread that finishes its
    // run takes the next one whatever the others are doing: the load stays balanced when the
    // cost of runs differs between targets and cells (rayon's adaptive splitting of the index
    // range left one of two threads idle for a third of a study whose halves differed in cost).
    // The counter counts turns, taken in the order of `run_at_turn`. Results do not depend on
    // which thread does a run, or when: every run's seed comes from its identity.
    let next = std::sync::atomic::AtomicU64::new(0);
    pool.broadcast(|_| {
        loop {
            let j = next.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
            if j >= total {
                break;
            }
            let i = run_at_turn(study, j);
            if !wanted(i) {
                continue;
            }
            if sink.failed() {
                break;
            }
            let record = execute(study, i, Some(&log_dir));
            if !record.output.is_ok() {
                failed.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
            }
            let line = match serde_json::to_string(&record) {
                Ok(l) => l + "\n",
                Err(e) => {
                    let failed = RunRecord {
                        output: RunOutput::failed(format!("cannot encode the record: {e}")),
                        ..record.clone()
                    };
                    serde_json::to_string(&failed).unwrap_or_default() + "\n"
                }
            };
            if !sink.write_line(&line) {
                break;
            }
            keep(&record);
            bar.inc(1);
        }
    });
    failed.into_inner()
}

/// Run a study (or one shard of it), writing every record to the results file.
pub fn run_study(study: &Study, opts: &RunOptions) -> Result<RunSummary, RunError> {
    let started = Instant::now();
    let Opened {
        sink,
        threads,
        existing,
        ..
    } = open_results(study, opts)?;
    let mut done: HashSet<(String, String, u64)> = HashSet::new();
    for r in existing.iter().flat_map(|e| &e.runs) {
        done.insert((r.target.clone(), r.cell_key(), r.replicate));
    }
    drop(existing);

    let total = study.total_runs();
    // Which runs to do, as a predicate rather than a list, so memory does not grow with the
    // size of the study.
    let wanted = |i: u64| {
        if !opts.shard.is_none_or(|s| s.contains(i)) {
            return false;
        }
        if done.is_empty() {
            return true;
        }
        let (t, c, rep) = run_identity(study, i);
        !done.contains(&(
            study.targets[t].info.label.clone(),
            study.cells[c].key.clone(),
            rep,
        ))
    };
    let in_shard = (0..total)
        .filter(|&i| opts.shard.is_none_or(|s| s.contains(i)))
        .count() as u64;
    let todo_len = (0..total).filter(|&i| wanted(i)).count() as u64;
    let skipped = in_shard - todo_len;

    let bar = progress_bar(todo_len, opts.quiet);
    let pool = worker_pool(threads, &sink)?;
    let failed = run_wanted(study, &sink, &pool, &wanted, &bar, &|_| {});
    bar.finish_and_clear();
    let out = sink.out().to_path_buf();
    sink.finish()?;
    Ok(RunSummary {
        out,
        ran: todo_len,
        skipped,
        failed,
        seconds: started.elapsed().as_secs_f64(),
    })
}

/// Make sure a results file ends with a newline before records are appended to it.
fn end_with_newline(path: &Path) -> Result<(), RunError> {
    let bytes = std::fs::read(path)
        .map_err(|e| RunError(format!("cannot read {}: {e}", path.display())))?;
    if bytes.last().is_some_and(|&b| b != b'\n') {
        let mut f = OpenOptions::new()
            .append(true)
            .open(path)
            .map_err(|e| RunError(format!("cannot open {}: {e}", path.display())))?;
        f.write_all(b"\n")
            .map_err(|e| RunError(format!("cannot write {}: {e}", path.display())))?;
    }
    Ok(())
}

/// Cut an interrupted last line off a results file.
fn drop_torn_tail(path: &Path) -> Result<(), RunError> {
    let bytes = std::fs::read(path)
        .map_err(|e| RunError(format!("cannot read {}: {e}", path.display())))?;
    let keep = bytes.iter().rposition(|&b| b == b'\n').map_or(0, |p| p + 1);
    let f = OpenOptions::new()
        .write(true)
        .open(path)
        .map_err(|e| RunError(format!("cannot open {}: {e}", path.display())))?;
    f.set_len(keep as u64)
        .map_err(|e| RunError(format!("cannot truncate {}: {e}", path.display())))
}

/// The sampler of a cell: the built-in SMC sampler, or an external program when the cell sets
/// `external` (its stderr logs go to `log_dir`).
fn sampler_for(
    study: &Study,
    c: usize,
    log_dir: Option<&Path>,
) -> Result<Box<dyn Sampler>, String> {
    if let Some(factory) = &study.sampler_factory {
        return factory(&study.cells[c]);
    }
    let s = &study.cells[c].sampler;
    match s.external.as_ref().filter(|a| !a.is_empty()) {
        None => Smc::new(s.clone())
            .map(|s| Box::new(s) as Box<dyn Sampler>)
            .map_err(|e| e.to_string()),
        Some(argv) => {
            let mut settings = match serde_json::to_value(s) {
                Ok(serde_json::Value::Object(m)) => m,
                _ => serde_json::Map::new(),
            };
            settings.remove("external");
            ExternalSampler::new(
                argv.clone(),
                s.particles,
                settings,
                log_dir.map(Path::to_path_buf),
            )
            .map(|s| Box::new(s) as Box<dyn Sampler>)
        }
    }
}

/// Where the stderr logs of external programs go for a results file: `<file>.logs/`.
pub fn log_dir_for(out: &Path) -> PathBuf {
    let mut name = out
        .file_name()
        .map(|n| n.to_os_string())
        .unwrap_or_default();
    name.push(".logs");
    out.with_file_name(name)
}

/// A finished run whose estimates are not finite cannot be written as JSON numbers (and would
/// make the results file unreadable): such a mean or covariance fails the run, a non-finite
/// evidence or ESS is recorded as unknown.
fn sanitise(mut o: RunOutput) -> RunOutput {
    let finite = |v: &[f64]| v.iter().all(|x| x.is_finite());
    if o.is_ok() {
        let bad = if o.mean.as_deref().is_some_and(|m| !finite(m)) {
            Some("mean")
        } else if o
            .covariance
            .as_ref()
            .is_some_and(|c| c.iter().any(|r| !finite(r)))
        {
            Some("covariance")
        } else {
            None
        };
        if let Some(what) = bad {
            let mut f = RunOutput::failed(format!("the sampler reported a non-finite {what}"));
            f.evaluations = o.evaluations;
            f.seconds = o.seconds;
            f.resamples = o.resamples;
            return f;
        }
    }
    o.log_evidence = o.log_evidence.filter(|x| x.is_finite());
    o.kish_ess = o.kish_ess.filter(|x| x.is_finite());
    if !o.seconds.is_finite() {
        o.seconds = 0.0;
    }
    crate::sampler::thin_trace(&mut o.trace);
    for row in &mut o.trace {
        if !row.ess.is_finite() {
            row.ess = 0.0;
        }
    }
    o
}

/// Make run number `i` and its record. A panic inside a sampler is caught and recorded as a
/// failed run, so one bad cell cannot end a study.
pub fn execute(study: &Study, i: u64, log_dir: Option<&Path>) -> RunRecord {
    let (t, c, rep) = run_identity(study, i);
    let target = &study.targets[t];
    let cell = &study.cells[c];
    let seed = run_seed(study.info.seed, &target.info.label, &cell.key, rep);
    let ctx = RunContext {
        seed,
        deadline: study
            .info
            .timeout_s
            .and_then(|s| Instant::now().checked_add(Duration::try_from_secs_f64(s).ok()?)),
    };
    let t0 = Instant::now();
    let made = catch_unwind(AssertUnwindSafe(|| {
        sampler_for(study, c, log_dir).map(|s| s.run(target.target.as_ref(), &ctx))
    }));
    let output = match made {
        Ok(Err(e)) => RunOutput::failed(e),
        Ok(Ok(o)) => sanitise(o),
        Err(p) => {
            let msg = p
                .downcast_ref::<&str>()
                .map(|s| s.to_string())
                .or_else(|| p.downcast_ref::<String>().cloned())
                .unwrap_or_else(|| "unknown panic".to_string());
            let mut o = RunOutput::failed(format!("internal error in the sampler: {msg}"));
            o.seconds = t0.elapsed().as_secs_f64();
            o
        }
    };
    RunRecord {
        target: target.info.label.clone(),
        settings: cell.settings.clone(),
        replicate: rep,
        seed,
        output,
    }
}

/// A progress bar of `len` runs on a terminal; hidden under `--quiet` or when stderr is not a
/// terminal.
pub fn progress_bar(len: u64, quiet: bool) -> ProgressBar {
    if quiet || !std::io::stderr().is_terminal() {
        return ProgressBar::hidden();
    }
    let bar = ProgressBar::with_draw_target(Some(len), ProgressDrawTarget::stderr());
    if let Ok(style) = ProgressStyle::with_template(
        "{spinner} [{elapsed_precise}] {wide_bar} {pos}/{len} runs  {rate}  ETA {eta}",
    ) {
        bar.set_style(style.with_key(
            "rate",
            |state: &indicatif::ProgressState, w: &mut dyn std::fmt::Write| {
                let _ = write!(w, "{:.1} runs/s", state.per_sec());
            },
        ));
    }
    bar.enable_steady_tick(Duration::from_millis(200));
    bar
}

#[cfg(test)]
mod tests {
    use std::collections::HashSet;
    use std::path::Path;

    use super::*;

    #[test]
    fn turns_are_a_bijection_and_go_round_every_cell() {
        // 3 targets x 4 cells x 5 replicates (the grid is 2 x 2).
        let src = "[study]\nname = \"t\"\nreplicates = 5\n[sampler]\nparticles = 10\n\
                   [grid]\nproposal_scale = [0.5, 1.0]\ninitial_scale = [1.0, 2.0]\n\
                   [[target]]\nlabel = \"a\"\nfamily = \"gaussian\"\ndim = 1\n\
                   [[target]]\nlabel = \"b\"\nfamily = \"gaussian\"\ndim = 2\n\
                   [[target]]\nlabel = \"c\"\nfamily = \"gaussian\"\ndim = 3\n";
        let study = crate::study::parse_study(Path::new("t.toml"), src).expect("study");
        let total = study.total_runs();
        assert_eq!(total, 60);
        let order: Vec<u64> = (0..total).map(|j| run_at_turn(&study, j)).collect();
        assert_eq!(order.iter().copied().collect::<HashSet<_>>().len(), 60);
        assert!(order.iter().all(|&i| i < total));
        // Each round of 12 turns runs one replicate of every (target, cell), replicate k in
        // round k.
        for (round, turns) in order.chunks(12).enumerate() {
            let ids: HashSet<_> = turns.iter().map(|&i| run_identity(&study, i)).collect();
            assert_eq!(ids.len(), 12);
            assert!(ids.iter().all(|&(_, _, rep)| rep == round as u64));
        }
    }
}
