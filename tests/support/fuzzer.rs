//! Grammar-aware fuzzing of every input surface of hadal: the parser, the
//! checker (with includes and CSV tables on disk), the canonical formatter,
//! the rendering of diagnostics, and the solver on inputs that check.
//!
//! Shared by `examples/fuzz.rs` (long campaigns) and `tests/fuzz_smoke.rs`
//! (a few thousand inputs in every `cargo test`) through `#[path]`.
//!
//! Everything is deterministic: case `i` of seed `s` is generated from its
//! own splitmix64 stream, so any failure is replayed with
//! `--seed s --start i --count 1`. Each case runs on its own thread, named
//! `fuzz case I`, so even a stack overflow (which aborts the process and
//! cannot be caught) names the case that caused it.
//!
//! What a case checks (any violation is a failure):
//! - no panic anywhere (parse, check, format, render, solve);
//! - no case takes longer than the hang limit;
//! - every diagnostic's spans lie inside their file, on character
//!   boundaries, and render through miette;
//! - a file that parses formats to text that parses, and formatting that
//!   text again changes nothing (idempotence);
//! - a scenario that checks still checks after formatting, to the same
//!   canonical model hash;
//! - a scenario that checks and solves writes no NaN or infinity in any CSV;
//! - its stage programs give the same bits as native code as interpreted,
//!   at the states the solve reported (ensembles run native code).

#![allow(dead_code)]

use std::cell::RefCell;
use std::path::{Path, PathBuf};
use std::sync::{mpsc, Arc};
use std::time::{Duration, Instant};

use hadal::check::{check_file, check_text, CheckError, CheckOptions};
use hadal::diagnostic::Problem;
use hadal::span::Sources;

// ---- a small deterministic random number generator ---------------------------

/// splitmix64: tiny, fast, and good enough to drive mutations.
#[derive(Debug, Clone)]
pub struct Rng {
    state: u64,
}

impl Rng {
    pub fn new(seed: u64) -> Rng {
        Rng { state: seed }
    }

    /// The stream of case `index` of campaign `seed`.
    pub fn for_case(seed: u64, index: u64) -> Rng {
        let mut r = Rng::new(seed ^ 0x5DEE_CE66_D1CE_4E5B);
        r.state ^= index.wrapping_mul(0xD1B5_4A32_D192_ED03);
        r.next_u64();
        r
    }

    pub fn next_u64(&mut self) -> u64 {
        self.state = self.state.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.state;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }

    /// Uniform in `0..n` (0 when `n` is 0).
    pub fn below(&mut self, n: usize) -> usize {
        if n == 0 {
            0
        } else {
            (self.next_u64() % n as u64) as usize
        }
    }

    /// Uniform in `lo..hi`.
    pub fn range(&mut self, lo: usize, hi: usize) -> usize {
        lo + self.below(hi.saturating_sub(lo))
    }

    pub fn one_in(&mut self, n: usize) -> bool {
        self.below(n) == 0
    }

    pub fn pick<'a, T>(&mut self, items: &'a [T]) -> &'a T {
        &items[self.below(items.len())]
    }

    /// A size with a long tail: mostly small, sometimes near `max`.
    pub fn size(&mut self, max: usize) -> usize {
        match self.below(4) {
            0 => self.below(max.min(4) + 1),
            1 => self.below(max.min(16) + 1),
            2 => self.below(max.min(128) + 1),
            _ => self.below(max + 1),
        }
    }
}

// ---- the seed corpus ----------------------------------------------------------

/// Files the mutations start from.
#[derive(Debug, Clone, Default)]
pub struct Corpus {
    /// Scenario files: the demos and the diagnostics cases.
    pub scenarios: Vec<String>,
    /// Library files (definitions only).
    pub libraries: Vec<String>,
    /// CSV tables.
    pub tables: Vec<String>,
    /// Names seen in the corpus, for token insertion and overrides.
    pub names: Vec<String>,
}

fn manifest_dir() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

fn files_with(dir: &Path, ext: &str) -> Vec<PathBuf> {
    let mut out: Vec<PathBuf> = std::fs::read_dir(dir)
        .map(|rd| {
            rd.flatten()
                .map(|e| e.path())
                .filter(|p| p.is_file() && p.extension().is_some_and(|e| e == ext))
                .collect()
        })
        .unwrap_or_default();
    out.sort();
    out
}

impl Corpus {
    /// The demo scenarios and their shared files, and the diagnostics cases.
    pub fn load() -> Corpus {
        let root = manifest_dir();
        let mut c = Corpus::default();
        let read = |p: &Path| std::fs::read_to_string(p).unwrap_or_default();
        for p in files_with(&root.join("scenarios"), "hadal") {
            c.scenarios.push(read(&p));
        }
        let diag = root.join("tests/diagnostics");
        for p in files_with(&diag, "hadal") {
            c.scenarios.push(read(&p));
        }
        for sub in [
            "scenarios/shared",
            "tests/diagnostics/lib",
            "tests/diagnostics/cycle",
        ] {
            for p in files_with(&root.join(sub), "hadal") {
                c.libraries.push(read(&p));
            }
        }
        for sub in ["scenarios/shared", "tests/diagnostics/data"] {
            for p in files_with(&root.join(sub), "csv") {
                c.tables.push(read(&p));
            }
        }
        assert!(
            c.scenarios.len() >= 2 && !c.libraries.is_empty() && !c.tables.is_empty(),
            "the fuzz corpus (scenarios/, tests/diagnostics/) is missing"
        );
        let mut names: Vec<String> = Vec::new();
        for text in c.scenarios.iter().chain(&c.libraries) {
            for line in text.lines() {
                let mut words = line.split_whitespace();
                if let (Some(kw), Some(name)) = (words.next(), words.next()) {
                    if DEF_KEYWORDS.contains(&kw) {
                        let name = name.trim_end_matches(':');
                        if name.chars().all(|c| c.is_ascii_alphanumeric() || c == '_') {
                            names.push(name.to_owned());
                        }
                    }
                }
            }
        }
        names.sort();
        names.dedup();
        c.names = names;
        c
    }
}

const DEF_KEYWORDS: &[&str] = &[
    "const",
    "param",
    "let",
    "reservoir",
    "state",
    "output",
    "flux",
    "event",
    "table",
];

// ---- the workspace on disk ----------------------------------------------------

/// A project directory for one worker: a `.git` (so it is its own project
/// root), copies of the demo's shared files and of the diagnostics cases'
/// data, a file outside the project and a symlink that points at it.
pub struct Workspace {
    _dir: tempfile::TempDir,
    /// The project root; the scenario of a case is `root/s.hadal`.
    pub root: PathBuf,
}

fn copy_dir(from: &Path, to: &Path) {
    let _ = std::fs::create_dir_all(to);
    if let Ok(rd) = std::fs::read_dir(from) {
        for e in rd.flatten() {
            let p = e.path();
            if p.is_file() {
                let _ = std::fs::copy(&p, to.join(e.file_name()));
            }
        }
    }
}

/// The files every case can read: a `.git` (so `root` is the project
/// root), the demo's shared files and the diagnostics cases' data.
pub fn populate(root: &Path) {
    std::fs::create_dir_all(root.join(".git")).expect("workspace");
    let src = manifest_dir();
    copy_dir(&src.join("scenarios/shared"), &root.join("shared"));
    for sub in ["data", "lib", "cycle", "deep"] {
        copy_dir(&src.join("tests/diagnostics").join(sub), &root.join(sub));
    }
}

impl Workspace {
    pub fn new() -> Workspace {
        // A RAM disk when there is one: a case writes up to three files.
        let shm = Path::new("/dev/shm");
        let builder = {
            let mut b = tempfile::Builder::new();
            b.prefix("hadal-fuzz-");
            b
        };
        let dir = if shm.is_dir() {
            builder.tempdir_in(shm).or_else(|_| builder.tempdir())
        } else {
            builder.tempdir()
        }
        .expect("a temporary directory");
        let root = dir.path().join("project");
        populate(&root);
        let outside = dir.path().join("outside");
        let _ = std::fs::create_dir_all(&outside);
        let _ = std::fs::write(outside.join("secret.csv"), "x,y\n0,1\n1,2\n");
        let _ = std::fs::write(outside.join("secret.hadal"), "const secret = 1 kg\n");
        #[cfg(unix)]
        {
            let _ = std::os::unix::fs::symlink(outside.join("secret.csv"), root.join("link.csv"));
            let _ = std::os::unix::fs::symlink(&outside, root.join("linkdir"));
        }
        let root = std::fs::canonicalize(&root).unwrap_or(root);
        Workspace { _dir: dir, root }
    }

