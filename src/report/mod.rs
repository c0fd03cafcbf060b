//! Phase 6, report: derived quantities over the solved series, and the
//! files a modeler opens (series and per-stage CSV).
//!
//! Invariant: reads solved states and the model's output definitions only;
//! it never integrates. Numbers are written in shortest round-trip form, so
//! reading a CSV back gives the same bits.

use crate::compile::{self, Wants};
use crate::diagnostic::Problem;
use crate::model::{DefId, DefKind, Model};
use crate::solve::methods::{MethodUse, Stats};
use crate::solve::Run;
use crate::units::{self, Unit};

/// One column of the series.
#[derive(Debug, Clone)]
pub struct Column {
    pub name: String,
    /// UDUNITS-style unit string.
    pub unit: String,
    pub def: Option<DefId>,
    display: Unit,
}

/// The report table: one row per report age.
#[derive(Debug, Clone)]
pub struct Series {
    pub columns: Vec<Column>,
    /// Row-major values in display units; the first column is the age in Ga.
    pub rows: Vec<Vec<f64>>,
}

/// The unit a definition's values are shown in: the unit it was written
/// with (`in UNIT` of an output, or the unit of a lone literal), else a
/// default for its dimension; as a UDUNITS-style string and a conversion.
pub fn shown_unit(model: &Model, id: DefId) -> (String, Unit) {
    let d = &model.defs[id];
    match &d.display_unit {
        Some((text, unit)) => (units::udunits(text), *unit),
        None => default_unit(d.dim),
    }
}

fn default_unit(dim: units::Dim) -> (String, Unit) {
    let (name, unit) = units::display_unit(dim);
    if name.is_empty() {
        (dim.internal_unit(), unit)
    } else {
        (name.to_owned(), unit)
    }
}

fn column_for(model: &Model, id: DefId) -> Column {
    let d = &model.defs[id];
    // Inventories are always in kg; outputs and states as written.
    let (unit_text, display) = match d.kind {
        DefKind::Output | DefKind::State { .. } => shown_unit(model, id),
        _ => default_unit(d.dim),
    };
    Column {
        name: d.name.clone(),
        unit: unit_text,
        def: Some(id),
        display,
    }
}

/// Columns: age, reservoirs, states, outputs, each group in the order of
/// names. Never declaration order: reordering a file's declarations changes
/// neither the model nor a byte of its series (the stage cache relies on it).
pub fn columns(model: &Model) -> Vec<Column> {
    let mut cols = vec![Column {
        name: "age".into(),
        unit: "Ga".into(),
        def: None,
        display: units::lookup("Ga").expect("Ga is a unit"),
    }];
    for id in compile::state_order(model) {
        cols.push(column_for(model, id));
    }
    for id in compile::by_name(model, |k| matches!(k, DefKind::Output)) {
        cols.push(column_for(model, id));
    }
    cols
}

/// Compiled output and expectation programs, one per stage.
#[derive(Debug, Clone)]
pub struct ReportPrograms {
    outputs: Vec<compile::Program>,
    expects: Vec<compile::Program>,
    /// For each expectation, the range of its expressions in `extra`.
    expect_slots: Vec<std::ops::Range<usize>>,
}

impl ReportPrograms {
    /// Native code for the output programs, which every report row of
    /// every member evaluates (see `compile::Program::make_native`), built
    /// in parallel on the current rayon pool; the expectations' programs
    /// run a few times a member and stay interpreted.
    pub fn make_native(&mut self) {
        use rayon::prelude::*;
        self.outputs.par_iter_mut().for_each(|p| {
            p.make_native();
        });
    }
}

