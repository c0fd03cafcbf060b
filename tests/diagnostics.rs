//! Golden tests for the diagnostics of the parser and the checker.
//!
//! Every `tests/diagnostics/*.hadal` file is one case. Its name starts with
//! the code it is about (`H0301_add_mass_rate.hadal`), and the file beside it
//! with the same stem and `.txt` holds every problem the checker reports for
//! it, in order: code, location of the primary span, primary message, the
//! exact source text under every label, and the help line. Files in
//! subfolders (`data/`, `lib/`, `cycle/`, `deep/`) are the tables and includes
//! the cases read; they are not cases themselves.
//!
//! A case may start with directive comments that the harness reads:
//!
//!     # set: NAME=VALUE      a `--set` override for this case
//!
//! To regenerate the golden files after an intended change of wording, run
//!
//!     HADAL_BLESS=1 cargo test --test diagnostics
//!
//! and read every changed `.txt` in `git diff` before committing: a golden
//! file is a statement that its message, span and hint are right.
//!
//! The tests here also show that every code the parser and checker can emit
//! has a case and an entry in docs/errors.md, that independent errors are
//! reported in one pass, that syntax errors never leak grammar rule names,
//! and that no input, however mangled, panics.

use std::collections::BTreeSet;
use std::path::{Path, PathBuf};

use hadal::check::{check_text, CheckError, CheckOptions};
use hadal::diagnostic::Problem;
use hadal::span::Sources;
use proptest::prelude::*;

fn cases_dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/diagnostics")
}

fn case_files() -> Vec<PathBuf> {
    let mut out: Vec<PathBuf> = std::fs::read_dir(cases_dir())
        .expect("tests/diagnostics exists")
        .map(|e| e.expect("readable entry").path())
        .filter(|p| p.is_file() && p.extension().is_some_and(|e| e == "hadal"))
        .collect();
    out.sort();
    out
}

/// Overrides given by `# set: NAME=VALUE` lines at the top of a case.
fn directives(text: &str) -> CheckOptions {
    let mut options = CheckOptions::default();
    for line in text.lines().take_while(|l| l.starts_with('#')) {
        if let Some(rest) = line.strip_prefix("# set:") {
            let (name, value) = rest.trim().split_once('=').expect("NAME=VALUE");
            options
                .overrides
                .push((name.trim().to_owned(), value.trim().to_owned()));
        }
    }
    options
}

/// Check a case file the way `hadal check` does, with the file's own name
/// as its display name so locations do not depend on the machine.
fn check_case(path: &Path) -> Result<hadal::check::Checked, CheckError> {
    let text = std::fs::read_to_string(path).expect("case readable");
    let name = path.file_name().unwrap().to_string_lossy().into_owned();
    check_text(&name, path, &text, &cases_dir(), &directives(&text))
}

fn location(sources: &Sources, span: hadal::span::Span) -> String {
    let (line, col) = sources.line_col(span);
    format!("{}:{line}:{col}", sources.get(span.file).name)
}

/// The golden text of a list of problems.
fn render(sources: &Sources, problems: &[Problem]) -> String {
    let mut out = String::new();
    for (i, p) in problems.iter().enumerate() {
        if i > 0 {
            out.push('\n');
        }
        let severity = if p.warning { "warning" } else { "error" };
        let at = p
            .primary()
            .map_or_else(|| "(no location)".to_owned(), |s| location(sources, s));
        out.push_str(&format!("{} {severity} at {at}\n", p.code));
        out.push_str(&format!("message: {}\n", p.message));
        for label in &p.labels {
            out.push_str(&format!(
                "label: {} {:?} {}\n",
                location(sources, label.span),
                sources.slice(label.span),
                label.text
            ));
        }
        if let Some(h) = &p.help {
            for (k, line) in h.lines().enumerate() {
                let key = if k == 0 { "help" } else { "  more" };
                out.push_str(&format!("{key}: {line}\n"));
            }
        }
    }
    out
}

