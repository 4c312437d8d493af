//! Synthetic cells for the race's unit tests and its simulation (`rates`): a 2-d standard
//! Gaussian target and cells whose runs are mean estimates with known error law.

use serde_json::{Map, Value};

use super::decide::RaceCell;
use crate::results::TargetInfo;
use crate::scores::CellRuns;

/// A 2-d standard Gaussian target (mean 0, covariance I, no evidence) labelled `label`.
pub(super) fn target(label: &str) -> TargetInfo {
    TargetInfo {
        label: label.into(),
        family: "gaussian".into(),
        dim: 2,
        log_z: None,
        mean: Some(vec![0.0, 0.0]),
        covariance: Some(vec![vec![1.0, 0.0], vec![0.0, 1.0]]),
        params: Map::new(),
        reference_run: None,
        sweep: None,
    }
}

/// `k` cells of one invented grid axis.
pub(super) fn cells(k: usize) -> Vec<RaceCell> {
    (0..k)
        .map(|i| {
            let mut s = Map::new();
            s.insert("proposal_scale".into(), Value::from(i as f64));
            RaceCell {
                key: crate::results::cell_key(&s),
                settings: s,
            }
        })
        .collect()
}

/// A cell's runs with these mean estimates, as [`CellRuns::collect`] holds them (one second,
/// no resampling count and no evaluation count a run).
pub(super) fn runs_of<'a>(means: impl IntoIterator<Item = &'a [f64; 2]>) -> CellRuns {
    let mut r = CellRuns::default();
    for m in means {
        r.means.push(m.to_vec());
        r.seconds.push(1.0);
        r.resamples.push(0.0);
        r.evaluations.push(0.0);
        r.ok += 1;
    }
    r
}
