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
use hadal::syntax::{self, SyntaxFile};
use proptest::prelude::*;

// ---- comparing trees and models ---------------------------------------------

/// A syntax tree as text with every span and line number blanked, so that
/// two trees that differ only in layout compare equal. Working on the
/// `Debug` text keeps this independent of the statement kinds the language
/// grows.
fn strip(file: &SyntaxFile) -> String {
    let dbg = format!("{file:?}");
    let mut out = String::with_capacity(dbg.len());
    let mut rest = dbg.as_str();
    let mut in_string = false;
    while let Some(c) = rest.chars().next() {
        if in_string {
            if let Some(r) = rest.strip_prefix('\\') {
                // An escaped character: copy both.
                let n = r.chars().next().map_or(0, char::len_utf8);
                out.push_str(&rest[..1 + n]);
                rest = &r[n..];
                continue;
            }
            if c == '"' {
                in_string = false;
            }
        } else if c == '"' {
            in_string = true;
        } else if let Some(r) = rest.strip_prefix("Span { ") {
            let end = r.find('}').expect("a Span ends");
            out.push_str("Span");
            rest = &r[end + 1..];
            continue;
        } else if let Some(r) = rest.strip_prefix("line: ") {
            out.push_str("line: _");
            rest = r.trim_start_matches(|c: char| c.is_ascii_digit());
            continue;
        }
        out.push(c);
        rest = &rest[c.len_utf8()..];
    }
    out
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
    /// Names an expression may refer to (so that no definition refers to
    /// itself, directly or round a cycle).
    allowed: Vec<&'static str>,
    /// Whether `capacity`, `fill` and `excess` may appear (not inside a
    /// capacity).
    reservoir_functions: bool,
}

/// Precedence of what an expression is at its top, as the parser sees it.
const OR: u8 = 0;
const AND: u8 = 1;
const NOT: u8 = 2;
const CMP: u8 = 3;
const ADD: u8 = 4;
const MUL: u8 = 5;
const NEG: u8 = 6;
const ATOM: u8 = 8;
/// An `if`, which may stand only where a whole expression does.
const IF: u8 = 9;

type Ex = (Vec<String>, u8);

fn tok(s: &str) -> Vec<String> {
    vec![s.to_owned()]
}

/// Brackets around `e` when its top binds looser than `min`.
fn operand(e: Ex, min: u8) -> Vec<String> {
    if e.1 == IF || e.1 < min {
        [tok("("), e.0, tok(")")].concat()
    } else {
        e.0
    }
}

/// `lhs op rhs` for a left-associative operator of precedence `p`.
fn binary(lhs: Ex, op: &str, p: u8, rhs: Ex) -> Ex {
    let rhs_min = p + 1;
    (
        [operand(lhs, p), tok(op), operand(rhs, rhs_min)].concat(),
        p,
    )
}

fn call(f: &str, args: Vec<Ex>) -> Ex {
    let mut out = vec![f.to_owned(), "(".to_owned()];
    for (i, a) in args.into_iter().enumerate() {
        if i > 0 {
            out.push(",".to_owned());
        }
        // Arguments are whole expressions: an `if` needs no brackets.
        out.extend(a.0);
    }
    out.push(")".to_owned());
    (out, ATOM)
}

fn paren(e: Ex) -> Ex {
    ([tok("("), e.0, tok(")")].concat(), ATOM)
}

impl Gen<'_, '_> {
    fn number(&mut self) -> String {
        self.tape.one(NUMBERS).to_owned()
    }

    fn quantity(&mut self, unit: &str) -> Ex {
        (vec![self.number(), format!("\u{1}{unit}")], ATOM)
    }

    /// A name if allowed here, else a literal of the same kind.
    fn name_or(&mut self, name: &'static str, kind: Kind) -> Ex {
        if self.allowed.contains(&name) {
            (tok(name), ATOM)
        } else {
            self.leaf(kind)
        }
    }

