//! Drawing helpers on top of the plotters SVG backend: text with conservative size estimates,
//! polylines with dash patterns, markers, axes with readable ticks, legends and word wrap.
//!
//! Layout is done here rather than by plotters' chart builder so that every label's space is
//! reserved from its character count before anything is drawn: the SVG backend cannot measure
//! text (it writes `<text>` elements and leaves the glyphs to the viewer), so widths are
//! estimated generously and labels that would still collide are thinned out.

use plotters::coord::Shift;
use plotters::prelude::*;
use plotters::style::FontTransform;
use plotters::style::text_anchor::{HPos, Pos, VPos};

use super::palette::{self, Marker};

/// The drawing surface of one chart.
pub type Area<'a> = DrawingArea<SVGBackend<'a>, Shift>;
/// Result of drawing; the error is a message.
pub type Drawn = Result<(), String>;

/// Generic font family, so that no font file is needed to write or view a chart.
pub const FONT: &str = "sans-serif";
/// Font sizes in pixels.
pub const TITLE_PX: f64 = 17.0;
pub const LABEL_PX: f64 = 13.0;
pub const TICK_PX: f64 = 11.5;
pub const NOTE_PX: f64 = 12.0;
/// Conservative advance width of an average character, in ems (wide enough for digits and
/// lower case in common sans-serif faces).
const EM_ADVANCE: f64 = 0.62;
/// Outer margin of every chart, in pixels.
pub const PAD: f64 = 16.0;

/// Estimated width in pixels of `s` at `px`.
pub fn text_width(s: &str, px: f64) -> f64 {
    s.chars().count() as f64 * EM_ADVANCE * px
}

/// Line height in pixels for text at `px`.
pub fn line_height(px: f64) -> f64 {
    (px * 1.35).ceil()
}

fn err<E: std::fmt::Display>(e: E) -> String {
    format!("cannot draw the chart: {e}")
}

/// A pixel coordinate, made safe for the backend (non-finite values go to 0, huge ones are
/// clamped so that they cannot overflow).
pub fn px(v: f64) -> i32 {
    if v.is_finite() {
        v.round().clamp(-100_000.0, 100_000.0) as i32
    } else {
        0
    }
}

fn pt(x: f64, y: f64) -> (i32, i32) {
    (px(x), px(y))
}

/// Draw a chart of `w` x `h` pixels and return the finished SVG document (XML declaration,
/// root `<svg>` with a `<title>`).
pub fn render(
    w: f64,
    h: f64,
    title: &str,
    draw: impl FnOnce(&Area) -> Drawn,
) -> Result<String, String> {
    let size = (
        w.clamp(64.0, 20_000.0) as u32,
        h.clamp(64.0, 20_000.0) as u32,
    );
    let mut buf = String::new();
    {
        let root = SVGBackend::with_string(&mut buf, size).into_drawing_area();
        root.fill(&palette::WHITE).map_err(err)?;
        draw(&root)?;
        root.present().map_err(err)?;
    }
    Ok(finish(&buf, title))
}

/// Escape text for XML.
pub fn escape(s: &str) -> String {
    let mut o = String::with_capacity(s.len());
    for c in s.chars() {
        match c {
            '&' => o.push_str("&amp;"),
            '<' => o.push_str("&lt;"),
            '>' => o.push_str("&gt;"),
            '"' => o.push_str("&quot;"),
            '\'' => o.push_str("&apos;"),
            c if (c as u32) < 0x20 && c != '\n' && c != '\t' => o.push(' '),
            c => o.push(c),
        }
    }
    o
}

fn finish(svg: &str, title: &str) -> String {
    let body = svg.trim_start();
    let mut out = String::with_capacity(body.len() + 128);
    out.push_str("<?xml version=\"1.0\" encoding=\"UTF-8\"?>\n");
    match body.find('>') {
        Some(i) if body.starts_with("<svg") => {
            out.push_str(&body[..=i]);
            out.push_str("\n<title>");
            out.push_str(&escape(title));
            out.push_str("</title>");
            out.push_str(&body[i + 1..]);
        }
        _ => out.push_str(body),
    }
    out
}