    pub fn scenario_path(&self) -> PathBuf {
        self.root.join("s.hadal")
    }
}

impl Default for Workspace {
    fn default() -> Self {
        Workspace::new()
    }
}

// ---- cases ----------------------------------------------------------------------

/// One fuzz input: the scenario's bytes, and the include and table files it
/// may read (`inc.hadal`, `t.csv` in the project root).
#[derive(Debug, Clone)]
pub struct Case {
    pub index: u64,
    pub scenario: Vec<u8>,
    pub include: Vec<u8>,
    pub table: Vec<u8>,
    /// Check through `check_file` (the bytes as read from disk, with the
    /// size limit, UTF-8 check and byte-order mark handling) rather than
    /// `check_text`.
    pub from_disk: bool,
    pub overrides: Vec<(String, String)>,
}

impl Case {
    /// Save the case's files into `dir` (created).
    /// The directory is a project of its own (`hadal check DIR/s.hadal`
    /// reads the same files as the case did).
    pub fn save(&self, dir: &Path) -> std::io::Result<()> {
        std::fs::create_dir_all(dir)?;
        populate(dir);
        std::fs::write(dir.join("s.hadal"), &self.scenario)?;
        std::fs::write(dir.join("inc.hadal"), &self.include)?;
        std::fs::write(dir.join("t.csv"), &self.table)?;
        let sets: Vec<String> = self
            .overrides
            .iter()
            .map(|(n, v)| format!("--set {n}={v}\n"))
            .collect();
        std::fs::write(dir.join("overrides.txt"), sets.concat())?;
        Ok(())
    }
}

const KEYWORDS: &[&str] = &[
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
];

const PUNCT: &[&str] = &[
    "=", ":", "->", ",", "(", ")", "{", "}", "+-", "±", "+", "-", "*", "/", "^", "<", ">", "<=",
    ">=", "==", "!=", "#", "##", "\"", "\\", ".", "%", "\t", " ", "\n", "\r\n", "\r",
];

const UNITS: &[&str] = &[
    "kg", "g", "t", "Mt", "Gt", "Tg", "Pg", "m", "cm", "mm", "km", "s", "d", "yr", "kyr", "Myr",
    "Gyr", "ka", "Ma", "Ga", "K", "degC", "J", "kJ", "MJ", "GJ", "EJ", "ZJ", "W", "mW", "kW", "MW",
    "GW", "TW", "Pa", "MPa", "GPa", "%", "wt%", "ppm", "ppb", "1", "furlong", "Kg", "m2",
];

const NUMBERS: &[&str] = &[
    "0",
    "1",
    "-1",
    "0.5",
    ".5",
    "1e9",
    "4.5",
    "1e21",
    "1e308",
    "1.7976931348623157e308",
    "2e308",
    "1e400",
    "1e-400",
    "4.9e-324",
    "1e999999999999999999999",
    "1e-999999999999999999",
    "00000000000000000000000000000000001",
    "123456789012345678901234567890123456789012345678901234567890",
    "0.000000000000000000000000000000000000000000000000000000000001",
    "1e",
    "1e+",
    "1.",
    "1..2",
    "0x10",
    "1_000",
    "NaN",
    "inf",
    "-0",
    "1e-9",
    "2147483648",
    "18446744073709551616",
];

const UNICODE: &[&str] = &[
    "é",
    "±",
    "−",
    "\u{200b}",
    "😀",
    "\u{feff}",
    "Ω",
    "°",
    "µ",
    "\u{0301}",
    "\u{2028}",
    "\0",
    "\u{7f}",
    "ß",
    "İ",
    "ﬁ",
    "\u{10ffff}",
    "日本",
    "\u{202e}",
    "\u{85}",
];

const PATHS: &[&str] = &[
    "inc.hadal",
    "t.csv",
    "s.hadal",
    "./s.hadal",
    "../outside/secret.hadal",
    "../outside/secret.csv",
    "link.csv",
    "linkdir/secret.csv",
    "linkdir/secret.hadal",
    "/etc/passwd",
    "/dev/zero",
    "/dev/urandom",
    "/proc/self/mem",
    "",
    ".",
    "..",
    "shared",
    "shared/",
    "shared/../shared/mantle_minerals.hadal",
    "shared/mantle_minerals.hadal",
    "shared/glacial_forcing.csv",
    "shared/hypsometry_mirrowen.csv",
    "data/empty.csv",
    "data/ragged.csv",
    "deep/d01.hadal",
    "cycle/a.hadal",
    "lib/with_stage.hadal",
    "nonexistent.hadal",
    "a\\\"b.csv",
    "C:\\\\x.csv",
    "//server/share/x.csv",
    "shared/./././mantle_minerals.hadal",
    "../project/inc.hadal",
];

/// One token of a text: a word, a run of spaces, a line end, or punctuation.
fn tokens(text: &str) -> Vec<&str> {
    let mut out = Vec::new();
    let mut i = 0;
    let b = text.as_bytes();
    while i < text.len() {
        let start = i;
        let c = text[i..].chars().next().expect("in bounds");
        if c.is_alphanumeric() || c == '_' || c == '.' || c == '%' {
            while i < text.len() {
                let c = text[i..].chars().next().expect("in bounds");
                if c.is_alphanumeric() || c == '_' || c == '.' || c == '%' {
                    i += c.len_utf8();
                } else {
                    break;
                }
            }
        } else if c == ' ' || c == '\t' {
            while i < text.len() && (b[i] == b' ' || b[i] == b'\t') {
                i += 1;
            }
        } else {
            let two = text.get(i..i + 2);
            i += match two {
                Some("->" | "<=" | ">=" | "==" | "!=" | "+-" | "\r\n" | "##") => 2,
                _ => c.len_utf8(),
            };
        }
        out.push(&text[start..i]);
    }
    out
}

fn char_floor(text: &str, mut i: usize) -> usize {
    i = i.min(text.len());
    while !text.is_char_boundary(i) {
        i -= 1;
    }
    i
}

fn random_unit(rng: &mut Rng) -> String {
    let n = 1 + rng.size(6);
    let mut s = String::new();
    if rng.one_in(8) {
        s.push_str("1/");
    }
    for k in 0..n {
        if k > 0 {
            s.push_str(if rng.one_in(2) { "/" } else { "." });
        }
        {
            let u: &str = rng.pick::<&str>(UNITS);
            s.push_str(u);
        }
        if rng.one_in(3) {
            s.push('^');
            let p: &[&str] = &[
                "2",
                "3",
                "-1",
                "-2",
                "0",
                "10",
                "127",
                "128",
                "1000",
                "-2147483648",
                "2147483647",
                "99999999999999999999",
                "-",
                "",
            ];
            {
                let q: &str = rng.pick::<&str>(p);
                s.push_str(q);
            }
        }
    }
    s
}

fn random_number(rng: &mut Rng) -> String {
    if rng.one_in(3) {
        let mantissa = rng.next_u64() % 100_000;
        let exp = rng.below(700) as i64 - 350;
        format!("{}e{exp}", mantissa as f64 / 1000.0)
    } else {
        rng.pick(NUMBERS).to_string()
    }
}

/// A random token that fits somewhere in the language.
fn random_token(rng: &mut Rng, corpus: &Corpus) -> String {
    match rng.below(9) {
        0 | 1 => rng.pick(KEYWORDS).to_string(),
        2 | 3 => rng.pick(PUNCT).to_string(),
        4 => random_unit(rng),
        5 => random_number(rng),
        // The built-ins' names come from the language's own table.
        6 => rng.pick(hadal::builtins::BUILTINS).name.to_string(),
        7 if !corpus.names.is_empty() => rng.pick(&corpus.names).clone(),
        7 => "x".into(),
        _ => rng.pick(UNICODE).to_string(),
    }
}

// ---- generated scenarios --------------------------------------------------------

/// A plain positive number, for generated scenarios that should check.
fn sane_number(rng: &mut Rng) -> String {
    format!("{}e{}", 1 + rng.below(9), 8 + rng.below(10))
}

struct GenNames {
    reservoirs: Vec<String>,
    /// Reservoirs with a capacity (`fill` and `excess` need one).
    capped: Vec<String>,
    dimless: Vec<String>,
    temps: Vec<String>,
    durations: Vec<String>,
    rates: Vec<String>,
}

