//! Properties of the canonical formatter, over generated scenarios, a few
//! hand-written awkward layouts and every `.hadal` file under `scenarios/`:
//!
//! - formatting is idempotent: fmt(fmt(x)) == fmt(x);
//! - the formatted text parses, to the same syntax tree up to spans and line
//!   numbers;
//! - the checked model is unchanged: every definition's canonical form, doc
//!   comment and display unit, the header, the stages and the expectations;
//!   and a file with errors keeps exactly the same errors.
//!
//! Generated scenarios come from a random tape of choices (so proptest
//! shrinks a failure towards the first, simplest alternative of every
//! choice): random statements of every kind, mostly well-typed, laid out
//! with random spacing, indentation, comments, doc comments, blank lines,
//! CRLF line ends and redundant parentheses.

use std::path::{Path, PathBuf};

use hadal::check::{check_text, CheckError, CheckOptions};
use hadal::model::{ExpectCheck, Model};
use hadal::syntax::{self, Entry, EntryKind, Expr, ExprKind, StmtKind, SyntaxFile};
use proptest::prelude::*;

// ---- comparing trees and models ---------------------------------------------

/// A syntax tree with every span and line number zeroed.
fn strip(file: &SyntaxFile) -> SyntaxFile {
    let mut f = file.clone();
    strip_entries(&mut f.entries);
    f
}

fn strip_entries(entries: &mut [Entry]) {
    for e in entries {
        e.line = 0;
        if let EntryKind::Stmt(stmt) = &mut e.kind {
            stmt.span = Default::default();
            strip_stmt(&mut stmt.kind);
        }
    }
}

fn strip_ident(i: &mut syntax::Ident) {
    i.span = Default::default();
}

fn strip_unit(u: &mut syntax::UnitText) {
    u.span = Default::default();
    for f in &mut u.factors {
        f.span = Default::default();
    }
}

fn strip_stmt(k: &mut StmtKind) {
    match k {
        StmtKind::Scenario { name, title } => {
            strip_ident(name);
            if let Some(t) = title {
                t.span = Default::default();
            }
        }
        StmtKind::Span { from, to } => {
            strip_expr(from);
            strip_expr(to);
        }
        StmtKind::Report { every } => strip_expr(every),
        StmtKind::Solver { key, value } => {
            strip_ident(key);
            strip_expr(value);
        }
        StmtKind::Include { path } => path.span = Default::default(),
        StmtKind::Const { name, value }
        | StmtKind::Param { name, value }
        | StmtKind::Let { name, value }
        | StmtKind::Set { name, value }
        | StmtKind::Event {
            name,
            condition: value,
        } => {
            strip_ident(name);
            strip_expr(value);
        }
        StmtKind::Table {
            name,
            path,
            x_unit,
            y_unit,
        } => {
            strip_ident(name);
            path.span = Default::default();
            strip_unit(x_unit);
            strip_unit(y_unit);
        }
        StmtKind::Reservoir {
            name,
            initial,
            clauses,
        }
        | StmtKind::State {
            name,
            initial,
            clauses,
        } => {
            strip_ident(name);
            strip_expr(initial);
            for c in clauses {
                strip_ident(&mut c.key);
                strip_expr(&mut c.value);
            }
        }
        StmtKind::Output { name, value, unit } => {
            strip_ident(name);
            strip_expr(value);
            if let Some(u) = unit {
                strip_unit(u);
            }
        }
        StmtKind::Flux {
            name,
            from,
            to,
            rate,
        } => {
            strip_ident(name);
            strip_ident(from);
            strip_ident(to);
            strip_expr(rate);
        }
        StmtKind::Expect { subject, check } => {
            strip_expr(subject);
            match check {
                syntax::ExpectCheck::Target { at, value, sigma } => {
                    strip_expr(at);
                    strip_expr(value);
                    strip_expr(sigma);
                }
                syntax::ExpectCheck::Range { at, low, high } => {
                    strip_expr(at);
                    strip_expr(low);
                    strip_expr(high);
                }
                syntax::ExpectCheck::Bound { at, value, .. } => {
                    strip_expr(at);
                    strip_expr(value);
                }
                syntax::ExpectCheck::Event { age, .. } => strip_expr(age),
            }
        }
        StmtKind::Stage {
            name,
            from,
            to,
            body,
        } => {
            strip_ident(name);
            strip_expr(from);
            strip_expr(to);
            if let Some(b) = body {
                b.close_line = 0;
                strip_entries(&mut b.entries);
            }
        }
    }
}

