//! The `assay` command line.

use std::io::{IsTerminal, Write};
use std::path::PathBuf;
use std::process::ExitCode;

use clap::{Parser, Subcommand, ValueEnum};
use serde_json::{Value, json};

use assay::recommend::{self, DEFAULT_RECOMMEND_BY, RecommendBy};
use assay::results::{Results, read_validated};
use assay::scores::Metric;
use assay::study::{self, RunOptions, Shard};
use assay::table::{self, DEFAULT_METRIC};
use assay::targets::{families, nearest};

/// Score SMC sampler configurations on analytic targets with exact answers.
#[derive(Parser)]
#[command(name = "assay", version, about, long_about = None)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Clone, Copy, ValueEnum)]
enum Format {
    Markdown,
    Csv,
    Json,
}

#[derive(Clone, Copy, PartialEq, Eq, ValueEnum)]
enum View {
    Auto,
    Targets,
    Sweeps,
}

#[derive(Clone, Copy, ValueEnum)]
enum CheckFormat {
    Markdown,
    Json,
}

#[derive(Subcommand)]
enum Command {
    /// List the target families (parameters marked `sweepable` may be given as a list of
    /// numbers), or print the reference values of a study's targets, sweeps expanded.
    Targets {
        /// A study file whose [[target]] tables to build (a sweep lists each expanded target).
        #[arg(long, value_name = "FILE")]
        config: Option<PathBuf>,
        /// Print JSON instead of text.
        #[arg(long)]
        json: bool,
    },
    /// Run a study: every target x grid cell x replicate; print the ranked table.
    Run {
        /// The study file (TOML).
        study: PathBuf,
        /// Results file (JSON Lines); default results/<study name>.jsonl.
        #[arg(long, value_name = "FILE")]
        out: Option<PathBuf>,
        /// Worker threads (default: all cores).
        #[arg(long, value_name = "N")]
        threads: Option<usize>,
        /// Run only part K of N of the study (1 <= K <= N), for batch arrays.
        #[arg(long, value_name = "K/N")]
        shard: Option<String>,
        /// Continue an existing results file of the same study, skipping finished runs.
        #[arg(long, conflicts_with = "replace")]
        resume: bool,
        /// Overwrite an existing results file.
        #[arg(long)]
        replace: bool,
        /// No progress bar and no table.
        #[arg(long, short)]
        quiet: bool,
        /// Metric to rank the printed table by (and, in a race, to compare cells by).
        #[arg(long, value_name = "METRIC")]
        rank_by: Option<String>,
        /// How the recommended configuration combines the targets: worst (default) or
        /// geometric-mean.
        #[arg(long, value_name = "RULE")]
        recommend_by: Option<String>,
        /// Run the study as a race (as `[study] race = true`): replicates go to the cells
        /// still in contention.
        #[arg(long)]
        race: bool,
    },
    /// Print the ranked table of a results file.
    Table {
        /// Results file (JSON Lines).
        results: PathBuf,
        /// Metric to rank by: ess_per_second (default; a raced file's own metric), variance_ess,
        /// rmse_mean, log_z_error_sd, log_z_error_abs, covariance_error, kish_ess, seconds.
        #[arg(long, value_name = "METRIC")]
        rank_by: Option<String>,
        /// Output format.
        #[arg(long, value_enum, default_value = "markdown")]
        format: Format,
        /// How the recommended configuration combines the targets: worst (default) or
        /// geometric-mean.
        #[arg(long, value_name = "RULE")]
        recommend_by: Option<String>,
        /// Markdown tables: `auto` prints one table per sweep (a row per cell, a column per
        /// swept value) and the full table of every target outside a sweep; `targets` the
        /// full table of every target; `sweeps` only the sweep tables.
        #[arg(long, value_enum, default_value = "auto")]
        view: View,
    },
    /// Compare a candidate results file with a baseline of the same study design; exit 1 when
    /// a cell became biased, noisier, failed more (or slower, when asked).
    Check {
        /// The baseline results file.
        baseline: PathBuf,
        /// The candidate results file.
        candidate: PathBuf,
        /// Report format.
        #[arg(long, value_enum, default_value = "markdown")]
        format: CheckFormat,
        /// Also fail cells whose median ESS per second dropped by more than this fraction
        /// (0 < F < 1; off unless given; 0.5 when given without a value).
        #[arg(long, value_name = "F", num_args = 0..=1, default_missing_value = "0.5")]
        speed_tolerance: Option<f64>,
        /// Family-wise false-alarm rate over every test of every cell.
        #[arg(long, value_name = "ALPHA", default_value_t = assay::check::DEFAULT_FAMILY_ALPHA)]
        alpha: f64,
    },
    /// Combine the results files of a study's shards into one.
    Merge {
        /// The shard results files.
        #[arg(required = true)]
        parts: Vec<PathBuf>,
        /// The combined results file.
        #[arg(long, value_name = "FILE")]
        out: PathBuf,
        /// Overwrite an existing output file.
        #[arg(long)]
        replace: bool,
    },
    /// Draw the charts of a results file as SVG files.
    Plot {
        /// Results file (JSON Lines).
        results: PathBuf,
        /// Directory for the SVG files (created if missing).
        #[arg(long, value_name = "DIR")]
        out: PathBuf,
        /// Score of the error-vs-cost chart (default rmse_mean) and the heat maps (default
        /// ess_per_second); any metric of `table --rank-by`.
        #[arg(long, value_name = "METRIC")]
        score: Option<String>,
    },
    /// Fit an analytic target to the draws of a pilot run (CSV) and print it as a [[target]]
    /// block for a study file.
    Proxy {
        /// The pilot draws: CSV with a header row, one draw per line, optional `weight` column.
        pilot: PathBuf,
        /// Family of the proxy; `auto` takes the one with the lowest BIC.
        #[arg(long, value_enum, default_value = "auto")]
        family: ProxyFamily,
        /// Largest number of mixture components tried.
        #[arg(long, value_name = "K", default_value_t = assay::proxy::DEFAULT_MAX_COMPONENTS)]
        max_components: usize,
        /// Label of the target (default: <pilot file stem>-proxy).
        #[arg(long, value_name = "L")]
        label: Option<String>,
        /// No progress messages.
        #[arg(long, short)]
        quiet: bool,
    },
    /// Write a markdown report (settings, ranked tables, flags, charts) of a results file.
    Report {
        /// Results file (JSON Lines).
        results: PathBuf,
        /// Directory for report.md and its charts (created if missing).
        #[arg(long, value_name = "DIR")]
        out: PathBuf,
        /// Metric to rank the tables by.
        #[arg(long, value_name = "METRIC")]
        rank_by: Option<String>,
        /// How the recommended configuration combines the targets: worst (default) or
        /// geometric-mean.
        #[arg(long, value_name = "RULE")]
        recommend_by: Option<String>,
    },
}