fn dimless_expr(rng: &mut Rng, n: &GenNames, depth: usize) -> String {
    let leaf = depth == 0 || rng.one_in(3);
    if leaf {
        return match rng.below(5) {
            0 => format!("{}", (rng.below(1000) as f64) / 100.0),
            1 if !n.dimless.is_empty() => rng.pick(&n.dimless).clone(),
            2 if !n.capped.is_empty() => format!("fill({})", rng.pick(&n.capped)),
            3 if !n.reservoirs.is_empty() => {
                format!("{} / {} kg", rng.pick(&n.reservoirs), sane_number(rng))
            }
            _ => format!("{} %", rng.below(100)),
        };
    }
    let d = depth - 1;
    match rng.below(10) {
        0 => format!("{} + {}", dimless_expr(rng, n, d), dimless_expr(rng, n, d)),
        1 => format!("{} * {}", dimless_expr(rng, n, d), dimless_expr(rng, n, d)),
        2 => format!("({})", dimless_expr(rng, n, d)),
        3 if !n.temps.is_empty() => format!(
            "exp(-{} 1/K * ({} - 1500 K))",
            (rng.below(100) as f64) / 1e4,
            rng.pick(&n.temps)
        ),
        4 => format!(
            "min(1, {}, {})",
            dimless_expr(rng, n, d),
            dimless_expr(rng, n, d)
        ),
        5 => format!("clamp({}, 0, 1)", dimless_expr(rng, n, d)),
        6 => format!(
            "(if age > {} Ga then {} else {})",
            rng.below(45) as f64 / 10.0,
            dimless_expr(rng, n, d),
            dimless_expr(rng, n, d)
        ),
        7 => format!("smoothstep({}, 0, 1)", dimless_expr(rng, n, d)),
        8 => format!("{} ^ {}", dimless_expr(rng, n, d), rng.below(4)),
        _ => format!(
            "{} / ({} + 1)",
            dimless_expr(rng, n, d),
            dimless_expr(rng, n, d)
        ),
    }
}

fn duration(rng: &mut Rng, n: &GenNames) -> String {
    if !n.durations.is_empty() && rng.one_in(2) {
        return rng.pick(&n.durations).clone();
    }
    format!(
        "{} {}",
        1 + rng.below(500),
        rng.pick(&["kyr", "Myr", "Gyr", "yr"])
    )
}

fn rate_expr(rng: &mut Rng, n: &GenNames, from: Option<&str>) -> String {
    match rng.below(5) {
        0 | 1 if from.is_some() => format!(
            "{} / {} * ({})",
            from.unwrap_or("x"),
            duration(rng, n),
            dimless_expr(rng, n, 2)
        ),
        2 if !n.rates.is_empty() => {
            format!("{} * ({})", rng.pick(&n.rates), dimless_expr(rng, n, 2))
        }
        3 if from.is_some_and(|f| n.capped.iter().any(|c| c == f)) => {
            format!("excess({}) / {}", from.unwrap_or("x"), duration(rng, n))
        }
        _ => format!("{} kg/yr * ({})", sane_number(rng), dimless_expr(rng, n, 1)),
    }
}

/// A scenario built from the grammar: mostly well typed, so that many
/// generated inputs reach the solver.
pub fn generate_scenario(rng: &mut Rng) -> String {
    let mut out = String::new();
    let start = 1 + rng.below(45);
    out.push_str(&format!("scenario gen_{} \"generated\"\n", rng.below(1000)));
    out.push_str(&format!("span {} Ga to 0 Ga\n", start as f64 / 10.0));
    out.push_str(&format!(
        "report every {} {}\n",
        1 + rng.below(200),
        rng.pick(&["Myr", "Myr", "kyr", "Gyr"])
    ));
    if rng.one_in(2) {
        out.push_str(&format!(
            "solver method = {}\n",
            rng.pick(&["auto", "explicit", "implicit"])
        ));
    }
    if rng.one_in(3) {
        out.push_str(&format!("solver rtol = 1e-{}\n", 3 + rng.below(8)));
    }
    if rng.one_in(3) {
        out.push_str(&format!("solver max_step = {} Myr\n", 1 + rng.below(100)));
    }
    let mut n = GenNames {
        reservoirs: Vec::new(),
        capped: Vec::new(),
        dimless: Vec::new(),
        temps: Vec::new(),
        durations: Vec::new(),
        rates: Vec::new(),
    };
    for i in 0..rng.below(4) {
        let name = format!("k{i}");
        out.push_str(&format!(
            "## A generated dimensionless parameter.\nparam {name} = {}\n",
            rng.below(100) as f64 / 50.0
        ));
        n.dimless.push(name);
    }
    for i in 0..rng.below(3) {
        let name = format!("tau{i}");
        out.push_str(&format!("const {name} = {}\n", duration(rng, &n)));
        n.durations.push(name);
    }
    if rng.one_in(2) {
        out.push_str(&format!(
            "state T = {} K, rate = -{} K / 1 {}\n",
            1200 + rng.below(800),
            1 + rng.below(300),
            rng.pick(&["Gyr", "Myr"])
        ));
        n.temps.push("T".into());
    }
    let reservoirs = 1 + rng.below(5);
    for i in 0..reservoirs {
        let name = format!("r{i}");
        let mut line = format!(
            "reservoir {name} = {}e{} kg",
            1 + rng.below(9),
            15 + rng.below(8)
        );
        let capped = rng.one_in(2);
        if capped {
            line.push_str(&format!(
                ", capacity = {}e{} kg * ({})",
                1 + rng.below(9),
                18 + rng.below(5),
                dimless_expr(rng, &n, 1)
            ));
        }
        out.push_str(&line);
        out.push('\n');
        if capped {
            n.capped.push(name.clone());
        }
        n.reservoirs.push(name);
    }
    for i in 0..rng.below(3) {
        let name = format!("q{i}");
        let r = rate_expr(rng, &n, None);
        out.push_str(&format!("let {name} = {r}\n"));
        n.rates.push(name);
    }
    for i in 0..rng.below(6) {
        let a = rng.below(reservoirs + 1);
        let mut b = rng.below(reservoirs + 1);
        if b == a {
            b = (a + 1) % (reservoirs + 1);
        }
        let from = if a == reservoirs {
            "outside".to_owned()
        } else {
            n.reservoirs[a].clone()
        };
        let to = if b == reservoirs {
            "outside".to_owned()
        } else {
            n.reservoirs[b].clone()
        };
        let src = (from != "outside").then_some(from.as_str());
        let rate = rate_expr(rng, &n, src);
        out.push_str(&format!("flux f{i}: {from} -> {to} = {rate}\n"));
    }
    for i in 0..rng.below(3) {
        let e = dimless_expr(rng, &n, 2);
        let unit = if rng.one_in(2) { " in %" } else { "" };
        out.push_str(&format!("output o{i} = {e}{unit}\n"));
    }
    if rng.one_in(3) {
        out.push_str(&format!(
            "event e0 = {} > {}\n",
            dimless_expr(rng, &n, 1),
            rng.below(10) as f64 / 10.0
        ));
    }
    // Contiguous stages over the span.
    let stages = 1 + rng.below(4);
    let mut cuts: Vec<usize> = (0..stages - 1)
        .map(|_| 1 + rng.below(start.max(2) - 1))
        .collect();
    cuts.sort_unstable();
    cuts.dedup();
    cuts.retain(|&c| c < start);
    let mut bounds = vec![start];
    bounds.extend(cuts.iter().rev());
    bounds.push(0);
    for (i, w) in bounds.windows(2).enumerate() {
        let mut line = format!(
            "stage s{i} from {} Ga to {} Ga",
            w[0] as f64 / 10.0,
            w[1] as f64 / 10.0
        );
        if rng.one_in(2) {
            line.push_str(" {\n");
            if !n.dimless.is_empty() && rng.one_in(2) {
                line.push_str(&format!(
                    "  set {} = {}\n",
                    rng.pick(&n.dimless),
                    rng.below(100) as f64 / 30.0
                ));
            }
            if rng.one_in(2) {
                let r = rng.pick(&n.reservoirs).clone();
                let rate = rate_expr(rng, &n, None);
                line.push_str(&format!("  flux g{i}: outside -> {r} = {rate}\n"));
            }
            if rng.one_in(3) {
                line.push_str(&format!("  solver max_step = {} Myr\n", 1 + rng.below(50)));
            }
            line.push('}');
        }
        out.push_str(&line);
        out.push('\n');
    }
    if rng.one_in(2) {
        out.push_str(&format!(
            "expect {} at 0 Ga > 0 kg\n",
            rng.pick(&n.reservoirs)
        ));
    }
    out
}