fn strip_expr(e: &mut Expr) {
    e.span = Default::default();
    match &mut e.kind {
        ExprKind::Quantity { unit, .. } => {
            if let Some(u) = unit {
                strip_unit(u);
            }
        }
        ExprKind::Name(id) => strip_ident(id),
        ExprKind::Call { func, args } => {
            strip_ident(func);
            args.iter_mut().for_each(strip_expr);
        }
        ExprKind::Unary { operand, .. } => strip_expr(operand),
        ExprKind::Binary { lhs, rhs, .. } => {
            strip_expr(lhs);
            strip_expr(rhs);
        }
        ExprKind::If {
            cond,
            then,
            otherwise,
        } => {
            strip_expr(cond);
            strip_expr(then);
            strip_expr(otherwise);
        }
        ExprKind::Paren(inner) => strip_expr(inner),
    }
}

/// Everything in a checked model that formatting must not change, as text.
fn model_summary(m: &Model) -> Vec<String> {
    let mut out = vec![format!(
        "header {:?} {:?} {:?} {:?} {:?} {:?}",
        m.name, m.title, m.start_age, m.end_age, m.cadence, m.solver
    )];
    for (id, d) in m.defs.iter().enumerate() {
        out.push(format!(
            "{} | doc {:?} | unit {:?}",
            m.canonical_def(id),
            d.doc,
            d.display_unit
        ));
    }
    for t in &m.tables {
        out.push(format!(
            "table {} {} {:?} {:?} {:?} {:?}",
            t.name, t.display_path, t.x_dim, t.y_dim, t.xs, t.ys
        ));
    }
    for st in &m.stages {
        let sets: Vec<String> = st
            .sets
            .iter()
            .map(|(d, e)| format!("{} = {}", m.defs[*d].name, m.canonical_expr(e)))
            .collect();
        out.push(format!(
            "stage {} {:?} {:?} sets {sets:?} fluxes {:?} solver {:?}",
            st.name, st.start_age, st.end_age, st.fluxes, st.solver
        ));
    }
    for e in &m.expects {
        let check = match &e.check {
            ExpectCheck::Target { age, value, sigma } => format!(
                "at {age:?} = {} +- {}",
                m.canonical_expr(value),
                m.canonical_expr(sigma)
            ),
            ExpectCheck::Range { age, low, high } => format!(
                "at {age:?} in {} to {}",
                m.canonical_expr(low),
                m.canonical_expr(high)
            ),
            ExpectCheck::Bound { age, op, value } => {
                format!("at {age:?} {op:?} {}", m.canonical_expr(value))
            }
            ExpectCheck::Event { event, before, age } => {
                format!("event {event} before {before} {age:?}")
            }
        };
        out.push(format!(
            "expect {} {check} | {}",
            m.canonical_expr(&e.subject),
            e.text
        ));
    }
    out
}

/// What checking a text gives: a model summary, or the list of problems
/// without their places (formatting moves places, never problems).
fn check_outcome(path: &Path, root: &Path, text: &str) -> Result<Vec<String>, Vec<String>> {
    let name = path.file_name().unwrap().to_string_lossy().into_owned();
    match check_text(&name, path, text, root, &CheckOptions::default()) {
        Ok(c) => Ok(model_summary(&c.model)),
        Err(CheckError::Invalid { problems, .. }) => Err(problems
            .iter()
            .map(|p| format!("{} {} | {:?}", p.code, p.message, p.help))
            .collect()),
        Err(CheckError::Io { message, .. }) => Err(vec![format!("io {message}")]),
    }
}

/// The three properties for one text, read as the file at `path` inside
/// `root`. Returns whether the text checked clean.
fn assert_formatting_keeps_everything(path: &Path, root: &Path, text: &str) -> bool {
    let tree = syntax::parse(text, 0)
        .unwrap_or_else(|p| panic!("input does not parse: {p:#?}\n---\n{text}"));
    let once = syntax::format_file(&tree);
    let tree_once = syntax::parse(&once, 0)
        .unwrap_or_else(|p| panic!("formatted text does not parse: {p:#?}\n---\n{once}"));
    let twice = syntax::format_file(&tree_once);
    assert_eq!(once, twice, "formatting is not idempotent for\n{text}");
    assert_eq!(
        strip(&tree),
        strip(&tree_once),
        "formatting changed the syntax tree of\n{text}\n---\n{once}"
    );
    let before = check_outcome(path, root, text);
    let after = check_outcome(path, root, &once);
    assert_eq!(
        before, after,
        "formatting changed the checked model of\n{text}\n---\n{once}"
    );
    before.is_ok()
}

fn manifest() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

/// Generated scenarios read the hypsometry of the diagnostics cases.
fn generated_path() -> (PathBuf, PathBuf) {
    let root = manifest().join("tests/diagnostics");
    (root.join("generated.hadal"), root)
}