/// How a piece of text is set.
#[derive(Clone, Copy)]
pub struct Font {
    pub px: f64,
    pub colour: RGBColor,
    pub h: HPos,
    pub v: VPos,
    pub bold: bool,
    /// Rotated a quarter turn counter-clockwise (reads bottom to top).
    pub upright: bool,
}

impl Font {
    /// Text at `px`, black, anchored at its left end, vertically centred.
    pub fn new(px: f64) -> Font {
        Font {
            px,
            colour: palette::BLACK,
            h: HPos::Left,
            v: VPos::Center,
            bold: false,
            upright: false,
        }
    }
    pub fn colour(mut self, c: RGBColor) -> Font {
        self.colour = c;
        self
    }
    pub fn anchor(mut self, h: HPos, v: VPos) -> Font {
        self.h = h;
        self.v = v;
        self
    }
    pub fn bold(mut self) -> Font {
        self.bold = true;
        self
    }
    pub fn upright(mut self) -> Font {
        self.upright = true;
        self
    }
}

/// Draw `s` at (x, y).
pub fn text(area: &Area, s: &str, x: f64, y: f64, f: Font) -> Drawn {
    if s.is_empty() {
        return Ok(());
    }
    // plotters writes font-size = size / 1.24 into the SVG; undo that so `f.px` is exact.
    let mut font = (FONT, f.px * 1.24).into_font();
    if f.bold {
        font = font.style(FontStyle::Bold);
    }
    let mut style = font.color(&f.colour).pos(Pos::new(f.h, f.v));
    if f.upright {
        style = style.transform(FontTransform::Rotate270);
    }
    area.draw(&Text::new(s.to_string(), pt(x, y), style))
        .map_err(err)
}

/// Draw a polyline; `dash` is a list of on/off lengths (empty: solid).
pub fn polyline(
    area: &Area,
    pts: &[(f64, f64)],
    colour: RGBColor,
    width: u32,
    dash: &[f64],
) -> Drawn {
    let pts: Vec<(f64, f64)> = pts
        .iter()
        .copied()
        .filter(|(x, y)| x.is_finite() && y.is_finite())
        .collect();
    if pts.len() < 2 {
        return Ok(());
    }
    let style = colour.stroke_width(width);
    if dash.is_empty() || dash.iter().any(|d| d.is_nan() || *d <= 0.0) {
        let path: Vec<(i32, i32)> = pts.iter().map(|&(x, y)| pt(x, y)).collect();
        return area.draw(&PathElement::new(path, style)).map_err(err);
    }
    // Walk the polyline, emitting the "on" stretches of the pattern.
    let mut k = 0usize;
    let mut left = dash[0];
    let mut on = true;
    let mut current: Vec<(f64, f64)> = vec![pts[0]];
    for w in pts.windows(2) {
        let (mut x0, mut y0) = w[0];
        let (x1, y1) = w[1];
        let mut seg = ((x1 - x0).powi(2) + (y1 - y0).powi(2)).sqrt();
        while seg > left {
            let t = left / seg;
            let (xm, ym) = (x0 + t * (x1 - x0), y0 + t * (y1 - y0));
            if on {
                current.push((xm, ym));
                let path: Vec<(i32, i32)> = current.iter().map(|&(x, y)| pt(x, y)).collect();
                area.draw(&PathElement::new(path, style)).map_err(err)?;
            }
            current = vec![(xm, ym)];
            seg -= left;
            x0 = xm;
            y0 = ym;
            on = !on;
            k = (k + 1) % dash.len();
            left = dash[k];
        }
        left -= seg;
        if on {
            current.push((x1, y1));
        } else {
            current = vec![(x1, y1)];
        }
    }
    if on && current.len() > 1 {
        let path: Vec<(i32, i32)> = current.iter().map(|&(x, y)| pt(x, y)).collect();
        area.draw(&PathElement::new(path, style)).map_err(err)?;
    }
    Ok(())
}