fn expect_exprs(e: &crate::model::Expect) -> Vec<crate::model::Expr> {
    use crate::model::ExpectCheck;
    match &e.check {
        ExpectCheck::Target { value, sigma, .. } => {
            vec![e.subject.clone(), value.clone(), sigma.clone()]
        }
        ExpectCheck::Range { low, high, .. } => vec![e.subject.clone(), low.clone(), high.clone()],
        ExpectCheck::Bound { value, .. } => vec![e.subject.clone(), value.clone()],
        ExpectCheck::Event { .. } => Vec::new(),
    }
}

/// Compile the outputs and expectations of every stage, keeping the
/// parameters in `symbolic` as registers.
pub fn report_programs(model: &Model, symbolic: &[DefId]) -> ReportPrograms {
    let cols = columns(model);
    let outputs: Vec<DefId> = cols.iter().filter_map(|c| c.def).collect();
    let mut exprs = Vec::new();
    let mut expect_slots = Vec::new();
    for e in &model.expects {
        let x = expect_exprs(e);
        expect_slots.push(exprs.len()..exprs.len() + x.len());
        exprs.extend(x);
    }
    let mut out = Vec::new();
    let mut exp = Vec::new();
    for s in 0..model.stages.len() {
        out.push(compile_outputs(model, s, &outputs, symbolic));
        exp.push(compile::compile_with(
            model,
            Some(s),
            &Wants {
                rhs: false,
                defs: Vec::new(),
                exprs: exprs.clone(),
            },
            symbolic,
        ));
    }
    ReportPrograms {
        outputs: out,
        expects: exp,
        expect_slots,
    }
}

fn compile_outputs(
    model: &Model,
    s: usize,
    outputs: &[DefId],
    symbolic: &[DefId],
) -> compile::Program {
    compile::compile_with(
        model,
        Some(s),
        &Wants {
            rhs: false,
            defs: outputs.to_vec(),
            exprs: Vec::new(),
        },
        symbolic,
    )
}

/// Evaluate outputs on every reported row.
pub fn series(model: &Model, run: &Run) -> Result<Series, Problem> {
    series_with(model, run, &report_programs(model, &[]), &[])
}

/// Evaluate outputs with precompiled programs and parameter values.
pub fn series_with(
    model: &Model,
    run: &Run,
    programs: &ReportPrograms,
    params: &[(DefId, f64)],
) -> Result<Series, Problem> {
    let mut values = Vec::new();
    series_values_into(model, run, programs, params, &mut values)?;
    let columns = columns(model);
    let rows = values
        .chunks(columns.len().max(1))
        .map(<[f64]>::to_vec)
        .collect();
    Ok(Series { columns, rows })
}

/// Evaluate the series rows of one stage, in display units, handing each
/// row (`columns.len()` values) to `row`. `Err` on a non-finite output
/// (H0605) or when a stop was requested.
fn stage_rows_each(
    model: &Model,
    columns: &[Column],
    prog: &compile::Program,
    sr: &crate::solve::StageRun,
    params: &[(DefId, f64)],
    mut row: impl FnMut(&[f64]) -> Result<(), Problem>,
) -> Result<(), Problem> {
    let mut regs = prog.regs_with(params);
    let mut values = Vec::with_capacity(columns.len());
    for (i, (age, y)) in sr.rows.iter().enumerate() {
        if i.is_multiple_of(crate::cancel::ROWS_PER_CHECK) {
            crate::cancel::check()?;
        }
        prog.eval(&mut regs, y, model.start_age - age, age);
        values.clear();
        values.push(columns[0].display.from_internal(age));
        for (k, &(def, reg)) in prog.observed.iter().enumerate() {
            let v = prog.value(&regs, reg);
            if !v.is_finite() {
                let d = &model.defs[def];
                return Err(Problem::error(
                    "H0605",
                    format!(
                        "`{}` is {} at {} Ga",
                        d.name,
                        if v.is_nan() { "not a number (NaN)" } else { "infinite" },
                        age / 1e9
                    ),
                )
                .label(d.expr.span, "evaluates to a non-finite number")
                .help("nothing non-finite is written to a CSV; guard the expression (e.g. `max(x, 1e-30 kg)` before dividing)"));
            }
            values.push(columns[k + 1].display.from_internal(v));
        }
        row(&values)?;
    }
    Ok(())
}

