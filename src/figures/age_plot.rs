//! One figure type drawn many ways: quantities against age, the oldest age
//! on the left and the present on the right, with stage bands, event
//! lines, shaded ranges and constraint marks. Run and ensemble figures are
//! both built from an [`AgePlot`].
//!
//! Layout, top to bottom: title; a strip with the stage names (never over
//! the data); the plot area; tick labels and the age-axis title; the
//! legend, in rows below everything (so it can never cover a line).

use plotters::style::{Color, RGBColor, WHITE};

use super::canvas::{
    self, axis_exponent, nice_ticks, power_of_ten, render, short_num, text_width, tick_label,
    Anchor, Baseline, Canvas, LineStyle, Marker, Res, TextSpec, AXIS_PX, BAND_A, BAND_B, BOUNDARY,
    GRID, INK, LEGEND_PX, MUTED, STAGE_PX, TICK_PX, TITLE_PX,
};
use super::data::StageSpan;

/// Width of every age figure in CSS pixels. At 3.5 in (one paper column)
/// a 16 px tick label prints at about 6.7 pt.
pub const WIDTH: f64 = 600.0;
const PLOT_HEIGHT: f64 = 236.0;
const MARGIN: f64 = 12.0;
const STRIP_ROW: f64 = 18.0;
const LEGEND_ROW: f64 = 24.0;
const MARKERS_PER_LINE: usize = 6;

/// One line against age.
#[derive(Debug, Clone)]
pub struct Line {
    pub label: String,
    /// Ages in Ga.
    pub ages: Vec<f64>,
    pub values: Vec<f64>,
    pub style: LineStyle,
}

/// A shaded range between two curves (an ensemble band).
#[derive(Debug, Clone)]
pub struct Fill {
    pub label: String,
    pub ages: Vec<f64>,
    pub low: Vec<f64>,
    pub high: Vec<f64>,
    pub color: RGBColor,
    pub opacity: f64,
}

/// A vertical line at an age (an event), marked where it crosses each line.
#[derive(Debug, Clone)]
pub struct EventLine {
    pub label: String,
    pub age_ga: f64,
}

/// A constraint drawn on a figure, in the figure's value unit.
#[derive(Debug, Clone, PartialEq)]
pub enum MarkShape {
    /// A target with its uncertainty: the bar spans the accepted window
    /// (`half_width` either side, e.g. two sigmas).
    Target { value: f64, half_width: f64 },
    /// A range: a bar from low to high.
    Range { low: f64, high: f64 },
    /// An upper bound: a line across the plot, a marker pointing down.
    Upper { value: f64 },
    /// A lower bound.
    Lower { value: f64 },
}

#[derive(Debug, Clone, PartialEq)]
pub struct Mark {
    pub label: String,
    /// Age in Ga at which the constraint applies (None: at every age).
    pub age_ga: Option<f64>,
    pub shape: MarkShape,
}

#[derive(Debug, Clone, Default)]
pub struct AgePlot {
    pub title: String,
    /// The quantity on the value axis, e.g. "water".
    pub y_quantity: String,
    /// Its unit as a person reads it, e.g. "ocean masses", "K".
    pub y_unit: String,
    pub lines: Vec<Line>,
    pub fills: Vec<Fill>,
    pub stages: Vec<StageSpan>,
    pub events: Vec<EventLine>,
    pub marks: Vec<Mark>,
    /// Start the value axis at zero (for inventories).
    pub from_zero: bool,
    /// Draw a thin line at value zero (for anomalies).
    pub zero_line: bool,
}

/// The unit the age axis is labelled in, and how many of it make a Ga.
pub(crate) fn age_unit(span_ga: f64) -> (&'static str, f64) {
    if span_ga >= 0.1 {
        ("Ga", 1.0)
    } else if span_ga >= 1e-4 {
        ("Ma", 1e3)
    } else {
        ("ka", 1e6)
    }
}