// ---- the generator -------------------------------------------------------------

/// A tape of random choices; past its end every choice is the first one.
struct Tape<'a> {
    data: &'a [u32],
    pos: usize,
}

impl Tape<'_> {
    fn pick(&mut self, n: usize) -> usize {
        let v = self.data.get(self.pos).copied().unwrap_or(0);
        self.pos += 1;
        v as usize % n
    }
    fn one<'s>(&mut self, xs: &[&'s str]) -> &'s str {
        xs[self.pick(xs.len())]
    }
    /// True with probability about `pct` percent (false when shrunk).
    fn chance(&mut self, pct: usize) -> bool {
        self.pick(100) >= 100 - pct
    }
}

#[derive(Clone, Copy, PartialEq)]
enum Kind {
    Mass,
    Rate,
    Frac,
    Dur,
    Age,
    Temp,
    TempDiff,
    Cond,
}

const NUMBERS: &[&str] = &[
    "1", "2.5", "0.3", "1e3", "4.5", ".5", "1.5E2", "3e-2", "10", "7",
];

struct Gen<'t, 'a> {
    tape: &'t mut Tape<'a>,
}

impl Gen<'_, '_> {
    fn number(&mut self) -> String {
        self.tape.one(NUMBERS).to_owned()
    }

    fn quantity(&mut self, unit: &str) -> Vec<String> {
        vec![self.number(), format!("\u{1}{unit}")]
    }