/// An error for the user: message and exit code.
struct Fail(u8, String);

fn usage(msg: impl Into<String>) -> Fail {
    Fail(2, msg.into())
}

/// The value named `name` among `all`, or the default; an unknown name exits 2 with the
/// nearest name and every allowed one (`option` and `what` name them in the message).
fn named<T: Copy>(
    option: &str,
    what: &str,
    all: &[(&str, T)],
    parse: fn(&str) -> Option<T>,
    default: T,
    name: Option<&str>,
) -> Result<T, Fail> {
    let Some(n) = name else {
        return Ok(default);
    };
    parse(n).ok_or_else(|| {
        let names: Vec<&str> = all.iter().map(|(k, _)| *k).collect();
        let hint = nearest(n, &names).map_or(String::new(), |s| format!(" (did you mean `{s}`?)"));
        usage(format!(
            "{option} `{n}` is not {what}{hint}; allowed: {}",
            names.join(", ")
        ))
    })
}

fn metric_of(name: Option<&str>) -> Result<Metric, Fail> {
    Ok(parse_metric(name)?.unwrap_or(DEFAULT_METRIC))
}

/// The metric `--rank-by` names, if any.
fn parse_metric(name: Option<&str>) -> Result<Option<Metric>, Fail> {
    name.map(|n| {
        named(
            "--rank-by",
            "a metric",
            Metric::ALL,
            Metric::parse,
            DEFAULT_METRIC,
            Some(n),
        )
    })
    .transpose()
}

fn recommend_by_of(name: Option<&str>) -> Result<RecommendBy, Fail> {
    named(
        "--recommend-by",
        "a rule",
        RecommendBy::ALL,
        RecommendBy::parse,
        DEFAULT_RECOMMEND_BY,
        name,
    )
}

