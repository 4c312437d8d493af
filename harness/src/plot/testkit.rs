//! Synthetic studies and an SVG checker for the chart and report tests.

use std::path::{Path, PathBuf};

use serde_json::{Map, Value, json};

use crate::results::{Header, Results, RunRecord, SCHEMA, StudyInfo, TargetInfo};
use crate::sampler::{RunOutput, RunStatus, TraceRow};

/// A small deterministic generator (xorshift64*), so the fixtures do not depend on any
/// random-number crate's API.
struct Gen(u64);

impl Gen {
    fn new(seed: u64) -> Gen {
        Gen(seed.wrapping_mul(0x9E37_79B9_7F4A_7C15) | 1)
    }
    fn uniform(&mut self) -> f64 {
        self.0 ^= self.0 >> 12;
        self.0 ^= self.0 << 25;
        self.0 ^= self.0 >> 27;
        let x = self.0.wrapping_mul(0x2545_F491_4F6C_DD1D);
        ((x >> 11) as f64 + 0.5) / (1u64 << 53) as f64
    }
    fn normal(&mut self) -> f64 {
        let (u, v) = (self.uniform(), self.uniform());
        (-2.0 * u.ln()).sqrt() * (std::f64::consts::TAU * v).cos()
    }
}

/// A `dim`-dimensional standard Gaussian target's header entry.
pub fn target(label: &str, dim: usize, log_z: f64) -> TargetInfo {
    TargetInfo {
        label: label.into(),
        family: "gaussian".into(),
        dim,
        log_z: Some(log_z),
        mean: Some(vec![0.0; dim]),
        covariance: Some(
            (0..dim)
                .map(|i| (0..dim).map(|j| if i == j { 1.0 } else { 0.0 }).collect())
                .collect(),
        ),
        params: Map::new(),
        reference_run: None,
        sweep: None,
    }
}

/// A study header (master seed 7) with a small `[sampler]` table.
pub fn header(
    name: &str,
    replicates: u64,
    grid: Vec<(String, Vec<Value>)>,
    targets: Vec<TargetInfo>,
) -> Header {
    let mut sampler = Map::new();
    sampler.insert("particles".into(), json!(400));
    sampler.insert("iterations".into(), json!(30));
    Header {
        schema: SCHEMA.into(),
        study: StudyInfo {
            name: name.into(),
            replicates,
            seed: 7,
            timeout_s: Some(60.0),
            sampler,
            grid,
            reference: None,
            race: None,
        },
        targets,
    }
}

/// One synthetic run of a cell. `quality` scales the accuracy (1 = nominal), `cost` the time.
#[allow(clippy::too_many_arguments)]
fn run(
    g: &mut Gen,
    t: &TargetInfo,
    settings: &Map<String, Value>,
    replicate: u64,
    quality: f64,
    cost: f64,
    tempered: bool,
    metropolis: bool,
    bias: f64,
) -> RunRecord {
    let n = 400.0;
    let ess = (n * quality).max(2.0);
    let sd = 1.0 / ess.sqrt();
    let mean: Vec<f64> = (0..t.dim)
        .map(|i| if i == 0 { bias } else { 0.0 } + sd * g.normal())
        .collect();
    let s = 1.2 / quality.sqrt();
    let log_evidence = t.log_z.unwrap_or(0.0) - 0.5 * s * s + s * g.normal() + bias * 8.0;
    let iterations = if tempered {
        14 + (g.uniform() * 8.0) as usize
    } else {
        30
    };
    let mut trace = Vec::with_capacity(iterations);
    let mut e = n;
    for it in 1..=iterations {
        e *= 0.80 + 0.12 * quality.min(1.5) + 0.03 * g.normal();
        e = e.clamp(1.0, n);
        let resampled = e < 0.5 * n;
        trace.push(TraceRow {
            iteration: it,
            ess: e,
            resampled,
            temperature: tempered.then(|| ((it - 1) as f64 / (iterations - 1) as f64).powf(2.5)),
            acceptance: metropolis.then(|| {
                (0.55 - 0.25 * it as f64 / iterations as f64 + 0.04 * g.normal()).clamp(0.0, 1.0)
            }),
            regularisation: 0.0,
            stride: None,
        });
        if resampled {
            e = n;
        }
    }
    RunRecord {
        target: t.label.clone(),
        settings: settings.clone(),
        replicate,
        seed: replicate * 1000 + 17,
        output: RunOutput {
            status: RunStatus::Ok,
            error: None,
            mean: Some(mean),
            covariance: t.covariance.clone(),
            log_evidence: Some(log_evidence),
            kish_ess: Some(ess * if metropolis { 1.0 } else { 3.0 }),
            resamples: 6,
            evaluations: 12_000,
            seconds: cost * (1.0 + 0.1 * g.normal()).max(0.5),
            trace,
        },
    }
}