fn generate_table(rng: &mut Rng) -> String {
    let mut s = String::from("x,y\n");
    let rows = 2 + rng.size(50);
    let mut x = rng.below(10) as f64;
    for _ in 0..rows {
        s.push_str(&format!("{x},{}\n", rng.below(10_000) as f64 / 7.0));
        x += 1.0 + rng.below(5) as f64;
    }
    s
}

// ---- mutations --------------------------------------------------------------------

/// Apply one random grammar-aware mutation to `text`.
fn mutate_text(rng: &mut Rng, text: &mut String, corpus: &Corpus) {
    let toks = tokens(text);
    let lines: Vec<&str> = text.split_inclusive('\n').collect();
    let new = match rng.below(30) {
        // Token deletion, duplication, insertion, replacement, swap.
        0 | 1 if !toks.is_empty() => {
            let i = rng.below(toks.len());
            let mut t = toks.clone();
            t.remove(i);
            t.concat()
        }
        2 if !toks.is_empty() => {
            let i = rng.below(toks.len());
            let mut t = toks.clone();
            t.insert(i, toks[i]);
            t.concat()
        }
        3 | 4 => {
            let i = rng.below(toks.len() + 1);
            let tok = random_token(rng, corpus);
            let mut t: Vec<String> = toks.iter().map(|s| s.to_string()).collect();
            let sep = if rng.one_in(2) { " " } else { "" };
            t.insert(i, format!("{sep}{tok}{sep}"));
            t.concat()
        }
        5 | 6 if !toks.is_empty() => {
            let i = rng.below(toks.len());
            let tok = random_token(rng, corpus);
            let mut t: Vec<String> = toks.iter().map(|s| s.to_string()).collect();
            t[i] = tok;
            t.concat()
        }
        7 if toks.len() >= 2 => {
            let i = rng.below(toks.len() - 1);
            let mut t = toks.clone();
            t.swap(i, i + 1);
            t.concat()
        }
        // Whole lines: swap, duplicate, delete, truncate, splice from another file.
        8 if lines.len() >= 2 => {
            let (a, b) = (rng.below(lines.len()), rng.below(lines.len()));
            let mut l = lines.clone();
            l.swap(a, b);
            l.concat()
        }
        9 if !lines.is_empty() => {
            let a = rng.below(lines.len());
            let mut l = lines.clone();
            let times = 1 + rng.size(3);
            for _ in 0..times {
                l.insert(a, lines[a]);
            }
            l.concat()
        }
        10 if !lines.is_empty() => {
            let a = rng.below(lines.len());
            let mut l = lines.clone();
            l.remove(a);
            l.concat()
        }
        11 if !lines.is_empty() => {
            let a = rng.below(lines.len());
            let cut = char_floor(lines[a], rng.below(lines[a].len() + 1));
            let mut l: Vec<String> = lines.iter().map(|s| s.to_string()).collect();
            l[a] = lines[a][..cut].to_owned();
            if rng.one_in(2) {
                l[a].push('\n');
            }
            l.concat()
        }
        12 => {
            let other = rng.pick(&corpus.scenarios);
            let other_lines: Vec<&str> = other.split_inclusive('\n').collect();
            let mut l: Vec<&str> = lines.clone();
            if !other_lines.is_empty() {
                let at = rng.below(l.len() + 1);
                let from = rng.below(other_lines.len());
                let to = (from + 1 + rng.size(8)).min(other_lines.len());
                for (k, line) in other_lines[from..to].iter().enumerate() {
                    l.insert(at + k, line);
                }
            }
            l.concat()
        }
        // Truncate the whole file.
        13 => {
            let cut = char_floor(text, rng.below(text.len() + 1));
            text[..cut].to_owned()
        }
        // Deep nesting: parentheses, calls, if-chains, prefix and infix chains.
        14 => {
            let depth = *rng.pick(&[2usize, 10, 40, 63, 64, 65, 100, 1000, 20_000]);
            let inner = "1".to_string();
            let e = match rng.below(6) {
                0 => format!("{}{inner}{}", "(".repeat(depth), ")".repeat(depth)),
                1 => format!("{}{inner}{}", "exp(".repeat(depth), ")".repeat(depth)),
                2 => {
                    let mut s = String::new();
                    for _ in 0..depth {
                        s.push_str("if age > 1 Ga then ");
                    }
                    s.push('1');
                    for _ in 0..depth {
                        s.push_str(" else 2");
                    }
                    s
                }
                3 => {
                    let mut s = "1".to_owned();
                    for _ in 0..depth {
                        s.push_str(" else if age > 2 Ga then 3");
                    }
                    format!("if age > 1 Ga then 1 else {}", &s[..])
                }
                4 => format!("{}1", rng.pick(&["-", "- ", "not ", "--"]).repeat(depth)),
                _ => {
                    let op = rng.pick(&[" + ", " * ", " ^ ", " / ", " - ", " and ", " < "]);
                    vec!["2"; depth + 1].join(op)
                }
            };
            let line = format!("let deep_{} = {e}\n", rng.below(100));
            let mut l: Vec<&str> = lines.clone();
            l.insert(rng.below(l.len() + 1), &line);
            l.concat()
        }
        // Huge and odd numbers in place of a number.
        15 | 16 => {
            let nums: Vec<usize> = toks
                .iter()
                .enumerate()
                .filter(|(_, t)| t.starts_with(|c: char| c.is_ascii_digit()))
                .map(|(i, _)| i)
                .collect();
            let mut t: Vec<String> = toks.iter().map(|s| s.to_string()).collect();
            if nums.is_empty() {
                t.push(random_number(rng));
            } else {
                let i = *rng.pick(&nums);
                t[i] = random_number(rng);
            }
            t.concat()
        }
        // Random unit strings after a number.
        17 | 18 => {
            let nums: Vec<usize> = toks
                .iter()
                .enumerate()
                .filter(|(_, t)| t.starts_with(|c: char| c.is_ascii_digit()))
                .map(|(i, _)| i)
                .collect();
            let mut t: Vec<String> = toks.iter().map(|s| s.to_string()).collect();
            if !nums.is_empty() {
                let i = *rng.pick(&nums);
                let u = random_unit(rng);
                t[i] = format!("{} {u}", t[i]);
                // Drop the unit that was there, if any.
                if i + 2 < t.len() && t[i + 1].trim().is_empty() && rng.one_in(2) {
                    t[i + 2] = String::new();
                }
            }
            t.concat()
        }
        // Line ends: CRLF everywhere, a lone CR, no final newline.
        19 => match rng.below(3) {
            0 => text.replace('\n', "\r\n"),
            1 => {
                let at = char_floor(text, rng.below(text.len() + 1));
                format!("{}\r{}", &text[..at], &text[at..])
            }
            _ => text.trim_end_matches(['\n', '\r']).to_owned(),
        },
        // A byte-order mark (at the start, or stray inside).
        20 => {
            if rng.one_in(3) {
                let at = char_floor(text, rng.below(text.len() + 1));
                format!("{}\u{feff}{}", &text[..at], &text[at..])
            } else {
                format!("\u{feff}{text}")
            }
        }
        // Unicode anywhere.
        21 => {
            let at = char_floor(text, rng.below(text.len() + 1));
            format!("{}{}{}", &text[..at], rng.pick(UNICODE), &text[at..])
        }
        // Paths of includes and tables.
        22 => {
            let line = if rng.one_in(2) {
                format!("include \"{}\"\n", rng.pick(PATHS))
            } else {
                format!(
                    "table tz_{} = \"{}\" ({}, {})\n",
                    rng.below(10),
                    rng.pick(PATHS),
                    random_unit(rng),
                    random_unit(rng)
                )
            };
            let mut l: Vec<&str> = lines.clone();
            l.insert(rng.below(l.len() + 1), &line);
            l.concat()
        }
        // A generated statement.
        23 => {
            let generated = generate_scenario(rng);
            let gl: Vec<&str> = generated.split_inclusive('\n').collect();
            let pick = rng.pick(&gl).to_string();
            let mut l: Vec<&str> = lines.clone();
            l.insert(rng.below(l.len() + 1), &pick);
            l.concat()
        }
        // A long line: a token repeated many times.
        24 => {
            // Megabyte lines are slow to parse (about 2 MB/s); keep them rare.
            let times = if rng.one_in(64) {
                100_000
            } else {
                *rng.pick(&[100usize, 1000, 10_000])
            };
            let line = match rng.below(5) {
                0 => format!("let long = min({})\n", vec!["1"; times].join(", ")),
                1 => format!("let {} = 1\n", "x".repeat(times)),
                2 => format!(
                    "reservoir r_long = 1 kg{}\n",
                    ", capacity = 1 kg".repeat(times)
                ),
                3 => format!("scenario s \"{}\"\n", "é".repeat(times)),
                _ => format!("# {}\n", "(".repeat(times)),
            };
            let mut l: Vec<&str> = lines.clone();
            l.insert(rng.below(l.len() + 1), &line);
            l.concat()
        }
        // Many lines: a block repeated, or many definitions with errors.
        25 => {
            let times = if rng.one_in(16) {
                5000
            } else {
                *rng.pick(&[10usize, 100, 1000])
            };
            match rng.below(7) {
                0 if !lines.is_empty() => {
                    let a = rng.below(lines.len());
                    let b = (a + 1 + rng.below(5)).min(lines.len());
                    let block = lines[a..b].concat();
                    format!("{text}\n{}", block.repeat(times))
                }
                1 => {
                    let mut s = text.clone();
                    s.push('\n');
                    for k in 0..times {
                        s.push_str(&format!("let u{k} = missing_{k} + other{k}\n"));
                    }
                    s
                }
                2 => {
                    let mut s = text.clone();
                    s.push('\n');
                    for k in 0..times {
                        s.push_str(&format!("let v{k} = v{} * 2\n", k + 1));
                    }
                    s
                }
                3 => {
                    // Each constant uses the one before twice.
                    let mut s = text.clone();
                    s.push_str("\nconst w0 = 1\n");
                    for k in 1..times.min(300) {
                        s.push_str(&format!("const w{k} = w{} + w{}\n", k - 1, k - 1));
                    }
                    s
                }
                4 => {
                    // A chain in dependency order, or closing into a cycle.
                    let mut s = text.clone();
                    s.push_str(&format!("\nconst z{times} = 1\n"));
                    for k in (0..times).rev() {
                        s.push_str(&format!("let z{k} = z{} + 1\n", k + 1));
                    }
                    if rng.one_in(2) {
                        s.push_str(&format!("let z{} = z0\n", times + 1));
                    }
                    s
                }
                5 => {
                    // Capacities that use fill, capacity or excess of
                    // reservoirs, possibly their own.
                    let mut s = text.clone();
                    s.push('\n');
                    let n = 1 + rng.below(4);
                    for k in 0..n {
                        let other = rng.below(n);
                        let f = rng.pick(&["fill", "capacity", "excess"]);
                        let cap = if *f == "fill" {
                            format!("1e21 kg * (1 - {f}(cr{other}))")
                        } else {
                            format!("{f}(cr{other}) + 1 kg")
                        };
                        s.push_str(&format!("reservoir cr{k} = 1e19 kg, capacity = {cap}\n"));
                    }
                    s.push_str("flux crf: cr0 -> outside = excess(cr0) / 1 Myr\n");
                    s
                }
                _ => {
                    // The same file included, or the same table read, many times.
                    let mut s = text.clone();
                    s.push('\n');
                    for k in 0..times.min(200) {
                        if rng.one_in(2) {
                            s.push_str("include \"inc.hadal\"\n");
                        } else {
                            s.push_str(&format!("table tt{k} = \"t.csv\" (Ma, K)\n"));
                        }
                    }
                    s
                }
            }
        }
        // Random bytes replaced by random characters.
        26 => {
            let mut chars: Vec<char> = text.chars().collect();
            for _ in 0..1 + rng.size(8) {
                if chars.is_empty() {
                    break;
                }
                let i = rng.below(chars.len());
                chars[i] = char::from_u32(rng.below(0x3000) as u32).unwrap_or('?');
            }
            chars.into_iter().collect()
        }
        // A stage body opened or closed where it should not be.
        27 => {
            let bits: &[&str] = &[
                "{\n",
                "}\n",
                "{",
                "}",
                " {\n}\n",
                "stage x from 1 Ga to 0 Ga {\n",
            ];
            let at = char_floor(text, rng.below(text.len() + 1));
            format!("{}{}{}", &text[..at], rng.pick(bits), &text[at..])
        }
        // Quotes and escapes.
        28 => {
            let bits: &[&str] = &["\"", "\\", "\\\"", "\"\"", "\"\n"];
            let at = char_floor(text, rng.below(text.len() + 1));
            format!("{}{}{}", &text[..at], rng.pick(bits), &text[at..])
        }
        // Whitespace: tabs, indentation, many blank lines.
        _ => {
            let bits: &[&str] = &[
                "\t", "    ", "\n\n\n\n", "\x0b", "\x0c", "\u{a0}", "\u{3000}",
            ];
            let at = char_floor(text, rng.below(text.len() + 1));
            format!("{}{}{}", &text[..at], rng.pick(bits), &text[at..])
        }
    };
    *text = new;
}