/// The ranked tables and, after them, the recommended configuration, as markdown.
fn tables_markdown(
    results: &Results,
    metric: Metric,
    by: RecommendBy,
    view: table::TableView,
) -> String {
    let ranking = table::rank(results, metric);
    let rec = recommend::recommend(results, &ranking, by);
    let mut text = table::render_markdown_view(results, &ranking, view);
    text.push('\n');
    text.push_str(&recommend::render::markdown(results, &rec, 2));
    text
}

fn print_out(text: &str) -> Result<(), Fail> {
    let mut out = std::io::stdout().lock();
    // A closed pipe (e.g. `| head`) is not an error worth reporting.
    match out.write_all(text.as_bytes()).and_then(|_| out.flush()) {
        // Exit 2, not 1: 1 means "regression found" to a gate.
        Err(e) if e.kind() != std::io::ErrorKind::BrokenPipe => Err(Fail(
            2,
            format!("cannot write the output to standard output: {e}"),
        )),
        _ => Ok(()),
    }
}

fn cmd_targets(config: Option<PathBuf>, json_out: bool) -> Result<(), Fail> {
    let Some(config) = config else {
        if json_out {
            let fams: Vec<Value> = families()
                .iter()
                .map(|f| {
                    json!({
                        "family": f.name, "summary": f.summary, "source": f.source,
                        "params": f.params.iter().map(|p| json!({
                            "name": p.name, "default": p.default, "allowed": p.allowed, "doc": p.doc,
                            "sweepable": p.sweepable
                        })).collect::<Vec<_>>()
                    })
                })
                .collect();
            return print_out(&format!(
                "{}\n",
                serde_json::to_string_pretty(&fams).unwrap_or_default()
            ));
        }
        let mut s = String::new();
        for f in families() {
            s.push_str(&format!(
                "{}: {}\n  source: {}\n",
                f.name, f.summary, f.source
            ));
            for p in f.params {
                s.push_str(&format!(
                    "  {:<14} default {:<10} allowed {:<24} {}{}\n",
                    p.name,
                    p.default,
                    p.allowed,
                    p.doc,
                    if p.sweepable { " (sweepable)" } else { "" }
                ));
            }
            s.push('\n');
        }
        s.push_str(
            "external: a model in another program, evaluated over a JSON Lines pipe (see the README)\n  \
             command        required            allowed [\"program\", \"arg\", ...]     argv list, never a shell string\n  \
             dim            required            allowed integer >= 1              dimension of the model\n  \
             log_z, mean, covariance   optional   exact reference values, when known (else use [reference])\n",
        );
        return print_out(&s);
    };
    let study = study::load_study(&config).map_err(|e| usage(e.to_string()))?;
    let list: Vec<Value> = study
        .targets
        .iter()
        .map(|t| {
            let i = &t.info;
            let mut o = json!({
                "label": i.label, "family": i.family, "dim": i.dim, "log_z": i.log_z,
                "mean": i.mean, "covariance": i.covariance,
            });
            if let Some(sw) = &i.sweep {
                o["sweep"] = json!({ "label": sw.label, "values": sw.values });
            }
            if let Some((x, y)) = t.target.data() {
                let rows: Vec<Vec<f64>> = (0..x.nrows())
                    .map(|r| (0..x.ncols()).map(|c| x[(r, c)]).collect())
                    .collect();
                o["data"] = json!({ "x": rows, "y": y });
            }
            o
        })
        .collect();
    if json_out {
        print_out(&format!(
            "{}\n",
            serde_json::to_string_pretty(&list).unwrap_or_default()
        ))
    } else {
        let mut s = String::new();
        for t in &study.targets {
            let i = &t.info;
            let sweep = i.sweep.as_ref().map_or(String::new(), |sw| {
                let values: Vec<String> = sw
                    .values
                    .iter()
                    .map(|(k, v)| format!("{k} = {v}"))
                    .collect();
                format!(" [sweep `{}`: {}]", sw.label, values.join(", "))
            });
            s.push_str(&format!(
                "{} ({}, d = {}): log Z = {}{sweep}\n",
                i.label,
                i.family,
                i.dim,
                i.log_z.map_or("unknown".into(), |z| format!("{z:.10}"))
            ));
        }
        print_out(&s)
    }
}