/// An age in the unit that suits it, for legends: "2.537 Ga", "1.912 Ma".
pub(crate) fn age_text(age_ga: f64, unit: &str) -> String {
    let f = match unit {
        "Ma" => 1e3,
        "ka" => 1e6,
        _ => 1.0,
    };
    format!("{} {unit}", short_num(age_ga * f))
}

enum Swatch {
    Line(LineStyle),
    Fill(RGBColor, f64),
    Event,
    Mark(MarkShape),
}

struct Entry {
    swatch: Swatch,
    label: String,
}

const SWATCH_W: f64 = 34.0;

fn entry_width(e: &Entry) -> f64 {
    SWATCH_W + 7.0 + text_width(&e.label, LEGEND_PX) + 20.0
}

/// Legend entries flowed into rows no wider than `width`.
fn legend_rows(entries: &[Entry], width: f64) -> Vec<Vec<usize>> {
    let mut rows: Vec<Vec<usize>> = Vec::new();
    let mut used = 0.0;
    for (i, e) in entries.iter().enumerate() {
        let w = entry_width(e);
        match rows.last_mut() {
            Some(row) if used + w <= width => {
                row.push(i);
                used += w;
            }
            _ => {
                rows.push(vec![i]);
                used = w;
            }
        }
    }
    rows
}

fn shorten(s: &str, max: usize) -> String {
    if s.chars().count() <= max {
        s.to_owned()
    } else {
        let mut t: String = s.chars().take(max - 1).collect();
        t.push('…');
        t
    }
}

/// Linear interpolation of `values` at `age` (ages in either order).
pub(crate) fn value_at(ages: &[f64], values: &[f64], age: f64) -> Option<f64> {
    for k in 1..ages.len().min(values.len()) {
        let (a0, a1) = (ages[k - 1], ages[k]);
        if (a0 - age) * (a1 - age) <= 0.0 && a0 != a1 {
            let t = (age - a0) / (a1 - a0);
            let v = values[k - 1] + t * (values[k] - values[k - 1]);
            return v.is_finite().then_some(v);
        }
        if a0 == age && values[k - 1].is_finite() {
            return Some(values[k - 1]);
        }
    }
    match (ages.last(), values.last()) {
        (Some(&a), Some(&v)) if a == age && v.is_finite() => Some(v),
        _ => None,
    }
}

struct Frame {
    left: f64,
    right: f64,
    top: f64,
    bottom: f64,
    /// Oldest and youngest age, in the axis unit.
    old: f64,
    young: f64,
    /// Value range, in scaled units.
    lo: f64,
    hi: f64,
    /// Ga → axis unit.
    xf: f64,
    /// Value → scaled value.
    yf: f64,
}

impl Frame {
    fn x(&self, age_ga: f64) -> f64 {
        let a = age_ga * self.xf;
        self.left + (self.old - a) / (self.old - self.young) * (self.right - self.left)
    }
    fn y(&self, v: f64) -> f64 {
        let s = v * self.yf;
        self.bottom - (s - self.lo) / (self.hi - self.lo) * (self.bottom - self.top)
    }
    fn clamp_y(&self, y: f64) -> f64 {
        y.clamp(self.top, self.bottom)
    }
}

fn data_range(p: &AgePlot) -> Option<(f64, f64, f64, f64)> {
    let mut ages = (f64::INFINITY, f64::NEG_INFINITY);
    let mut vals = (f64::INFINITY, f64::NEG_INFINITY);
    let mut see_age = |a: f64| {
        if a.is_finite() {
            ages = (ages.0.min(a), ages.1.max(a));
        }
    };
    let see_val = |v: f64, vals: &mut (f64, f64)| {
        if v.is_finite() {
            *vals = (vals.0.min(v), vals.1.max(v));
        }
    };
    for l in &p.lines {
        l.ages.iter().for_each(|&a| see_age(a));
        l.values.iter().for_each(|&v| see_val(v, &mut vals));
    }
    for f in &p.fills {
        f.ages.iter().for_each(|&a| see_age(a));
        f.low.iter().for_each(|&v| see_val(v, &mut vals));
        f.high.iter().for_each(|&v| see_val(v, &mut vals));
    }
    for m in &p.marks {
        match m.shape {
            MarkShape::Target { value, half_width } => {
                see_val(value - half_width, &mut vals);
                see_val(value + half_width, &mut vals);
            }
            MarkShape::Range { low, high } => {
                see_val(low, &mut vals);
                see_val(high, &mut vals);
            }
            MarkShape::Upper { value } | MarkShape::Lower { value } => see_val(value, &mut vals),
        }
    }
    (ages.0.is_finite() && vals.0.is_finite()).then_some((ages.0, ages.1, vals.0, vals.1))
}