/// A filled rectangle, with an optional outline.
pub fn rect(
    area: &Area,
    x0: f64,
    y0: f64,
    x1: f64,
    y1: f64,
    fill: Option<(RGBColor, f64)>,
    stroke: Option<RGBColor>,
) -> Drawn {
    if let Some((c, alpha)) = fill {
        area.draw(&Rectangle::new(
            [pt(x0, y0), pt(x1, y1)],
            c.mix(alpha).filled(),
        ))
        .map_err(err)?;
    }
    if let Some(c) = stroke {
        area.draw(&Rectangle::new([pt(x0, y0), pt(x1, y1)], c.stroke_width(1)))
            .map_err(err)?;
    }
    Ok(())
}

/// A filled polygon.
pub fn polygon(area: &Area, pts: &[(f64, f64)], colour: RGBColor, alpha: f64) -> Drawn {
    if pts.len() < 3 || pts.iter().any(|(x, y)| !x.is_finite() || !y.is_finite()) {
        return Ok(());
    }
    let path: Vec<(i32, i32)> = pts.iter().map(|&(x, y)| pt(x, y)).collect();
    area.draw(&Polygon::new(path, colour.mix(alpha).filled()))
        .map_err(err)
}

/// A marker of radius about `r` centred at (x, y), filled with a white outline so that
/// overlapping markers stay distinct.
pub fn marker(area: &Area, shape: Marker, x: f64, y: f64, r: f64, colour: RGBColor) -> Drawn {
    if !(x.is_finite() && y.is_finite()) {
        return Ok(());
    }
    let poly = |pts: Vec<(f64, f64)>| -> Drawn {
        let path: Vec<(i32, i32)> = pts.iter().map(|&(a, b)| pt(x + a, y + b)).collect();
        area.draw(&Polygon::new(path.clone(), colour.filled()))
            .map_err(err)?;
        let mut closed = path;
        closed.push(closed[0]);
        area.draw(&PathElement::new(closed, palette::WHITE.stroke_width(1)))
            .map_err(err)
    };
    match shape {
        Marker::Circle => {
            area.draw(&Circle::new(pt(x, y), px(r).max(1), colour.filled()))
                .map_err(err)?;
            area.draw(&Circle::new(
                pt(x, y),
                px(r).max(1),
                palette::WHITE.stroke_width(1),
            ))
            .map_err(err)
        }
        Marker::Square => {
            let s = r * 0.9;
            poly(vec![(-s, -s), (s, -s), (s, s), (-s, s)])
        }
        Marker::TriangleUp => poly(vec![
            (0.0, -r * 1.15),
            (r * 1.05, r * 0.75),
            (-r * 1.05, r * 0.75),
        ]),
        Marker::TriangleDown => poly(vec![
            (0.0, r * 1.15),
            (r * 1.05, -r * 0.75),
            (-r * 1.05, -r * 0.75),
        ]),
        Marker::Diamond => {
            let s = r * 1.25;
            poly(vec![(0.0, -s), (s, 0.0), (0.0, s), (-s, 0.0)])
        }
        Marker::Cross => {
            let (a, b) = (r * 1.1, r * 0.38);
            poly(vec![
                (-b, -a),
                (b, -a),
                (b, -b),
                (a, -b),
                (a, b),
                (b, b),
                (b, a),
                (-b, a),
                (-b, b),
                (-a, b),
                (-a, -b),
                (-b, -b),
            ])
        }
    }
}

/// A hollow circle of radius `r` centred at (x, y): white inside, outlined in `colour`, for a
/// point that is to read as "not to be trusted" beside filled ones.
pub fn ring(area: &Area, x: f64, y: f64, r: f64, colour: RGBColor) -> Drawn {
    if !(x.is_finite() && y.is_finite()) {
        return Ok(());
    }
    area.draw(&Circle::new(
        pt(x, y),
        px(r).max(1),
        palette::WHITE.filled(),
    ))
    .map_err(err)?;
    area.draw(&Circle::new(pt(x, y), px(r).max(1), colour.stroke_width(2)))
        .map_err(err)
}