fn problems_of(path: &Path) -> (Sources, Vec<Problem>) {
    match check_case(path) {
        Ok(checked) => (checked.model.sources.clone(), checked.warnings),
        Err(CheckError::Invalid { sources, problems }) => (sources, problems),
        Err(CheckError::Io { path, message }) => {
            panic!("case {} could not be read: {message}", path.display())
        }
    }
}

#[test]
fn golden_diagnostics() {
    let bless = std::env::var_os("HADAL_BLESS").is_some_and(|v| v == "1");
    let cases = case_files();
    assert!(cases.len() >= 60, "only {} cases found", cases.len());
    let mut failures = Vec::new();
    for case in &cases {
        let (sources, problems) = problems_of(case);
        let stem = case.file_stem().unwrap().to_string_lossy().into_owned();
        let code = stem.split('_').next().unwrap();
        assert!(
            !problems.is_empty(),
            "{stem}: expected a problem, but the file checks clean"
        );
        assert_eq!(
            problems[0].code, code,
            "{stem}: the first problem is {} ({}), not the code in the file name",
            problems[0].code, problems[0].message
        );
        for p in &problems {
            let span = p.primary().unwrap_or_else(|| {
                panic!("{stem}: {} `{}` has no primary label", p.code, p.message)
            });
            assert!(
                (span.end as usize) <= sources.get(span.file).text.len() && span.start <= span.end,
                "{stem}: {} has a span outside its file",
                p.code
            );
            assert!(
                p.help.is_some() || p.labels.len() > 1 || !p.labels[0].text.is_empty(),
                "{stem}: {} says nothing beyond its message",
                p.code
            );
        }
        // The project root appears in some hints; keep golden files free of
        // the machine's paths.
        let root = std::fs::canonicalize(cases_dir()).unwrap();
        let got = render(&sources, &problems).replace(&*root.to_string_lossy(), "<cases>");
        let golden = case.with_extension("txt");
        if bless {
            std::fs::write(&golden, &got).expect("write golden file");
            continue;
        }
        let want = std::fs::read_to_string(&golden).unwrap_or_else(|_| {
            panic!("{stem}: no golden file; run with HADAL_BLESS=1 and review it")
        });
        if got != want {
            failures.push(format!("--- {stem}\nexpected:\n{want}\nfound:\n{got}"));
        }
    }
    assert!(failures.is_empty(), "{}", failures.join("\n"));
}

/// Every `"H0..."` code literal in the parser's and checker's source.
fn codes_in_source() -> BTreeSet<String> {
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("src");
    let mut files = Vec::new();
    for dir in ["syntax", "check", "units"] {
        for e in std::fs::read_dir(root.join(dir)).unwrap() {
            files.push(e.unwrap().path());
        }
    }
    files.push(root.join("diagnostic.rs"));
    let mut codes = BTreeSet::new();
    for f in files
        .iter()
        .filter(|f| f.extension().is_some_and(|e| e == "rs"))
    {
        let text = std::fs::read_to_string(f).unwrap();
        let bytes = text.as_bytes();
        for (i, _) in text.match_indices("\"H") {
            let code = &bytes[i + 1..(i + 6).min(bytes.len())];
            let closed = bytes.get(i + 6) == Some(&b'"');
            if closed && code[1..].iter().all(u8::is_ascii_digit) {
                codes.insert(String::from_utf8(code.to_vec()).unwrap());
            }
        }
    }
    codes
}