fn run() -> Result<(), Fail> {
    let cli = Cli::parse();
    match cli.command {
        Command::Targets { config, json } => cmd_targets(config, json),
        Command::Run {
            study: file,
            out,
            threads,
            shard,
            resume,
            replace,
            quiet,
            rank_by,
            recommend_by,
            race,
        } => {
            let asked = parse_metric(rank_by.as_deref())?;
            let by = recommend_by_of(recommend_by.as_deref())?;
            let shard = shard.map(|s| Shard::parse(&s)).transpose().map_err(usage)?;
            if threads == Some(0) {
                return Err(usage(
                    "--threads 0 is not allowed; allowed: an integer >= 1",
                ));
            }
            let mut study = study::load_study(&file).map_err(|e| usage(e.to_string()))?;
            let opts = RunOptions {
                out,
                threads,
                shard,
                resume,
                replace,
                quiet,
            };
            let summary = if race || study.race {
                let raced = assay::race::run_race(&mut study, &opts, asked, by)
                    .map_err(|e| usage(e.to_string()))?;
                if !quiet && std::io::stderr().is_terminal() {
                    eprintln!(
                        "assay: race of {} round{}: {} of the full grid's {} runs, {} cell{} \
                         eliminated",
                        raced.rounds,
                        if raced.rounds == 1 { "" } else { "s" },
                        raced.runs_in_file,
                        raced.full_grid_runs,
                        raced.eliminations,
                        if raced.eliminations == 1 { "" } else { "s" }
                    );
                }
                raced.run
            } else {
                study::run_study(&study, &opts).map_err(|e| usage(e.to_string()))?
            };
            if !quiet {
                if std::io::stderr().is_terminal() {
                    eprintln!(
                        "assay: {} runs in {:.1} s ({} skipped as already done, {} failed); \
                         results in {}",
                        summary.ran,
                        summary.seconds,
                        summary.skipped,
                        summary.failed,
                        summary.out.display()
                    );
                }
                let results =
                    read_validated(&summary.out, false).map_err(|e| usage(e.to_string()))?;
                let metric = asked.unwrap_or(table::default_metric(&results));
                print_out(&tables_markdown(
                    &results,
                    metric,
                    by,
                    table::TableView::Auto,
                ))?;
            }
            Ok(())
        }
        Command::Table {
            results: path,
            rank_by,
            format,
            recommend_by,
            view,
        } => {
            let asked = parse_metric(rank_by.as_deref())?;
            let by = recommend_by_of(recommend_by.as_deref())?;
            let results = read_validated(&path, false).map_err(|e| usage(e.to_string()))?;
            if view == View::Sweeps && results.header.sweeps().is_empty() {
                return Err(usage(format!(
                    "--view sweeps: {} has no sweeps (no [[target]] gave a parameter as a list); \
                     allowed here: --view auto or --view targets",
                    path.display()
                )));
            }
            let view = match view {
                View::Auto => table::TableView::Auto,
                View::Targets => table::TableView::Targets,
                View::Sweeps => table::TableView::Sweeps,
            };
            let metric = asked.unwrap_or(table::default_metric(&results));
            let text = match format {
                Format::Markdown => tables_markdown(&results, metric, by, view),
                Format::Csv => table::render_csv(&results, &table::rank(&results, metric)),
                Format::Json => {
                    let ranking = table::rank(&results, metric);
                    let mut doc = table::render_json(&ranking);
                    let rec = recommend::recommend(&results, &ranking, by);
                    doc["recommendation"] = recommend::render::json(&rec);
                    format!(
                        "{}\n",
                        serde_json::to_string_pretty(&doc).unwrap_or_default()
                    )
                }
            };
            print_out(&text)
        }
        Command::Check {
            baseline,
            candidate,
            format,
            speed_tolerance,
            alpha,
        } => {
            let base = read_validated(&baseline, false).map_err(|e| usage(e.to_string()))?;
            let cand = read_validated(&candidate, false).map_err(|e| usage(e.to_string()))?;
            let opts = assay::check::CheckOptions {
                speed_tolerance,
                family_alpha: alpha,
            };
            let report =
                assay::check::check(&base, &cand, &opts).map_err(|e| usage(e.to_string()))?;
            let text = match format {
                CheckFormat::Markdown => report.to_markdown(),
                CheckFormat::Json => format!(
                    "{}\n",
                    serde_json::to_string_pretty(&report.to_json()).unwrap_or_default()
                ),
            };
            print_out(&text)?;
            if report.regressed() {
                Err(Fail(
                    1,
                    format!("regression found in {} cell(s)", report.cells_regressed()),
                ))
            } else {
                Ok(())
            }
        }
        Command::Merge {
            parts,
            out,
            replace,
        } => {
            let n = study::merge::merge(&parts, &out, replace).map_err(usage)?;
            if std::io::stderr().is_terminal() {
                eprintln!("assay: merged {n} runs into {}", out.display());
            }
            Ok(())
        }
        Command::Plot {
            results,
            out,
            score,
        } => cmd_plot(&results, &out, score.as_deref()),
        Command::Report {
            results,
            out,
            rank_by,
            recommend_by,
        } => cmd_report(&results, &out, rank_by.as_deref(), recommend_by.as_deref()),
        Command::Proxy {
            pilot,
            family,
            max_components,
            label,
            quiet,
        } => cmd_proxy(&pilot, family, max_components, label, quiet),
    }
}