fn mutate_table(rng: &mut Rng, text: &mut String) {
    let lines: Vec<&str> = text.split_inclusive('\n').collect();
    let new = match rng.below(14) {
        0 => String::new(),
        1 => lines.first().map(|l| l.to_string()).unwrap_or_default(),
        2 if lines.len() >= 2 => {
            let (a, b) = (rng.below(lines.len()), rng.below(lines.len()));
            let mut l = lines.clone();
            l.swap(a, b);
            l.concat()
        }
        3 if !lines.is_empty() => {
            let a = rng.below(lines.len());
            let mut l = lines.clone();
            l.insert(a, lines[a]);
            l.concat()
        }
        4 if !lines.is_empty() => {
            let a = rng.below(lines.len());
            let mut l: Vec<String> = lines.iter().map(|s| s.to_string()).collect();
            let extra: &[&str] = &[",1", ",", ",,", ",x", ",\"3\""];
            l[a] = format!("{}{}\n", lines[a].trim_end(), rng.pick(extra));
            l.concat()
        }
        5 if !lines.is_empty() => {
            let a = rng.below(lines.len());
            let mut l: Vec<String> = lines.iter().map(|s| s.to_string()).collect();
            let cells: &[&str] = &[
                "NaN", "inf", "-inf", "x", "", "1e400", "1,5", "\"1\"", "0x1", " 1 ", "1e-400", "é",
            ];
            l[a] = format!("{},{}\n", rng.pick(cells), rng.pick(cells));
            l.concat()
        }
        6 => text.replace('\n', "\r\n"),
        7 => format!("\u{feff}{text}"),
        8 => {
            let cut = char_floor(text, rng.below(text.len() + 1));
            text[..cut].to_owned()
        }
        9 => {
            let mut l: Vec<&str> = lines.clone();
            l.reverse();
            l.concat()
        }
        10 => {
            let at = char_floor(text, rng.below(text.len() + 1));
            let bits: &[&str] = &["\"", "\n\n", "\r", "\0", ";", "\t", "é", "#"];
            format!("{}{}{}", &text[..at], rng.pick(bits), &text[at..])
        }
        11 => {
            let rows = *rng.pick(&[3usize, 100, 5000]);
            let mut s = String::from("a,b\n");
            for k in 0..rows {
                s.push_str(&format!("{k},{}\n", rng.below(100)));
            }
            s
        }
        12 => "a\n1\n2\n".to_owned(),
        _ => {
            let mut l: Vec<&str> = lines.clone();
            if l.len() > 1 {
                l.remove(1 + rng.below(l.len() - 1));
            }
            l.concat()
        }
    };
    *text = new;
}

fn mutation_count(rng: &mut Rng) -> usize {
    match rng.below(100) {
        0..=1 => 0,
        2..=40 => 1,
        41..=65 => 2,
        66..=80 => 3,
        _ => 4 + rng.below(5),
    }
}

/// Largest scenario a case holds: twice what the parser accepts, so that
/// inputs over the limit are still made.
const MAX_GENERATED_BYTES: usize = 2 * hadal::syntax::MAX_SOURCE_BYTES;