/// Split `s` into lines no wider than `max_px` at `px` (words longer than a line are kept
/// whole on a line of their own).
pub fn wrap(s: &str, max_px: f64, px: f64) -> Vec<String> {
    let max_chars = ((max_px / (EM_ADVANCE * px)).floor() as usize).max(8);
    let mut lines = Vec::new();
    let mut line = String::new();
    for word in s.split_whitespace() {
        if !line.is_empty() && line.chars().count() + 1 + word.chars().count() > max_chars {
            lines.push(std::mem::take(&mut line));
        }
        if !line.is_empty() {
            line.push(' ');
        }
        line.push_str(word);
    }
    if !line.is_empty() {
        lines.push(line);
    }
    lines
}

/// The title block of a chart: a bold title and wrapped subtitle lines.
pub struct Heading {
    pub title: String,
    pub lines: Vec<String>,
}

impl Heading {
    /// Lay out `title` and `subtitle` paragraphs for a chart `width` pixels wide.
    pub fn new(title: &str, subtitle: &[String], width: f64) -> Heading {
        let avail = width - 2.0 * PAD;
        let mut lines = Vec::new();
        for p in subtitle {
            lines.extend(wrap(p, avail, NOTE_PX));
        }
        Heading {
            title: title.to_string(),
            lines,
        }
    }

    /// Height taken by the block, including the space under it.
    pub fn height(&self) -> f64 {
        PAD + line_height(TITLE_PX) + self.lines.len() as f64 * line_height(NOTE_PX) + 10.0
    }

    /// Width the title needs (the subtitle wraps).
    pub fn min_width(title: &str) -> f64 {
        text_width(title, TITLE_PX) * 1.08 + 2.0 * PAD
    }

    pub fn draw(&self, area: &Area) -> Drawn {
        let top = Font::new(TITLE_PX).bold().anchor(HPos::Left, VPos::Top);
        text(area, &self.title, PAD, PAD, top)?;
        let mut y = PAD + line_height(TITLE_PX);
        let f = Font::new(NOTE_PX)
            .colour(palette::MUTED)
            .anchor(HPos::Left, VPos::Top);
        for l in &self.lines {
            text(area, l, PAD, y, f)?;
            y += line_height(NOTE_PX);
        }
        Ok(())
    }
}

/// Draw a chart's heading and, under it, its legend flowed across the chart's `width`.
pub fn draw_heading_and_legend(
    area: &Area,
    heading: &Heading,
    legend: &[Entry],
    width: f64,
) -> Drawn {
    heading.draw(area)?;
    draw_legend(area, legend, PAD, heading.height(), width - 2.0 * PAD).map(|_| ())
}

/// Notes printed under a chart (wrapped), returning the height they take.
pub fn notes_height(notes: &[String], width: f64) -> f64 {
    let n: usize = notes
        .iter()
        .map(|s| wrap(s, width - 2.0 * PAD, NOTE_PX).len())
        .sum();
    n as f64 * line_height(NOTE_PX) + if n > 0 { 8.0 } else { 0.0 }
}

/// Draw `notes` from `y` down.
pub fn draw_notes(area: &Area, notes: &[String], y: f64, width: f64) -> Drawn {
    let f = Font::new(NOTE_PX)
        .colour(palette::MUTED)
        .anchor(HPos::Left, VPos::Top);
    let mut y = y + 4.0;
    for s in notes {
        for l in wrap(s, width - 2.0 * PAD, NOTE_PX) {
            text(area, &l, PAD, y, f)?;
            y += line_height(NOTE_PX);
        }
    }
    Ok(())
}

/// Linear or logarithmic axis scale.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Scale {
    Linear,
    Log,
}

/// A value axis mapped onto a pixel interval: `lo` goes to pixel `a`, `hi` to pixel `b`.
#[derive(Debug, Clone, Copy)]
pub struct Axis {
    pub lo: f64,
    pub hi: f64,
    pub scale: Scale,
    pub a: f64,
    pub b: f64,
}

