//! Drawing primitives over plotters' SVG backend: a canvas in CSS pixels,
//! the series styles, tick placement and number formatting.
//!
//! Everything is laid out in CSS pixels as `f64` and drawn at twice that
//! resolution (plotters writes integer coordinates), so lines and text are
//! placed to half a pixel. Determinism: only `+ - * /`, `sqrt`, rounding
//! and `libm` are used to place anything, so the same inputs give the same
//! bytes on every machine; plotters' SVG writer adds no ids or timestamps.

use plotters::coord::Shift;
use plotters::prelude::*;
use plotters::style::text_anchor::{HPos, Pos, VPos};
use plotters::style::FontTransform;

/// Internal drawing units per CSS pixel.
const SCALE: f64 = 2.0;

pub(crate) fn err<E: std::fmt::Debug>(e: E) -> String {
    format!("drawing failed: {e:?}")
}

pub(crate) type Res = Result<(), String>;

/// Text sizes in CSS pixels. Each doubled size survives plotters' 1.24
/// font-size factor exactly, so the SVG says `font-size="32"`, not
/// `31.999999999999996` (checked by a unit test below).
pub(crate) const TICK_PX: f64 = 16.0;
pub(crate) const AXIS_PX: f64 = 17.0;
pub(crate) const TITLE_PX: f64 = 18.0;
pub(crate) const LEGEND_PX: f64 = 16.0;
pub(crate) const STAGE_PX: f64 = 14.0;

pub(crate) const INK: RGBColor = RGBColor(34, 34, 34);
pub(crate) const MUTED: RGBColor = RGBColor(85, 85, 85);
pub(crate) const GRID: RGBColor = RGBColor(214, 214, 214);
pub(crate) const BAND_A: RGBColor = RGBColor(241, 241, 241);
pub(crate) const BAND_B: RGBColor = RGBColor(226, 226, 226);
pub(crate) const BOUNDARY: RGBColor = RGBColor(160, 160, 160);

/// Marker shapes, drawn every so often along a line so that lines stay
/// distinguishable in greyscale and for readers who cannot tell the
/// colours apart.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Marker {
    Circle,
    Square,
    Triangle,
    Diamond,
    Cross,
    OpenCircle,
    TriangleDown,
    OpenSquare,
}

/// How one series is drawn.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LineStyle {
    pub color: RGBColor,
    /// Stroke width in CSS pixels (a multiple of 0.5).
    pub width: f64,
    /// Dash pattern in CSS pixels, alternating on and off; empty = solid.
    pub dash: &'static [f64],
    pub marker: Option<Marker>,
}

/// A colour-blind-safe set of eight colours (no red/green pairs, distinct
/// in lightness), each with its own dash pattern and marker, so that
/// series differ in three ways at once.
const SERIES: [(RGBColor, &[f64], Marker); 8] = [
    (RGBColor(0, 114, 178), &[], Marker::Circle),
    (RGBColor(213, 94, 0), &[9.0, 4.0], Marker::Square),
    (
        RGBColor(0, 158, 115),
        &[12.0, 4.0, 2.5, 4.0],
        Marker::Triangle,
    ),
    (RGBColor(204, 121, 167), &[4.0, 3.0], Marker::Diamond),
    (RGBColor(230, 159, 0), &[16.0, 5.0], Marker::Cross),
    (RGBColor(86, 180, 233), &[2.5, 3.0], Marker::OpenCircle),
    (
        RGBColor(0, 0, 0),
        &[9.0, 3.0, 2.5, 3.0, 2.5, 3.0],
        Marker::TriangleDown,
    ),
    (RGBColor(120, 120, 120), &[6.0, 6.0], Marker::OpenSquare),
];

/// The style of the `i`-th series of a figure.
pub fn series_style(i: usize) -> LineStyle {
    let (color, dash, marker) = SERIES[i % SERIES.len()];
    LineStyle {
        color,
        width: 2.0,
        dash,
        marker: Some(marker),
    }
}