fn main() -> ExitCode {
    match run() {
        Ok(()) => ExitCode::SUCCESS,
        Err(Fail(code, msg)) => {
            eprintln!("assay: {msg}");
            ExitCode::from(code)
        }
    }
}

/// After a failed `plot` or `report`: remove the output directory if this command created it
/// and wrote nothing into it, so that a failed command leaves nothing behind.
fn forget_new_dir(dir: &std::path::Path, existed: bool) {
    if !existed {
        let _ = std::fs::remove_dir(dir);
    }
}

/// The metric named by `--score`.
fn score_of(name: Option<&str>) -> Result<Option<Metric>, Fail> {
    name.map(|n| {
        metric_of(Some(n)).map_err(|Fail(c, m)| Fail(c, m.replacen("--rank-by", "--score", 1)))
    })
    .transpose()
}

fn cmd_plot(
    results: &std::path::Path,
    out: &std::path::Path,
    score: Option<&str>,
) -> Result<(), Fail> {
    let score = score_of(score)?;
    let results = read_validated(results, false).map_err(|e| usage(e.to_string()))?;
    let existed = out.exists();
    let set = assay::plot::write_charts(&results, out, score).map_err(|e| {
        forget_new_dir(out, existed);
        Fail(2, e.to_string())
    })?;
    for c in &set.charts {
        eprintln!("assay: wrote {}", out.join(&c.file).display());
    }
    for n in &set.notes {
        eprintln!("assay: note: {n}");
    }
    Ok(())
}

fn cmd_report(
    results: &std::path::Path,
    out: &std::path::Path,
    rank_by: Option<&str>,
    recommend_by: Option<&str>,
) -> Result<(), Fail> {
    let asked = parse_metric(rank_by)?;
    let by = recommend_by_of(recommend_by)?;
    let results = read_validated(results, false).map_err(|e| usage(e.to_string()))?;
    let metric = asked.unwrap_or(table::default_metric(&results));
    let existed = out.exists();
    let (path, set) =
        assay::report::write_report(&results, out, Some(metric), Some(by)).map_err(|e| {
            forget_new_dir(out, existed);
            Fail(2, e.to_string())
        })?;
    eprintln!(
        "assay: wrote {} with {} chart{}",
        path.display(),
        set.charts.len(),
        if set.charts.len() == 1 { "" } else { "s" }
    );
    Ok(())
}

#[derive(Clone, Copy, ValueEnum)]
enum ProxyFamily {
    Auto,
    Gaussian,
    StudentT,
    Mixture,
}

fn cmd_proxy(
    pilot: &std::path::Path,
    family: ProxyFamily,
    max_components: usize,
    label: Option<String>,
    quiet: bool,
) -> Result<(), Fail> {
    use assay::proxy::{Family, ProxyOptions, propose};
    let opts = ProxyOptions {
        family: match family {
            ProxyFamily::Auto => Family::Auto,
            ProxyFamily::Gaussian => Family::Gaussian,
            ProxyFamily::StudentT => Family::StudentT,
            ProxyFamily::Mixture => Family::Mixture,
        },
        max_components,
        label,
    };
    let bar = (!quiet && std::io::stderr().is_terminal()).then(|| {
        let b = indicatif::ProgressBar::new_spinner();
        b.enable_steady_tick(std::time::Duration::from_millis(120));
        b
    });
    let text = propose(pilot, &opts, &mut |stage| {
        if let Some(b) = &bar {
            b.set_message(format!("fitting {stage}"));
        }
    });
    if let Some(b) = bar {
        b.finish_and_clear();
    }
    print_out(&text.map_err(|e| usage(e.to_string()))?)
}
