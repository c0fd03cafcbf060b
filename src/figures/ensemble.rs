//! Ensemble figures: for each variable of `quantiles.csv`, the median and
//! the 50 % and 90 % bands against age for all members and for accepted
//! members, with the constraints on that variable drawn where they apply;
//! and a scatter matrix of the parameter values of `members.csv`.
//!
//! The file formats read here are described in docs/figures.md. Callers
//! that already hold the numbers can build an [`EnsembleData`] directly
//! and call [`figures`], [`band_figure`] or [`scatter_matrix`].

use std::path::Path;

use plotters::style::{Color, RGBColor};

use super::age_plot::{self, AgePlot, Fill, Line, Mark, MarkShape};
use super::canvas::{
    self, nice_ticks, pretty_unit, render, short_num, text_width, tick_label, Anchor, Baseline,
    Canvas, LineStyle, Marker, Res, TextSpec, AXIS_PX, INK, LEGEND_PX, MUTED, STAGE_PX, TITLE_PX,
};
use super::data::{
    parse_members, parse_quantiles, Members, StageSpan, TextTable, VariableQuantiles,
};
use super::run::OCEAN_MASS_KG;
use super::{FigureError, Files};

/// A constraint on one variable, in that constraint's own unit.
#[derive(Debug, Clone, PartialEq)]
pub struct ConstraintMark {
    /// The quantiles variable it constrains.
    pub variable: String,
    /// The unit of the values in `mark` (converted to the variable's unit
    /// when drawn; a constraint whose unit cannot be converted is not
    /// drawn).
    pub unit: String,
    pub mark: Mark,
}

/// What an ensemble directory holds, as numbers.
#[derive(Debug, Clone, Default)]
pub struct EnsembleData {
    pub variables: Vec<VariableQuantiles>,
    pub members: Option<Members>,
    pub constraints: Vec<ConstraintMark>,
    /// Stage spans, when the directory has a `stages.csv`.
    pub stages: Vec<StageSpan>,
    pub summary: Option<serde_json::Value>,
}

fn num(v: &serde_json::Value, keys: &[&str]) -> Option<f64> {
    keys.iter()
        .find_map(|k| v.get(*k).and_then(serde_json::Value::as_f64))
}

fn text(v: &serde_json::Value, keys: &[&str]) -> Option<String> {
    keys.iter()
        .find_map(|k| v.get(*k).and_then(serde_json::Value::as_str))
        .map(str::to_owned)
}

/// A quantity as written in a statement: a number and an optional unit.
fn quantity(tokens: &[&str]) -> Option<(f64, String, usize)> {
    let v = tokens.first()?.parse::<f64>().ok()?;
    match tokens.get(1) {
        Some(u) if !is_keyword(u) => Some((v, (*u).to_owned(), 2)),
        _ => Some((v, String::new(), 1)),
    }
}

fn is_keyword(t: &str) -> bool {
    matches!(
        t,
        "=" | "+-" | "±" | "in" | "to" | "<" | "<=" | ">" | ">=" | "at" | "before" | "after"
    )
}

/// A unit in either spelling: the CSV headers' (`kg yr-1`) or the
/// language's (`kg/yr`).
fn any_unit(u: &str) -> Option<crate::units::Unit> {
    super::data::header_unit(u).or_else(|| crate::units::parse_unit(u).ok())
}

/// Convert a difference (an uncertainty) between units: scale only.
fn convert_diff(v: f64, from: &str, to: &str) -> Option<f64> {
    if from == to || from.is_empty() || to.is_empty() {
        return Some(v);
    }
    let (a, b) = (any_unit(from)?, any_unit(to)?);
    (a.dim.plain() == b.dim.plain()).then(|| v * a.scale / b.scale)
}

/// Convert an absolute value between units (with offsets, e.g. degC to K).
fn convert_abs(v: f64, from: &str, to: &str) -> Option<f64> {
    if from == to || from.is_empty() || to.is_empty() {
        return Some(v);
    }
    let (a, b) = (any_unit(from)?, any_unit(to)?);
    (a.dim.plain() == b.dim.plain()).then(|| b.from_internal(a.to_internal(v)))
}