impl Axis {
    pub fn new(range: (f64, f64), scale: Scale, a: f64, b: f64) -> Axis {
        Axis {
            lo: range.0,
            hi: range.1,
            scale,
            a,
            b,
        }
    }

    /// Pixel position of `v`.
    pub fn map(&self, v: f64) -> f64 {
        let t = match self.scale {
            Scale::Linear => (v - self.lo) / (self.hi - self.lo),
            Scale::Log => (v.ln() - self.lo.ln()) / (self.hi.ln() - self.lo.ln()),
        };
        let t = if t.is_finite() { t } else { 0.5 };
        self.a + t * (self.b - self.a)
    }

    /// Length in pixels.
    pub fn len(&self) -> f64 {
        (self.b - self.a).abs()
    }

    /// Tick positions and labels, at most about one per `spacing` pixels.
    pub fn ticks(&self, spacing: f64) -> Vec<(f64, String)> {
        let max_n = ((self.len() / spacing).floor() as usize).clamp(2, 12);
        let vals = match self.scale {
            Scale::Linear => nice_ticks(self.lo, self.hi, max_n),
            Scale::Log => log_ticks(self.lo, self.hi, max_n),
        };
        vals.into_iter().map(|v| (v, tick_label(v))).collect()
    }
}

/// A padded linear range covering `values` (and `extra`, e.g. zero); a sensible range when
/// there are no finite values or they are all equal.
pub fn linear_range(values: impl IntoIterator<Item = f64>, pad: f64) -> (f64, f64) {
    let (mut lo, mut hi) = (f64::INFINITY, f64::NEG_INFINITY);
    for v in values.into_iter().filter(|v| v.is_finite()) {
        lo = lo.min(v);
        hi = hi.max(v);
    }
    if !lo.is_finite() {
        return (0.0, 1.0);
    }
    if hi - lo <= f64::EPSILON * hi.abs().max(lo.abs()).max(1e-300) {
        let d = if lo == 0.0 { 1.0 } else { lo.abs() * 0.1 };
        return (lo - d, hi + d);
    }
    let d = (hi - lo) * pad;
    (lo - d, hi + d)
}

/// A padded logarithmic range covering the positive finite `values`.
pub fn log_range(values: impl IntoIterator<Item = f64>) -> (f64, f64) {
    let (mut lo, mut hi) = (f64::INFINITY, f64::NEG_INFINITY);
    for v in values.into_iter().filter(|v| v.is_finite() && *v > 0.0) {
        lo = lo.min(v);
        hi = hi.max(v);
    }
    if !lo.is_finite() {
        return (0.1, 10.0);
    }
    let span = (hi / lo).ln();
    if span < 2f64.ln() {
        // Less than a factor of two: widen to at least one decade around the geometric mean.
        let mid = (lo * hi).sqrt();
        let f = 10f64.sqrt().max((hi / lo).sqrt() * 1.3);
        return (mid / f, mid * f);
    }
    let f = (span * 0.06).exp();
    (lo / f, hi * f)
}

/// Ticks at 1, 2 or 5 times a power of ten, at most about `max_n` of them.
pub fn nice_ticks(lo: f64, hi: f64, max_n: usize) -> Vec<f64> {
    if !(lo.is_finite() && hi.is_finite()) || hi <= lo {
        return Vec::new();
    }
    let raw = (hi - lo) / max_n.max(1) as f64;
    let mag = 10f64.powf(raw.log10().floor());
    let step = [1.0, 2.0, 2.5, 5.0, 10.0]
        .iter()
        .map(|m| m * mag)
        .find(|s| (hi - lo) / s <= max_n as f64)
        .unwrap_or(10.0 * mag);
    let first = (lo / step).ceil() as i64;
    let last = (hi / step).floor() as i64;
    if last < first || last - first > 1000 {
        return Vec::new();
    }
    (first..=last)
        .map(|k| {
            let v = k as f64 * step;
            if v.abs() < step * 1e-9 { 0.0 } else { v }
        })
        .collect()
}