/// Draw the figure; `Err` only if the backend fails or there is nothing to
/// draw (no finite data at all).
pub fn draw(p: &AgePlot) -> Result<Vec<u8>, super::FigureError> {
    if data_range(p).is_none() {
        return Err(super::FigureError::Invalid(format!(
            "`{}`: no finite values to draw",
            p.title
        )));
    }
    draw_svg(p).map_err(super::FigureError::Draw)
}

/// [`draw`] once the data is known to have a range; errors are the
/// backend's.
fn draw_svg(p: &AgePlot) -> Result<Vec<u8>, String> {
    let (young_ga, old_ga, mut vlo, mut vhi) =
        data_range(p).ok_or_else(|| format!("`{}`: no finite values to draw", p.title))?;
    let (old_ga, young_ga) = if old_ga > young_ga {
        (old_ga, young_ga)
    } else {
        (old_ga + 1e-3, young_ga)
    };
    let (xunit, xf) = age_unit(old_ga - young_ga);

    // Value axis: pad by 4 %, start at zero if asked, factor out a power of ten.
    if p.from_zero && vlo >= 0.0 {
        vlo = 0.0;
    }
    if p.zero_line {
        vlo = vlo.min(0.0);
        vhi = vhi.max(0.0);
    }
    if vhi <= vlo {
        let d = if vlo == 0.0 { 1.0 } else { vlo.abs() * 0.05 };
        vlo -= d;
        vhi += d;
    }
    let pad = (vhi - vlo) * 0.04;
    let lo = if p.from_zero && vlo == 0.0 {
        0.0
    } else {
        vlo - pad
    };
    let hi = vhi + pad;
    let e = axis_exponent(lo.abs().max(hi.abs()));
    let yf = canvas::pow10(-e);
    let (yticks, yd) = nice_ticks(lo * yf, hi * yf, 6);
    let ylabels: Vec<String> = yticks.iter().map(|&v| tick_label(v, yd)).collect();
    let (xticks, xd) = nice_ticks(young_ga * xf, old_ga * xf, 7);
    let xlabels: Vec<String> = xticks.iter().map(|&v| tick_label(v, xd)).collect();

    let y_unit = if e != 0 {
        if p.y_unit.is_empty() {
            power_of_ten(e)
        } else {
            format!("{} {}", power_of_ten(e), p.y_unit)
        }
    } else {
        p.y_unit.clone()
    };
    let y_title = if y_unit.is_empty() {
        p.y_quantity.clone()
    } else {
        format!("{} [{}]", p.y_quantity, y_unit)
    };
    let x_title = format!("age [{xunit}]");

    // Legend entries, in drawing order.
    let mut entries: Vec<Entry> = Vec::new();
    for f in &p.fills {
        entries.push(Entry {
            swatch: Swatch::Fill(f.color, f.opacity),
            label: shorten(&f.label, 40),
        });
    }
    for l in &p.lines {
        entries.push(Entry {
            swatch: Swatch::Line(l.style),
            label: shorten(&l.label, 40),
        });
    }
    for ev in &p.events {
        entries.push(Entry {
            swatch: Swatch::Event,
            label: shorten(&ev.label, 48),
        });
    }
    for m in &p.marks {
        entries.push(Entry {
            swatch: Swatch::Mark(m.shape.clone()),
            label: shorten(&m.label, 56),
        });
    }

    // Horizontal layout.
    let ytick_w = ylabels
        .iter()
        .map(|s| text_width(s, TICK_PX))
        .fold(0.0, f64::max);
    let left = MARGIN + AXIS_PX + 10.0 + ytick_w + 9.0;
    let last_half = xlabels
        .first()
        .map_or(0.0, |s| text_width(s, TICK_PX) / 2.0);
    let right = WIDTH - MARGIN - last_half.max(6.0);

    // Stage labels: centred on their band, moved down a row when they would
    // touch the previous label in the row above.
    let visible: Vec<&StageSpan> = p
        .stages
        .iter()
        .filter(|s| s.from_ga.max(s.to_ga) > young_ga && s.from_ga.min(s.to_ga) < old_ga)
        .collect();
    let pre = Frame {
        left,
        right,
        top: 0.0,
        bottom: 1.0,
        old: old_ga * xf,
        young: young_ga * xf,
        lo: 0.0,
        hi: 1.0,
        xf,
        yf: 1.0,
    };
    let mut row_end: Vec<f64> = Vec::new();
    let mut placed: Vec<(f64, usize, String)> = Vec::new();
    for s in &visible {
        let a = s.from_ga.max(s.to_ga).min(old_ga);
        let b = s.from_ga.min(s.to_ga).max(young_ga);
        let (x0, x1) = (pre.x(a), pre.x(b));
        let label = shorten(&s.name, 28);
        let w = text_width(&label, STAGE_PX);
        let cx = ((x0 + x1) / 2.0).clamp(left + w / 2.0, WIDTH - MARGIN - w / 2.0);
        let row = row_end
            .iter()
            .position(|&end| cx - w / 2.0 > end + 6.0)
            .unwrap_or_else(|| {
                if row_end.len() < 3 {
                    row_end.push(f64::NEG_INFINITY);
                    row_end.len() - 1
                } else {
                    // Three rows full: reuse the one that ends first.
                    (0..row_end.len())
                        .min_by(|&i, &j| row_end[i].total_cmp(&row_end[j]))
                        .unwrap_or(0)
                }
            });
        row_end[row] = cx + w / 2.0;
        placed.push((cx, row, label));
    }
    let strip = if row_end.is_empty() {
        4.0
    } else {
        row_end.len() as f64 * STRIP_ROW + 6.0
    };

    // Vertical layout.
    let title_h = if p.title.is_empty() { 0.0 } else { 26.0 };
    let top = MARGIN + title_h + strip;
    let bottom = top + PLOT_HEIGHT;
    let rows = legend_rows(&entries, WIDTH - 2.0 * MARGIN);
    let legend_top = bottom + 10.0 + TICK_PX + 8.0 + AXIS_PX + 12.0;
    let height = legend_top + rows.len() as f64 * LEGEND_ROW + MARGIN;

    let fr = Frame {
        left,
        right,
        top,
        bottom,
        old: old_ga * xf,
        young: young_ga * xf,
        lo: lo * yf,
        hi: hi * yf,
        xf,
        yf,
    };

    render(WIDTH, height, &p.title, |c| {
        // Stage bands and their boundaries.
        for (k, s) in visible.iter().enumerate() {
            let a = s.from_ga.max(s.to_ga).min(old_ga);
            let b = s.from_ga.min(s.to_ga).max(young_ga);
            let shade = if k % 2 == 0 { BAND_A } else { BAND_B };
            c.rect_fill(fr.x(a), top, fr.x(b), bottom, shade.to_rgba())?;
        }
        for s in &visible {
            for edge in [s.from_ga, s.to_ga] {
                if edge < old_ga && edge > young_ga {
                    let x = fr.x(edge);
                    c.line((x, top), (x, bottom), BOUNDARY, 1.0)?;
                }
            }
        }
        // Value grid.
        for &t in &yticks {
            let y = bottom - (t - fr.lo) / (fr.hi - fr.lo) * (bottom - top);
            c.line((left, y), (right, y), GRID, 1.0)?;
        }
        if p.zero_line && fr.lo < 0.0 && fr.hi > 0.0 {
            let y = fr.y(0.0);
            c.line((left, y), (right, y), MUTED, 1.0)?;
        }
        // Shaded ranges, then lines, then events and marks on top.
        for f in &p.fills {
            draw_fill(c, &fr, f)?;
        }
        for (i, l) in p.lines.iter().enumerate() {
            draw_line(c, &fr, l, i)?;
        }
        for ev in &p.events {
            if ev.age_ga <= old_ga && ev.age_ga >= young_ga {
                let x = fr.x(ev.age_ga);
                c.dashed(&[(x, top), (x, bottom)], INK, 1.5, &[6.0, 4.0])?;
                for l in &p.lines {
                    if let Some(v) = value_at(&l.ages, &l.values, ev.age_ga) {
                        let y = fr.clamp_y(fr.y(v));
                        c.marker(Marker::Diamond, (x, y), 6.0, INK)?;
                        c.marker(Marker::Diamond, (x, y), 3.5, WHITE)?;
                    }
                }
            }
        }
        for m in &p.marks {
            draw_mark(c, &fr, m, old_ga, young_ga)?;
        }
        // Frame, ticks, labels.
        c.rect_stroke(left, top, right, bottom, INK, 1.0)?;
        for (t, s) in yticks.iter().zip(&ylabels) {
            let y = bottom - (t - fr.lo) / (fr.hi - fr.lo) * (bottom - top);
            c.line((left - 5.0, y), (left, y), INK, 1.0)?;
            c.text(
                s,
                (left - 8.0, y),
                TextSpec::new(TICK_PX, Anchor::End, Baseline::Center),
            )?;
        }
        for (t, s) in xticks.iter().zip(&xlabels) {
            let x = left + (fr.old - t) / (fr.old - fr.young) * (right - left);
            c.line((x, bottom), (x, bottom + 5.0), INK, 1.0)?;
            c.text(
                s,
                (x, bottom + 8.0),
                TextSpec::new(TICK_PX, Anchor::Middle, Baseline::Top),
            )?;
        }
        c.text(
            &x_title,
            ((left + right) / 2.0, bottom + 10.0 + TICK_PX + 6.0),
            TextSpec::new(AXIS_PX, Anchor::Middle, Baseline::Top),
        )?;
        c.text(
            &y_title,
            (MARGIN + AXIS_PX / 2.0, (top + bottom) / 2.0),
            TextSpec::new(AXIS_PX, Anchor::Middle, Baseline::Center).vertical(),
        )?;
        if !p.title.is_empty() {
            // Bold text runs about a tenth wider than the estimate.
            let room = WIDTH - MARGIN - left;
            let mut title = p.title.clone();
            let mut keep = title.chars().count();
            while keep > 8 && 1.1 * text_width(&title, TITLE_PX) > room {
                keep -= 1;
                title = shorten(&p.title, keep);
            }
            c.text(
                &title,
                (left, MARGIN),
                TextSpec::new(TITLE_PX, Anchor::Start, Baseline::Top).bold(),
            )?;
        }
        for (cx, row, label) in &placed {
            let y = top - strip + 3.0 + *row as f64 * STRIP_ROW;
            c.text(
                label,
                (*cx, y),
                TextSpec::new(STAGE_PX, Anchor::Middle, Baseline::Top).color(MUTED),
            )?;
        }
        // Legend.
        for (r, row) in rows.iter().enumerate() {
            let y = legend_top + r as f64 * LEGEND_ROW + LEGEND_ROW / 2.0;
            let mut x = MARGIN;
            for &i in row {
                let e = &entries[i];
                draw_swatch(c, &e.swatch, x, y)?;
                c.text(
                    &e.label,
                    (x + SWATCH_W + 7.0, y),
                    TextSpec::new(LEGEND_PX, Anchor::Start, Baseline::Center),
                )?;
                x += entry_width(e);
            }
        }
        Ok(())
    })
}