/// A constraint from its statement in canonical form, when its subject is
/// a plain name and it applies at an age:
/// `expect NAME at AGE = V [+- S]`, `... in A to B`, `... < V` (or `<=`,
/// `>`, `>=`). Other statements (expressions, events) give `None`: they
/// are listed in the report but not drawn.
pub fn parse_constraint(text: &str) -> Option<ConstraintMark> {
    let t: Vec<&str> = text.split_whitespace().collect();
    let t = if t.first() == Some(&"expect") {
        &t[1..]
    } else {
        &t[..]
    };
    let variable = *t.first()?;
    let ident = variable
        .chars()
        .enumerate()
        .all(|(i, c)| c == '_' || c.is_ascii_alphabetic() || (i > 0 && c.is_ascii_digit()));
    if !ident || t.get(1) != Some(&"at") {
        return None;
    }
    let (age, age_unit, n) = quantity(&t[2..])?;
    let age_ga = match age_unit.as_str() {
        "Ga" => age,
        "Ma" => age / 1e3,
        "ka" => age / 1e6,
        _ => return None,
    };
    let rest = &t[2 + n..];
    let (op, rest) = rest.split_first()?;
    let (unit, shape) = match *op {
        "=" => {
            let (value, unit, k) = quantity(rest)?;
            let sigma = match rest.get(k) {
                Some(&"+-") | Some(&"±") => {
                    let (s, su, _) = quantity(&rest[k + 1..])?;
                    convert_diff(s, &su, &unit)?
                }
                _ => 0.0,
            };
            (
                unit,
                MarkShape::Target {
                    value,
                    half_width: crate::report::TARGET_SIGMAS * sigma,
                },
            )
        }
        "in" => {
            let (low, lu, k) = quantity(rest)?;
            if rest.get(k) != Some(&"to") {
                return None;
            }
            let (high, hu, _) = quantity(&rest[k + 1..])?;
            let unit = if lu.is_empty() { hu.clone() } else { lu };
            let high = convert_abs(high, &hu, &unit)?;
            (unit, MarkShape::Range { low, high })
        }
        "<" | "<=" => {
            let (value, unit, _) = quantity(rest)?;
            (unit, MarkShape::Upper { value })
        }
        ">" | ">=" => {
            let (value, unit, _) = quantity(rest)?;
            (unit, MarkShape::Lower { value })
        }
        _ => return None,
    };
    Some(ConstraintMark {
        variable: variable.to_owned(),
        unit,
        mark: Mark {
            label: t.join(" "),
            age_ga: Some(age_ga),
            shape,
        },
    })
}

/// The constraints of `summary.json`: an array `constraints` of objects,
/// each either structured (`kind` = `target` | `range` | `bound`, with
/// `variable`, `age_ga`, `unit` and the values of its kind, see
/// docs/figures.md) or carrying only the statement (`expectation` or
/// `text`), which is then read by [`parse_constraint`].
pub fn constraints_from_summary(summary: &serde_json::Value) -> Vec<ConstraintMark> {
    let Some(list) = summary.get("constraints").and_then(|c| c.as_array()) else {
        return Vec::new();
    };
    let mut out = Vec::new();
    for c in list {
        let statement = text(c, &["expectation", "text"]);
        let Some(variable) = text(c, &["variable"]) else {
            if let Some(m) = statement.as_deref().and_then(parse_constraint) {
                out.push(m);
            }
            continue;
        };
        let label = statement
            .or_else(|| text(c, &["name"]))
            .unwrap_or_else(|| variable.clone());
        let unit = text(c, &["unit"]).unwrap_or_default();
        let age_ga = num(c, &["age_ga", "at_ga"]);
        let kind = text(c, &["kind"]).unwrap_or_default().to_ascii_lowercase();
        let shape = match kind.as_str() {
            "target" => {
                let (Some(value), Some(sigma)) = (num(c, &["target", "value"]), num(c, &["sigma"]))
                else {
                    continue;
                };
                MarkShape::Target {
                    value,
                    half_width: crate::report::TARGET_SIGMAS * sigma,
                }
            }
            "range" => {
                let (Some(low), Some(high)) =
                    (num(c, &["low", "lower"]), num(c, &["high", "upper"]))
                else {
                    continue;
                };
                MarkShape::Range { low, high }
            }
            "bound" | "upper" | "lower" => {
                let Some(value) = num(c, &["value", "bound"]) else {
                    continue;
                };
                let op = text(c, &["op"]).unwrap_or_else(|| kind.clone());
                if op.starts_with('<') || op == "upper" {
                    MarkShape::Upper { value }
                } else if op.starts_with('>') || op == "lower" {
                    MarkShape::Lower { value }
                } else {
                    continue;
                }
            }
            _ => continue,
        };
        out.push(ConstraintMark {
            variable,
            unit,
            mark: Mark {
                label,
                age_ga,
                shape,
            },
        });
    }
    out
}