#[test]
fn every_code_has_a_case_and_documentation() {
    let codes = codes_in_source();
    // The families of issue 2, as a floor: the scan above must find them.
    for want in [
        "H0101", "H0102", "H0201", "H0209", "H0301", "H0307", "H0401", "H0412", "H0501", "H0506",
    ] {
        assert!(codes.contains(want), "{want} not found in the source scan");
    }
    let covered: BTreeSet<String> = case_files()
        .iter()
        .map(|p| p.file_stem().unwrap().to_string_lossy()[..5].to_owned())
        .collect();
    let missing: Vec<&String> = codes.difference(&covered).collect();
    assert!(
        missing.is_empty(),
        "codes without a golden case: {missing:?}"
    );
    let docs =
        std::fs::read_to_string(Path::new(env!("CARGO_MANIFEST_DIR")).join("docs/errors.md"))
            .expect("docs/errors.md exists");
    let undocumented: Vec<&String> = codes
        .iter()
        .filter(|c| !docs.contains(&format!("### {c}")))
        .collect();
    assert!(
        undocumented.is_empty(),
        "codes without a section in docs/errors.md: {undocumented:?}"
    );
}

fn check_str(text: &str) -> Result<hadal::check::Checked, CheckError> {
    check_text(
        "mem.hadal",
        Path::new("mem.hadal"),
        text,
        Path::new("."),
        &CheckOptions::default(),
    )
}

fn problems_str(text: &str) -> Vec<Problem> {
    match check_str(text) {
        Ok(_) => Vec::new(),
        Err(CheckError::Invalid { problems, .. }) => problems,
        Err(CheckError::Io { message, .. }) => panic!("unexpected I/O error: {message}"),
    }
}

#[test]
fn independent_errors_are_all_reported_in_one_pass() {
    // Four independent mistakes on four lines: a unit mismatch, an unknown
    // name, a flux rate that is a mass, and a flux to an undeclared
    // reservoir. Each must be reported, each at its own place.
    let text = "\
reservoir ocean = 1.4e21 kg
const a = 3 kg + 2 kg/yr
let b = ocaen / 1 Myr
flux f: ocean -> outside = 3 kg
flux g: ocean -> mantel = 1 kg/yr
const c = 2 Gyrs
";
    let problems = problems_str(text);
    let got: Vec<(&str, usize)> = problems
        .iter()
        .map(|p| {
            let start = p.primary().unwrap().start as usize;
            (p.code, text[..start].matches('\n').count() + 1)
        })
        .collect();
    assert_eq!(
        got,
        vec![
            ("H0301", 2),
            ("H0201", 3),
            ("H0302", 4),
            ("H0203", 6),
            ("H0405", 5),
        ],
        "{problems:#?}"
    );
    assert_eq!(problems[1].help.as_deref(), Some("did you mean `ocean`?"));
    assert_eq!(problems[3].help.as_deref(), Some("did you mean `Gyr`?"));
    assert_eq!(
        problems[4].help.as_deref(),
        Some("declare it with `reservoir NAME = INITIAL`, or use `outside`")
    );
}