    /// Tokens of an expression of `kind`; `constant` excludes everything
    /// that changes during a run.
    fn expr(&mut self, kind: Kind, depth: usize, constant: bool) -> Vec<String> {
        let leaf = depth >= 3;
        let n = if leaf { 2 } else { 8 };
        let choice = self.tape.pick(n);
        let t = |s: &str| vec![s.to_owned()];
        let cat = |parts: Vec<Vec<String>>| parts.concat();
        match kind {
            Kind::Mass => match choice {
                0 => {
                    let u = self.tape.one(&["kg", "g", "t", "Tg", "Gt"]);
                    self.quantity(u)
                }
                1 => {
                    if constant {
                        t("c_mass")
                    } else {
                        t(self.tape.one(&["ocean", "mantle", "c_mass"]))
                    }
                }
                2 => cat(vec![
                    t("("),
                    self.expr(Kind::Mass, depth + 1, constant),
                    t(")"),
                ]),
                3 => {
                    let op = self.tape.one(&["+", "-"]);
                    cat(vec![
                        self.expr(Kind::Mass, depth + 1, constant),
                        t(op),
                        self.expr(Kind::Mass, depth + 1, constant),
                    ])
                }
                4 => cat(vec![
                    self.expr(Kind::Frac, depth + 1, constant),
                    t("*"),
                    self.expr(Kind::Mass, depth + 1, constant),
                ]),
                5 => cat(vec![
                    self.expr(Kind::Rate, depth + 1, constant),
                    t("*"),
                    self.expr(Kind::Dur, depth + 1, constant),
                ]),
                6 => {
                    let f = self.tape.one(&["min", "max"]);
                    cat(vec![
                        t(f),
                        t("("),
                        self.expr(Kind::Mass, depth + 1, constant),
                        t(","),
                        self.expr(Kind::Mass, depth + 1, constant),
                        t(")"),
                    ])
                }
                _ => {
                    if constant {
                        self.expr(Kind::Mass, depth + 1, constant)
                    } else {
                        // `if` is a whole expression; as an operand it
                        // needs brackets.
                        let e = cat(vec![
                            t("if"),
                            self.expr(Kind::Cond, depth + 1, constant),
                            t("then"),
                            self.expr(Kind::Mass, depth + 1, constant),
                            t("else"),
                            self.expr(Kind::Mass, depth + 1, constant),
                        ]);
                        if depth == 0 {
                            e
                        } else {
                            cat(vec![t("("), e, t(")")])
                        }
                    }
                }
            },
            Kind::Rate => match choice {
                0 => {
                    let u = self.tape.one(&["kg/yr", "Gt/Myr", "t/yr", "kg/s"]);
                    self.quantity(u)
                }
                1 => t("p_rate"),
                2 => cat(vec![
                    self.expr(Kind::Mass, depth + 1, constant),
                    t("/"),
                    self.expr(Kind::Dur, depth + 1, constant),
                ]),
                3 => cat(vec![
                    self.expr(Kind::Rate, depth + 1, constant),
                    t("*"),
                    self.expr(Kind::Frac, depth + 1, constant),
                ]),
                4 => cat(vec![
                    t("max"),
                    t("("),
                    self.expr(Kind::Rate, depth + 1, constant),
                    t(","),
                    t("0"),
                    t("\u{1}kg/yr"),
                    t(")"),
                ]),
                5 => cat(vec![
                    t("("),
                    self.expr(Kind::Rate, depth + 1, constant),
                    t(")"),
                ]),
                6 if !constant => t("l_rate"),
                _ => cat(vec![
                    self.expr(Kind::Rate, depth + 1, constant),
                    t(self.tape.one(&["+", "-"])),
                    self.expr(Kind::Rate, depth + 1, constant),
                ]),
            },
            Kind::Frac => match choice {
                0 => t(&self.number()),
                1 => {
                    let u = self.tape.one(&["%", "ppm", "wt%"]);
                    self.quantity(u)
                }
                2 => t("p_frac"),
                3 => cat(vec![
                    t("("),
                    self.expr(Kind::Frac, depth + 1, constant),
                    t(")"),
                ]),
                4 => cat(vec![
                    self.expr(Kind::Mass, depth + 1, constant),
                    t("/"),
                    self.expr(Kind::Mass, depth + 1, constant),
                ]),
                5 => cat(vec![t("-"), self.expr(Kind::Frac, depth + 1, constant)]),
                6 => {
                    let f = self.tape.pick(4);
                    match f {
                        0 => cat(vec![
                            t("smoothstep"),
                            t("("),
                            self.expr(Kind::Frac, depth + 1, constant),
                            t(","),
                            t("0"),
                            t(","),
                            t("1"),
                            t(")"),
                        ]),
                        1 => cat(vec![
                            t("("),
                            self.expr(Kind::Frac, depth + 1, constant),
                            t(")"),
                            t("^"),
                            t("2"),
                        ]),
                        2 => cat(vec![
                            t("exp"),
                            t("("),
                            t("-"),
                            self.expr(Kind::Frac, depth + 1, constant),
                            t(")"),
                        ]),
                        _ => cat(vec![
                            self.expr(Kind::Dur, depth + 1, constant),
                            t("/"),
                            self.expr(Kind::Dur, depth + 1, constant),
                        ]),
                    }
                }
                _ => {
                    if constant {
                        t("p_frac")
                    } else {
                        t(self.tape.one(&["fill(mantle)", "l_frac"]))
                    }
                }
            },
            Kind::Dur => match choice {
                0 => {
                    let u = self.tape.one(&["yr", "kyr", "Myr", "Gyr"]);
                    self.quantity(u)
                }
                1 => cat(vec![
                    self.expr(Kind::Age, depth + 1, constant),
                    t("-"),
                    self.expr(Kind::Age, depth + 1, constant),
                ]),
                2 if !constant => t("time"),
                3 => cat(vec![
                    self.expr(Kind::Dur, depth + 1, constant),
                    t("*"),
                    self.expr(Kind::Frac, depth + 1, constant),
                ]),
                4 => cat(vec![
                    t("("),
                    self.expr(Kind::Dur, depth + 1, constant),
                    t(")"),
                ]),
                _ => self.quantity("Myr"),
            },
            Kind::Age => match choice {
                0 => {
                    let u = self.tape.one(&["Ga", "Ma", "ka"]);
                    self.quantity(u)
                }
                1 if !constant => t("age"),
                2 => cat(vec![
                    self.expr(Kind::Age, depth + 1, constant),
                    t(self.tape.one(&["+", "-"])),
                    self.expr(Kind::Dur, depth + 1, constant),
                ]),
                _ => self.quantity("Ga"),
            },
            Kind::Temp => match choice {
                0 => {
                    let u = self.tape.one(&["K", "degC"]);
                    self.quantity(u)
                }
                1 => {
                    let n = self.number();
                    cat(vec![t("-"), t(&n), t("\u{1}degC")])
                }
                2 => t("T_ref"),
                3 if !constant => t("T"),
                4 => cat(vec![
                    self.expr(Kind::Temp, depth + 1, constant),
                    t(self.tape.one(&["+", "-"])),
                    self.expr(Kind::TempDiff, depth + 1, constant),
                ]),
                _ => cat(vec![
                    t("("),
                    self.expr(Kind::Temp, depth + 1, constant),
                    t(")"),
                ]),
            },
            Kind::TempDiff => match choice {
                0 => self.quantity("K"),
                1 => cat(vec![
                    self.expr(Kind::Temp, depth + 1, constant),
                    t("-"),
                    self.expr(Kind::Temp, depth + 1, constant),
                ]),
                _ => cat(vec![
                    t("("),
                    self.expr(Kind::TempDiff, depth + 1, constant),
                    t(")"),
                ]),
            },
            Kind::Cond => match choice {
                0 => cat(vec![
                    self.expr(Kind::Mass, depth + 1, constant),
                    t(self.tape.one(&[">", "<", ">=", "<="])),
                    self.expr(Kind::Mass, depth + 1, constant),
                ]),
                1 => cat(vec![
                    self.expr(Kind::Age, depth + 1, constant),
                    t(self.tape.one(&[">", "<", "==", "!="])),
                    self.expr(Kind::Age, depth + 1, constant),
                ]),
                2 => cat(vec![
                    self.expr(Kind::Cond, depth + 1, constant),
                    t(self.tape.one(&["and", "or"])),
                    self.expr(Kind::Cond, depth + 1, constant),
                ]),
                3 => cat(vec![t("not"), self.expr(Kind::Cond, depth + 1, constant)]),
                4 => cat(vec![
                    t("("),
                    self.expr(Kind::Cond, depth + 1, constant),
                    t(")"),
                ]),
                5 => cat(vec![
                    self.expr(Kind::Temp, depth + 1, constant),
                    t(">="),
                    self.expr(Kind::Temp, depth + 1, constant),
                ]),
                _ => cat(vec![
                    self.expr(Kind::Frac, depth + 1, constant),
                    t("<"),
                    self.expr(Kind::Frac, depth + 1, constant),
                ]),
            },
        }
    }