impl EnsembleData {
    /// Read `quantiles.csv` (required), `members.csv`, `summary.json` and
    /// `stages.csv` (optional) from an ensemble directory.
    pub fn load(dir: &Path) -> Result<EnsembleData, FigureError> {
        let q = TextTable::read_optional(dir, "quantiles.csv")?
            .ok_or_else(|| FigureError::Read(format!("{} has no quantiles.csv", dir.display())))?;
        // The messages name quantiles.csv: `dir/quantiles.csv has no ...`.
        let variables = parse_quantiles(&q).map_err(|e| match e {
            FigureError::Invalid(m) => FigureError::Invalid(format!("{}/{m}", dir.display())),
            e => e,
        })?;
        let members = TextTable::read_optional(dir, "members.csv")?.map(|t| parse_members(&t));
        let summary: Option<serde_json::Value> = match crate::fsutil::read_bounded(
            &dir.join("summary.json"),
            crate::fsutil::MAX_JSON_BYTES,
        ) {
            Ok(b) => Some(serde_json::from_slice(&b).map_err(|e| {
                FigureError::Invalid(format!("{}/summary.json: {e}", dir.display()))
            })?),
            Err(_) => None,
        };
        let constraints = summary
            .as_ref()
            .map(constraints_from_summary)
            .unwrap_or_default();
        let stages = super::data::load_stages(dir)?;
        Ok(EnsembleData {
            variables,
            members,
            constraints,
            stages,
            summary,
        })
    }
}

const ALL_90: RGBColor = RGBColor(165, 165, 165);
const ALL_50: RGBColor = RGBColor(105, 105, 105);
const ACC_90: RGBColor = RGBColor(86, 180, 233);
const ACC_50: RGBColor = RGBColor(0, 114, 178);

/// A file-name-safe form of a variable name.
pub fn file_stem(name: &str) -> String {
    let s: String = name
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || c == '_' || c == '-' {
                c
            } else {
                '_'
            }
        })
        .collect();
    if s.is_empty() {
        "variable".into()
    } else {
        s
    }
}

/// The band figure of one variable.
pub fn band_figure(
    v: &VariableQuantiles,
    constraints: &[ConstraintMark],
    stages: &[StageSpan],
) -> AgePlot {
    // Inventories in ocean masses, as in the run figures.
    let (div, unit) = if v.unit == "kg" {
        (OCEAN_MASS_KG, "ocean masses".to_owned())
    } else {
        (1.0, pretty_unit(&v.unit))
    };
    let scale = |xs: &[f64]| xs.iter().map(|x| x / div).collect::<Vec<f64>>();
    let mut fills = Vec::new();
    let mut lines = Vec::new();
    let mut sets: Vec<(
        &str,
        &super::data::QuantileSet,
        RGBColor,
        RGBColor,
        LineStyle,
    )> = vec![(
        "all",
        &v.all,
        ALL_90,
        ALL_50,
        LineStyle {
            color: INK,
            width: 2.0,
            dash: &[9.0, 4.0],
            marker: None,
        },
    )];
    let mut note = "";
    if let Some(acc) = &v.accepted {
        if acc.q[2].iter().any(|x| x.is_finite()) {
            sets.push((
                "accepted",
                acc,
                ACC_90,
                ACC_50,
                LineStyle {
                    color: ACC_50,
                    width: 2.5,
                    dash: &[],
                    marker: Some(Marker::Circle),
                },
            ));
        } else {
            note = " (no accepted members)";
        }
    }
    for (name, set, c90, c50, style) in sets {
        // The outer band between quantiles 0 and 4, the inner one between 1 and 3.
        for (width, low, high, color, opacity) in [(90, 0, 4, c90, 0.35), (50, 1, 3, c50, 0.4)] {
            fills.push(Fill {
                label: format!("{name}: {width} % band"),
                ages: v.ages.clone(),
                low: scale(&set.q[low]),
                high: scale(&set.q[high]),
                color,
                opacity,
            });
        }
        lines.push(Line {
            label: format!("{name}: median"),
            ages: v.ages.clone(),
            values: scale(&set.q[2]),
            style,
        });
    }
    let marks = constraints
        .iter()
        .filter(|c| c.variable == v.variable)
        .filter_map(|c| {
            let conv = |x: f64| convert_abs(x, &c.unit, &v.unit).map(|y| y / div);
            let shape = match c.mark.shape {
                MarkShape::Target { value, half_width } => MarkShape::Target {
                    value: conv(value)?,
                    half_width: convert_diff(half_width, &c.unit, &v.unit)? / div,
                },
                MarkShape::Range { low, high } => MarkShape::Range {
                    low: conv(low)?,
                    high: conv(high)?,
                },
                MarkShape::Upper { value } => MarkShape::Upper {
                    value: conv(value)?,
                },
                MarkShape::Lower { value } => MarkShape::Lower {
                    value: conv(value)?,
                },
            };
            let label = if matches!(shape, MarkShape::Target { .. }) {
                format!(
                    "{} (bar: ±{}σ)",
                    c.mark.label,
                    short_num(crate::report::TARGET_SIGMAS)
                )
            } else {
                c.mark.label.clone()
            };
            Some(Mark {
                label,
                age_ga: c.mark.age_ga,
                shape,
            })
        })
        .collect();
    AgePlot {
        title: format!("{}: all and accepted members{note}", v.variable),
        y_quantity: v.variable.clone(),
        y_unit: unit,
        lines,
        fills,
        stages: stages.to_vec(),
        marks,
        ..AgePlot::default()
    }
}