/// The whole series as one row-major array (`columns(model).len()` values
/// per row), into `out` (cleared first): what an ensemble member keeps,
/// without a vector per row, in a buffer it reuses from member to member.
pub fn series_values_into(
    model: &Model,
    run: &Run,
    programs: &ReportPrograms,
    params: &[(DefId, f64)],
    out: &mut Vec<f64>,
) -> Result<(), Problem> {
    series_values_of(model, &run.stages, programs, params, out)
}

/// [`series_values_into`] over the stages given (in order), which may be
/// borrowed from different places (an ensemble member's own stages after
/// the stages all members share).
pub fn series_values_of<'a>(
    model: &Model,
    stages: impl IntoIterator<Item = &'a crate::solve::StageRun> + Clone,
    programs: &ReportPrograms,
    params: &[(DefId, f64)],
    out: &mut Vec<f64>,
) -> Result<(), Problem> {
    let columns = columns(model);
    let rows: usize = stages.clone().into_iter().map(|sr| sr.rows.len()).sum();
    out.clear();
    let values = rows.saturating_mul(columns.len());
    out.try_reserve_exact(values)
        .map_err(|_| crate::solve::out_of_memory("series", values.saturating_mul(8)))?;
    for sr in stages {
        stage_rows_each(
            model,
            &columns,
            &programs.outputs[sr.stage],
            sr,
            params,
            |row| {
                out.extend_from_slice(row);
                Ok(())
            },
        )?;
    }
    Ok(())
}

/// The most bytes a row of `columns` numbers takes as CSV: a shortest
/// round-trip double is at most 24 characters (`-1.2345678901234567e-308`),
/// and each is followed by a comma or the line's end.
pub fn csv_row_bound(columns: usize) -> usize {
    columns.saturating_mul(25)
}

/// Append the series CSV lines of one stage's rows (no header) to `out`:
/// the stage's part of `series.csv`, which the stage cache keeps per stage.
/// Written row by row, with no table of values in between; `out` grows by
/// at most [`csv_row_bound`] bytes a row, reserved first so that a lack of
/// memory is the H0607 error rather than an abort.
pub fn append_stage_series_csv(
    model: &Model,
    columns: &[Column],
    sr: &crate::solve::StageRun,
    out: &mut Vec<u8>,
) -> Result<(), Problem> {
    let outputs: Vec<DefId> = columns.iter().filter_map(|c| c.def).collect();
    let prog = compile_outputs(model, sr.stage, &outputs, &[]);
    let bound = sr.rows.len().saturating_mul(csv_row_bound(columns.len()));
    out.try_reserve(bound)
        .map_err(|_| crate::solve::out_of_memory("series", bound))?;
    let mut b = ryu::Buffer::new();
    stage_rows_each(model, columns, &prog, sr, &[], |row| {
        push_row(out, &mut b, row);
        Ok(())
    })
}

/// The header line of the series CSV: `name [unit]` per column.
pub fn header_csv(columns: &[Column]) -> Vec<u8> {
    let mut w = csv::WriterBuilder::new()
        .terminator(csv::Terminator::Any(b'\n'))
        .from_writer(Vec::new());
    let header: Vec<String> = columns
        .iter()
        .map(|c| format!("{} [{}]", c.name, c.unit))
        .collect();
    let _ = w.write_record(&header);
    w.into_inner().unwrap_or_default()
}

/// Rows of numbers as CSV lines. Numbers never need quoting, so they are
/// written directly rather than through a CSV writer (several times
/// faster, and the same bytes).
pub fn rows_csv<'a>(rows: impl IntoIterator<Item = &'a [f64]>, out: &mut Vec<u8>) {
    let mut b = ryu::Buffer::new();
    for row in rows {
        push_row(out, &mut b, row);
    }
}