/// Split at non-finite values so gaps stay gaps.
fn runs(fr: &Frame, ages: &[f64], values: &[f64]) -> Vec<Vec<(f64, f64)>> {
    let mut out = vec![Vec::new()];
    for (&a, &v) in ages.iter().zip(values) {
        if a.is_finite() && v.is_finite() {
            if let Some(cur) = out.last_mut() {
                cur.push((fr.x(a), fr.y(v)));
            }
        } else if out.last().is_some_and(|r| !r.is_empty()) {
            out.push(Vec::new());
        }
    }
    out.retain(|r| !r.is_empty());
    out
}

fn draw_line(c: &Canvas, fr: &Frame, l: &Line, index: usize) -> Res {
    let pieces = runs(fr, &l.ages, &l.values);
    // A line that swings up and down many times (glacial cycles) would turn
    // its dashes into noise: such lines are drawn solid and told apart by
    // colour and markers alone.
    let length: f64 = pieces
        .iter()
        .flat_map(|p| p.windows(2))
        .map(|w| {
            let (dx, dy) = (w[1].0 - w[0].0, w[1].1 - w[0].1);
            (dx * dx + dy * dy).sqrt()
        })
        .sum();
    let busy = length > 3.0 * ((fr.right - fr.left) + (fr.bottom - fr.top));
    let dash = if busy { &[][..] } else { l.style.dash };
    for piece in &pieces {
        if piece.len() == 1 {
            c.circle(piece[0], l.style.width, l.style.color, true, 1.0)?;
        }
        c.dashed(piece, l.style.color, l.style.width, dash)?;
    }
    // Markers at evenly spaced positions, shifted per line so that the
    // markers of overlapping lines do not sit on each other.
    if let Some(m) = l.style.marker {
        let pts: Vec<(f64, f64)> = pieces.into_iter().flatten().collect();
        if pts.len() >= 2 {
            let shift = (index % 4) as f64 * 0.2 + 0.15;
            for k in 0..MARKERS_PER_LINE {
                let tx =
                    fr.left + (k as f64 + shift) / MARKERS_PER_LINE as f64 * (fr.right - fr.left);
                let best = pts
                    .iter()
                    .min_by(|a, b| (a.0 - tx).abs().total_cmp(&(b.0 - tx).abs()));
                if let Some(&p) = best {
                    if (p.0 - tx).abs() < (fr.right - fr.left) / MARKERS_PER_LINE as f64 / 2.0 {
                        c.marker(m, p, 4.0, l.style.color)?;
                    }
                }
            }
        }
    }
    Ok(())
}