    /// Join tokens with random spacing, keeping apart what must stay apart.
    /// A token starting with `\u{1}` is a unit, which follows its number
    /// with or without a space.
    fn layout(&mut self, tokens: &[String]) -> String {
        let wordy = |c: char| c.is_alphanumeric() || matches!(c, '_' | '.' | '%' | '"');
        let mut out = String::new();
        let mut prev_unit = false;
        for tok in tokens {
            let (unit, text) = match tok.strip_prefix('\u{1}') {
                Some(u) => (true, u),
                None => (false, tok.as_str()),
            };
            if let (Some(last), Some(first)) = (out.chars().last(), text.chars().next()) {
                let must = (wordy(last) && wordy(first) && !unit)
                    || (last == '+' && first == '-')
                    || (prev_unit && matches!(first, '/' | '.' | '^'))
                    || (matches!(last, '<' | '>' | '=' | '!') && first == '=');
                let space = self.tape.one(&[" ", "", "  ", "\t", " "]);
                out.push_str(if must && space.is_empty() { " " } else { space });
            }
            out.push_str(text);
            prev_unit = unit;
        }
        out
    }

    fn comment(&mut self) -> String {
        self.tape
            .one(&[
                "# a comment",
                "#",
                "#no space",
                "## looks like a doc",
                "# é ü and = + - signs   ",
                "# param x = 3 kg",
                "#\t tabbed",
            ])
            .to_owned()
    }
}

/// One generated line: tokens, a trailing comment and doc lines before it.
struct Line {
    tokens: Vec<String>,
    doc: bool,
    trailing: bool,
}

fn words(s: &str) -> Vec<String> {
    s.split(' ').map(str::to_owned).collect()
}