/// Two targets x (proposal_scale: 3) x (move: 2) x (path: 2) = 24 cells, 8 replicates, with a
/// biased cell, a cell with failed runs and overconfident Kish ESS for random-walk cells.
pub fn demo_study() -> Results {
    let grid = vec![
        (
            "proposal_scale".to_string(),
            vec![json!(0.25), json!(0.5), json!(1.0)],
        ),
        (
            "move".to_string(),
            vec![json!("random-walk"), json!("metropolis")],
        ),
        ("path".to_string(), vec![json!("static"), json!("tempered")]),
    ];
    let targets = vec![
        target("corr-gauss-10", 10, 0.0),
        target("banana-2", 2, 1.25),
    ];
    let h = header("demo", 8, grid.clone(), targets.clone());
    let mut g = Gen::new(11);
    let mut runs = Vec::new();
    for (ti, t) in targets.iter().enumerate() {
        for scale in &grid[0].1 {
            for mv in &grid[1].1 {
                for path in &grid[2].1 {
                    let mut s = Map::new();
                    s.insert("move".into(), mv.clone());
                    s.insert("path".into(), path.clone());
                    s.insert("proposal_scale".into(), scale.clone());
                    let sc = scale.as_f64().unwrap_or(1.0);
                    let metropolis = mv == "metropolis";
                    let tempered = path == "tempered";
                    let quality = (0.25 + 0.4 * (-(sc.ln() - 0.5f64.ln()).powi(2)).exp())
                        * if metropolis { 2.0 } else { 1.0 }
                        * if tempered { 1.5 } else { 1.0 }
                        / (1.0 + ti as f64);
                    let cost = 0.02
                        * if tempered { 3.0 } else { 1.0 }
                        * if metropolis { 1.6 } else { 1.0 }
                        * (1.0 + ti as f64 * 0.5);
                    let bias = if sc == 1.0 && !metropolis && !tempered && ti == 1 {
                        0.3
                    } else {
                        0.0
                    };
                    for rep in 0..8u64 {
                        if ti == 0 && sc == 0.25 && !metropolis && tempered && rep < 3 {
                            let msg = if rep < 2 {
                                "weights degenerate: ESS fell to 0 at iteration 9"
                            } else {
                                "deadline passed after 60 s"
                            };
                            let mut rec = run(
                                &mut g, t, &s, rep, quality, cost, tempered, metropolis, bias,
                            );
                            rec.output = RunOutput::failed(msg);
                            runs.push(rec);
                            continue;
                        }
                        runs.push(run(
                            &mut g, t, &s, rep, quality, cost, tempered, metropolis, bias,
                        ));
                    }
                }
            }
        }
    }
    Results {
        path: PathBuf::from("demo.jsonl"),
        header: h,
        runs,
        eliminations: Vec::new(),
        torn_tail: false,
    }
}

/// One target, one cell (an empty grid), 5 replicates.
pub fn single_cell_study() -> Results {
    let t = target("gauss-3", 3, -2.0);
    let h = header("single", 5, Vec::new(), vec![t.clone()]);
    let mut g = Gen::new(3);
    let runs = (0..5)
        .map(|r| run(&mut g, &t, &Map::new(), r, 1.0, 0.05, false, true, 0.0))
        .collect();
    Results {
        path: PathBuf::from("single.jsonl"),
        header: h,
        runs,
        eliminations: Vec::new(),
        torn_tail: false,
    }
}