/// Ticks of a logarithmic axis: powers of ten, thinned to at most `max_n`; with less than
/// two decades in view, 1-2-5 steps inside each decade.
pub fn log_ticks(lo: f64, hi: f64, max_n: usize) -> Vec<f64> {
    if !(lo > 0.0 && hi > lo && hi.is_finite()) {
        return Vec::new();
    }
    let (d0, d1) = (lo.log10().floor() as i32, hi.log10().ceil() as i32);
    let decades: Vec<i32> = (d0..=d1).collect();
    let mut vals: Vec<f64> = Vec::new();
    let inside = |v: f64| v >= lo * (1.0 - 1e-9) && v <= hi * (1.0 + 1e-9);
    let powers: Vec<f64> = decades
        .iter()
        .map(|&d| 10f64.powi(d))
        .filter(|v| inside(*v))
        .collect();
    if powers.len() >= 3 {
        let every = powers.len().div_ceil(max_n.max(1));
        vals.extend(powers.iter().step_by(every.max(1)));
    } else {
        for &d in &decades {
            for m in [1.0, 2.0, 5.0] {
                let v = m * 10f64.powi(d);
                if inside(v) {
                    vals.push(v);
                }
            }
        }
        if vals.len() > max_n {
            vals.retain(|v| {
                let m = v / 10f64.powf(v.log10().floor());
                (m - 1.0).abs() < 1e-6 || (m - 5.0).abs() < 1e-6
            });
        }
        if vals.len() < 2 {
            vals = nice_ticks(lo, hi, max_n.min(5))
                .into_iter()
                .filter(|v| *v > 0.0)
                .collect();
        }
    }
    vals
}

/// Short label of a tick value.
pub fn tick_label(v: f64) -> String {
    if v == 0.0 {
        return "0".to_string();
    }
    let a = v.abs();
    if !(1e-3..1e5).contains(&a) {
        let e = a.log10().floor() as i32;
        let m = v / 10f64.powi(e);
        let m = (m * 100.0).round() / 100.0;
        return if (m.abs() - 1.0).abs() < 1e-9 {
            format!("{}1e{e}", if v < 0.0 { "-" } else { "" })
        } else {
            format!("{}e{e}", trim_zeros(&format!("{m:.2}")))
        };
    }
    trim_zeros(&format!("{v:.6}"))
}

fn trim_zeros(s: &str) -> String {
    if s.contains('.') {
        s.trim_end_matches('0').trim_end_matches('.').to_string()
    } else {
        s.to_string()
    }
}

/// A plot frame: the x axis runs left to right, the y axis bottom (`y.a`) to top (`y.b`).
#[derive(Debug, Clone, Copy)]
pub struct Frame {
    pub x: Axis,
    pub y: Axis,
}

impl Frame {
    pub fn left(&self) -> f64 {
        self.x.a.min(self.x.b)
    }
    pub fn right(&self) -> f64 {
        self.x.a.max(self.x.b)
    }
    pub fn top(&self) -> f64 {
        self.y.a.min(self.y.b)
    }
    pub fn bottom(&self) -> f64 {
        self.y.a.max(self.y.b)
    }
}

/// Width needed left of a frame for the y tick labels and the y-axis title.
pub fn y_gutter(labels: &[(f64, String)]) -> f64 {
    let w = labels
        .iter()
        .map(|(_, l)| text_width(l, TICK_PX))
        .fold(0.0, f64::max);
    w + 12.0 + line_height(LABEL_PX) + 6.0
}

/// Height needed under a frame for the x tick labels and the x-axis title.
pub fn x_gutter() -> f64 {
    6.0 + line_height(TICK_PX) + 6.0 + line_height(LABEL_PX)
}