fn draw_fill(c: &Canvas, fr: &Frame, f: &Fill) -> Res {
    let color = f.color.mix(f.opacity);
    // Each run of ages where both edges are finite is one polygon.
    let mut upper: Vec<(f64, f64)> = Vec::new();
    let mut lower: Vec<(f64, f64)> = Vec::new();
    let flush = |upper: &mut Vec<(f64, f64)>, lower: &mut Vec<(f64, f64)>| -> Res {
        if upper.len() >= 2 {
            let mut poly = std::mem::take(upper);
            poly.extend(lower.drain(..).rev());
            c.polygon(&poly, color)?;
        }
        upper.clear();
        lower.clear();
        Ok(())
    };
    for k in 0..f.ages.len().min(f.low.len()).min(f.high.len()) {
        let (a, lo, hi) = (f.ages[k], f.low[k], f.high[k]);
        if a.is_finite() && lo.is_finite() && hi.is_finite() {
            upper.push((fr.x(a), fr.y(hi)));
            lower.push((fr.x(a), fr.y(lo)));
        } else {
            flush(&mut upper, &mut lower)?;
        }
    }
    flush(&mut upper, &mut lower)
}

const MARK_COLOR: RGBColor = RGBColor(0, 0, 0);
const BOUND_COLOR: RGBColor = RGBColor(213, 94, 0);

