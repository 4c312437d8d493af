//! Combining the results files of the shards of one study into one file.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use crate::results::{RunRecord, read_validated};

/// Merge shard files of one study into `out`, in a canonical order (target, cell, replicate as
/// in the header), keeping one record per run. Refuses parts of different studies.
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
    add(first.runs, &parts[0])?;
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
    }
    let cells: usize = header.study.grid.iter().map(|(_, v)| v.len()).product();
    let expected = header.targets.len() as u64 * cells as u64 * header.study.replicates;
    if (runs.len() as u64) < expected {
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
    if let Some(dir) = out.parent().filter(|d| !d.as_os_str().is_empty()) {
        std::fs::create_dir_all(dir)
            .map_err(|e| format!("cannot create {}: {e}", dir.display()))?;
    }
    // Aside and renamed: a full disk leaves the old file (or none), never a torn one.
    crate::results::write_atomically(out, text.as_bytes())
        .map_err(|e| format!("cannot write {}: {e}", out.display()))?;
    Ok(runs.len() as u64)
}