/// One grid axis of four values, one target.
pub fn one_axis_study() -> Results {
    let grid = vec![(
        "particles".to_string(),
        vec![json!(100), json!(200), json!(400), json!(800)],
    )];
    let t = target("gauss-3", 3, 0.5);
    let h = header("one-axis", 6, grid.clone(), vec![t.clone()]);
    let mut g = Gen::new(5);
    let mut runs = Vec::new();
    for v in &grid[0].1 {
        let mut s = Map::new();
        s.insert("particles".into(), v.clone());
        let q = v.as_f64().unwrap_or(100.0) / 400.0;
        for r in 0..6 {
            runs.push(run(&mut g, &t, &s, r, q, 0.01 * q, true, false, 0.0));
        }
    }
    Results {
        path: PathBuf::from("one-axis.jsonl"),
        header: h,
        runs,
        eliminations: Vec::new(),
        torn_tail: false,
    }
}

/// One sweep `g` over `dim` = 2, 5, 10 (targets `g-dim_2`, `g-dim_5`, `g-dim_10`) and one
/// target outside it (`lone`), a grid of two proposal scales, 6 replicates; the cell
/// `proposal_scale = 1.0` is biased on `g-dim_10` only, and every run of
/// `proposal_scale = 0.5` on `g-dim_5` failed.
pub fn sweep_study() -> Results {
    let grid = vec![("proposal_scale".to_string(), vec![json!(0.5), json!(1.0)])];
    let mut targets: Vec<TargetInfo> = [2usize, 5, 10]
        .iter()
        .map(|&d| {
            let mut t = target(&format!("g-dim_{d}"), d, 0.0);
            t.sweep = Some(crate::results::SweepInfo {
                label: "g".into(),
                values: vec![("dim".into(), json!(d))],
            });
            t
        })
        .collect();
    targets.push(target("lone", 2, 0.0));
    let h = header("sweep", 6, grid.clone(), targets.clone());
    let mut g = Gen::new(23);
    let mut runs = Vec::new();
    for t in &targets {
        for scale in &grid[0].1 {
            let mut s = Map::new();
            s.insert("proposal_scale".into(), scale.clone());
            let sc = scale.as_f64().unwrap_or(1.0);
            let quality = 2.0 / t.dim as f64;
            let bias = if sc == 1.0 && t.dim == 10 { 1.0 } else { 0.0 };
            for rep in 0..6u64 {
                let mut rec = run(&mut g, t, &s, rep, quality, 0.01, false, false, bias);
                if sc == 0.5 && t.dim == 5 {
                    rec.output = RunOutput::failed("weights degenerate");
                }
                runs.push(rec);
            }
        }
    }
    Results {
        path: PathBuf::from("sweep.jsonl"),
        header: h,
        runs,
        eliminations: Vec::new(),
        torn_tail: false,
    }
}

/// Every run failed (as with a sampler that cannot run at all).
pub fn failed_study() -> Results {
    let mut r = demo_study();
    r.header.study.name = "all-failed".into();
    for rec in &mut r.runs {
        rec.output = RunOutput::failed("engine not implemented yet");
    }
    r
}

/// A header and no runs.
pub fn empty_study() -> Results {
    let mut r = demo_study();
    r.runs.clear();
    r
}

/// Write `r` as a results file.
pub fn write_jsonl(r: &Results, path: &Path) {
    let mut s = serde_json::to_string(&r.header).unwrap();
    s.push('\n');
    for rec in &r.runs {
        s.push_str(&serde_json::to_string(rec).unwrap());
        s.push('\n');
    }
    std::fs::write(path, s).unwrap();
}