fn bar(c: &Canvas, x: f64, y0: f64, y1: f64) -> Res {
    c.line((x, y0), (x, y1), MARK_COLOR, 2.0)?;
    c.line((x - 6.0, y0), (x + 6.0, y0), MARK_COLOR, 2.0)?;
    c.line((x - 6.0, y1), (x + 6.0, y1), MARK_COLOR, 2.0)
}

fn draw_mark(c: &Canvas, fr: &Frame, m: &Mark, old: f64, young: f64) -> Res {
    let x = m
        .age_ga
        .filter(|a| *a <= old && *a >= young)
        .map(|a| fr.x(a));
    match m.shape {
        MarkShape::Target { value, half_width } => {
            if let Some(x) = x {
                bar(c, x, fr.y(value - half_width), fr.y(value + half_width))?;
                c.marker(Marker::Diamond, (x, fr.y(value)), 5.5, MARK_COLOR)?;
            }
        }
        MarkShape::Range { low, high } => {
            if let Some(x) = x {
                bar(c, x, fr.y(low), fr.y(high))?;
            }
        }
        MarkShape::Upper { value } | MarkShape::Lower { value } => {
            let y = fr.y(value);
            c.dashed(
                &[(fr.left, y), (fr.right, y)],
                BOUND_COLOR,
                2.0,
                &[10.0, 3.0, 2.5, 3.0],
            )?;
            if let Some(x) = x {
                let mk = if matches!(m.shape, MarkShape::Upper { .. }) {
                    Marker::TriangleDown
                } else {
                    Marker::Triangle
                };
                c.marker(mk, (x, y), 6.0, BOUND_COLOR)?;
            }
        }
    }
    Ok(())
}