/// Every ensemble figure: `bands_<variable>.svg` per variable, and
/// `parameters.svg` (the scatter matrix) when members are known.
pub fn figures(d: &EnsembleData) -> Result<Files, FigureError> {
    let mut out = Vec::new();
    for v in &d.variables {
        if !v.all.q[2].iter().any(|x| x.is_finite()) {
            continue;
        }
        let p = band_figure(v, &d.constraints, &d.stages);
        out.push((
            format!("bands_{}.svg", file_stem(&v.variable)),
            age_plot::draw(&p)?,
        ));
    }
    if let Some(m) = &d.members {
        if let Some(svg) = scatter_matrix(m)? {
            out.push(("parameters.svg".into(), svg));
        }
    }
    Ok(out)
}

/// How a parameter axis is spaced.
#[derive(Debug, Clone, Copy)]
struct Axis {
    lo: f64,
    hi: f64,
    log: bool,
}

impl Axis {
    fn of(values: &[f64]) -> Option<Axis> {
        let finite: Vec<f64> = values.iter().copied().filter(|v| v.is_finite()).collect();
        let lo = finite.iter().copied().fold(f64::INFINITY, f64::min);
        let hi = finite.iter().copied().fold(f64::NEG_INFINITY, f64::max);
        if !lo.is_finite() {
            return None;
        }
        // Spread over more than two decades of positive values: log axis.
        let log = lo > 0.0 && hi / lo > 100.0;
        let (a, b) = if log {
            (libm::log10(lo), libm::log10(hi))
        } else {
            (lo, hi)
        };
        let (a, b) = if b > a {
            let pad = (b - a) * 0.05;
            (a - pad, b + pad)
        } else {
            let d = if a == 0.0 { 1.0 } else { a.abs() * 0.05 };
            (a - d, b + d)
        };
        Some(Axis { lo: a, hi: b, log })
    }
    fn t(&self, v: f64) -> f64 {
        let x = if self.log {
            if v > 0.0 {
                libm::log10(v)
            } else {
                f64::NAN
            }
        } else {
            v
        };
        (x - self.lo) / (self.hi - self.lo)
    }
    /// Tick positions (0..1) and labels.
    fn ticks(&self) -> Vec<(f64, String)> {
        let (vals, d) = nice_ticks(self.lo, self.hi, 4);
        vals.into_iter()
            .map(|t| {
                let label = if self.log {
                    if (t - libm::round(t)).abs() < 1e-9 {
                        canvas::power_of_ten(libm::round(t) as i32)
                    } else {
                        short_num(libm::pow(10.0, t))
                    }
                } else {
                    tick_label(t, d)
                };
                ((t - self.lo) / (self.hi - self.lo), label)
            })
            .collect()
    }
}

/// Up to this many parameters are drawn in the scatter matrix.
pub const MAX_MATRIX_PARAMS: usize = 8;
/// Points drawn over all off-diagonal panels together (members are
/// thinned evenly beyond that, keeping the figure small).
const POINT_BUDGET: usize = 3000;

fn stride(n: usize, cap: usize) -> usize {
    if cap == 0 {
        usize::MAX
    } else {
        n.div_ceil(cap).max(1)
    }
}