/// Case `index` of campaign `seed`.
pub fn make_case(corpus: &Corpus, seed: u64, index: u64) -> Case {
    let mut rng = Rng::for_case(seed, index);
    let mut generated = false;
    let mut text = match rng.below(10) {
        0..=5 => {
            // The demos are the first files of the corpus; favour them.
            let demos = corpus.scenarios.len().min(2);
            if rng.one_in(2) {
                corpus.scenarios[rng.below(demos)].clone()
            } else {
                rng.pick(&corpus.scenarios).clone()
            }
        }
        6..=8 => {
            // A fresh scenario is new input already: often leave it intact,
            // so that many reach the solver.
            generated = true;
            generate_scenario(&mut rng)
        }
        _ => rng.pick(&corpus.libraries).clone(),
    };
    let mut include = rng.pick(&corpus.libraries).clone();
    let mut table = if rng.one_in(2) {
        rng.pick(&corpus.tables).clone()
    } else {
        generate_table(&mut rng)
    };
    if rng.one_in(6) {
        for _ in 0..1 + rng.below(3) {
            mutate_text(&mut rng, &mut include, corpus);
        }
        let at = rng.below(text.lines().count() + 1);
        let mut lines: Vec<String> = text.lines().map(|l| format!("{l}\n")).collect();
        lines.insert(at.min(lines.len()), "include \"inc.hadal\"\n".into());
        text = lines.concat();
    }
    if rng.one_in(5) {
        for _ in 0..1 + rng.below(3) {
            mutate_table(&mut rng, &mut table);
        }
        let units = [
            ("Ma", "K"),
            ("Ga", "W/m^2"),
            ("m", "m^2"),
            ("Ma", "1"),
            ("kg", "kg"),
            ("yr", "K"),
        ];
        let (xu, yu) = *rng.pick(&units);
        let mut lines: Vec<String> = text.lines().map(|l| format!("{l}\n")).collect();
        let at = rng.below(lines.len() + 1);
        lines.insert(at, format!("table fz_table = \"t.csv\" ({xu}, {yu})\n"));
        if xu == "Ma" || xu == "Ga" {
            lines.push(format!(
                "output fz_read = fz_table(age){}\n",
                if yu == "K" { " in K" } else { "" }
            ));
        }
        text = lines.concat();
    }
    let mutations = if generated && rng.one_in(2) {
        0
    } else {
        mutation_count(&mut rng)
    };
    for _ in 0..mutations {
        mutate_text(&mut rng, &mut text, corpus);
        // Repeated duplication can grow a case to hundreds of megabytes,
        // which costs the generator minutes and gigabytes; past the
        // parser's limit more bytes test nothing new.
        if text.len() > MAX_GENERATED_BYTES {
            let cut = char_floor(&text, MAX_GENERATED_BYTES);
            text.truncate(cut);
        }
    }
    let mut scenario = text.into_bytes();
    let mut from_disk = rng.one_in(8);
    // Raw bytes: invalid UTF-8 goes through the reader of `check_file`.
    if rng.one_in(25) && !scenario.is_empty() {
        for _ in 0..1 + rng.size(8) {
            let i = rng.below(scenario.len());
            scenario[i] = rng.below(256) as u8;
        }
        from_disk = true;
    }
    let mut overrides = Vec::new();
    if rng.one_in(10) && !corpus.names.is_empty() {
        for _ in 0..1 + rng.below(2) {
            let name = rng.pick(&corpus.names).clone();
            let mut value = rng
                .pick(&["0.3", "1500 K", "1e400", "x", "1 +", "(", "5 cm/yr", "2 kg"])
                .to_string();
            if rng.one_in(3) {
                mutate_text(&mut rng, &mut value, corpus);
            }
            overrides.push((name, value));
        }
    }
    Case {
        index,
        scenario,
        include: include.into_bytes(),
        table: table.into_bytes(),
        from_disk,
        overrides,
    }
}

// ---- running one case ---------------------------------------------------------

/// What one case reached.
#[derive(Debug, Clone, Copy, Default)]
pub struct Reached {
    pub parsed: bool,
    pub checked: bool,
    pub solved: bool,
    pub solve_failed: bool,
}

/// Largest report and step counts used when solving fuzzed scenarios.
pub const SOLVE_MAX_ROWS: f64 = 2_000.0;
pub const SOLVE_MAX_STEPS: u64 = 20_000;
pub const SOLVE_MAX_STAGES: usize = 64;

pub fn spans_are_valid(sources: &Sources, problems: &[Problem], phase: &str) -> Result<(), String> {
    for p in problems {
        if p.code.len() != 5 || !p.code.starts_with('H') {
            return Err(format!("{phase}: odd code `{}` ({})", p.code, p.message));
        }
        if p.message.trim().is_empty() {
            return Err(format!("{phase}: {} has an empty message", p.code));
        }
        for l in &p.labels {
            let Some(f) = sources.files.get(l.span.file as usize) else {
                return Err(format!(
                    "{phase}: {} `{}` points at file {} of {}",
                    p.code,
                    p.message,
                    l.span.file,
                    sources.files.len()
                ));
            };
            let (s, e) = (l.span.start as usize, l.span.end as usize);
            if s > e || e > f.text.len() {
                return Err(format!(
                    "{phase}: {} `{}` has span {s}..{e} outside {} ({} bytes)",
                    p.code,
                    p.message,
                    f.name,
                    f.text.len()
                ));
            }
            if !f.text.is_char_boundary(s) || !f.text.is_char_boundary(e) {
                return Err(format!(
                    "{phase}: {} `{}` has span {s}..{e} inside a character",
                    p.code, p.message
                ));
            }
        }
        let _ = p.location(sources);
        let rendered = p.render(sources);
        let handler =
            miette::GraphicalReportHandler::new_themed(miette::GraphicalTheme::unicode_nocolor())
                .with_width(100);
        let mut out = String::new();
        let _ = handler.render_report(&mut out, &rendered);
    }
    Ok(())
}

fn single_source(name: &str, text: &str) -> Sources {
    let mut s = Sources::default();
    s.add(name.to_owned(), PathBuf::from(name), text.to_owned());
    s
}

/// The first difference between two models' canonical forms, in words.
fn model_difference(a: &hadal::model::Model, b: &hadal::model::Model) -> String {
    let canon = |m: &hadal::model::Model| -> Vec<String> {
        let mut v: Vec<String> = (0..m.defs.len())
            .filter(|&i| !m.defs[i].prelude)
            .map(|i| m.canonical_def(i))
            .collect();
        v.sort();
        v
    };
    let (ca, cb) = (canon(a), canon(b));
    for (x, y) in ca.iter().zip(&cb) {
        if x != y {
            let cut = |s: &str| s.chars().take(300).collect::<String>();
            return format!("`{}` became `{}`", cut(x), cut(y));
        }
    }
    if ca.len() != cb.len() {
        return format!("{} definitions became {}", ca.len(), cb.len());
    }
    if (a.start_age, a.end_age, a.cadence) != (b.start_age, b.end_age, b.cadence) {
        return "the span or cadence changed".into();
    }
    if format!("{:?}", a.solver) != format!("{:?}", b.solver) {
        return format!("solver {:?} became {:?}", a.solver, b.solver);
    }
    for (x, y) in a.stages.iter().zip(&b.stages) {
        let sx = format!("{} {} {} {:?}", x.name, x.start_age, x.end_age, x.solver);
        let sy = format!("{} {} {} {:?}", y.name, y.start_age, y.end_age, y.solver);
        if sx != sy {
            return format!("stage `{sx}` became `{sy}`");
        }
    }
    for (x, y) in a.expects.iter().zip(&b.expects) {
        let ex = format!("{} {:?}", a.canonical_expr(&x.subject), x.check);
        let ey = format!("{} {:?}", b.canonical_expr(&y.subject), y.check);
        if ex != ey {
            return format!("expectation `{ex}` became `{ey}`");
        }
    }
    if a.expects.len() != b.expects.len() || a.stages.len() != b.stages.len() {
        return "the number of stages or expectations changed".into();
    }
    "the stage parameter settings changed".into()
}