/// Draw grid lines, the frame, tick labels and axis titles. `y_ticks` should come from
/// [`Axis::ticks`] on `f.y` (so that [`y_gutter`] reserved room for them); `x_ticks: None`
/// leaves the x axis unlabelled (category axes draw their own).
pub fn draw_frame(
    area: &Area,
    f: &Frame,
    x_ticks: Option<&[(f64, String)]>,
    y_ticks: &[(f64, String)],
    x_title: &str,
    y_title: &str,
) -> Drawn {
    let (l, r, t, b) = (f.left(), f.right(), f.top(), f.bottom());
    for (v, _) in y_ticks {
        let y = f.y.map(*v);
        polyline(area, &[(l, y), (r, y)], palette::GRID, 1, &[])?;
    }
    if let Some(xt) = x_ticks {
        for (v, _) in xt {
            let x = f.x.map(*v);
            polyline(area, &[(x, t), (x, b)], palette::GRID, 1, &[])?;
        }
    }
    rect(area, l, t, r, b, None, Some(palette::FRAME))?;
    let tick = Font::new(TICK_PX).colour(palette::BLACK);
    let mut widest = 0.0f64;
    for (v, s) in y_ticks {
        let y = f.y.map(*v);
        polyline(area, &[(l - 4.0, y), (l, y)], palette::FRAME, 1, &[])?;
        text(area, s, l - 7.0, y, tick.anchor(HPos::Right, VPos::Center))?;
        widest = widest.max(text_width(s, TICK_PX));
    }
    if let Some(xt) = x_ticks {
        // Keep a label only when it clears the previous one.
        let mut last_end = f64::NEG_INFINITY;
        for (v, s) in xt {
            let x = f.x.map(*v);
            polyline(area, &[(x, b), (x, b + 4.0)], palette::FRAME, 1, &[])?;
            let w = text_width(s, TICK_PX);
            if x - w / 2.0 > last_end + 6.0 && x + w / 2.0 <= r + 40.0 {
                text(area, s, x, b + 6.0, tick.anchor(HPos::Center, VPos::Top))?;
                last_end = x + w / 2.0;
            }
        }
    }
    let title = Font::new(LABEL_PX);
    if !x_title.is_empty() {
        let y = b + 6.0 + line_height(TICK_PX) + 6.0;
        text(
            area,
            x_title,
            (l + r) / 2.0,
            y,
            title.anchor(HPos::Center, VPos::Top),
        )?;
    }
    if !y_title.is_empty() {
        let x = l - widest - 12.0 - line_height(LABEL_PX) / 2.0;
        text(
            area,
            y_title,
            x,
            (t + b) / 2.0,
            title.upright().anchor(HPos::Center, VPos::Center),
        )?;
    }
    Ok(())
}