#[test]
fn independent_syntax_errors_are_all_reported_in_one_pass() {
    let text = "\
param a 3
param b = 2 kg
flux f ocean -> outside = 1 kg/yr
let c = (a + 1
table t = \"x.csv\" (m)
";
    let problems = problems_str(text);
    let got: Vec<(&str, String, usize)> = problems
        .iter()
        .map(|p| {
            let start = p.primary().unwrap().start as usize;
            (
                p.code,
                p.message.clone(),
                text[..start].matches('\n').count() + 1,
            )
        })
        .collect();
    assert_eq!(
        got,
        vec![
            ("H0101", "expected `=`, found `3`".to_owned(), 1),
            ("H0101", "expected `:`, found `ocean`".to_owned(), 3),
            (
                "H0101",
                "expected `)`, a unit or an operator, found end of line".to_owned(),
                4
            ),
            ("H0101", "expected `,`, found `)`".to_owned(), 5),
        ]
    );
}

/// Grammar rule names that must never reach a user: every rule with an
/// underscore in its name, and the few one-word internal ones.
fn rule_names() -> Vec<String> {
    let grammar =
        std::fs::read_to_string(Path::new(env!("CARGO_MANIFEST_DIR")).join("grammar/hadal.pest"))
            .unwrap();
    let mut names: Vec<String> = grammar
        .lines()
        .filter_map(|l| {
            let (head, _) = l.split_once('=')?;
            let head = head.trim();
            let ok = !head.is_empty()
                && !l.trim_start().starts_with("//")
                && head.chars().all(|c| c.is_ascii_alphanumeric() || c == '_');
            ok.then(|| head.to_owned())
        })
        .filter(|n| n.contains('_'))
        .collect();
    names.extend(
        [
            "expr",
            "EOI",
            "SOI",
            "NEWLINE",
            "WHITESPACE",
            "ANY",
            "ASCII_DIGIT",
        ]
        .map(String::from),
    );
    assert!(names.iter().any(|n| n == "kw_param"), "rule scan failed");
    assert!(names.iter().any(|n| n == "flux_stmt"), "rule scan failed");
    names
}

fn assert_plain_words(p: &Problem, input: &str, rules: &[String]) {
    let words = |s: &str| -> Vec<String> {
        s.split(|c: char| !(c.is_ascii_alphanumeric() || c == '_'))
            .filter(|w| !w.is_empty())
            .map(str::to_owned)
            .collect()
    };
    let mut text = p.message.clone();
    if let Some(h) = &p.help {
        text.push(' ');
        text.push_str(h);
    }
    for l in &p.labels {
        text.push(' ');
        text.push_str(&l.text);
    }
    for w in words(&text) {
        assert!(
            !rules.contains(&w),
            "grammar rule `{w}` leaked into {:?} for input {input:?}",
            text
        );
    }
}

/// Broken lines of every statement kind.
const BROKEN_LINES: &[&str] = &[
    "param x 3",
    "param x =",
    "param = 3",
    "param 3x = 4",
    "const x == 3",
    "let y = (3 kg",
    "let y = 3 kg)",
    "let y = 3 +",
    "let y = 3 kg kg",
    "let y = max(1, 2",
    "let y = if a then b",
    "let y = if a b else c",
    "let y = 3 +- 2",
    "let y = 3 @ 4",
    "let y = \"text\"",
    "let y = 3 kg/",
    "let y = 3 kg^",
    "x = 3",
    "scenario \"x\"",
    "scenario x \"unclosed",
    "span 4 Ga 0 Ga",
    "span 4 Ga to",
    "report 10 Myr",
    "report every",
    "solver rtol 1e-8",
    "include x.hadal",
    "include",
    "table t = \"x.csv\" (m)",
    "table t \"x.csv\" (m, m)",
    "table t = \"x.csv\" m, m",
    "reservoir r = 3 kg, capacity 4",
    "reservoir r = 3 kg capacity = 4",
    "reservoir r",
    "state s = 1 K, rate",
    "output o = 3 kg in",
    "output o = 3 kg as g",
    "flux f ocean -> b = 3 kg/yr",
    "flux f: a b = 3",
    "flux f: a -> = 3",
    "flux: a -> b = 3",
    "event e",
    "expect x at 0 Ga 3",
    "expect x at 0 Ga = 3",
    "expect x at = 3 +- 1",
    "expect x in 1 to",
    "expect e before",
    "stage a from 4 Ga to 0 Ga {",
    "stage a from 4 Ga 0 Ga",
    "stage a 4 Ga to 0 Ga",
    "stage a from 4 Ga to 0 Ga {\n  set x 3\n}",
    "stage a from 4 Ga to 0 Ga {\n  param x = 3\n}",
    "stage a from 4 Ga to 0 Ga {\n}\n}",
    "set x = 3",
    "}",
    "{",
    "# fine\n  ,",
    "let y = not",
    "let y = -",
    "let y = 1 ^ ^ 2",
    "let y = f(,)",
    "let y = f(1,)",
    "let ü = 3",
    "let y = 3 ± 2",
    "let y = .5.5",
];

#[test]
fn syntax_errors_speak_plain_words() {
    let rules = rule_names();
    for input in BROKEN_LINES {
        let problems = problems_str(&format!("{input}\n"));
        assert!(!problems.is_empty(), "{input:?} should not check clean");
        let syntax: Vec<&Problem> = problems.iter().filter(|p| p.code == "H0101").collect();
        assert!(
            !syntax.is_empty(),
            "{input:?} gave no syntax error: {problems:#?}"
        );
        for p in &problems {
            assert_plain_words(p, input, &rules);
            assert!(
                p.message.starts_with("expected ")
                    || p.message.starts_with("unexpected ")
                    || p.code != "H0101",
                "{input:?}: odd syntax message {:?}",
                p.message
            );
        }
    }
}

/// Tokens to build random inputs from: fragments of every statement, good
/// and bad, with the odd stray character.
const TOKENS: &[&str] = &[
    "scenario",
    "span",
    "report",
    "every",
    "solver",
    "include",
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
    "from",
    "to",
    "at",
    "in",
    "set",
    "if",
    "then",
    "else",
    "and",
    "or",
    "not",
    "before",
    "after",
    "ocean",
    "mantle",
    "T",
    "x",
    "age",
    "time",
    "outside",
    "capacity",
    "rate",
    "exp",
    "min",
    "decay",
    "fill",
    "sea_level",
    "=",
    "==",
    ":",
    "->",
    ",",
    "(",
    ")",
    "{",
    "}",
    "+",
    "-",
    "*",
    "/",
    "^",
    "<",
    ">=",
    "+-",
    "#",
    "## doc",
    "\"f.csv\"",
    "\"",
    "1",
    "0",
    "4.5",
    "1e21",
    "1e999",
    ".5",
    "kg",
    "Ga",
    "Gyr",
    "K",
    "degC",
    "kg/yr",
    "m^2",
    "1/K",
    "wt%",
    "%",
    "W.m^-2",
    "\n",
    "\n",
    "\n",
    " ",
    " ",
    "\t",
    "\r\n",
    "é",
    "\u{feff}",
    "@",
    ";",
    "\\",
];

fn token_soup() -> impl Strategy<Value = String> {
    prop::collection::vec((0..TOKENS.len(), prop::bool::ANY), 0..40).prop_map(|toks| {
        let mut s = String::new();
        for (i, space) in toks {
            s.push_str(TOKENS[i]);
            if space {
                s.push(' ');
            }
        }
        s
    })
}

fn assert_sane(text: &str, rules: &[String]) {
    match check_str(text) {
        Ok(_) => {}
        Err(CheckError::Io { message, .. }) => panic!("I/O error on in-memory text: {message}"),
        Err(CheckError::Invalid { sources, problems }) => {
            assert!(!problems.is_empty(), "invalid but no problems for {text:?}");
            for p in &problems {
                assert!(p.code.starts_with('H') && p.code.len() == 5);
                let span = p.primary().expect("every problem has a primary label");
                let file = sources.get(span.file);
                assert!(span.start <= span.end && span.end as usize <= file.text.len());
                assert!(file.text.is_char_boundary(span.start as usize));
                assert!(file.text.is_char_boundary(span.end as usize));
                // Locations and rendering work for every problem.
                let _ = p.location(&sources);
                let _ = p.render(&sources);
                if p.code == "H0101" {
                    assert_plain_words(p, text, rules);
                }
            }
        }
    }
}

proptest! {
    #![proptest_config(ProptestConfig {
        cases: 300,
        failure_persistence: None,
        ..ProptestConfig::default()
    })]

    /// No input panics; every problem points inside its file; syntax
    /// messages stay free of grammar rule names.
    #[test]
    fn random_inputs_never_panic(text in token_soup()) {
        let rules = rule_names();
        assert_sane(&text, &rules);
    }

    /// Arbitrary characters, too.
    #[test]
    fn arbitrary_text_never_panics(text in "\\PC{0,80}") {
        let rules = rule_names();
        assert_sane(&text, &rules);
    }
}