/// Check that `svg` is a well-formed SVG document: XML declaration, one root `<svg>` element,
/// balanced tags, quoted attributes and escaped text.
pub fn check_svg(svg: &str) -> Result<(), String> {
    if !svg.starts_with("<?xml version=\"1.0\"") {
        return Err("no XML declaration".into());
    }
    let b = svg.as_bytes();
    let mut stack: Vec<String> = Vec::new();
    let mut roots = 0;
    let mut i = 0;
    while i < b.len() {
        if b[i] != b'<' {
            let end = svg[i..].find('<').map_or(b.len(), |k| i + k);
            check_text(&svg[i..end])?;
            if stack.is_empty() && !svg[i..end].trim().is_empty() {
                return Err(format!("text outside the root at byte {i}"));
            }
            i = end;
            continue;
        }
        let rest = &svg[i..];
        if rest.starts_with("<?") {
            i += rest.find("?>").ok_or("unterminated <?")? + 2;
        } else if rest.starts_with("<!--") {
            i += rest.find("-->").ok_or("unterminated comment")? + 3;
        } else if let Some(close) = rest.strip_prefix("</") {
            let end = close.find('>').ok_or("unterminated end tag")?;
            let name = close[..end].trim();
            match stack.pop() {
                Some(open) if open == name => {}
                other => return Err(format!("</{name}> closes {other:?}")),
            }
            i += 2 + end + 1;
        } else {
            // Scan the start tag, honouring quoted attribute values.
            let mut j = 1;
            let mut quote: Option<u8> = None;
            while j < rest.len() {
                let c = rest.as_bytes()[j];
                match quote {
                    Some(q) if c == q => quote = None,
                    Some(_) if c == b'<' => return Err("< inside an attribute value".into()),
                    Some(_) => {}
                    None if c == b'"' || c == b'\'' => quote = Some(c),
                    None if c == b'>' => break,
                    None => {}
                }
                j += 1;
            }
            if j >= rest.len() {
                return Err("unterminated start tag".into());
            }
            let tag = &rest[1..j];
            let self_closing = tag.ends_with('/');
            let name: String = tag
                .chars()
                .take_while(|c| !c.is_whitespace() && *c != '/')
                .collect();
            if name.is_empty() {
                return Err(format!("empty tag name at byte {i}"));
            }
            check_attributes(tag)?;
            if stack.is_empty() {
                roots += 1;
                if name != "svg" {
                    return Err(format!("root element is <{name}>, not <svg>"));
                }
            }
            if !self_closing {
                stack.push(name);
            }
            i += j + 1;
        }
    }
    if !stack.is_empty() {
        return Err(format!("unclosed elements: {stack:?}"));
    }
    if roots != 1 {
        return Err(format!("{roots} root elements"));
    }
    Ok(())
}

fn check_text(t: &str) -> Result<(), String> {
    let mut rest = t;
    while let Some(k) = rest.find('&') {
        let after = &rest[k + 1..];
        let end = after.find(';').ok_or_else(|| format!("bare & in {t:?}"))?;
        let ent = &after[..end];
        let ok = matches!(ent, "amp" | "lt" | "gt" | "quot" | "apos")
            || (ent.starts_with('#') && ent.len() > 1);
        if !ok {
            return Err(format!("unknown entity &{ent}; in {t:?}"));
        }
        rest = &after[end + 1..];
    }
    if t.contains('>') && !t.contains("]]>") {
        // A bare > is legal in text; nothing to do.
    }
    Ok(())
}

fn check_attributes(tag: &str) -> Result<(), String> {
    // Every `=` outside quotes must be followed by a quoted value.
    let b = tag.as_bytes();
    let mut quote: Option<u8> = None;
    for (k, &c) in b.iter().enumerate() {
        match quote {
            Some(q) if c == q => quote = None,
            Some(_) => {}
            None if c == b'"' || c == b'\'' => quote = Some(c),
            None if c == b'=' && !matches!(b.get(k + 1), Some(b'"') | Some(b'\'')) => {
                return Err(format!("unquoted attribute value in <{tag}>"));
            }
            None => {}
        }
    }
    Ok(())
}

