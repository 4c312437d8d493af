//! The `[[target]]` block of a proxy, with TOML comments on the family comparison, on what the
//! proxy does not capture, and the caution that goes with every proxy.
//!
//! Numbers are written with Rust's shortest round-trip form, so the study file reads back the
//! fitted values bit for bit.

use std::fmt::Write as _;
use std::path::Path;

use nalgebra::{DMatrix, DVector};

use super::fit::shape_of_column;
use super::{Fitted, Proxy};

/// Differences of skewness or excess kurtosis below this many large-sample standard errors
/// (`sqrt(6 / n)` and `sqrt(24 / n)` under normality; common practice) are not reported.
pub const SHAPE_SE: f64 = 3.0;

fn num(x: f64) -> String {
    format!("{x:?}")
}

fn vector(v: &DVector<f64>) -> String {
    let parts: Vec<String> = v.iter().map(|&x| num(x)).collect();
    format!("[{}]", parts.join(", "))
}

fn matrix(m: &DMatrix<f64>) -> String {
    let mut s = String::from("[\n");
    for i in 0..m.nrows() {
        let row: Vec<String> = (0..m.ncols()).map(|j| num(m[(i, j)])).collect();
        let _ = writeln!(s, "  [{}],", row.join(", "));
    }
    s.push(']');
    s
}

/// Marginal skewness and excess kurtosis of coordinate j under the chosen proxy (`None` where
/// the moment does not exist).
fn proxy_shape(chosen: &Fitted, j: usize) -> (Option<f64>, Option<f64>) {
    match chosen {
        Fitted::Gaussian(_) => (Some(0.0), Some(0.0)),
        // t marginals: symmetric; excess kurtosis 6 / (nu - 4) for nu > 4 (Kotz & Nadarajah
        // 2004, ch. 1; from memory).
        Fitted::StudentT(t) => (
            (t.dof > 3.0).then_some(0.0),
            (t.dof > 4.0).then(|| 6.0 / (t.dof - 4.0)),
        ),
        // Mixture marginals: with delta = mu_k - m and s^2 the component variance,
        // E(x - m)^3 = sum pi (delta^3 + 3 delta s^2) and E(x - m)^4 = sum pi (delta^4 +
        // 6 delta^2 s^2 + 3 s^4), the central moments of a normal about a shifted point
        // (common practice).
        Fitted::Mixture(m) => {
            let mean: f64 = m.components.iter().map(|c| c.weight * c.mean[j]).sum();
            let (mut m2, mut m3, mut m4) = (0.0, 0.0, 0.0);
            for c in &m.components {
                let (dl, s2) = (c.mean[j] - mean, c.cov[(j, j)]);
                m2 += c.weight * (dl * dl + s2);
                m3 += c.weight * (dl.powi(3) + 3.0 * dl * s2);
                m4 += c.weight * (dl.powi(4) + 6.0 * dl * dl * s2 + 3.0 * s2 * s2);
            }
            (Some(m3 / m2.powf(1.5)), Some(m4 / (m2 * m2) - 3.0))
        }
    }
}

fn family_name(f: &Fitted) -> &'static str {
    match f {
        Fitted::Gaussian(_) => "Gaussian",
        Fitted::StudentT(_) => "Student-t",
        Fitted::Mixture(_) => "mixture",
    }
}

/// What the proxy does not capture, one line each.
pub fn caveats(proxy: &Proxy) -> Vec<String> {
    let p = &proxy.pilot;
    let n_e = p.kish_ess();
    let mut out = Vec::new();
    let kind = family_name(&proxy.chosen);
    for (j, name) in p.names.iter().enumerate() {
        let (skew, kurt) = shape_of_column(p, j, proxy.gaussian.mean[j]);
        let (ps, pk) = proxy_shape(&proxy.chosen, j);
        if let Some(ps) = ps
            && (skew - ps).abs() > SHAPE_SE * (6.0 / n_e).sqrt()
        {
            out.push(if ps == 0.0 {
                format!("pilot skewness of {name} is {skew:.2}; the {kind} proxy is symmetric")
            } else {
                format!("pilot skewness of {name} is {skew:.2}; the {kind} proxy's is {ps:.2}")
            });
        }
        match pk {
            Some(pk) if (kurt - pk).abs() > SHAPE_SE * (24.0 / n_e).sqrt() => out.push(format!(
                "pilot excess kurtosis of {name} is {kurt:.2}; the {kind} proxy's is {pk:.2}"
            )),
            _ => {}
        }
        let col: Vec<f64> = (0..p.rows()).map(|i| p.row(i)[j]).collect();
        let lo = col.iter().copied().fold(f64::INFINITY, f64::min);
        let hi = col.iter().copied().fold(f64::NEG_INFINITY, f64::max);
        if lo >= 0.0 && hi <= 1.0 {
            out.push(format!(
                "{name} lies in [0, 1] in every pilot draw (min {lo:.4}, max {hi:.4}); the \
                 proxy's support is unbounded"
            ));
        } else if lo >= 0.0 {
            out.push(format!(
                "{name} is >= 0 in every pilot draw (min {lo:.4}); the proxy's support is \
                 unbounded"
            ));
        }
    }
    if let Fitted::StudentT(t) = &proxy.chosen {
        if t.dof <= 1.0 {
            out.push(format!(
                "dof {:.3} <= 1: the proxy has no mean or covariance, so the scores that need \
                 them are not available",
                t.dof
            ));
        } else if t.dof <= 2.0 {
            out.push(format!(
                "dof {:.3} <= 2: the proxy has no covariance, so the scores that need it are \
                 not available",
                t.dof
            ));
        }
    }
    out.push(
        "dependence beyond the covariance (curved, bounded or tail dependence between \
         coordinates)"
            .into(),
    );
    out
}