fn draw_swatch(c: &Canvas, s: &Swatch, x: f64, y: f64) -> Res {
    match s {
        Swatch::Line(st) => {
            c.dashed(&[(x, y), (x + SWATCH_W, y)], st.color, st.width, st.dash)?;
            if let Some(m) = st.marker {
                c.marker(m, (x + SWATCH_W / 2.0, y), 4.0, st.color)?;
            }
            Ok(())
        }
        Swatch::Fill(color, opacity) => c.rect_fill(
            x + 2.0,
            y - 7.0,
            x + SWATCH_W - 2.0,
            y + 7.0,
            color.mix(*opacity),
        ),
        Swatch::Event => {
            let cx = x + SWATCH_W / 2.0;
            c.dashed(&[(cx, y - 10.0), (cx, y + 10.0)], INK, 1.5, &[4.0, 3.0])?;
            c.marker(Marker::Diamond, (cx, y), 6.0, INK)?;
            c.marker(Marker::Diamond, (cx, y), 3.5, WHITE)
        }
        Swatch::Mark(shape) => {
            let cx = x + SWATCH_W / 2.0;
            match shape {
                MarkShape::Target { .. } => {
                    bar(c, cx, y - 9.0, y + 9.0)?;
                    c.marker(Marker::Diamond, (cx, y), 5.5, MARK_COLOR)
                }
                MarkShape::Range { .. } => bar(c, cx, y - 9.0, y + 9.0),
                MarkShape::Upper { .. } | MarkShape::Lower { .. } => {
                    c.dashed(
                        &[(x, y), (x + SWATCH_W, y)],
                        BOUND_COLOR,
                        2.0,
                        &[10.0, 3.0, 2.5, 3.0],
                    )?;
                    let mk = if matches!(shape, MarkShape::Upper { .. }) {
                        Marker::TriangleDown
                    } else {
                        Marker::Triangle
                    };
                    c.marker(mk, (cx, y), 6.0, BOUND_COLOR)
                }
            }
        }
    }
}