/// Run every check on one case. `Err` is a property violation (panics are
/// caught by the caller).
pub fn run_case(ws: &Workspace, case: &Case, solve: bool) -> Result<Reached, String> {
    let mut reached = Reached::default();
    let path = ws.scenario_path();
    std::fs::write(&path, &case.scenario).map_err(|e| format!("workspace: {e}"))?;
    std::fs::write(ws.root.join("inc.hadal"), &case.include)
        .map_err(|e| format!("workspace: {e}"))?;
    std::fs::write(ws.root.join("t.csv"), &case.table).map_err(|e| format!("workspace: {e}"))?;
    let text = String::from_utf8_lossy(&case.scenario).into_owned();

    // 1. Parse, and the formatter on what parses.
    let mut formatted = None;
    match hadal::syntax::parse(&text, 0) {
        Err(problems) => {
            if problems.is_empty() {
                return Err("parse failed without a problem".into());
            }
            spans_are_valid(&single_source("s.hadal", &text), &problems, "parse")?;
        }
        Ok(tree) => {
            reached.parsed = true;
            let f1 = hadal::syntax::format_file(&tree);
            let tree2 = hadal::syntax::parse(&f1, 0).map_err(|p| {
                format!(
                    "the formatted text does not parse: {} {}",
                    p[0].code, p[0].message
                )
            })?;
            let f2 = hadal::syntax::format_file(&tree2);
            if f1 != f2 {
                let line = f1
                    .lines()
                    .zip(f2.lines())
                    .position(|(a, b)| a != b)
                    .unwrap_or(0);
                return Err(format!(
                    "formatting is not idempotent (first change at line {})",
                    line + 1
                ));
            }
            formatted = Some(f1);
        }
    }

    // 2. Check, through the file reader or from the text.
    let options = CheckOptions {
        overrides: case.overrides.clone(),
    };
    let result = if case.from_disk {
        check_file(&path, &options)
    } else {
        check_text("s.hadal", &path, &text, &ws.root, &options)
    };
    let checked = match result {
        Err(CheckError::Io { .. }) => return Ok(reached),
        Err(CheckError::Invalid { sources, problems }) => {
            if !problems.iter().any(|p| !p.warning) {
                return Err("the check failed without an error".into());
            }
            spans_are_valid(&sources, &problems, "check")?;
            return Ok(reached);
        }
        Ok(c) => c,
    };
    reached.checked = true;
    spans_are_valid(&checked.model.sources, &checked.warnings, "check warnings")?;

    // 3. Formatting never changes the model.
    if let (Some(f1), false) = (&formatted, case.from_disk) {
        if *f1 != text {
            match check_text("s.hadal", &path, f1, &ws.root, &options) {
                Ok(again) => {
                    let a = hadal::manifest::canonical_hash(&checked.model);
                    let b = hadal::manifest::canonical_hash(&again.model);
                    if a != b {
                        return Err(format!(
                            "formatting changed the checked model: {}",
                            model_difference(&checked.model, &again.model)
                        ));
                    }
                }
                Err(CheckError::Invalid { problems, .. }) => {
                    return Err(format!(
                        "the scenario checks, but its formatted text does not: {} {}",
                        problems[0].code, problems[0].message
                    ))
                }
                Err(CheckError::Io { message, .. }) => {
                    return Err(format!("formatted text: {message}"))
                }
            }
        }
    }

    // 4. The dependency graph, as `hadal graph` and `hadal params` use it.
    let graph = hadal::graph::DepGraph::build(&checked.model);
    let _ = graph.to_dot(&checked.model);
    let _ = hadal::graph::param_stages(&checked.model, &graph);

    // 5. Solve, with the span's row count and the step budget capped.
    let mut model = checked.model;
    if !solve
        || model.is_library()
        || model.stages.is_empty()
        || model.stages.len() > SOLVE_MAX_STAGES
    {
        return Ok(reached);
    }
    let span = model.start_age - model.end_age;
    if span / model.cadence > SOLVE_MAX_ROWS {
        model.cadence = span / SOLVE_MAX_ROWS;
    }
    model.solver.max_steps = model.solver.max_steps.min(SOLVE_MAX_STEPS);
    for st in &mut model.stages {
        st.solver.max_steps = st.solver.max_steps.min(SOLVE_MAX_STEPS);
    }
    match hadal::pipeline::execute(&model, None) {
        Ok(outcome) => {
            reached.solved = true;
            let stages = hadal::report::stages_csv(&model, &outcome.run);
            let events = hadal::report::events_csv(&model, &outcome.run);
            let expectations =
                hadal::report::expectations_csv(&hadal::report::expectations(&model, &outcome.run));
            for (name, bytes) in [
                ("series.csv", &outcome.series_csv),
                ("stages.csv", &stages),
                ("events.csv", &events),
                ("expectations.csv", &expectations),
            ] {
                let s = String::from_utf8_lossy(bytes);
                for cell in s.split([',', '\n']) {
                    let c = cell.trim();
                    // expectations.csv writes `inf` for a value or misfit
                    // that cannot be evaluated (an event that never
                    // happened); a NaN is never written anywhere.
                    let infinite = c.eq_ignore_ascii_case("inf") || c.eq_ignore_ascii_case("-inf");
                    if c.eq_ignore_ascii_case("nan") || (infinite && name != "expectations.csv") {
                        return Err(format!("{name} holds a non-finite cell `{c}`"));
                    }
                }
            }
            spans_are_valid(&model.sources, &outcome.warnings, "solve warnings")?;
            native_agrees(&model, &outcome.run)?;
        }
        Err(p) => {
            reached.solve_failed = true;
            spans_are_valid(&model.sources, std::slice::from_ref(&p), "solve")?;
        }
    }
    Ok(reached)
}

/// Each stage's program (right-hand side, outputs and events) run as
/// native code and interpreted, at the stage's start and end states (and
/// halved and doubled copies of them) at its start, middle and end ages:
/// the same bits in every register (any NaN counts as one value: which NaN
/// an operation on NaNs returns is the machine's choice, and none is
/// written).
fn native_agrees(model: &hadal::model::Model, run: &hadal::solve::Run) -> Result<(), String> {
    let mut defs: Vec<usize> = hadal::report::columns(model)
        .iter()
        .filter_map(|c| c.def)
        .collect();
    defs.extend(hadal::solve::event_defs(model));
    let bits = |r: &hadal::compile::Regs| -> Vec<u64> {
        r.0.iter()
            .map(|x| if x.is_nan() { u64::MAX } else { x.to_bits() })
            .collect()
    };
    let mut start = hadal::solve::initial_state(model).0;
    for sr in &run.stages {
        let wants = hadal::compile::Wants {
            rhs: true,
            defs: defs.clone(),
            exprs: Vec::new(),
        };
        let mut prog = hadal::compile::compile(model, Some(sr.stage), &wants);
        if !prog.make_native() {
            return Ok(());
        }
        let st = &model.stages[sr.stage];
        let (mut native, mut interpreted) = (prog.regs(), prog.regs());
        for y in [&start, &sr.end.0] {
            for scale in [1.0, 0.5, 2.0] {
                for age in [st.start_age, 0.5 * (st.start_age + st.end_age), st.end_age] {
                    let y: Vec<f64> = y.iter().map(|v| v * scale).collect();
                    let t = model.start_age - age;
                    prog.eval(&mut native, &y, t, age);
                    prog.eval_interpreted(&mut interpreted, &y, t, age);
                    let (a, b) = (bits(&native), bits(&interpreted));
                    if let Some(r) = (0..a.len()).find(|&i| a[i] != b[i]) {
                        return Err(format!(
                            "stage {}: register {r} is {} as native code and {} interpreted at {} Ga",
                            sr.stage,
                            native.0[r],
                            interpreted.0[r],
                            age / 1e9
                        ));
                    }
                }
            }
        }
        start = sr.end.0.clone();
    }
    Ok(())
}

// ---- campaigns ---------------------------------------------------------------------

/// A property violation, a panic or a hang.
#[derive(Debug, Clone)]
pub struct Failure {
    pub index: u64,
    pub what: String,
    pub saved: Option<PathBuf>,
}

#[derive(Debug, Clone)]
pub struct Settings {
    pub seed: u64,
    pub start: u64,
    pub count: u64,
    /// A case running longer than this is a hang...
    pub hang_after: Duration,
    /// ...plus this much per megabyte of input: parsing is linear but
    /// slow (0.5 to 3 MB/s depending on the construct), and a case parses
    /// its scenario several times, twice for every syntax error.
    pub hang_per_mb: Duration,
    /// Stack of the thread a case runs on.
    pub stack_bytes: usize,
    pub solve: bool,
    /// Where failing cases are saved (`DIR/case-SEED-INDEX/`).
    pub save_dir: Option<PathBuf>,
    /// Stop after this many failures.
    pub max_failures: usize,
    /// Skip cases with more input than this (bytes): unoptimized builds
    /// parse slowly, and the long campaigns cover large inputs.
    pub max_input_bytes: usize,
}