/// What a legend entry shows next to its label.
#[derive(Debug, Clone)]
pub enum Key {
    Point(RGBColor, Marker),
    /// A hollow circle ([`ring`]).
    Ring(RGBColor),
    Line(RGBColor, &'static [f64]),
    /// A band behind a line.
    Band(RGBColor, &'static [f64]),
    Swatch(RGBColor),
    /// An outlined box (box plots).
    BoxOutline,
    /// A dashed reference line.
    Reference,
}

/// A legend entry.
#[derive(Debug, Clone)]
pub struct Entry {
    pub key: Key,
    pub label: String,
}

const KEY_W: f64 = 26.0;

fn entry_width(e: &Entry) -> f64 {
    KEY_W + 6.0 + text_width(&e.label, LABEL_PX) + 18.0
}

/// Positions of legend entries flowed left to right in rows no wider than `max_w`, and the
/// total height.
pub fn legend_layout(entries: &[Entry], max_w: f64) -> (Vec<(f64, f64)>, f64) {
    let lh = line_height(LABEL_PX) + 4.0;
    let (mut x, mut y) = (0.0, 0.0);
    let mut pos = Vec::with_capacity(entries.len());
    for e in entries {
        let w = entry_width(e);
        if x > 0.0 && x + w > max_w {
            x = 0.0;
            y += lh;
        }
        pos.push((x, y));
        x += w;
    }
    let h = if entries.is_empty() { 0.0 } else { y + lh };
    (pos, h)
}

/// Width of a legend laid out as a single column.
pub fn legend_column_width(entries: &[Entry]) -> f64 {
    entries.iter().map(entry_width).fold(0.0, f64::max)
}

/// Draw a legend with its top-left corner at (x, y), flowed within `max_w`; returns height.
pub fn draw_legend(
    area: &Area,
    entries: &[Entry],
    x: f64,
    y: f64,
    max_w: f64,
) -> Result<f64, String> {
    let (pos, h) = legend_layout(entries, max_w);
    let lh = line_height(LABEL_PX) + 4.0;
    for (e, (dx, dy)) in entries.iter().zip(pos) {
        let (kx, cy) = (x + dx, y + dy + lh / 2.0);
        match &e.key {
            Key::Point(c, m) => marker(area, *m, kx + KEY_W / 2.0, cy, 5.0, *c)?,
            Key::Ring(c) => ring(area, kx + KEY_W / 2.0, cy, 5.0, *c)?,
            Key::Line(c, d) => polyline(area, &[(kx, cy), (kx + KEY_W, cy)], *c, 2, d)?,
            Key::Band(c, d) => {
                rect(
                    area,
                    kx,
                    cy - 6.0,
                    kx + KEY_W,
                    cy + 6.0,
                    Some((*c, 0.18)),
                    None,
                )?;
                polyline(area, &[(kx, cy), (kx + KEY_W, cy)], *c, 2, d)?;
            }
            Key::Swatch(c) => rect(
                area,
                kx,
                cy - 6.0,
                kx + KEY_W,
                cy + 6.0,
                Some((*c, 1.0)),
                Some(palette::FRAME),
            )?,
            Key::BoxOutline => {
                rect(
                    area,
                    kx + 6.0,
                    cy - 6.0,
                    kx + KEY_W - 6.0,
                    cy + 6.0,
                    None,
                    Some(palette::BLACK),
                )?;
                polyline(
                    area,
                    &[(kx + 6.0, cy), (kx + KEY_W - 6.0, cy)],
                    palette::BLACK,
                    2,
                    &[],
                )?;
            }
            Key::Reference => polyline(
                area,
                &[(kx, cy), (kx + KEY_W, cy)],
                palette::BLACK,
                1,
                &[5.0, 3.0],
            )?,
        }
        text(
            area,
            &e.label,
            kx + KEY_W + 6.0,
            cy,
            Font::new(LABEL_PX).anchor(HPos::Left, VPos::Center),
        )?;
    }
    Ok(h)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ticks_cover_ranges() {
        assert_eq!(
            nice_ticks(0.0, 1.0, 5),
            vec![0.0, 0.2, 0.4, 0.6000000000000001, 0.8, 1.0]
        );
        assert!(nice_ticks(1.0, 1.0, 5).is_empty());
        assert!(nice_ticks(f64::NAN, 1.0, 5).is_empty());
        let t = log_ticks(1e-4, 1e2, 4);
        assert!(t.len() <= 4 && t.len() >= 2, "{t:?}");
        let t = log_ticks(0.3, 4.0, 8);
        assert_eq!(t, vec![0.5, 1.0, 2.0]);
        assert!(log_ticks(-1.0, 1.0, 5).is_empty());
    }

    #[test]
    fn tick_labels_are_short() {
        assert_eq!(tick_label(0.6000000000000001), "0.6");
        assert_eq!(tick_label(1e-5), "1e-5");
        assert_eq!(tick_label(2.5e6), "2.5e6");
        assert_eq!(tick_label(100.0), "100");
    }

    #[test]
    fn ranges_survive_degenerate_input() {
        assert_eq!(linear_range([], 0.05), (0.0, 1.0));
        let (lo, hi) = linear_range([3.0, 3.0, f64::NAN], 0.05);
        assert!(lo < 3.0 && hi > 3.0);
        let (lo, hi) = log_range([2.0, f64::INFINITY, -1.0]);
        assert!(lo < 2.0 && hi > 2.0 && lo > 0.0);
    }

    #[test]
    fn wrap_respects_width() {
        let lines = wrap(
            "a b c d e f g h i j k l m n o p q r s t u v w x y z",
            60.0,
            10.0,
        );
        assert!(lines.len() > 1);
        assert!(
            lines
                .iter()
                .all(|l| text_width(l, 10.0) <= 60.0 || !l.contains(' '))
        );
    }
}