/// A rough width of `s` set in a sans-serif face at `size` px. Used only
/// for layout (where labels go, how wide the legend is); the viewer sets
/// the real text.
pub(crate) fn text_width(s: &str, size: f64) -> f64 {
    s.chars()
        .map(|c| match c {
            'i' | 'l' | 'j' | '.' | ',' | ':' | ';' | '\'' | '|' | '!' | ' ' | '1' | '(' | ')'
            | '[' | ']' | 'f' | 't' | 'r' => 0.34,
            'm' | 'w' | 'M' | 'W' | '%' => 0.86,
            'A'..='Z' => 0.68,
            '⁰'..='⁹' | '¹' | '²' | '³' | '⁻' => 0.36,
            _ => 0.56,
        })
        .sum::<f64>()
        * size
}

fn ip(v: f64) -> i32 {
    (v * SCALE).round() as i32
}

fn iw(w: f64) -> u32 {
    ((w * SCALE).round() as u32).max(1)
}

/// A drawing surface of `width` x `height` CSS pixels.
pub(crate) struct Canvas<'a> {
    area: DrawingArea<SVGBackend<'a>, Shift>,
}

/// Draw a figure of `width` x `height` CSS pixels and return the SVG.
pub(crate) fn render(
    width: f64,
    height: f64,
    title: &str,
    draw: impl FnOnce(&Canvas) -> Res,
) -> Result<Vec<u8>, String> {
    let (w, h) = (ip(width).max(1) as u32, ip(height).max(1) as u32);
    let mut buf = String::new();
    {
        let area = SVGBackend::with_string(&mut buf, (w, h)).into_drawing_area();
        area.fill(&WHITE).map_err(err)?;
        let c = Canvas { area };
        draw(&c)?;
        c.area.present().map_err(err)?;
    }
    // plotters sizes the document in drawing units; show it at CSS pixels,
    // keep the viewBox in drawing units, and give it an accessible title.
    let open = format!("<svg width=\"{w}\" height=\"{h}\" ");
    let css = format!(
        "<svg width=\"{}\" height=\"{}\" ",
        fmt_px(width),
        fmt_px(height)
    );
    if !buf.starts_with(&open) {
        return Err("unexpected SVG header from the plotting backend".into());
    }
    let mut out = css;
    out.push_str(&buf[open.len()..]);
    if let Some(end) = out.find(">\n") {
        out.insert_str(end + 2, &format!("<title>{}</title>\n", escape_xml(title)));
    }
    Ok(out.into_bytes())
}

fn fmt_px(v: f64) -> String {
    let r = (v * 2.0).round() / 2.0;
    if r.fract() == 0.0 {
        format!("{}", r as i64)
    } else {
        format!("{r:.1}")
    }
}