fn generated_scenario(data: &[u32]) -> String {
    let mut tape = Tape { data, pos: 0 };
    let mut g = Gen { tape: &mut tape };
    let mut items: Vec<Vec<String>> = Vec::new();
    let c = |g: &mut Gen, k| g.expr(k, 0, true);
    let v = |g: &mut Gen, k| g.expr(k, 0, false);
    let title = g
        .tape
        .one(&["\"A planet\"", "\"quotes \\\" inside\"", "\"\""]);
    items.push(vec!["scenario".into(), "generated".into(), title.into()]);
    items.push(words("span 4.5 Ga to 0 Ga"));
    let cadence = g.tape.one(&["10 Myr", "1 Myr", "500 kyr", "0.1 Gyr"]);
    items.push(
        [words("report every"), {
            let mut q = cadence.split(' ');
            vec![
                q.next().unwrap().into(),
                format!("\u{1}{}", q.next().unwrap()),
            ]
        }]
        .concat(),
    );
    if g.tape.chance(50) {
        items.push(words(g.tape.one(&[
            "solver rtol = 1e-8",
            "solver method = implicit",
            "solver max_steps = 1000",
        ])));
    }
    items.push([words("const c_mass ="), c(&mut g, Kind::Mass)].concat());
    items.push([words("param p_frac ="), c(&mut g, Kind::Frac)].concat());
    items.push([words("param p_rate ="), c(&mut g, Kind::Rate)].concat());
    items.push([words("const T_ref ="), c(&mut g, Kind::Temp)].concat());
    items.push([words("reservoir ocean ="), c(&mut g, Kind::Mass)].concat());
    items.push(
        [
            words("reservoir mantle ="),
            c(&mut g, Kind::Mass),
            words(", capacity ="),
            v(&mut g, Kind::Mass),
        ]
        .concat(),
    );
    items.push(
        [
            words("state T ="),
            c(&mut g, Kind::Temp),
            words(", rate = ( T_ref - T ) /"),
            c(&mut g, Kind::Dur),
        ]
        .concat(),
    );
    items.push([words("let l_rate ="), v(&mut g, Kind::Rate)].concat());
    items.push([words("let l_frac ="), v(&mut g, Kind::Frac)].concat());
    items.push([words("let l_mass ="), v(&mut g, Kind::Mass)].concat());
    items.push(words("table hyps = \"data/hypsometry.csv\" ( m , m^2 )"));
    if g.tape.chance(70) {
        items.push(words(
            "output o_level = sea_level ( hyps , ocean / 1027 \u{1}kg/m^3 ) in m",
        ));
    }
    if g.tape.chance(70) {
        let u = g.tape.one(&["Gt", "kg", "%"]);
        let kind = if u == "%" { Kind::Frac } else { Kind::Mass };
        items.push(
            [
                words("output o_x ="),
                v(&mut g, kind),
                vec!["in".into(), u.into()],
            ]
            .concat(),
        );
    }
    if g.tape.chance(70) {
        items.push(words("output o_T = T in degC"));
    }
    items.push([words("flux f1: ocean -> mantle ="), v(&mut g, Kind::Rate)].concat());
    if g.tape.chance(70) {
        items.push([words("flux f2: mantle -> ocean ="), v(&mut g, Kind::Rate)].concat());
    }
    items.push([words("event e1 ="), v(&mut g, Kind::Cond)].concat());
    if g.tape.chance(70) {
        items.push(
            [
                words("expect ocean at 0 Ga in"),
                c(&mut g, Kind::Mass),
                words("to"),
                c(&mut g, Kind::Mass),
            ]
            .concat(),
        );
    }
    if g.tape.chance(70) {
        items.push(
            [
                words("expect T at 0 Ga ="),
                c(&mut g, Kind::Temp),
                words("+-"),
                c(&mut g, Kind::TempDiff),
            ]
            .concat(),
        );
    }
    if g.tape.chance(70) {
        let w = g.tape.one(&["before", "after"]);
        items.push([words("expect e1"), vec![w.into()], words("1 \u{1}Ga")].concat());
    }
    if g.tape.chance(70) {
        let op = g.tape.one(&["<", "<=", ">", ">="]);
        items.push(
            [
                words("expect l_frac at 1 \u{1}Ga"),
                vec![op.into()],
                c(&mut g, Kind::Frac),
            ]
            .concat(),
        );
    }

    // Shuffle everything but the stages (a random swap per item).
    let n = items.len();
    for i in 0..n {
        let j = g.tape.pick(n);
        items.swap(i, j);
    }

    let split = g.tape.one(&["2 Ga", "2000 Ma", "2.5 Ga"]);
    let split: Vec<String> = {
        let mut q = split.split(' ');
        vec![
            q.next().unwrap().into(),
            format!("\u{1}{}", q.next().unwrap()),
        ]
    };
    let mut stage_lines: Vec<Vec<String>> = Vec::new();
    let mut s1 = [words("stage s1 from 4.5 \u{1}Ga to"), split.clone()].concat();
    let body1 = g.tape.chance(80);
    if body1 {
        s1.push("{".into());
    }
    stage_lines.push(s1);
    if body1 {
        if g.tape.chance(70) {
            stage_lines.push([words("set p_frac ="), c(&mut g, Kind::Frac)].concat());
        }
        if g.tape.chance(70) {
            stage_lines
                .push([words("flux f3: outside -> ocean ="), v(&mut g, Kind::Rate)].concat());
        }
        if g.tape.chance(50) {
            stage_lines.push([words("solver max_step ="), c(&mut g, Kind::Dur)].concat());
        }
        stage_lines.push(vec!["}".into()]);
    }
    let mut s2 = [words("stage s2 from"), split, words("to 0 \u{1}Ga")].concat();
    let body2 = g.tape.chance(30);
    if body2 {
        s2.push("{".into());
    }
    stage_lines.push(s2);
    if body2 {
        if g.tape.chance(50) {
            stage_lines.push([words("set p_rate ="), c(&mut g, Kind::Rate)].concat());
        }
        stage_lines.push(vec!["}".into()]);
    }

    // Lines with their decorations; the stages go at the end, in order.
    let mut lines: Vec<Line> = items
        .into_iter()
        .map(|tokens| Line {
            tokens,
            doc: false,
            trailing: false,
        })
        .chain(stage_lines.into_iter().map(|tokens| Line {
            tokens,
            doc: false,
            trailing: false,
        }))
        .collect();
    for l in &mut lines {
        let first = l.tokens[0].as_str();
        let is_def = matches!(
            first,
            "const"
                | "param"
                | "let"
                | "reservoir"
                | "state"
                | "output"
                | "flux"
                | "event"
                | "table"
        );
        l.doc = is_def && g.tape.chance(30);
        // A comment after `}` or `{` is allowed too.
        l.trailing = g.tape.chance(25);
    }

    let newline = if g.tape.chance(10) { "\r\n" } else { "\n" };
    let mut text = String::new();
    if g.tape.chance(30) {
        text.push_str(&g.comment());
        text.push_str(newline);
    }
    for l in &lines {
        for _ in 0..g.tape.pick(3) {
            if g.tape.chance(20) {
                text.push_str(g.tape.one(&[" ", "\t", "  "]));
            }
            text.push_str(newline);
        }
        if g.tape.chance(10) {
            text.push_str(&g.comment());
            text.push_str(newline);
        }
        let indent = g.tape.one(&["", "", "  ", "\t", " "]);
        if l.doc {
            for _ in 0..=g.tape.pick(2) {
                text.push_str(indent);
                text.push_str(
                    g.tape
                        .one(&["## Doc line.", "##no space", "##   spaced doc"]),
                );
                text.push_str(newline);
            }
        }
        text.push_str(indent);
        let body = g.layout(&l.tokens);
        text.push_str(&body);
        if l.trailing {
            text.push_str(g.tape.one(&[" ", "  ", "\t", ""]));
            text.push_str(&g.comment());
        } else if g.tape.chance(10) {
            text.push_str("   ");
        }
        text.push_str(newline);
    }
    for _ in 0..g.tape.pick(3) {
        text.push_str(newline);
    }
    if g.tape.chance(10) {
        // No newline at the end of the file.
        while text.ends_with(['\n', '\r']) {
            text.pop();
        }
    }
    text
}