fn unescape(s: &str) -> String {
    s.replace("&lt;", "<")
        .replace("&gt;", ">")
        .replace("&quot;", "\"")
        .replace("&apos;", "'")
        .replace("&amp;", "&")
}

/// The contents of every `<text>` element, unescaped and trimmed.
pub fn texts(svg: &str) -> Vec<String> {
    let mut out = Vec::new();
    let mut rest = svg;
    while let Some(k) = rest.find("<text") {
        let after = &rest[k..];
        let Some(open_end) = after.find('>') else {
            break;
        };
        let body = &after[open_end + 1..];
        let Some(close) = body.find("</text>") else {
            break;
        };
        out.push(unescape(body[..close].trim()));
        rest = &body[close..];
    }
    out
}

/// The contents of the document's `<title>`.
pub fn title(svg: &str) -> Option<String> {
    let a = svg.find("<title>")? + 7;
    let b = svg[a..].find("</title>")?;
    Some(unescape(&svg[a..a + b]))
}

/// A `<polyline>`: stroke colour, stroke width, points.
pub type Polyline = (String, String, Vec<(i32, i32)>);

/// Every `<polyline>` of a document.
pub fn polylines(svg: &str) -> Vec<Polyline> {
    let attr = |tag: &str, name: &str| -> String {
        let pat = format!(" {name}=\"");
        tag.find(&pat)
            .and_then(|k| {
                let v = &tag[k + pat.len()..];
                v.find('"').map(|e| v[..e].to_string())
            })
            .unwrap_or_default()
    };
    let mut out = Vec::new();
    let mut rest = svg;
    while let Some(k) = rest.find("<polyline") {
        let after = &rest[k..];
        let end = after.find('>').unwrap_or(after.len());
        let tag = &after[..end];
        let pts = attr(tag, "points")
            .split_whitespace()
            .filter_map(|p| {
                let (x, y) = p.split_once(',')?;
                Some((x.parse().ok()?, y.parse().ok()?))
            })
            .collect();
        out.push((attr(tag, "stroke"), attr(tag, "stroke-width"), pts));
        rest = &after[end..];
    }
    out
}

/// Number of `<circle>` elements filled with `colour` (e.g. `#0072B2`).
pub fn filled_circles(svg: &str, colour: &str) -> usize {
    svg.match_indices("<circle")
        .filter(|(k, _)| {
            let tag = &svg[*k..svg[*k..].find('>').map_or(svg.len(), |e| k + e)];
            tag.contains(&format!("fill=\"{colour}\""))
        })
        .count()
}

/// Number of hollow circles ([`super::canvas::ring`]) outlined in `colour`.
pub fn rings(svg: &str, colour: &str) -> usize {
    svg.match_indices("<circle")
        .filter(|(k, _)| {
            let tag = &svg[*k..svg[*k..].find('>').map_or(svg.len(), |e| k + e)];
            tag.contains("fill=\"none\"")
                && tag.contains(&format!("stroke=\"{colour}\""))
                && tag.contains("stroke-width=\"2\"")
        })
        .count()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn checker_accepts_good_and_rejects_bad_documents() {
        let good = "<?xml version=\"1.0\" encoding=\"UTF-8\"?>\n<svg a=\"1\"><title>x &amp; y</title><g><rect/></g></svg>\n";
        check_svg(good).unwrap();
        let bad = [
            "<svg></svg>",
            "<?xml version=\"1.0\"?><svg><g></svg>",
            "<?xml version=\"1.0\"?><svg><g></g>",
            "<?xml version=\"1.0\"?><svg></svg><svg></svg>",
            "<?xml version=\"1.0\"?><svg a=1></svg>",
            "<?xml version=\"1.0\"?><svg>a & b</svg>",
            "<?xml version=\"1.0\"?><html></html>",
        ];
        for b in bad {
            assert!(check_svg(b).is_err(), "{b}");
        }
        assert_eq!(texts("<text x=\"1\">a &lt; b\n</text>"), vec!["a < b"]);
    }
}
