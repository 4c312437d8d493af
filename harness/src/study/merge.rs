//! Combining the results files of the shards of one study into one file.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use crate::results::{Elimination, RunRecord, read_validated};

/// Merge shard files of one study into `out`, in a canonical order (target, cell, replicate as
/// in the header), keeping one record per run. Refuses parts of different studies. The
/// elimination records of a raced study's shards follow the runs, by round, target and cell;
/// a cell eliminated in two parts must be eliminated alike.
pub fn merge(parts: &[PathBuf], out: &Path, replace: bool) -> Result<u64, String> {
    if parts.is_empty() {
        return Err("merge needs at least one results file".to_string());
    }
    if out.exists() && !replace {
        return Err(format!(
            "{} already exists; pass --replace to overwrite it or choose another --out",
            out.display()
        ));
    }
    let first = read_validated(&parts[0], false).map_err(|e| e.to_string())?;
    let header = first.header.clone();
    let order: BTreeMap<String, usize> = header
        .targets
        .iter()
        .enumerate()
        .map(|(i, t)| (t.label.clone(), i))
        .collect();
    let mut runs: BTreeMap<(usize, String, u64), RunRecord> = BTreeMap::new();
    let mut add = |rs: Vec<RunRecord>, file: &Path| -> Result<(), String> {
        for r in rs {
            let t = *order.get(&r.target).ok_or_else(|| {
                format!("{}: run of unknown target `{}`", file.display(), r.target)
            })?;
            let key = (t, r.cell_key(), r.replicate);
            if let Some(old) = runs.get(&key) {
                let strip = |x: &RunRecord| {
                    let mut o = x.output.clone();
                    o.seconds = 0.0;
                    (x.seed, o)
                };
                if strip(old) != strip(&r) {
                    return Err(format!(
                        "{}: run {} / {} / replicate {} is also in another part with different \
                         results; refusing to merge",
                        file.display(),
                        r.target,
                        r.cell_key(),
                        r.replicate
                    ));
                }
            }
            runs.insert(key, r);
        }
        Ok(())
    };
    let mut eliminations: BTreeMap<(usize, String), Elimination> = BTreeMap::new();
    let mut add_eliminations = |es: Vec<Elimination>, file: &Path| -> Result<(), String> {
        for e in es {
            let t = order.get(&e.target).copied().unwrap_or(usize::MAX);
            let key = (t, e.cell_key());
            if eliminations.get(&key).is_some_and(|old| *old != e) {
                return Err(format!(
                    "{}: the elimination of cell {} on `{}` in round {} differs from another \
                     part's; refusing to merge",
                    file.display(),
                    e.cell_key(),
                    e.target,
                    e.round
                ));
            }
            eliminations.insert(key, e);
        }
        Ok(())
    };
    add(first.runs, &parts[0])?;
    add_eliminations(first.eliminations, &parts[0])?;
    for p in &parts[1..] {
        let r = read_validated(p, false).map_err(|e| e.to_string())?;
        if let Some(what) = header.study_difference(&r.header) {
            return Err(format!(
                "{} is a part of a different study than {} ({what}); refusing to merge",
                p.display(),
                parts[0].display()
            ));
        }
        add(r.runs, p)?;
        add_eliminations(r.eliminations, p)?;
    }
    let cells: usize = header.study.grid.iter().map(|(_, v)| v.len()).product();
    let expected = header.targets.len() as u64 * cells as u64 * header.study.replicates;
    // A raced study holds fewer runs by design.
    if header.study.race.is_none() && (runs.len() as u64) < expected {
        eprintln!(
            "assay: warning: the parts hold {} of the study's {expected} runs; is a part missing?",
            runs.len()
        );
    }
    let mut text = serde_json::to_string(&header).map_err(|e| e.to_string())?;
    text.push('\n');
    for r in runs.values() {
        text.push_str(&serde_json::to_string(r).map_err(|e| e.to_string())?);
        text.push('\n');
    }
    let mut by_round: Vec<(&(usize, String), &Elimination)> = eliminations.iter().collect();
    by_round.sort_by_key(|(k, e)| (e.round, *k));
    for (_, e) in by_round {
        text.push_str(&serde_json::to_string(e).map_err(|e| e.to_string())?);
        text.push('\n');
    }
    if let Some(dir) = out.parent().filter(|d| !d.as_os_str().is_empty()) {
        std::fs::create_dir_all(dir)
            .map_err(|e| format!("cannot create {}: {e}", dir.display()))?;
    }
    // Aside and renamed: a full disk leaves the old file (or none), never a torn one.
    crate::results::write_atomically(out, text.as_bytes())
        .map_err(|e| format!("cannot write {}: {e}", out.display()))?;
    Ok(runs.len() as u64)
}