proptest! {
    #![proptest_config(ProptestConfig {
        cases: 192,
        failure_persistence: None,
        ..ProptestConfig::default()
    })]

    #[test]
    fn formatting_generated_scenarios_keeps_everything(
        data in prop::collection::vec(any::<u32>(), 0..400)
    ) {
        let text = generated_scenario(&data);
        let (path, root) = generated_path();
        assert_formatting_keeps_everything(&path, &root, &text);
    }
}

/// The generator is useful only if most of what it writes checks clean and
/// it writes every statement kind; measure that over a fixed set of tapes.
#[test]
fn generated_scenarios_mostly_check_clean() {
    let (path, root) = generated_path();
    let mut clean = 0;
    let mut seen_kinds = std::collections::BTreeSet::new();
    let total = 120;
    let mut state = 0x9e37_79b9_7f4a_7c15u64;
    for _ in 0..total {
        let data: Vec<u32> = (0..400)
            .map(|_| {
                // xorshift64*
                state ^= state >> 12;
                state ^= state << 25;
                state ^= state >> 27;
                (state.wrapping_mul(0x2545_f491_4f6c_dd1d) >> 32) as u32
            })
            .collect();
        let text = generated_scenario(&data);
        for line in text.lines() {
            if let Some(w) = line.split_whitespace().next() {
                seen_kinds.insert(w.to_owned());
            }
        }
        if assert_formatting_keeps_everything(&path, &root, &text) {
            clean += 1;
        } else if clean < 3 {
            eprintln!("DEBUG {:?}\n{text}", check_outcome(&path, &root, &text));
        }
    }
    for kw in [
        "scenario",
        "span",
        "report",
        "solver",
        "const",
        "param",
        "table",
        "reservoir",
        "state",
        "let",
        "output",
        "flux",
        "event",
        "expect",
        "stage",
        "set",
        "}",
        "##",
        "#",
    ] {
        assert!(seen_kinds.contains(kw), "no `{kw}` line generated");
    }
    assert!(
        clean * 2 >= total,
        "only {clean} of {total} generated scenarios check clean"
    );
    assert!(clean < total, "no generated scenario has an error to keep");
}

// ---- hand-written layouts and the demos ------------------------------------------