impl Default for Settings {
    fn default() -> Self {
        Settings {
            seed: 1,
            start: 0,
            count: 1000,
            hang_after: Duration::from_secs(2),
            hang_per_mb: Duration::from_secs(20),
            stack_bytes: 2 << 20,
            solve: true,
            save_dir: None,
            max_failures: 10,
            max_input_bytes: usize::MAX,
        }
    }
}

#[derive(Debug, Clone, Default)]
pub struct Report {
    pub cases: u64,
    pub parsed: u64,
    pub checked: u64,
    pub solved: u64,
    pub solve_failed: u64,
    /// Cases over `max_input_bytes`, not run.
    pub skipped: u64,
    pub failures: Vec<Failure>,
    pub slowest: Duration,
    pub slowest_index: u64,
    pub elapsed: Duration,
}

impl Report {
    pub fn summary(&self) -> String {
        format!(
            "{} cases in {:.1} s: {} parsed, {} checked, {} solved, {} solve errors, {} skipped as too large; slowest case {} took {:.0} ms; {} failures",
            self.cases,
            self.elapsed.as_secs_f64(),
            self.parsed,
            self.checked,
            self.solved,
            self.solve_failed,
            self.skipped,
            self.slowest_index,
            self.slowest.as_secs_f64() * 1e3,
            self.failures.len()
        )
    }
}

/// CPU time used by the calling thread so far.
#[cfg(unix)]
fn thread_cpu_time() -> Option<Duration> {
    let mut ts = libc::timespec {
        tv_sec: 0,
        tv_nsec: 0,
    };
    // SAFETY: `ts` is a valid timespec to write into.
    let rc = unsafe { libc::clock_gettime(libc::CLOCK_THREAD_CPUTIME_ID, &mut ts) };
    (rc == 0).then(|| Duration::new(ts.tv_sec as u64, ts.tv_nsec as u32))
}

#[cfg(not(unix))]
fn thread_cpu_time() -> Option<Duration> {
    None
}

thread_local! {
    static PANIC_MESSAGE: RefCell<Option<String>> = const { RefCell::new(None) };
}

/// Keep panic messages for the report instead of printing them; panics
/// outside fuzz cases still print as usual.
pub fn install_panic_hook() {
    static ONCE: std::sync::Once = std::sync::Once::new();
    ONCE.call_once(|| {
        let default = std::panic::take_hook();
        std::panic::set_hook(Box::new(move |info| {
            let in_case = std::thread::current()
                .name()
                .is_some_and(|n| n.starts_with("fuzz case "));
            if in_case {
                let msg = if let Some(s) = info.payload().downcast_ref::<&str>() {
                    (*s).to_owned()
                } else if let Some(s) = info.payload().downcast_ref::<String>() {
                    s.clone()
                } else {
                    "a panic".to_owned()
                };
                let at = info
                    .location()
                    .map(|l| format!(" at {}:{}", l.file(), l.line()))
                    .unwrap_or_default();
                PANIC_MESSAGE.with(|m| *m.borrow_mut() = Some(format!("panic{at}: {msg}")));
            } else {
                default(info);
            }
        }));
    });
}

/// Run cases `start..start+count` (every `stride`-th from `offset`),
/// calling `progress` now and then.
pub fn run_campaign(
    settings: &Settings,
    corpus: &Arc<Corpus>,
    offset: u64,
    stride: u64,
    progress: &mut dyn FnMut(&Report),
) -> Report {
    install_panic_hook();
    let ws = Arc::new(Workspace::new());
    let mut report = Report::default();
    let clock = Instant::now();
    let mut last_progress = Instant::now();
    let mut i = settings.start + offset;
    let end = settings.start + settings.count;
    while i < end {
        let case = Arc::new(make_case(corpus, settings.seed, i));
        if case.scenario.len() + case.include.len() + case.table.len() > settings.max_input_bytes {
            report.skipped += 1;
            i += stride;
            continue;
        }
        let (tx, rx) = mpsc::channel();
        let (ws2, case2, solve) = (Arc::clone(&ws), Arc::clone(&case), settings.solve);
        let t0 = Instant::now();
        let handle = std::thread::Builder::new()
            .name(format!("fuzz case {i}"))
            .stack_size(settings.stack_bytes)
            .spawn(move || {
                let cpu0 = thread_cpu_time();
                let r = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| {
                    run_case(&ws2, &case2, solve)
                }));
                let r = match r {
                    Ok(r) => r,
                    Err(_) => Err(PANIC_MESSAGE
                        .with(|m| m.borrow_mut().take())
                        .unwrap_or_else(|| "panic".into())),
                };
                let cpu = thread_cpu_time()
                    .zip(cpu0)
                    .map(|(b, a)| b.saturating_sub(a));
                let _ = tx.send((r, cpu));
            })
            .expect("spawn a case thread");
        let size = case.scenario.len() + case.include.len() + case.table.len();
        let limit = settings.hang_after + settings.hang_per_mb.mul_f64(size as f64 / 1e6);
        // The limit is on the case's own CPU time, so a busy machine (other
        // builds, `nice`) does not make slow cases; wall time is a backstop
        // for a case that never returns. It is generous: a campaign at
        // `nice 19` beside a build can get almost no CPU for minutes.
        let wall_limit = (limit * 10 + Duration::from_secs(10)).max(Duration::from_secs(300));
        let result = match rx.recv_timeout(wall_limit) {
            Ok((r, cpu)) => {
                let _ = handle.join();
                let used = cpu.unwrap_or_else(|| t0.elapsed());
                match r {
                    Ok(_) if used > limit => Err(format!(
                        "hang: took {:.1} s of CPU, more than {:.1} s ({} bytes of input)",
                        used.as_secs_f64(),
                        limit.as_secs_f64(),
                        size
                    )),
                    r => r,
                }
            }
            Err(_) => Err(format!(
                "hang: still running after {:.1} s ({} bytes of input)",
                wall_limit.as_secs_f64(),
                size
            )),
        };
        let took = t0.elapsed();
        if took > report.slowest {
            report.slowest = took;
            report.slowest_index = i;
        }
        report.cases += 1;
        match result {
            Ok(r) => {
                report.parsed += u64::from(r.parsed);
                report.checked += u64::from(r.checked);
                report.solved += u64::from(r.solved);
                report.solve_failed += u64::from(r.solve_failed);
            }
            Err(what) => {
                let saved = settings.save_dir.as_ref().and_then(|d| {
                    let dir = d.join(format!("case-{}-{i}", settings.seed));
                    case.save(&dir).ok().map(|_| dir)
                });
                let hang = what.starts_with("hang: still running");
                report.failures.push(Failure {
                    index: i,
                    what,
                    saved,
                });
                // A hung thread keeps running; stop rather than pile them up.
                if hang || report.failures.len() >= settings.max_failures {
                    break;
                }
            }
        }
        if last_progress.elapsed() > Duration::from_secs(10) {
            report.elapsed = clock.elapsed();
            progress(&report);
            last_progress = Instant::now();
        }
        i += stride;
    }
    report.elapsed = clock.elapsed();
    report
}

/// Run a campaign on `jobs` threads (each with its own workspace), and
/// merge their reports.
pub fn run_parallel(
    settings: &Settings,
    jobs: usize,
    progress: impl Fn(usize, &Report) + Sync,
) -> Report {
    let corpus = Arc::new(Corpus::load());
    let jobs = jobs.max(1);
    let clock = Instant::now();
    let reports: Vec<Report> = std::thread::scope(|s| {
        let handles: Vec<_> = (0..jobs)
            .map(|k| {
                let corpus = Arc::clone(&corpus);
                let progress = &progress;
                s.spawn(move || {
                    run_campaign(settings, &corpus, k as u64, jobs as u64, &mut |r| {
                        progress(k, r)
                    })
                })
            })
            .collect();
        handles
            .into_iter()
            .map(|h| h.join().expect("a fuzz worker"))
            .collect()
    });
    let mut total = Report::default();
    for r in reports {
        total.cases += r.cases;
        total.parsed += r.parsed;
        total.checked += r.checked;
        total.solved += r.solved;
        total.solve_failed += r.solve_failed;
        total.skipped += r.skipped;
        total.failures.extend(r.failures);
        if r.slowest > total.slowest {
            total.slowest = r.slowest;
            total.slowest_index = r.slowest_index;
        }
    }
    total.failures.sort_by_key(|f| f.index);
    total.elapsed = clock.elapsed();
    total
}