    fn leaf(&mut self, kind: Kind) -> Ex {
        match kind {
            Kind::Mass => {
                let u = self.tape.one(&["kg", "g", "t", "Tg", "Gt"]);
                self.quantity(u)
            }
            Kind::Rate => {
                let u = self.tape.one(&["kg/yr", "Gt/Myr", "t/yr", "kg/s"]);
                self.quantity(u)
            }
            Kind::Frac => {
                if self.tape.chance(50) {
                    (tok(&self.number()), ATOM)
                } else {
                    let u = self.tape.one(&["%", "ppm", "wt%"]);
                    self.quantity(u)
                }
            }
            Kind::Dur => {
                let u = self.tape.one(&["yr", "kyr", "Myr", "Gyr"]);
                self.quantity(u)
            }
            Kind::Age => {
                let u = self.tape.one(&["Ga", "Ma", "ka"]);
                self.quantity(u)
            }
            Kind::Temp => {
                if self.tape.chance(30) {
                    // A negative Celsius literal, one number.
                    let n = self.number();
                    ([tok("-"), tok(&n), tok("\u{1}degC")].concat(), NEG)
                } else {
                    let u = self.tape.one(&["K", "degC"]);
                    self.quantity(u)
                }
            }
            Kind::TempDiff => self.quantity("K"),
            Kind::Cond => {
                let a = self.leaf(Kind::Mass);
                let b = self.leaf(Kind::Mass);
                binary(a, ">", CMP, b)
            }
        }
    }

