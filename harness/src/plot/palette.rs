//! Colours, markers and dash patterns of the charts.
//!
//! Categorical colours are the eight of Okabe & Ito (2008), *Color Universal Design (CUD): how
//! to make figures and presentations that are friendly to colorblind people*
//! (<https://jfly.uni-koeln.de/color/>), the set recommended by Wong (2011), "Points of view:
//! Color blindness", *Nature Methods* 8, 441. Yellow is kept out of the series colours because
//! it has too little contrast against a white background for thin lines; series beyond the
//! seven remaining colours are told apart by dash pattern (lines) or marker shape (points), so
//! no chart relies on hue alone.
//!
//! The sequential scale of the heat maps runs from near-white through the Okabe-Ito sky blue
//! and blue to a dark blue. Its lightness falls monotonically, so the order of tiles can be
//! read from lightness alone, which every form of colour-vision deficiency preserves; tile
//! values are also printed as numbers.

use plotters::style::RGBColor;

/// Okabe-Ito black.
pub const BLACK: RGBColor = RGBColor(0, 0, 0);
/// Okabe-Ito orange.
pub const ORANGE: RGBColor = RGBColor(230, 159, 0);
/// Okabe-Ito sky blue.
pub const SKY_BLUE: RGBColor = RGBColor(86, 180, 233);
/// Okabe-Ito bluish green.
pub const BLUISH_GREEN: RGBColor = RGBColor(0, 158, 115);
/// Okabe-Ito yellow (used only for fills, never for lines or text).
pub const YELLOW: RGBColor = RGBColor(240, 228, 66);
/// Okabe-Ito blue.
pub const BLUE: RGBColor = RGBColor(0, 114, 178);
/// Okabe-Ito vermillion.
pub const VERMILLION: RGBColor = RGBColor(213, 94, 0);
/// Okabe-Ito reddish purple.
pub const REDDISH_PURPLE: RGBColor = RGBColor(204, 121, 167);

/// Neutral greys for frames, grid lines and secondary text (not data).
pub const GRID: RGBColor = RGBColor(225, 225, 225);
pub const FRAME: RGBColor = RGBColor(90, 90, 90);
pub const MUTED: RGBColor = RGBColor(85, 85, 85);
pub const WHITE: RGBColor = RGBColor(255, 255, 255);

/// Series colours in the order they are handed out.
pub const SERIES: [RGBColor; 7] = [
    BLUE,
    ORANGE,
    BLUISH_GREEN,
    VERMILLION,
    REDDISH_PURPLE,
    SKY_BLUE,
    BLACK,
];

/// Stroke patterns: on/off lengths in pixels (empty: solid).
pub const DASHES: [&[f64]; 3] = [&[], &[7.0, 4.0], &[2.0, 3.0]];

/// Number of distinct (colour, dash) line styles.
pub const LINE_STYLES: usize = SERIES.len() * DASHES.len();

/// Marker shapes of point series.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Marker {
    Circle,
    Square,
    TriangleUp,
    Diamond,
    TriangleDown,
    Cross,
}

/// Markers in the order they are handed out.
pub const MARKERS: [Marker; 6] = [
    Marker::Circle,
    Marker::Square,
    Marker::TriangleUp,
    Marker::Diamond,
    Marker::TriangleDown,
    Marker::Cross,
];

/// Colour of series `i` (cycling).
pub fn series_colour(i: usize) -> RGBColor {
    SERIES[i % SERIES.len()]
}

/// Line style of series `i`: colour first, then dash pattern, so the first seven series are
/// solid lines of distinct colours.
pub fn line_style(i: usize) -> (RGBColor, &'static [f64]) {
    (
        SERIES[i % SERIES.len()],
        DASHES[(i / SERIES.len()) % DASHES.len()],
    )
}

/// Point style of group `i`: colour and marker change together.
pub fn point_style(i: usize) -> (RGBColor, Marker) {
    (SERIES[i % SERIES.len()], MARKERS[i % MARKERS.len()])
}

/// Anchors of the sequential scale, light to dark.
const RAMP: [(f64, [f64; 3]); 4] = [
    (0.0, [244.0, 247.0, 250.0]),
    (0.4, [86.0, 180.0, 233.0]),
    (0.75, [0.0, 114.0, 178.0]),
    (1.0, [0.0, 40.0, 75.0]),
];

/// Colour of the sequential scale at `t` in [0, 1] (0 light, 1 dark); values outside are
/// clamped and NaN maps to the light end.
pub fn sequential(t: f64) -> RGBColor {
    let t = if t.is_nan() { 0.0 } else { t.clamp(0.0, 1.0) };
    let mut i = 0;
    while i + 2 < RAMP.len() && t > RAMP[i + 1].0 {
        i += 1;
    }
    let (t0, c0) = RAMP[i];
    let (t1, c1) = RAMP[i + 1];
    let u = if t1 > t0 { (t - t0) / (t1 - t0) } else { 0.0 };
    let mix = |k: usize| (c0[k] + u * (c1[k] - c0[k])).round().clamp(0.0, 255.0) as u8;
    RGBColor(mix(0), mix(1), mix(2))
}

/// Relative luminance of an sRGB colour, in [0, 1], as defined in W3C (2008), *Web Content
/// Accessibility Guidelines (WCAG) 2.0*.
pub fn luminance(c: RGBColor) -> f64 {
    let lin = |v: u8| {
        let s = v as f64 / 255.0;
        if s <= 0.04045 {
            s / 12.92
        } else {
            ((s + 0.055) / 1.055).powf(2.4)
        }
    };
    0.2126 * lin(c.0) + 0.7152 * lin(c.1) + 0.0722 * lin(c.2)
}

/// Black or white, whichever reads better on `background`.
pub fn text_on(background: RGBColor) -> RGBColor {
    if luminance(background) > 0.3 {
        BLACK
    } else {
        WHITE
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sequential_scale_darkens_monotonically() {
        let mut last = f64::INFINITY;
        for k in 0..=20 {
            let l = luminance(sequential(k as f64 / 20.0));
            assert!(l < last, "lightness must fall along the scale");
            last = l;
        }
        assert_eq!(sequential(f64::NAN), sequential(0.0));
        assert_eq!(sequential(7.0), sequential(1.0));
    }

    #[test]
    fn styles_cycle_without_repeats_in_the_first_cycle() {
        let styles: Vec<_> = (0..LINE_STYLES).map(line_style).collect();
        for (i, a) in styles.iter().enumerate() {
            for b in &styles[i + 1..] {
                assert!(a != b);
            }
        }
    }
}