/// A scatter matrix of parameter values: accepted members in colour over
/// all members in light grey, histograms on the diagonal. `None` when the
/// table has no parameter columns.
pub fn scatter_matrix(m: &Members) -> Result<Option<Vec<u8>>, FigureError> {
    scatter_matrix_svg(m).map_err(FigureError::Draw)
}

/// [`scatter_matrix`]; errors are the backend's.
fn scatter_matrix_svg(m: &Members) -> Result<Option<Vec<u8>>, String> {
    let params: Vec<(&super::data::Column, Axis)> = m
        .params
        .iter()
        .filter_map(|c| Axis::of(&c.values).map(|a| (c, a)))
        .take(MAX_MATRIX_PARAMS)
        .collect();
    let n = params.len();
    if n == 0 {
        return Ok(None);
    }
    let members = m.accepted.len();
    let n_acc = m.accepted.iter().filter(|a| **a).count();
    let panel = if n <= 3 {
        160.0
    } else {
        (640.0 / n as f64).max(90.0)
    };
    let gap = 6.0;
    let left = 12.0 + AXIS_PX + 8.0 + 44.0;
    let top = 12.0 + 26.0;
    let size = n as f64 * panel + (n - 1) as f64 * gap;
    let bottom_axis = 8.0 + STAGE_PX + 6.0 + AXIS_PX + 14.0;
    let legend_y = top + size + bottom_axis + 10.0;
    let title = format!("Accepted parameter values ({n_acc} of {members} members)");
    let entries = [
        (ACC_50, format!("accepted ({n_acc})")),
        (
            RGBColor(185, 185, 185),
            format!("rejected ({})", members - n_acc),
        ),
    ];
    let note = "diagonal: histograms of accepted members; outline: all members";
    let legend_w: f64 = entries
        .iter()
        .map(|(_, l)| 20.0 + text_width(l, LEGEND_PX) + 24.0)
        .sum();
    let width = (left + size + 16.0)
        .max(left + 1.2 * text_width(&title, TITLE_PX) + 16.0)
        .max(12.0 + legend_w + 12.0)
        .max(12.0 + text_width(note, LEGEND_PX) + 12.0);
    let height = legend_y + 2.0 * 24.0 + 12.0;
    let off = (n * (n - 1)).max(1);
    let cap = POINT_BUDGET / off;
    let acc_idx: Vec<usize> = (0..members).filter(|&i| m.accepted[i]).collect();
    let rej_idx: Vec<usize> = (0..members).filter(|&i| !m.accepted[i]).collect();
    let acc_show: Vec<usize> = acc_idx
        .iter()
        .copied()
        .step_by(stride(acc_idx.len(), cap))
        .collect();
    let rej_show: Vec<usize> = rej_idx
        .iter()
        .copied()
        .step_by(stride(rej_idx.len(), cap / 2))
        .collect();
    let svg = render(width, height, &title, |c| {
        for (i, (ci, ai)) in params.iter().enumerate() {
            for (j, (cj, aj)) in params.iter().enumerate() {
                let x0 = left + j as f64 * (panel + gap);
                let y0 = top + i as f64 * (panel + gap);
                let (x1, y1) = (x0 + panel, y0 + panel);
                c.rect_fill(x0, y0, x1, y1, RGBColor(250, 250, 250).to_rgba())?;
                if i == j {
                    histogram(c, (x0, y0, x1, y1), &ci.values, &m.accepted, ai)?;
                } else {
                    let px = |k: usize| {
                        (
                            x0 + aj.t(cj.values[k]) * panel,
                            y1 - ai.t(ci.values[k]) * panel,
                        )
                    };
                    for &k in &rej_show {
                        let p = px(k);
                        if p.0.is_finite() && p.1.is_finite() {
                            c.circle(p, 1.5, RGBColor(185, 185, 185), true, 1.0)?;
                        }
                    }
                    for &k in &acc_show {
                        let p = px(k);
                        if p.0.is_finite() && p.1.is_finite() {
                            c.circle(p, 1.5, ACC_50, true, 1.0)?;
                        }
                    }
                }
                c.rect_stroke(x0, y0, x1, y1, INK, 1.0)?;
                // Ticks on the outer panels: x along the bottom row, y (the
                // row's parameter) down the left column.
                if i == n - 1 {
                    for (t, label) in aj.ticks() {
                        let x = x0 + t * panel;
                        c.line((x, y1), (x, y1 + 4.0), INK, 1.0)?;
                        c.text(
                            &label,
                            (x, y1 + 6.0),
                            TextSpec::new(STAGE_PX, Anchor::Middle, Baseline::Top),
                        )?;
                    }
                    let (name, px) = fit(cj, panel - 14.0);
                    c.text(
                        &name,
                        ((x0 + x1) / 2.0, y1 + 8.0 + STAGE_PX + 6.0),
                        TextSpec::new(px, Anchor::Middle, Baseline::Top),
                    )?;
                }
                if j == 0 {
                    for (t, label) in ai.ticks() {
                        let y = y1 - t * panel;
                        c.line((x0 - 4.0, y), (x0, y), INK, 1.0)?;
                        c.text(
                            &label,
                            (x0 - 6.0, y),
                            TextSpec::new(STAGE_PX, Anchor::End, Baseline::Center),
                        )?;
                    }
                    let (name, px) = fit(ci, panel - 14.0);
                    c.text(
                        &name,
                        (12.0 + AXIS_PX / 2.0, (y0 + y1) / 2.0),
                        TextSpec::new(px, Anchor::Middle, Baseline::Center).vertical(),
                    )?;
                }
            }
        }
        c.text(
            &title,
            (left, 12.0),
            TextSpec::new(TITLE_PX, Anchor::Start, Baseline::Top).bold(),
        )?;
        // Legend.
        let y = legend_y + 12.0;
        let mut x = 12.0;
        for (color, label) in &entries {
            c.circle((x + 8.0, y), 4.0, *color, true, 1.0)?;
            c.text(
                label,
                (x + 20.0, y),
                TextSpec::new(LEGEND_PX, Anchor::Start, Baseline::Center),
            )?;
            x += 20.0 + text_width(label, LEGEND_PX) + 24.0;
        }
        c.text(
            note,
            (12.0, y + 24.0),
            TextSpec::new(LEGEND_PX, Anchor::Start, Baseline::Center).color(MUTED),
        )
    })?;
    Ok(Some(svg))
}