fn push_row(out: &mut Vec<u8>, b: &mut ryu::Buffer, row: &[f64]) {
    for (k, v) in row.iter().enumerate() {
        if k > 0 {
            out.push(b',');
        }
        push_num(out, b, *v);
    }
    out.push(b'\n');
}

fn push_num(out: &mut Vec<u8>, b: &mut ryu::Buffer, v: f64) {
    if v == 0.0 {
        out.push(b'0');
    } else if v.is_infinite() {
        out.extend_from_slice(if v > 0.0 { b"inf" } else { b"-inf" });
    } else {
        let s = b.format(v);
        out.extend_from_slice(s.strip_suffix(".0").unwrap_or(s).as_bytes());
    }
}

/// A number in shortest round-trip form, without a trailing `.0`.
pub fn fmt_num(v: f64) -> String {
    let mut out = Vec::with_capacity(24);
    push_num(&mut out, &mut ryu::Buffer::new(), v);
    String::from_utf8(out).unwrap_or_default()
}

/// A number for people: ten significant digits, then the shortest form, so
/// 0.9000000000000001 shows as 0.9; large and small magnitudes with an
/// exponent.
pub fn human_num(v: f64) -> String {
    if !v.is_finite() {
        return v.to_string();
    }
    let rounded: f64 = format!("{v:.9e}").parse().unwrap_or(v);
    let a = rounded.abs();
    if a >= 1e7 || (a != 0.0 && a < 1e-4) {
        // 1e15 rather than 1000000000000000.
        format!("{rounded:e}")
    } else {
        fmt_num(rounded)
    }
}

impl Series {
    /// The CSV text: a header `name [unit]` per column, then one row per age.
    pub fn to_csv(&self) -> Vec<u8> {
        let mut out = header_csv(&self.columns);
        out.reserve(self.rows.len() * self.columns.len() * 20);
        rows_csv(self.rows.iter().map(Vec::as_slice), &mut out);
        out
    }

    pub fn column(&self, name: &str) -> Option<usize> {
        self.columns.iter().position(|c| c.name == name)
    }
}

/// The per-stage table. Wall time is left out so the file is identical on
/// every run; it is shown in the command's summary instead.
pub fn stages_csv(model: &Model, run: &Run) -> Vec<u8> {
    let mut w = csv::WriterBuilder::new()
        .terminator(csv::Terminator::Any(b'\n'))
        .from_writer(Vec::new());
    let _ = w.write_record([
        "stage",
        "from [Ga]",
        "to [Ga]",
        "method",
        "accepted_steps",
        "rejected_steps",
        "rhs_evaluations",
        "jacobians",
        "closure_error",
    ]);
    for sr in &run.stages {
        let st = &model.stages[sr.stage];
        let _ = w.write_record([
            st.name.clone(),
            fmt_num(st.start_age / 1e9),
            fmt_num(st.end_age / 1e9),
            method_text(model, &sr.stats),
            sr.stats.accepted.to_string(),
            sr.stats.rejected.to_string(),
            sr.stats.rhs_evals.to_string(),
            sr.stats.jacobians.to_string(),
            fmt_num(sr.closure_error),
        ]);
    }
    w.into_inner().unwrap_or_default()
}

/// The words for the methods that took a stage's steps, as `stages.csv`,
/// the manifest and the run summary show them: "explicit", "implicit" or
/// "explicit, then implicit from X Ga".
pub fn method_text(model: &Model, stats: &Stats) -> String {
    match stats.method_use() {
        MethodUse::Explicit => "explicit".to_owned(),
        MethodUse::Implicit => "implicit".to_owned(),
        MethodUse::Switched { at } => format!(
            "explicit, then implicit from {}",
            crate::solve::ga(model.start_age - at)
        ),
    }
}

