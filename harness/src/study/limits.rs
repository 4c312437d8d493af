//! What a study may ask of the machine: its memory, estimated before anything starts, and the
//! number of worker threads.
//!
//! Every count setting has a fixed upper bound ([`crate::settings::MAX_COUNT`]) so that no
//! arithmetic on it overflows; what a study may really use is decided here against the memory
//! the machine has, so that a study that would abort on an allocation failure is refused with
//! the figure instead, before its results file is touched.

use super::config::Study;

/// Most worker threads a study starts, whatever `--threads` asks: more only adds contention.
pub const MAX_THREADS: usize = 512;

/// Most pooled reference runs of a `[reference]` table.
pub const MAX_REFERENCE_RUNS: u64 = 100_000;

/// The worker threads to start for `runs` runs: the request (or every core), never more than
/// the runs (at least one) and [`MAX_THREADS`].
pub fn worker_threads(requested: Option<usize>, runs: u64) -> usize {
    let cores = std::thread::available_parallelism().map_or(1, |n| n.get());
    let want = requested.unwrap_or(cores).max(1);
    let runs = usize::try_from(runs.max(1)).unwrap_or(usize::MAX);
    want.min(runs).min(MAX_THREADS)
}

/// Memory available to this process, in bytes, when the system says: the smaller of
/// `MemAvailable` (/proc/meminfo) and the cgroup v2 limit less its current use.
pub fn available_memory() -> Option<f64> {
    let meminfo = std::fs::read_to_string("/proc/meminfo").ok().and_then(|t| {
        t.lines()
            .find(|l| l.starts_with("MemAvailable:"))
            .and_then(|l| l.split_whitespace().nth(1)?.parse::<f64>().ok())
            .map(|kib| kib * 1024.0)
    });
    let read = |p: &str| -> Option<f64> { std::fs::read_to_string(p).ok()?.trim().parse().ok() };
    let cgroup = match (
        read("/sys/fs/cgroup/memory.max"),
        read("/sys/fs/cgroup/memory.current"),
    ) {
        (Some(max), Some(cur)) => Some((max - cur).max(0.0)),
        _ => None,
    };
    match (meminfo, cgroup) {
        (Some(a), Some(b)) => Some(a.min(b)),
        (a, b) => a.or(b),
    }
}

/// Bytes as text: `512 B`, `3.2 MiB`, `7.5 TiB`.
pub fn bytes_text(b: f64) -> String {
    const UNITS: [&str; 7] = ["B", "KiB", "MiB", "GiB", "TiB", "PiB", "EiB"];
    let mut v = b;
    let mut u = 0;
    while v >= 1024.0 && u + 1 < UNITS.len() {
        v /= 1024.0;
        u += 1;
    }
    if u == 0 {
        format!("{v:.0} {}", UNITS[u])
    } else {
        format!("{v:.1} {}", UNITS[u])
    }
}

/// The largest estimated run of a study (bytes, and a description of it), over every
/// target and cell, and the memory of its reference runs.
fn largest_run(study: &Study) -> (f64, String) {
    let mut best = (0.0, String::new());
    for t in &study.targets {
        for c in &study.cells {
            let b = c.sampler.memory_estimate(t.info.dim);
            if b > best.0 {
                let cell = if c.settings.is_empty() {
                    String::new()
                } else {
                    format!(", cell {}", c.key)
                };
                best = (
                    b,
                    format!(
                        "a run of target `{}` (dim {}){cell} with particles = {}",
                        t.info.label, t.info.dim, c.sampler.particles
                    ),
                );
            }
        }
    }
    best
}

/// Refuse a study whose runs cannot fit in memory: `threads` runs at a time, each of the
/// estimate of [`crate::settings::SamplerSettings::memory_estimate`], and the reference runs
/// with their pooled outputs. `available` is the machine's memory (None: not known, only the
/// fixed bounds apply).
pub fn check_memory(study: &Study, threads: usize, available: Option<f64>) -> Result<(), String> {
    let Some(avail) = available else {
        return Ok(());
    };
    let (run, what) = largest_run(study);
    let need = run * threads as f64;
    if need > avail {
        let per = bytes_text(run);
        let hint = if run > avail {
            "use fewer particles (memory grows as particles x dim)".to_string()
        } else {
            format!(
                "use --threads {} or fewer, or fewer particles",
                ((avail / run).floor() as usize).max(1)
            )
        };
        return Err(format!(
            "the study needs about {} of memory ({what} needs about {per}, and {threads} \
             run{} at a time) but this machine has {} available; {hint}",
            bytes_text(need),
            if threads == 1 { "" } else { "s" },
            bytes_text(avail)
        ));
    }
    if let Some(spec) = &study.reference {
        for t in &study.targets {
            if !super::reference::needs_reference(&t.info) {
                continue;
            }
            let d = t.info.dim as f64;
            let per_output = 8.0 * (d + d * d) + 64.0 * (crate::sampler::TRACE_LIMIT as f64 + 1.0);
            let need = spec.sampler.memory_estimate(t.info.dim) * threads as f64
                + spec.runs as f64 * per_output;
            if need > avail {
                return Err(format!(
                    "the reference runs of target `{}` (dim {}, [reference] runs = {}, \
                     particles = {}) need about {} of memory but this machine has {} \
                     available; lower [reference] runs or particles",
                    t.info.label,
                    t.info.dim,
                    spec.runs,
                    spec.sampler.particles,
                    bytes_text(need),
                    bytes_text(avail)
                ));
            }
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn threads_are_capped_by_runs_and_the_maximum() {
        assert_eq!(worker_threads(Some(100_000), 6), 6);
        assert_eq!(worker_threads(Some(100_000), 1_000_000), MAX_THREADS);
        assert_eq!(worker_threads(Some(3), 0), 1);
        assert!(worker_threads(None, 2) <= 2);
    }

    #[test]
    fn byte_figures_read_well() {
        assert_eq!(bytes_text(512.0), "512 B");
        assert_eq!(bytes_text(3.0 * 1024.0 * 1024.0), "3.0 MiB");
    }

    #[test]
    fn a_huge_population_is_refused_with_its_figure() {
        let src =
            "[sampler]\nparticles = 1000000000\n[[target]]\nfamily = \"gaussian\"\ndim = 10\n";
        let study = crate::study::parse_study(std::path::Path::new("m.toml"), src).unwrap();
        let e = check_memory(&study, 2, Some(8.0 * 1024.0 * 1024.0 * 1024.0)).unwrap_err();
        assert!(
            e.contains("particles = 1000000000") && e.contains("GiB"),
            "{e}"
        );
        let small = "[sampler]\nparticles = 100\n[[target]]\nfamily = \"gaussian\"\ndim = 10\n";
        let study = crate::study::parse_study(std::path::Path::new("m.toml"), small).unwrap();
        check_memory(&study, 2, Some(8.0 * 1024.0 * 1024.0 * 1024.0)).unwrap();
    }
}