pub(crate) fn escape_xml(s: &str) -> String {
    let mut out = String::with_capacity(s.len());
    for c in s.chars() {
        match c {
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '&' => out.push_str("&amp;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&apos;"),
            other => out.push(other),
        }
    }
    out
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Anchor {
    Start,
    Middle,
    End,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Baseline {
    Top,
    Center,
}

/// How a text is set.
#[derive(Debug, Clone, Copy)]
pub(crate) struct TextSpec {
    pub size: f64,
    pub color: RGBColor,
    pub anchor: Anchor,
    pub baseline: Baseline,
    pub bold: bool,
    /// Rotated a quarter turn counter-clockwise (for a y-axis title).
    pub vertical: bool,
}

impl TextSpec {
    pub fn new(size: f64, anchor: Anchor, baseline: Baseline) -> TextSpec {
        TextSpec {
            size,
            color: INK,
            anchor,
            baseline,
            bold: false,
            vertical: false,
        }
    }
    pub fn color(mut self, c: RGBColor) -> TextSpec {
        self.color = c;
        self
    }
    pub fn bold(mut self) -> TextSpec {
        self.bold = true;
        self
    }
    pub fn vertical(mut self) -> TextSpec {
        self.vertical = true;
        self
    }
}

impl Canvas<'_> {
    /// A polyline; consecutive points that land on the same drawing unit
    /// are written once.
    pub fn path(&self, pts: &[(f64, f64)], color: RGBColor, width: f64) -> Res {
        let mut q: Vec<(i32, i32)> = Vec::with_capacity(pts.len());
        for &(x, y) in pts {
            if !(x.is_finite() && y.is_finite()) {
                continue;
            }
            let p = (ip(x), ip(y));
            if q.last() != Some(&p) {
                q.push(p);
            }
        }
        if q.len() < 2 {
            return Ok(());
        }
        let style = ShapeStyle {
            color: color.to_rgba(),
            filled: false,
            stroke_width: iw(width),
        };
        self.area
            .draw(&PathElement::new(q, style))
            .map(|_| ())
            .map_err(err)
    }

    /// A line with a dash pattern (solid when `dash` is empty). Dashes are
    /// cut here, in pixel space, so the pattern runs on evenly along the
    /// whole line however densely it is sampled.
    pub fn dashed(&self, pts: &[(f64, f64)], color: RGBColor, width: f64, dash: &[f64]) -> Res {
        for piece in dash_pieces(pts, dash) {
            self.path(&piece, color, width)?;
        }
        Ok(())
    }

    pub fn line(&self, a: (f64, f64), b: (f64, f64), color: RGBColor, width: f64) -> Res {
        self.path(&[a, b], color, width)
    }

    pub fn rect_fill(&self, x0: f64, y0: f64, x1: f64, y1: f64, color: RGBAColor) -> Res {
        let (a, b) = (
            (ip(x0.min(x1)), ip(y0.min(y1))),
            (ip(x0.max(x1)), ip(y0.max(y1))),
        );
        if a.0 == b.0 || a.1 == b.1 {
            return Ok(());
        }
        self.area
            .draw(&Rectangle::new([a, b], color.filled()))
            .map(|_| ())
            .map_err(err)
    }

    pub fn rect_stroke(&self, x0: f64, y0: f64, x1: f64, y1: f64, color: RGBColor, w: f64) -> Res {
        self.path(
            &[(x0, y0), (x1, y0), (x1, y1), (x0, y1), (x0, y0)],
            color,
            w,
        )
    }

    pub fn polygon(&self, pts: &[(f64, f64)], color: RGBAColor) -> Res {
        let q: Vec<(i32, i32)> = pts
            .iter()
            .filter(|(x, y)| x.is_finite() && y.is_finite())
            .map(|&(x, y)| (ip(x), ip(y)))
            .collect();
        if q.len() < 3 {
            return Ok(());
        }
        self.area
            .draw(&Polygon::new(q, color.filled()))
            .map(|_| ())
            .map_err(err)
    }

    pub fn circle(&self, c: (f64, f64), r: f64, color: RGBColor, filled: bool, w: f64) -> Res {
        let style = ShapeStyle {
            color: color.to_rgba(),
            filled,
            stroke_width: iw(w),
        };
        self.area
            .draw(&Circle::new(
                (ip(c.0), ip(c.1)),
                (r * SCALE).round() as u32,
                style,
            ))
            .map(|_| ())
            .map_err(err)
    }

    /// A marker centred at `c`, about `r` px in radius.
    pub fn marker(&self, m: Marker, c: (f64, f64), r: f64, color: RGBColor) -> Res {
        let (x, y) = c;
        let fill = color.to_rgba();
        match m {
            Marker::Circle => self.circle(c, r, color, true, 1.0),
            Marker::OpenCircle => {
                self.circle(c, r, WHITE, true, 1.0)?;
                self.circle(c, r, color, false, 1.5)
            }
            Marker::Square => self.rect_fill(x - r, y - r, x + r, y + r, fill),
            Marker::OpenSquare => {
                self.rect_fill(x - r, y - r, x + r, y + r, WHITE.to_rgba())?;
                self.rect_stroke(x - r, y - r, x + r, y + r, color, 1.5)
            }
            Marker::Triangle => self.polygon(
                &[
                    (x, y - 1.2 * r),
                    (x + 1.1 * r, y + 0.8 * r),
                    (x - 1.1 * r, y + 0.8 * r),
                ],
                fill,
            ),
            Marker::TriangleDown => self.polygon(
                &[
                    (x, y + 1.2 * r),
                    (x + 1.1 * r, y - 0.8 * r),
                    (x - 1.1 * r, y - 0.8 * r),
                ],
                fill,
            ),
            Marker::Diamond => self.polygon(
                &[
                    (x, y - 1.3 * r),
                    (x + 1.1 * r, y),
                    (x, y + 1.3 * r),
                    (x - 1.1 * r, y),
                ],
                fill,
            ),
            Marker::Cross => {
                self.line((x - r, y - r), (x + r, y + r), color, 2.0)?;
                self.line((x - r, y + r), (x + r, y - r), color, 2.0)
            }
        }
    }

    pub fn text(&self, s: &str, at: (f64, f64), spec: TextSpec) -> Res {
        if s.is_empty() {
            return Ok(());
        }
        let style = if spec.bold {
            FontStyle::Bold
        } else {
            FontStyle::Normal
        };
        let mut font = FontDesc::new(FontFamily::SansSerif, spec.size * SCALE * 1.24, style);
        if spec.vertical {
            font = font.transform(FontTransform::Rotate270);
        }
        let h = match spec.anchor {
            Anchor::Start => HPos::Left,
            Anchor::Middle => HPos::Center,
            Anchor::End => HPos::Right,
        };
        let v = match spec.baseline {
            Baseline::Top => VPos::Top,
            Baseline::Center => VPos::Center,
        };
        let ts = TextStyle::from(font).color(&spec.color).pos(Pos::new(h, v));
        self.area
            .draw(&Text::new(s.to_owned(), (ip(at.0), ip(at.1)), ts))
            .map(|_| ())
            .map_err(err)
    }
}

/// Cut a polyline into the "on" pieces of a dash pattern.
pub(crate) fn dash_pieces(pts: &[(f64, f64)], dash: &[f64]) -> Vec<Vec<(f64, f64)>> {
    let pts: Vec<(f64, f64)> = pts
        .iter()
        .copied()
        .filter(|(x, y)| x.is_finite() && y.is_finite())
        .collect();
    let total: f64 = dash.iter().sum();
    if dash.is_empty() || total <= 0.0 || pts.len() < 2 {
        return vec![pts];
    }
    let mut out = Vec::new();
    let mut k = 0; // index into the pattern
    let mut left = dash[0]; // length still to go in the current dash or gap
    let mut cur: Vec<(f64, f64)> = vec![pts[0]];
    for w in pts.windows(2) {
        let (mut a, b) = (w[0], w[1]);
        loop {
            let (dx, dy) = (b.0 - a.0, b.1 - a.1);
            let d = (dx * dx + dy * dy).sqrt();
            if d <= left {
                left -= d;
                if k % 2 == 0 {
                    cur.push(b);
                }
                break;
            }
            let t = left / d;
            let m = (a.0 + dx * t, a.1 + dy * t);
            if k % 2 == 0 {
                cur.push(m);
                out.push(std::mem::take(&mut cur));
            } else {
                cur = vec![m];
            }
            a = m;
            k = (k + 1) % dash.len();
            left = dash[k];
        }
    }
    if k % 2 == 0 && cur.len() > 1 {
        out.push(cur);
    }
    out
}

/// Evenly spaced "nice" tick values (steps of 1, 2, 2.5 or 5 times a power
/// of ten) inside `[lo, hi]`, at most `max` of them, and the number of
/// decimals their labels need.
pub(crate) fn nice_ticks(lo: f64, hi: f64, max: usize) -> (Vec<f64>, usize) {
    let (lo, hi) = if lo <= hi { (lo, hi) } else { (hi, lo) };
    let span = hi - lo;
    if !(span > 0.0 && span.is_finite()) {
        return (vec![lo], decimals_for(lo.abs().max(1.0)));
    }
    let max = max.max(2);
    let raw = span / (max - 1) as f64;
    let mut e = libm::floor(libm::log10(raw)) as i32;
    loop {
        let p = pow10(e);
        for m in [1.0, 2.0, 2.5, 5.0] {
            let step = m * p;
            let first = libm::ceil(lo / step - 1e-9);
            let last = libm::floor(hi / step + 1e-9);
            if last - first + 1.0 <= max as f64 {
                // k * m / 10^-e rounds once, so 3 x 0.05 is written 0.15.
                let ticks: Vec<f64> = (first as i64..=last as i64)
                    .map(|k| {
                        let v = if e < 0 {
                            k as f64 * m / pow10(-e)
                        } else {
                            k as f64 * m * p
                        };
                        clean(v, step)
                    })
                    .collect();
                let d = decimals_for(step);
                return (ticks, d);
            }
        }
        e += 1;
    }
}

/// 10^e by repeated multiplication (exact for the range used here).
pub(crate) fn pow10(e: i32) -> f64 {
    let mut p = 1.0;
    for _ in 0..e.unsigned_abs() {
        if e > 0 {
            p *= 10.0;
        } else {
            p /= 10.0;
        }
    }
    p
}

/// Snap values within a tiny fraction of a step of zero to zero, so ticks
/// never read "-0".
fn clean(v: f64, step: f64) -> f64 {
    if v.abs() < step * 1e-9 {
        0.0
    } else {
        v
    }
}

/// Decimals needed to write multiples of `step` exactly.
fn decimals_for(step: f64) -> usize {
    for d in 0..12usize {
        let scaled = step * pow10(d as i32);
        if (scaled - libm::round(scaled)).abs() < 1e-6 * scaled.abs().max(1.0) {
            return d;
        }
    }
    12
}

/// A tick label with `decimals` decimals; never "-0".
pub(crate) fn tick_label(v: f64, decimals: usize) -> String {
    let s = format!("{v:.decimals$}");
    if s.starts_with('-') && s[1..].chars().all(|c| c == '0' || c == '.') {
        s[1..].to_owned()
    } else {
        s.replace('-', "\u{2212}")
    }
}

/// The power of ten to factor out of an axis whose values reach `maxabs`,
/// so tick labels stay short (0 when none is needed).
pub(crate) fn axis_exponent(maxabs: f64) -> i32 {
    if !(maxabs.is_finite() && maxabs > 0.0) || (1e-2..1e5).contains(&maxabs) {
        return 0;
    }
    libm::floor(libm::log10(maxabs)) as i32
}

/// `10⁻³`, `10²¹`.
pub(crate) fn power_of_ten(e: i32) -> String {
    let sup = |c: char| match c {
        '-' => '⁻',
        '0' => '⁰',
        '1' => '¹',
        '2' => '²',
        '3' => '³',
        '4' => '⁴',
        '5' => '⁵',
        '6' => '⁶',
        '7' => '⁷',
        '8' => '⁸',
        _ => '⁹',
    };
    format!("10{}", e.to_string().chars().map(sup).collect::<String>())
}

/// A UDUNITS unit string as a person reads it: `degC` → `°C`,
/// `W m-2` → `W m⁻²`, `cm yr-1` → `cm yr⁻¹`; `1` (dimensionless) stays.
pub(crate) fn pretty_unit(u: &str) -> String {
    let u = u.trim();
    if u == "degC" {
        return "°C".into();
    }
    u.split_whitespace()
        .map(|tok| {
            let split = tok
                .char_indices()
                .find(|&(i, c)| i > 0 && (c == '-' || c.is_ascii_digit()))
                .map_or(tok.len(), |(i, _)| i);
            let (name, pow) = tok.split_at(split);
            let name = if name == "degC" { "°C" } else { name };
            if pow.is_empty() {
                name.to_owned()
            } else {
                let sup: String = power_of_ten(pow.parse().unwrap_or(1))
                    .chars()
                    .skip(2)
                    .collect();
                format!("{name}{sup}")
            }
        })
        .collect::<Vec<_>>()
        .join(" ")
}

/// A number for a label or a legend: up to four significant digits,
/// scientific outside 1e-3..1e5.
pub(crate) fn short_num(v: f64) -> String {
    if v == 0.0 {
        return "0".into();
    }
    if !v.is_finite() {
        return if v.is_nan() {
            "n/a".into()
        } else {
            "∞".into()
        };
    }
    let a = v.abs();
    let s = if (1e-3..1e5).contains(&a) {
        let d = (3 - libm::floor(libm::log10(a)) as i32).clamp(0, 6) as usize;
        let s = format!("{v:.d$}");
        if s.contains('.') {
            s.trim_end_matches('0').trim_end_matches('.').to_owned()
        } else {
            s
        }
    } else {
        let e = libm::floor(libm::log10(a)) as i32;
        let m = v / pow10(e);
        let ms = format!("{m:.3}");
        let ms = ms.trim_end_matches('0').trim_end_matches('.');
        format!("{ms}×{}", power_of_ten(e))
    };
    s.replace('-', "\u{2212}")
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn font_sizes_survive_the_backend_factor() {
        for px in [TICK_PX, AXIS_PX, TITLE_PX, LEGEND_PX, STAGE_PX] {
            let s = px * SCALE * 1.24;
            assert_eq!(s / 1.24, px * SCALE, "{px}");
        }
    }

    #[test]
    fn ticks_are_nice_and_bounded() {
        let (t, d) = nice_ticks(0.0, 4.5, 7);
        assert_eq!(t, vec![0.0, 1.0, 2.0, 3.0, 4.0]);
        assert_eq!(d, 0);
        let (t, d) = nice_ticks(0.0, 40.0, 7);
        assert_eq!(t, vec![0.0, 10.0, 20.0, 30.0, 40.0]);
        assert_eq!(d, 0);
        let (t, d) = nice_ticks(-0.43, 22.7, 6);
        assert!(t.len() <= 6 && t.len() >= 3, "{t:?}");
        assert!(t.iter().all(|v| (-0.43..=22.7).contains(v)));
        assert_eq!(d, 0);
        let (t, d) = nice_ticks(0.0, 0.25, 6);
        assert_eq!(t, vec![0.0, 0.05, 0.1, 0.15, 0.2, 0.25]);
        assert_eq!(d, 2);
        assert_eq!(tick_label(-0.0, 1), "0.0");
        assert_eq!(tick_label(-2.5, 1), "\u{2212}2.5");
    }

    #[test]
    fn dashes_cover_the_pattern() {
        let pieces = dash_pieces(&[(0.0, 0.0), (10.0, 0.0), (20.0, 0.0)], &[4.0, 1.0]);
        // 0-4, 5-9, 10-14, 15-19 on; the last dash is cut at the end.
        assert_eq!(pieces.len(), 4);
        assert_eq!(pieces[0], vec![(0.0, 0.0), (4.0, 0.0)]);
        assert_eq!(pieces[2].first(), Some(&(10.0, 0.0)));
        assert_eq!(pieces[3].last(), Some(&(19.0, 0.0)));
        assert_eq!(dash_pieces(&[(0.0, 0.0), (3.0, 4.0)], &[]).len(), 1);
    }

    #[test]
    fn units_and_numbers_read_well() {
        assert_eq!(pretty_unit("degC"), "°C");
        assert_eq!(pretty_unit("W m-2"), "W m⁻²");
        assert_eq!(pretty_unit("kg yr-1"), "kg yr⁻¹");
        assert_eq!(pretty_unit("m2"), "m²");
        assert_eq!(power_of_ten(21), "10²¹");
        assert_eq!(axis_exponent(3.9e21), 21);
        assert_eq!(axis_exponent(1900.0), 0);
        assert_eq!(short_num(2.5373841050941555), "2.537");
        assert_eq!(short_num(1.4e21), "1.4×10²¹");
        assert_eq!(short_num(-40.0), "\u{2212}40");
    }
}