/// A panel label, `name [unit]`, that fits `room` px: at the axis size if
/// it fits, else at the small size, else with the name cut short (the unit
/// is always kept).
fn fit(c: &super::data::Column, room: f64) -> (String, f64) {
    let unit = if c.unit.is_empty() {
        String::new()
    } else {
        format!(" [{}]", pretty_unit(&c.unit))
    };
    let full = format!("{}{unit}", c.name);
    if text_width(&full, AXIS_PX) <= room {
        return (full, AXIS_PX);
    }
    let mut name: Vec<char> = c.name.chars().collect();
    let label = |n: &[char]| format!("{}{unit}", n.iter().collect::<String>());
    while name.len() > 3 && text_width(&label(&name), STAGE_PX) > room {
        name.pop();
        if let Some(last) = name.last_mut() {
            *last = '…';
        }
    }
    (label(&name), STAGE_PX)
}

const BINS: usize = 16;

fn histogram(
    c: &Canvas,
    (x0, y0, x1, y1): (f64, f64, f64, f64),
    values: &[f64],
    accepted: &[bool],
    a: &Axis,
) -> Res {
    let mut all = [0usize; BINS];
    let mut acc = [0usize; BINS];
    for (k, &v) in values.iter().enumerate() {
        let t = a.t(v);
        if !t.is_finite() {
            continue;
        }
        let b = ((t * BINS as f64) as usize).min(BINS - 1);
        all[b] += 1;
        if accepted.get(k).copied().unwrap_or(true) {
            acc[b] += 1;
        }
    }
    let top = all.iter().copied().max().unwrap_or(0).max(1) as f64;
    let w = (x1 - x0) / BINS as f64;
    let h = (y1 - y0) * 0.9;
    for (b, &count) in acc.iter().enumerate() {
        let bx = x0 + b as f64 * w;
        let ha = count as f64 / top * h;
        c.rect_fill(bx + 0.5, y1 - ha, bx + w - 0.5, y1, ACC_90.mix(0.9))?;
    }
    // Outline of all members.
    let mut outline = vec![(x0, y1)];
    for (b, &count) in all.iter().enumerate() {
        let bx = x0 + b as f64 * w;
        let hy = y1 - count as f64 / top * h;
        outline.push((bx, hy));
        outline.push((bx + w, hy));
    }
    outline.push((x1, y1));
    c.path(&outline, MUTED, 1.0)
}