/// Every prefix of every case and demo scenario, cut at every line and at
/// a few points inside lines, checks without panicking.
#[test]
fn truncated_files_never_panic() {
    let rules = rule_names();
    let mut files = case_files();
    let scenarios = Path::new(env!("CARGO_MANIFEST_DIR")).join("scenarios");
    if let Ok(rd) = std::fs::read_dir(&scenarios) {
        for e in rd.flatten() {
            if e.path().extension().is_some_and(|x| x == "hadal") {
                files.push(e.path());
            }
        }
    }
    let mut runs = 0;
    for f in &files {
        let text = std::fs::read_to_string(f).unwrap();
        // Line ends (at most 40 per file) and a dozen points inside lines.
        let ends: Vec<usize> = text.match_indices('\n').map(|(i, _)| i).collect();
        let mut cuts: Vec<usize> = ends.iter().step_by(ends.len() / 40 + 1).copied().collect();
        cuts.extend((0..text.len()).step_by(text.len() / 12 + 1));
        for cut in cuts {
            if !text.is_char_boundary(cut) {
                continue;
            }
            assert_sane(&text[..cut], &rules);
            runs += 1;
        }
    }
    assert!(runs > 1000, "only {runs} truncations ran");
}

#[test]
fn deep_nesting_is_a_diagnostic_not_a_crash() {
    let deep = format!("let x = {}1{}\n", "(".repeat(100_000), ")".repeat(100_000));
    let problems = problems_str(&deep);
    assert_eq!(problems.len(), 1);
    assert_eq!(problems[0].code, "H0102");
    assert_eq!(problems[0].message, "expression nested more than 64 deep");
    // Long chains of operators are deep trees too: each of these once
    // overflowed the stack.
    for (text, count) in [
        (format!("let x = 1{}\n", " + 1".repeat(20_000)), 20_000),
        (format!("let x = {}1\n", "-".repeat(5_000)), 5_000),
        (format!("let x = 2{}\n", "^1".repeat(5_000)), 5_000),
        (format!("event x = {}1 > 0\n", "not ".repeat(5_000)), 5_001),
    ] {
        let problems = problems_str(&text);
        assert_eq!(problems.len(), 1, "{problems:#?}");
        assert_eq!(problems[0].code, "H0102");
        assert_eq!(
            problems[0].message,
            format!("this statement has {count} operators; at most 128 are allowed")
        );
        assert_eq!(
            problems[0].help.as_deref(),
            Some("split the expression into `let` definitions")
        );
    }
}