    /// An expression of `kind`; `constant` excludes everything that changes
    /// during a run.
    fn expr(&mut self, kind: Kind, depth: usize, constant: bool) -> Ex {
        if depth >= 3 {
            return if self.tape.chance(50) {
                self.leaf(kind)
            } else {
                match kind {
                    Kind::Mass => self.name_or("c_mass", kind),
                    Kind::Rate => self.name_or("p_rate", kind),
                    Kind::Frac => self.name_or("p_frac", kind),
                    Kind::Temp => self.name_or("T_ref", kind),
                    _ => self.leaf(kind),
                }
            };
        }
        let d = depth + 1;
        let choice = self.tape.pick(8);
        match kind {
            Kind::Mass => match choice {
                0 => self.leaf(kind),
                1 => {
                    let n = if constant {
                        "c_mass"
                    } else {
                        self.tape.one(&["ocean", "mantle", "c_mass"])
                    };
                    match n {
                        "ocean" | "mantle" => (tok(n), ATOM),
                        _ => self.name_or("c_mass", kind),
                    }
                }
                2 => paren(self.expr(kind, d, constant)),
                3 => {
                    let op = self.tape.one(&["+", "-"]);
                    let a = self.expr(kind, d, constant);
                    let b = self.expr(kind, d, constant);
                    binary(a, op, ADD, b)
                }
                4 => {
                    let a = self.expr(Kind::Frac, d, constant);
                    let b = self.expr(kind, d, constant);
                    binary(a, "*", MUL, b)
                }
                5 => {
                    let a = self.expr(Kind::Rate, d, constant);
                    let b = self.expr(Kind::Dur, d, constant);
                    binary(a, "*", MUL, b)
                }
                6 => {
                    let f = self.tape.one(&["min", "max"]);
                    let a = self.expr(kind, d, constant);
                    let b = self.expr(kind, d, constant);
                    call(f, vec![a, b])
                }
                _ => {
                    if constant {
                        self.leaf(kind)
                    } else if self.reservoir_functions && self.tape.chance(30) {
                        let f = self.tape.one(&["capacity", "excess"]);
                        call(f, vec![(tok("mantle"), ATOM)])
                    } else {
                        let c = self.expr(Kind::Cond, d, constant);
                        let a = self.expr(kind, d, constant);
                        let b = self.expr(kind, d, constant);
                        let mut t = tok("if");
                        t.extend(c.0);
                        t.push("then".into());
                        t.extend(a.0);
                        t.push("else".into());
                        t.extend(b.0);
                        (t, IF)
                    }
                }
            },
            Kind::Rate => match choice {
                0 => self.leaf(kind),
                1 => self.name_or("p_rate", kind),
                2 => {
                    let a = self.expr(Kind::Mass, d, constant);
                    let b = self.expr(Kind::Dur, d, constant);
                    binary(a, "/", MUL, b)
                }
                3 => {
                    let a = self.expr(kind, d, constant);
                    let b = self.expr(Kind::Frac, d, constant);
                    binary(a, "*", MUL, b)
                }
                4 => {
                    let a = self.expr(kind, d, constant);
                    let zero = (vec!["0".to_owned(), "\u{1}kg/yr".to_owned()], ATOM);
                    call("max", vec![a, zero])
                }
                5 => paren(self.expr(kind, d, constant)),
                6 if !constant => self.name_or("l_rate", kind),
                _ => {
                    let op = self.tape.one(&["+", "-"]);
                    let a = self.expr(kind, d, constant);
                    let b = self.expr(kind, d, constant);
                    binary(a, op, ADD, b)
                }
            },
            Kind::Frac => match choice {
                0 => self.leaf(kind),
                1 => self.name_or("p_frac", kind),
                2 => paren(self.expr(kind, d, constant)),
                3 => {
                    let a = self.expr(Kind::Mass, d, constant);
                    let b = self.expr(Kind::Mass, d, constant);
                    binary(a, "/", MUL, b)
                }
                4 => {
                    let a = self.expr(kind, d, constant);
                    ([tok("-"), operand(a, NEG)].concat(), NEG)
                }
                5 => match self.tape.pick(4) {
                    0 => {
                        let a = self.expr(kind, d, constant);
                        let lo = (tok("0"), ATOM);
                        let hi = (tok("1"), ATOM);
                        call("smoothstep", vec![a, lo, hi])
                    }
                    1 => {
                        let a = paren(self.expr(kind, d, constant));
                        ([a.0, tok("^"), tok("2")].concat(), 7)
                    }
                    2 => {
                        let a = self.expr(kind, d, constant);
                        let neg = ([tok("-"), operand(a, NEG)].concat(), NEG);
                        call("exp", vec![neg])
                    }
                    _ => {
                        let a = self.expr(Kind::Dur, d, constant);
                        let b = self.expr(Kind::Dur, d, constant);
                        binary(a, "/", MUL, b)
                    }
                },
                6 if !constant && self.reservoir_functions => {
                    call("fill", vec![(tok("mantle"), ATOM)])
                }
                6 if !constant => self.name_or("l_frac", kind),
                _ => {
                    let a = self.expr(kind, d, constant);
                    let lo = (tok("0"), ATOM);
                    let hi = (tok("1"), ATOM);
                    call("clamp", vec![a, lo, hi])
                }
            },
            Kind::Dur => match choice {
                0 | 5 => self.leaf(kind),
                1 => {
                    let a = self.expr(Kind::Age, d, constant);
                    let b = self.expr(Kind::Age, d, constant);
                    binary(a, "-", ADD, b)
                }
                2 if !constant => (tok("time"), ATOM),
                3 => {
                    let a = self.expr(kind, d, constant);
                    let b = self.expr(Kind::Frac, d, constant);
                    binary(a, "*", MUL, b)
                }
                4 => paren(self.expr(kind, d, constant)),
                _ => self.quantity("Myr"),
            },
            Kind::Age => match choice {
                0 | 3 => self.leaf(kind),
                1 if !constant => (tok("age"), ATOM),
                2 => {
                    let op = self.tape.one(&["+", "-"]);
                    let a = self.expr(kind, d, constant);
                    let b = self.expr(Kind::Dur, d, constant);
                    binary(a, op, ADD, b)
                }
                _ => self.quantity("Ga"),
            },
            Kind::Temp => match choice {
                0 | 1 => self.leaf(kind),
                2 => self.name_or("T_ref", kind),
                3 if !constant => (tok("T"), ATOM),
                4 => {
                    let op = self.tape.one(&["+", "-"]);
                    let a = self.expr(kind, d, constant);
                    let b = self.expr(Kind::TempDiff, d, constant);
                    binary(a, op, ADD, b)
                }
                _ => paren(self.expr(kind, d, constant)),
            },
            Kind::TempDiff => match choice {
                0..=2 => self.leaf(kind),
                3 => {
                    let a = self.expr(Kind::Temp, d, constant);
                    let b = self.expr(Kind::Temp, d, constant);
                    // Two Celsius literals subtract to a difference; two
                    // differences would too, so this stays a difference.
                    binary(a, "-", ADD, b)
                }
                _ => paren(self.expr(kind, d, constant)),
            },
            Kind::Cond => match choice {
                0 => {
                    let op = self.tape.one(&[">", "<", ">=", "<="]);
                    let a = self.expr(Kind::Mass, d, constant);
                    let b = self.expr(Kind::Mass, d, constant);
                    binary(a, op, CMP, b)
                }
                1 => {
                    let op = self.tape.one(&[">", "<", "==", "!="]);
                    let a = self.expr(Kind::Age, d, constant);
                    let b = self.expr(Kind::Age, d, constant);
                    binary(a, op, CMP, b)
                }
                2 => {
                    let (op, p) = if self.tape.chance(50) {
                        ("and", AND)
                    } else {
                        ("or", OR)
                    };
                    let a = self.expr(kind, d, constant);
                    let b = self.expr(kind, d, constant);
                    binary(a, op, p, b)
                }
                3 => {
                    let a = self.expr(kind, d, constant);
                    ([tok("not"), operand(a, NOT)].concat(), NOT)
                }
                4 => paren(self.expr(kind, d, constant)),
                5 => {
                    let a = self.expr(Kind::Temp, d, constant);
                    let b = self.expr(Kind::Temp, d, constant);
                    binary(a, ">=", CMP, b)
                }
                _ => {
                    let a = self.expr(Kind::Frac, d, constant);
                    let b = self.expr(Kind::Frac, d, constant);
                    binary(a, "<", CMP, b)
                }
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
    let mut g = Gen {
        tape: &mut tape,
        allowed: Vec::new(),
        reservoir_functions: true,
    };
    let mut items: Vec<Vec<String>> = Vec::new();
    // What each definition may refer to: constants only to those declared
    // before them in this list, so no definition refers to itself.
    const CONSTS: &[&str] = &["T_ref", "p_frac", "c_mass", "p_rate"];
    let with = |g: &mut Gen, k, constant, allowed: &[&'static str], reservoir_functions| {
        g.allowed = allowed.to_vec();
        g.reservoir_functions = reservoir_functions;
        g.expr(k, 0, constant).0
    };
    let c = |g: &mut Gen, k| with(g, k, true, CONSTS, true);
    let v = |g: &mut Gen, k| with(g, k, false, &[CONSTS, &["l_rate", "l_frac"]].concat(), true);
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
    items.push(
        [
            words("const T_ref ="),
            with(&mut g, Kind::Temp, true, &[], true),
        ]
        .concat(),
    );
    items.push(
        [
            words("param p_frac ="),
            with(&mut g, Kind::Frac, true, &CONSTS[..1], true),
        ]
        .concat(),
    );
    items.push(
        [
            words("const c_mass ="),
            with(&mut g, Kind::Mass, true, &CONSTS[..2], true),
        ]
        .concat(),
    );
    items.push(
        [
            words("param p_rate ="),
            with(&mut g, Kind::Rate, true, &CONSTS[..3], true),
        ]
        .concat(),
    );
    items.push([words("reservoir ocean ="), c(&mut g, Kind::Mass)].concat());
    items.push(
        [
            words("reservoir mantle ="),
            c(&mut g, Kind::Mass),
            words(", capacity ="),
            with(
                &mut g,
                Kind::Mass,
                false,
                &[CONSTS, &["l_rate", "l_frac"]].concat(),
                false,
            ),
        ]
        .concat(),
    );
    items.push(
        [
            words("state T ="),
            c(&mut g, Kind::Temp),
            words(", rate = ( T_ref - T ) / ("),
            c(&mut g, Kind::Dur),
            words(")"),
        ]
        .concat(),
    );
    let l_rate = with(
        &mut g,
        Kind::Rate,
        false,
        &[CONSTS, &["l_frac"]].concat(),
        true,
    );
    items.push([words("let l_rate ="), l_rate].concat());
    let l_frac = with(&mut g, Kind::Frac, false, CONSTS, true);
    items.push([words("let l_frac ="), l_frac].concat());
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
        cases: 160,
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
    let total = 100;
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
    // An ensemble block, loosely written.
    "scenario s\nspan 1 Ga to 0 Ga\nreport every 100 Myr\nparam q0 = 20 TW\nparam k = 0.5\nstage a from 1 Ga to 0 Ga\nensemble {   # study\n\n  members=64 # n\n   seed = 7\n  vary q0 ~ uniform(15 TW,35 TW)\n  vary k ~ normal( 0.5 , 0.1 ), min = 0.1,max=0.9\n\n}\n",
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
    assert!(runs >= 15);
    // The tree comparison sees through layout, and only through layout.
    let tree = |t: &str| strip(&syntax::parse(t, 0).unwrap());
    assert_eq!(
        tree("const a = 1 kg # c\n"),
        tree("\n\n  const  a=1kg   # c")
    );
    assert_ne!(tree("const a = 1 kg\n"), tree("const a = 2 kg\n"));
    assert_ne!(tree("const a = 1 kg\n"), tree("const a = (1 kg)\n"));
    assert_ne!(tree("const a = 1 kg # c\n"), tree("const a = 1 kg # d\n"));
    assert_ne!(tree("# line: 3\n"), tree("# line: 4\n"));
    assert!(!tree("const a = 1 kg\n").contains("start:"));
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