/// The whole output of `assay proxy`.
pub fn render(proxy: &Proxy, path: &Path, label: &str) -> String {
    let p = &proxy.pilot;
    let d = p.dim();
    let mut s = String::new();
    let _ = writeln!(
        s,
        "# Proxy target fitted by `assay proxy` to {}: {} draws of {d} columns{}.",
        path.display(),
        p.rows(),
        if p.weighted {
            format!(", weighted (Kish ESS {:.1})", p.kish_ess())
        } else {
            String::new()
        }
    );
    let cols: Vec<String> = p
        .names
        .iter()
        .enumerate()
        .map(|(j, n)| format!("{j} = {n}"))
        .collect();
    let _ = writeln!(s, "# Coordinates in column order: {}.", cols.join(", "));
    let _ = writeln!(
        s,
        "# Families compared by BIC = -2 log L + k log n (Schwarz 1978; lower is better; n = {}):",
        if p.weighted { "Kish ESS" } else { "draws" }
    );
    let chosen_name = match &proxy.chosen {
        Fitted::Gaussian(_) => "gaussian".to_string(),
        Fitted::StudentT(_) => "student-t".to_string(),
        Fitted::Mixture(m) => format!("mixture (K = {})", m.components.len()),
    };
    for c in &proxy.candidates {
        let mark = if c.name == chosen_name {
            "   <- chosen"
        } else {
            ""
        };
        match &c.bic {
            Ok(b) => {
                let _ = writeln!(s, "#   {:<18} k = {:<5} BIC {b:.2}{mark}", c.name, c.params);
            }
            Err(e) => {
                let _ = writeln!(s, "#   {:<18} k = {:<5} not fitted: {e}", c.name, c.params);
            }
        }
    }
    let _ = writeln!(s, "# What this proxy does not capture:");
    for c in caveats(proxy) {
        let _ = writeln!(s, "#   - {c}");
    }
    let _ = writeln!(
        s,
        "# Caution: a proxy is only as good as the pilot. Modes, tails and regions the pilot \
         did not\n# visit are not in it. A configuration that wins on this proxy must still be \
         validated on the\n# real model (several seeds, a long reference run, the diagnostics)."
    );
    let _ = writeln!(s, "[[target]]");
    let _ = writeln!(s, "label = {}", toml::Value::String(label.to_string()));
    match &proxy.chosen {
        Fitted::Gaussian(g) => {
            let _ = writeln!(s, "family = \"gaussian\"\ndim = {d}");
            let _ = writeln!(s, "mean = {}", vector(&g.mean));
            let _ = writeln!(s, "covariance = {}", matrix(&g.cov));
        }
        Fitted::StudentT(t) => {
            let _ = writeln!(s, "family = \"student-t\"\ndim = {d}");
            let _ = writeln!(s, "dof = {}", num(t.dof));
            let _ = writeln!(s, "mean = {}", vector(&t.loc));
            let _ = writeln!(
                s,
                "# the scale matrix Sigma; the covariance of the t is dof / (dof - 2) Sigma"
            );
            let _ = writeln!(s, "covariance = {}", matrix(&t.scale));
        }
        Fitted::Mixture(m) => {
            let _ = writeln!(s, "family = \"mixture\"\ndim = {d}");
            for c in &m.components {
                let _ = writeln!(s, "\n[[target.components]]");
                let _ = writeln!(s, "weight = {}", num(c.weight));
                let _ = writeln!(s, "mean = {}", vector(&c.mean));
                let _ = writeln!(s, "covariance = {}", matrix(&c.cov));
            }
        }
    }
    s
}