/// Awkward layouts that are easy to get wrong.
const BUILT_IN: &[&str] = &[
    // Empty and comment-only files.
    "",
    "\n\n\n",
    "# only a comment",
    "# one\n\n\n# two\n",
    // Blank-line runs, trailing spaces, tabs, CRLF.
    "const a = 1 kg   \r\n\r\n\r\n\tconst b = 2 kg\r\n",
    // Doc comments, with and without a space, separated by a blank line.
    "## The ocean.\n##second line\nreservoir ocean = 1.4e21 kg\n\n## Orphan doc.\n\nconst x = 3\n",
    // Units glued to numbers, powers after quantities, negative Celsius.
    "const v = 2km^3\nconst w = (2 km)^3\nconst x = 2 km ^ 3\nconst t = -20degC\nconst u = 3 W.m^-2\n",
    // `+` before a negative number, nested prefixes, comparisons.
    "const a = 1 + -2\nconst b = - -3\nevent e = not not (1 > 0)\nconst c = 2^-1\n",
    // Parentheses kept as written.
    "const a = ((1 kg))\nconst b = (1 + 2) * 3\nconst c = 1 + (2 * 3)\n",
    // Stage bodies: open comment, blank lines, comments, nested indentation.
    "scenario s \"title \\\" q\"\nspan 1 Ga to 0 Ga\nreport every 100 Myr\nparam p = 1\nstage a from 1 Ga to 0.5 Ga { # open\n\n\n      set p = 2 # trailing\n  # inside\n\n    solver max_step = 1 Myr\n      } # after\nstage b from 0.5 Ga to 0 Ga {\n}\n",
    // An empty stage body and a body on a CRLF file.
    "scenario s\r\nspan 1 Ga to 0 Ga\r\nreport every 100 Myr\r\nstage a from 1 Ga to 0 Ga {\r\n}\r\n",
    // A file with errors keeps the same errors after formatting.
    "const a = 1 kg + 1 m\nlet b = oceann\nflux f: x -> y = 1 kg\n",
    // Expectations of every form.
    "scenario s\nspan 1 Ga to 0 Ga\nreport every 100 Myr\nreservoir ocean = 1e21 kg\nevent e = ocean < 1 kg\nstage a from 1 Ga to 0 Ga\nexpect ocean at 0 Ga = 1e21 kg +- 1e20 kg\nexpect ocean at 0 Ga in 1 kg to 2e21 kg\nexpect ocean at 0.5 Ga <= 3e21 kg\nexpect e after 0.5 Ga\n",
    // No final newline, and a trailing comment on the last line.
    "const a = 1 kg # last",
];

#[test]
fn formatting_built_in_layouts_keeps_everything() {
    let (path, root) = generated_path();
    let mut runs = 0;
    for text in BUILT_IN {
        assert_formatting_keeps_everything(&path, &root, text);
        runs += 1;
    }
    assert_eq!(runs, BUILT_IN.len());
    assert!(runs >= 14);
    // Spot checks of the canonical layout itself.
    let fmt = |t: &str| syntax::format_file(&syntax::parse(t, 0).unwrap());
    assert_eq!(
        fmt("const a = 1 kg   \r\n\r\n\r\n\tconst b = 2 kg\r\n"),
        "const a = 1 kg\n\nconst b = 2 kg\n"
    );
    assert_eq!(fmt("const v = 2km^3\n"), "const v = 2 km^3\n");
    assert_eq!(fmt("const w = (2 km)^3\n"), "const w = (2 km)^3\n");
    assert_eq!(fmt("const x = 2 km ^ 3\n"), "const x = 2 km ^ 3\n");
    assert_eq!(fmt("const a = 1 + -2\n"), "const a = 1 + -2\n");
    assert_eq!(fmt("const a = 1 kg # last"), "const a = 1 kg # last\n");
    assert_eq!(fmt("\n\n\n"), "");
}

fn hadal_files(dir: &Path, out: &mut Vec<PathBuf>) {
    let Ok(rd) = std::fs::read_dir(dir) else {
        return;
    };
    for e in rd.flatten() {
        let p = e.path();
        if p.is_dir() {
            hadal_files(&p, out);
        } else if p.extension().is_some_and(|x| x == "hadal") {
            out.push(p);
        }
    }
}

#[test]
fn formatting_the_demo_scenarios_keeps_everything() {
    let scenarios = manifest().join("scenarios");
    let mut files = Vec::new();
    hadal_files(&scenarios, &mut files);
    files.sort();
    for f in &files {
        let text = std::fs::read_to_string(f).unwrap();
        // Each demo is checked as itself, with its includes and tables.
        let root = f.parent().unwrap();
        let clean = assert_formatting_keeps_everything(f, root, &text);
        let top_level = f.parent() == Some(scenarios.as_path());
        assert!(
            clean || !top_level,
            "demo {} does not check clean",
            f.display()
        );
    }
    // The folder may be empty while the demos are being written; the
    // built-in layouts above run regardless.
    if files.is_empty() {
        eprintln!("no scenarios/*.hadal yet");
    }
}