/// The events table: name and first age (empty when it never happened).
pub fn events_csv(model: &Model, run: &Run) -> Vec<u8> {
    let mut w = csv::WriterBuilder::new()
        .terminator(csv::Terminator::Any(b'\n'))
        .from_writer(Vec::new());
    let _ = w.write_record(["event", "first_age [Ga]"]);
    for (k, &d) in run.event_defs.iter().enumerate() {
        let age = run.events[k].map(|a| fmt_num(a / 1e9)).unwrap_or_default();
        let _ = w.write_record([model.defs[d].name.clone(), age]);
    }
    w.into_inner().unwrap_or_default()
}

/// How one expectation fared in one run.
#[derive(Debug, Clone, PartialEq)]
pub struct ExpectResult {
    /// The statement as written.
    pub text: String,
    /// The unit `shown` is in.
    pub unit: String,
    /// The value in that unit.
    pub shown: f64,
    /// The subject's value (internal units), or the event's first age
    /// (years before present; infinite when it never happened).
    pub value: f64,
    /// How far from passing: 0 when it passes (for a target, |z| with
    /// z = (value - target) / sigma, which passes within 2 sigma).
    pub misfit: f64,
    pub pass: bool,
}

/// A target passes when the value lies within this many uncertainties.
pub const TARGET_SIGMAS: f64 = 2.0;

/// Evaluate every expectation of the model on a solved run.
pub fn expectations(model: &Model, run: &Run) -> Vec<ExpectResult> {
    expectations_with(model, run, &report_programs(model, &[]), &[])
}

/// Evaluate every expectation with precompiled programs and parameters.
pub fn expectations_with(
    model: &Model,
    run: &Run,
    programs: &ReportPrograms,
    params: &[(DefId, f64)],
) -> Vec<ExpectResult> {
    use crate::model::ExpectCheck;
    let mut out = Vec::with_capacity(model.expects.len());
    for (k, e) in model.expects.iter().enumerate() {
        let at = |age: f64| eval_at(model, run, programs, k, age, params);
        let (value, misfit, pass) = match &e.check {
            ExpectCheck::Event { event, before, age } => {
                let k = run.event_defs.iter().position(|d| d == event);
                match k.and_then(|k| run.events[k]) {
                    None => (f64::INFINITY, f64::INFINITY, false),
                    Some(at) => {
                        let pass = if *before { at > *age } else { at < *age };
                        let miss = if pass { 0.0 } else { (at - age).abs() / 1e9 };
                        (at, miss, pass)
                    }
                }
            }
            ExpectCheck::Target { age, .. } => {
                let v = at(*age);
                let z = (v[0] - v[1]) / v[2];
                (v[0], z.abs(), z.abs() <= TARGET_SIGMAS)
            }
            ExpectCheck::Range { age, .. } => {
                let v = at(*age);
                let (x, lo, hi) = (v[0], v[1], v[2]);
                let width = (hi - lo).abs().max(f64::MIN_POSITIVE);
                let miss = if x < lo {
                    (lo - x) / width
                } else if x > hi {
                    (x - hi) / width
                } else {
                    0.0
                };
                (x, miss, x >= lo && x <= hi)
            }
            ExpectCheck::Bound { age, op, .. } => {
                let v = at(*age);
                let (x, b) = (v[0], v[1]);
                use crate::syntax::CmpOp;
                let pass = match op {
                    CmpOp::Lt => x < b,
                    CmpOp::Le => x <= b,
                    CmpOp::Gt => x > b,
                    CmpOp::Ge => x >= b,
                };
                let miss = if pass {
                    0.0
                } else {
                    (x - b).abs() / b.abs().max(f64::MIN_POSITIVE)
                };
                (x, miss, pass)
            }
        };
        // A value that cannot be evaluated, or a misfit that cannot (an
        // uncertainty of zero, perhaps drawn by an ensemble), fails with an
        // infinite misfit: never a NaN in expectations.csv.
        let (value, misfit) = if value.is_nan() {
            (f64::INFINITY, f64::INFINITY)
        } else if misfit.is_nan() {
            (value, f64::INFINITY)
        } else {
            (value, misfit)
        };
        let (unit, shown) = match &e.display {
            Some((t, u)) => (units::udunits(t), u.from_internal(value)),
            None => {
                let d = match e.check {
                    ExpectCheck::Event { .. } => crate::units::Dim::AGE,
                    _ => infer_dim(model, e),
                };
                (d.internal_unit(), value)
            }
        };
        out.push(ExpectResult {
            text: e.text.clone(),
            unit,
            shown,
            value,
            misfit,
            pass: pass && misfit.is_finite(),
        });
    }
    out
}