/// The largest expressions the parser accepts go through every phase on an
/// ordinary test thread's stack.
#[test]
fn largest_accepted_expressions_check_and_format() {
    let max = hadal::syntax::MAX_OPERATORS;
    let nest = hadal::syntax::MAX_NESTING;
    let inputs = [
        format!("let x = 1{}\n", " + 1".repeat(max)),
        format!("let x = {}1\n", "-".repeat(max)),
        format!("let x = 2{}\n", "^1".repeat(max)),
        format!("let x = {}1{}\n", "-(".repeat(nest), ")".repeat(nest)),
        format!(
            "let x = {}1{}{}\n",
            "(".repeat(nest),
            " * 1".repeat(max),
            ")".repeat(nest)
        ),
    ];
    for text in &inputs {
        let checked = check_str(text).unwrap_or_else(|e| panic!("{e:?}"));
        let x = checked.model.find("x").unwrap();
        let v = hadal::check::eval_const(&checked.model, &checked.model.defs[x].expr);
        assert!(v.is_some_and(f64::is_finite), "{v:?}");
        let _ = checked.model.canonical_def(x);
        let tree = hadal::syntax::parse(text, 0).unwrap();
        let once = hadal::syntax::format_file(&tree);
        assert_eq!(
            hadal::syntax::format_file(&hadal::syntax::parse(&once, 0).unwrap()),
            once
        );
        let g = hadal::graph::DepGraph::build(&checked.model);
        let _ = g.to_dot(&checked.model);
    }
    let too_many = format!("let x = 1{}\n", " + 1".repeat(max + 1));
    assert_eq!(problems_str(&too_many)[0].code, "H0102");
}