fn infer_dim(model: &Model, e: &crate::model::Expect) -> crate::units::Dim {
    match &e.subject.kind {
        crate::model::ExprKind::Ref(d) => model.defs[*d].dim,
        _ => crate::units::Dim::NONE,
    }
}

/// Values of expectation `k`'s expressions at `age`, from the probe state
/// the solve kept there.
fn eval_at(
    model: &Model,
    run: &Run,
    programs: &ReportPrograms,
    k: usize,
    age: f64,
    params: &[(DefId, f64)],
) -> Vec<f64> {
    let slots = programs.expect_slots[k].clone();
    let found = run.stages.iter().find_map(|sr| {
        sr.probes
            .iter()
            .find(|(a, _)| *a == age)
            .map(|(_, y)| (sr.stage, y))
    });
    let Some((stage, y)) = found else {
        return vec![f64::NAN; slots.len()];
    };
    let prog = &programs.expects[stage];
    let mut regs = prog.regs_with(params);
    prog.eval(&mut regs, y, model.start_age - age, age);
    prog.extra[slots]
        .iter()
        .map(|&r| prog.value(&regs, r))
        .collect()
}

/// The expectations table of a run.
pub fn expectations_csv(results: &[ExpectResult]) -> Vec<u8> {
    let mut w = csv::WriterBuilder::new()
        .terminator(csv::Terminator::Any(b'\n'))
        .from_writer(Vec::new());
    let _ = w.write_record(["expectation", "value", "unit", "misfit", "pass"]);
    for r in results {
        let _ = w.write_record([
            r.text.clone(),
            fmt_num(r.shown),
            r.unit.clone(),
            fmt_num(r.misfit),
            if r.pass { "yes" } else { "no" }.to_owned(),
        ]);
    }
    w.into_inner().unwrap_or_default()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn numbers_for_people_round_and_use_exponents_at_the_extremes() {
        assert_eq!(human_num(0.9000000000000001), "0.9");
        assert_eq!(human_num(14.0), "14");
        assert_eq!(human_num(-0.3), "-0.3");
        assert_eq!(human_num(1e15), "1e15");
        assert_eq!(human_num(3e11), "3e11");
        assert_eq!(human_num(1.426e21), "1.426e21");
        assert_eq!(human_num(2.5e-5), "2.5e-5");
        assert_eq!(human_num(1234567.0), "1234567");
        assert_eq!(human_num(0.0), "0");
    }

    #[test]
    fn rows_are_written_as_the_csv_writer_would_write_them() {
        let rows = vec![
            vec![0.04, 1.426e21, 0.0, -3.5],
            vec![1e-300, 2.0, 123456.789, 1e16],
        ];
        let mut fast = Vec::new();
        rows_csv(rows.iter().map(Vec::as_slice), &mut fast);
        let mut w = csv::WriterBuilder::new()
            .terminator(csv::Terminator::Any(b'\n'))
            .from_writer(Vec::new());
        for r in &rows {
            w.write_record(r.iter().map(|v| fmt_num(*v))).unwrap();
        }
        assert_eq!(
            String::from_utf8(fast).unwrap(),
            String::from_utf8(w.into_inner().unwrap()).unwrap()
        );
    }
}
