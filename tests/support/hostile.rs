//! A hostile corpus: scenarios, files, paths and options chosen to break
//! the binary, each run as a real process with a time bound and its peak
//! memory measured. A case passes when the process exits by itself with 0, 1
//! or 2 (never a signal, never a panic message), within its time bound, and
//! under the memory bound. Shared by `examples/hostile.rs` (the CI-sized
//! campaign) and `tests/hostile_smoke.rs` (a slice of it in `cargo test`).
//!
//! Every case is a pure function of (seed, index): `--start I --count 1`
//! replays one. Unix only (FIFOs, symlinks, wait4).

#![allow(dead_code)]

use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

/// The library's SplitMix64 with the draws the corpus needs.
pub struct Mix(pub hadal::ensemble::SplitMix);

impl Mix {
    pub fn next(&mut self) -> u64 {
        self.0.next()
    }
    pub fn below(&mut self, n: usize) -> usize {
        (self.next() % n.max(1) as u64) as usize
    }
    pub fn pick<'a, T>(&mut self, xs: &'a [T]) -> &'a T {
        &xs[self.below(xs.len())]
    }
    pub fn chance(&mut self, p: f64) -> bool {
        (self.next() >> 11) as f64 / (1u64 << 53) as f64 <= p
    }
}

/// What a file of a case is.
#[derive(Debug, Clone)]
pub enum Entry {
    Bytes(Vec<u8>),
    Dir,
    Fifo,
    Symlink(String),
    /// A sparse file of this length (large without using the disk).
    Sparse(u64),
}

#[derive(Debug, Clone)]
pub struct Case {
    pub index: u64,
    pub family: &'static str,
    /// Files relative to the case's project directory, created in order.
    pub files: Vec<(String, Entry)>,
    /// Commands run in order before the checked one (setup, e.g. a first run
    /// that fills the cache); their outcome is not judged beyond the bounds.
    pub setup: Vec<Vec<String>>,
    /// Files changed after the setup commands (cache corruption).
    pub after_setup: Vec<(String, Entry)>,
    pub args: Vec<String>,
    pub env: Vec<(String, String)>,
}

/// A valid little scenario every family starts from.
pub const BASE: &str = "\
scenario hostile \"a small exchange model\"
span 1 Ga to 0 Ga
report every 100 Myr

## Transfer rate.
param k = 0.5 / 1 Gyr
param cap = 5e20 kg
reservoir a = 1e21 kg
reservoir b = 1e20 kg, capacity = cap
flux ab: a -> b = k * a
flux back: b -> a = 0.1 / 1 Gyr * b
output total = a + b in kg
output fill_b = fill(b) in %
event half = b > 3e20 kg
expect total at 0 Ga = 1.1e21 kg +- 1e18 kg
stage one from 1 Ga to 0.5 Ga
stage two from 0.5 Ga to 0 Ga
";

pub const ENSEMBLE: &str = "
ensemble {
  members = 8
  seed = 3
  vary k ~ uniform(0.1 / 1 Gyr, 1 / 1 Gyr)
  vary cap ~ normal(5e20 kg, 1e20 kg), min = 2e20 kg
}
";

fn s(x: &str) -> String {
    x.to_owned()
}

fn args(xs: &[&str]) -> Vec<String> {
    xs.iter().map(|x| s(x)).collect()
}

fn bytes(x: impl Into<Vec<u8>>) -> Entry {
    Entry::Bytes(x.into())
}

const VERBS_ON_FILE: &[&str] = &["check", "fmt", "graph", "run", "params", "ensemble"];

/// A verb and its arguments on scenario `file`.
fn verb_on(rng: &mut Mix, file: &str) -> Vec<String> {
    match *rng.pick(VERBS_ON_FILE) {
        "check" => args(&["check", file]),
        "fmt" => args(&["fmt", "--check", file]),
        "graph" => args(&["graph", file]),
        "params" => args(&["params", file]),
        "ensemble" => args(&[
            "ensemble",
            file,
            "--members",
            "4",
            "--no-plots",
            "--threads",
            "2",
        ]),
        _ => args(&["run", file, "--no-plots"]),
    }
}

fn case(index: u64, family: &'static str) -> Case {
    Case {
        index,
        family,
        files: Vec::new(),
        setup: Vec::new(),
        after_setup: Vec::new(),
        args: Vec::new(),
        env: Vec::new(),
    }
}

/// The base scenario with `line` added before the stages.
fn with_line(line: &str) -> String {
    let at = BASE.find("stage one").unwrap();
    format!("{}{line}\n{}", &BASE[..at], &BASE[at..])
}

/// The base with `from` replaced by `to` (which must occur).
fn replaced(from: &str, to: &str) -> String {
    assert!(BASE.contains(from), "{from}");
    BASE.replacen(from, to, 1)
}

const UNITS: &[&str] = &[
    "kg",
    "m",
    "yr",
    "K",
    "degC",
    "Ga",
    "Ma",
    "ka",
    "Gyr",
    "Myr",
    "kyr",
    "s",
    "W",
    "TW",
    "J",
    "%",
    "ppm",
    "wt%",
    "m^2",
    "m^3",
    "kg/yr",
    "kg/m^3",
    "W/m^2",
    "1/K",
    "cm/yr",
    "Gt",
    "mol",
    "km",
    "kg m^-3",
    "J/K",
    "Pa",
    "bar",
    "um",
    "µm",
    "kg^2",
    "m^-1",
    "K^-1",
    "furlong",
    "degF",
    "kg*kg",
    "kg^99",
    "m^-99",
    "kg^2147483647",
    "m^-9223372036854775808",
    "",
    "1",
    "(kg)",
    "kg/0",
    "Ga^2",
];

const OPS: &[&str] = &[
    " + ", " - ", " * ", " / ", "^", " < ", " > ", " and ", " or ",
];

const FUNCS: &[&str] = &[
    "exp",
    "ln",
    "log10",
    "sqrt",
    "min",
    "max",
    "clamp",
    "decay",
    "smoothstep",
    "fill",
    "excess",
    "if",
    "abs",
    "sin",
    "nosuch",
];

fn number(rng: &mut Mix) -> String {
    s(rng.pick::<&str>(&[
        "0",
        "1",
        "-1",
        "0.5",
        "1e308",
        "1e309",
        "-1e309",
        "1e-400",
        "4.9e-324",
        "2.2250738585072014e-308",
        "1e21",
        "1e-21",
        "nan",
        "inf",
        "NaN",
        "1_000",
        "0x10",
        "1.",
        ".5",
        "1e",
        "1e+",
        "--1",
        "99999999999999999999999999999999999999",
        "000000000001",
        "1e2147483648",
    ]))
}

/// A random expression of random units: dimension rules under stress.
fn expression(rng: &mut Mix, depth: usize) -> String {
    if depth == 0 || rng.chance(0.3) {
        return match rng.below(4) {
            0 => s(rng.pick::<&str>(&[
                "a", "b", "k", "cap", "age", "time", "total", "half", "ab", "pi", "nosuch",
            ])),
            _ => format!("{} {}", number(rng), rng.pick(UNITS)),
        };
    }
    match rng.below(3) {
        0 => format!(
            "({}{}{})",
            expression(rng, depth - 1),
            rng.pick(OPS),
            expression(rng, depth - 1)
        ),
        1 => {
            let n = rng.below(4);
            let parts: Vec<String> = (0..n).map(|_| expression(rng, depth - 1)).collect();
            format!("{}({})", rng.pick(FUNCS), parts.join(", "))
        }
        _ => format!("-{}", expression(rng, depth - 1)),
    }
}

/// Random damage to a text: flipped bytes, inserted junk, cut short.
fn mutate(rng: &mut Mix, text: &[u8]) -> Vec<u8> {
    let mut b = text.to_vec();
    for _ in 0..1 + rng.below(8) {
        if b.is_empty() {
            break;
        }
        let at = rng.below(b.len());
        match rng.below(6) {
            0 => b[at] ^= 1 << rng.below(8),
            1 => {
                let junk: &[u8] = rng.pick::<&[u8]>(&[
                    b"{".as_slice(),
                    b"}",
                    b"(",
                    b"\"",
                    b"\0",
                    b"\xff\xfe",
                    b"\xe2\x80\xae",
                    b"\r",
                    b"\n",
                    b"->",
                    b"##",
                    b"\xc0\x80",
                    b"stage x from 1 Ga to 0 Ga {",
                ]);
                b.splice(at..at, junk.iter().copied());
            }
            2 => b.truncate(at),
            3 => {
                let end = (at + rng.below(40)).min(b.len());
                b.drain(at..end);
            }
            4 => {
                let end = (at + rng.below(60)).min(b.len());
                let chunk = b[at..end].to_vec();
                b.splice(at..at, chunk);
            }
            _ => b[at] = rng.next() as u8,
        }
    }
    b
}

fn utf16(text: &str, big_endian: bool) -> Vec<u8> {
    let mut out = if big_endian {
        vec![0xfe, 0xff]
    } else {
        vec![0xff, 0xfe]
    };
    for u in text.encode_utf16() {
        let b = if big_endian {
            u.to_be_bytes()
        } else {
            u.to_le_bytes()
        };
        out.extend_from_slice(&b);
    }
    out
}

/// The number of families `generate` draws from.
pub const FAMILIES: u64 = 30;

/// Case `index` of the corpus for `seed`.
pub fn generate(seed: u64, index: u64) -> Case {
    let mut rng = Mix(hadal::ensemble::SplitMix(
        seed ^ index.wrapping_mul(0x2545_f491_4f6c_dd1d),
    ));
    rng.next();
    let family = index % FAMILIES;
    let f = "s.hadal";
    match family {
        0 => {
            // Deep parentheses, unary minus, or brackets.
            let depth = *rng.pick(&[10usize, 63, 64, 65, 200, 5_000, 100_000, 1_000_000]);
            let (open, close) = *rng.pick(&[("(", ")"), ("-", ""), ("-(", ")"), ("min(1,", ")")]);
            let expr = format!("{}1{}", open.repeat(depth), close.repeat(depth));
            let mut c = case(index, "nesting");
            c.files
                .push((s(f), bytes(with_line(&format!("let deep = {expr}")))));
            c.args = verb_on(&mut rng, f);
            c
        }
        1 => {
            // Long operator chains and many terms.
            let n = *rng.pick(&[127usize, 128, 129, 1_000, 100_000, 1_000_000]);
            let op = *rng.pick(&[" + ", "*", " and ", "^"]);
            let expr = vec!["1"; n].join(op);
            let mut c = case(index, "operators");
            c.files
                .push((s(f), bytes(with_line(&format!("let chain = {expr}")))));
            c.args = verb_on(&mut rng, f);
            c
        }
        2 => {
            // Blocks: unbalanced, nested, huge.
            let depth = *rng.pick(&[2usize, 50, 10_000, 500_000]);
            let text = match rng.below(4) {
                0 => format!("{BASE}{}", "stage x from 1 Ga to 0 Ga {\n".repeat(depth)),
                1 => format!("{BASE}{}", "}\n".repeat(depth)),
                2 => format!("{BASE}ensemble {{\n{}}}\n", "ensemble {\n".repeat(depth)),
                _ => replaced(
                    "stage two from 0.5 Ga to 0 Ga\n",
                    &format!(
                        "stage two from 0.5 Ga to 0 Ga {{\n{}}}\n",
                        "  set k = 1 / 1 Gyr\n".repeat(depth)
                    ),
                ),
            };
            let mut c = case(index, "blocks");
            c.files.push((s(f), bytes(text)));
            c.args = verb_on(&mut rng, f);
            c
        }
        3 => {
            // Include chains, cycles, self-includes, fan-out.
            let n = *rng.pick(&[2usize, 16, 17, 64, 300]);
            let mut c = case(index, "includes");
            let cyclic = rng.chance(0.4);
            for i in 0..n {
                let next = if i + 1 < n {
                    format!("include \"lib{}.hadal\"\n", i + 1)
                } else if cyclic {
                    s("include \"lib0.hadal\"\n")
                } else {
                    String::new()
                };
                c.files.push((
                    format!("lib{i}.hadal"),
                    bytes(format!("{next}const c{i} = {i} kg\n")),
                ));
            }
            let fan = if rng.chance(0.3) {
                (0..n)
                    .map(|i| format!("include \"lib{i}.hadal\"\n"))
                    .collect::<String>()
            } else {
                s("include \"lib0.hadal\"\n")
            };
            c.files.push((s(f), bytes(format!("{fan}{BASE}"))));
            c.args = verb_on(&mut rng, f);
            c
        }
        4 => {
            // Numbers at and beyond the edges of a double.
            let mut c = case(index, "numbers");
            let unit = *rng.pick(UNITS);
            let n = number(&mut rng);
            let text = match rng.below(5) {
                0 => with_line(&format!("param huge = {n} {unit}")),
                1 => replaced("reservoir a = 1e21 kg", &format!("reservoir a = {n} kg")),
                2 => replaced("report every 100 Myr", &format!("report every {n} Myr")),
                3 => replaced("span 1 Ga to 0 Ga", &format!("span {n} Ga to 0 Ga")),
                _ => replaced("param k = 0.5 / 1 Gyr", &format!("param k = {n} / 1 Gyr")),
            };
            c.files.push((s(f), bytes(text)));
            c.args = verb_on(&mut rng, f);
            c
        }
        5 => {
            // Sizes: long names, many statements, long lines, large files.
            let mut c = case(index, "sizes");
            let text = match rng.below(6) {
                0 => with_line(&format!(
                    "param {} = 1 kg",
                    "x".repeat(*rng.pick(&[256usize, 100_000, 3_000_000]))
                )),
                1 => {
                    let n = *rng.pick(&[1_000usize, 20_000, 100_000]);
                    let mut t = String::with_capacity(n * 24);
                    for i in 0..n {
                        t.push_str(&format!("const q{i} = {i} kg\n"));
                    }
                    t.push_str(BASE);
                    t
                }
                2 => format!(
                    "# {}\n{BASE}",
                    "x".repeat(*rng.pick(&[70_000usize, 5_000_000]))
                ),
                3 => format!(
                    "{BASE}{}",
                    "\n".repeat(*rng.pick(&[100_000usize, 4_194_304]))
                ),
                4 => with_line(&format!("let s = \"{}\"", "y".repeat(1 << 20))),
                _ => {
                    // Many reservoirs and fluxes: a large but honest model.
                    let n = *rng.pick(&[50usize, 400]);
                    let mut t = s(BASE);
                    let at = t.find("stage one").unwrap();
                    let mut extra = String::new();
                    for i in 0..n {
                        extra.push_str(&format!(
                            "reservoir r{i} = 1e18 kg\nflux f{i}: a -> r{i} = 1e-12 / 1 yr * a\n"
                        ));
                    }
                    t.insert_str(at, &extra);
                    t
                }
            };
            c.files.push((s(f), bytes(text)));
            c.args = verb_on(&mut rng, f);
            c
        }
        6 => {
            // Cadence and span: rows by the million, tiny and huge times.
            let mut c = case(index, "cadence");
            let (span, every) = *rng.pick(&[
                ("1 Ga to 0 Ga", "1 yr"),
                ("1 Ga to 0 Ga", "1 kyr"),
                ("1 Ga to 0 Ga", "100 yr"),
                ("1 Ga to 0 Ga", "1e-300 yr"),
                ("1 Ga to 0 Ga", "0 yr"),
                ("1 Ga to 0 Ga", "-1 Myr"),
                ("1e300 Ga to 0 Ga", "1 Gyr"),
                ("1 Ga to 0 Ga", "2 Gyr"),
                ("1 Ga to 0.999999999 Ga", "1e-9 yr"),
            ]);
            let text = BASE
                .replace("span 1 Ga to 0 Ga", &format!("span {span}"))
                .replace("report every 100 Myr", &format!("report every {every}"));
            c.files.push((s(f), bytes(text)));
            c.args = verb_on(&mut rng, f);
            c
        }
        7 | 8 => {
            // Random expressions with random units.
            let mut c = case(index, "units");
            let depth = 1 + rng.below(5);
            let e = expression(&mut rng, depth);
            let text = match rng.below(4) {
                0 => with_line(&format!("let r = {e}")),
                1 => with_line(&format!("output r = {e} in {}", rng.pick(UNITS))),
                2 => replaced(
                    "flux back: b -> a = 0.1 / 1 Gyr * b",
                    &format!("flux back: b -> a = {e}"),
                ),
                _ => with_line(&format!("expect {e} at 0 Ga = {e} +- {e}")),
            };
            c.files.push((s(f), bytes(text)));
            c.args = verb_on(&mut rng, f);
            c
        }
        9 => {
            // Encodings.
            let mut c = case(index, "encodings");
            let b: Vec<u8> = match rng.below(9) {
                0 => [b"\xef\xbb\xbf".as_slice(), BASE.as_bytes()].concat(),
                1 => utf16(BASE, false),
                2 => utf16(BASE, true),
                3 => BASE.replace('\n', "\r").into_bytes(),
                4 => BASE.replace('\n', "\r\n").into_bytes(),
                5 => BASE.replace("ab", "a\u{200b}b").into_bytes(),
                6 => BASE
                    .replace("output total", "output t\u{202e}otal")
                    .into_bytes(),
                7 => [BASE.as_bytes(), b"\xff\xfe\x00\xc0\x80\xed\xa0\x80"].concat(),
                _ => BASE
                    .replace("reservoir b", "reservoir \u{1f30a}")
                    .into_bytes(),
            };
            c.files.push((s(f), bytes(b)));
            c.args = verb_on(&mut rng, f);
            c
        }
        10 | 11 => {
            // Random damage to a valid file (with its ensemble block).
            let mut c = case(index, "mutations");
            let text = format!("{BASE}{ENSEMBLE}");
            c.files
                .push((s(f), bytes(mutate(&mut rng, text.as_bytes()))));
            c.args = verb_on(&mut rng, f);
            c
        }
        12 => {
            // The scenario argument is not a regular file.
            let mut c = case(index, "file kinds");
            let entry = match rng.below(8) {
                0 => Entry::Dir,
                1 => Entry::Fifo,
                2 => Entry::Symlink(s("/dev/zero")),
                3 => Entry::Symlink(s("/dev/null")),
                4 => Entry::Symlink(s("loop.hadal")),
                5 => Entry::Symlink(s("missing.hadal")),
                6 => Entry::Sparse(*rng.pick(&[5u64 << 20, 3 << 30])),
                _ => bytes(Vec::new()),
            };
            if matches!(entry, Entry::Symlink(ref t) if t == "loop.hadal") {
                c.files.push((s("loop.hadal"), Entry::Symlink(s(f))));
            }
            c.files.push((s(f), entry));
            c.args = verb_on(&mut rng, f);
            c
        }
        13 => {
            // A table or an include that is not a regular file.
            let mut c = case(index, "data file kinds");
            let entry = match rng.below(5) {
                0 => Entry::Dir,
                1 => Entry::Fifo,
                2 => Entry::Symlink(s("/dev/zero")),
                3 => Entry::Sparse(3 << 30),
                _ => bytes(Vec::new()),
            };
            if rng.chance(0.5) {
                c.files.push((s("t.csv"), entry));
                c.files.push((
                    s(f),
                    bytes(with_line(
                        "table t = \"t.csv\" (Ga, kg)\noutput tv = t(age) in kg",
                    )),
                ));
            } else {
                c.files.push((s("inc.hadal"), entry));
                c.files
                    .push((s(f), bytes(format!("include \"inc.hadal\"\n{BASE}"))));
            }
            c.args = verb_on(&mut rng, f);
            c
        }
        14 => {
            // Tables: large, broken, hostile numbers.
            let mut c = case(index, "tables");
            let body = match rng.below(6) {
                0 => {
                    let n = *rng.pick(&[10usize, 100_000, 1_000_000]);
                    let mut t = String::new();
                    for i in 0..n {
                        t.push_str(&format!("{},{}\n", i as f64 * 1e-6, i));
                    }
                    t
                }
                1 => s("age,x\n0,nan\n1,inf\n"),
                2 => s("0,1\n0,2\n"),
                3 => s("0,1\n1,2,3\n"),
                4 => format!("0,1\n1,{}\n", "9".repeat(400)),
                _ => String::from_utf8_lossy(&mutate(&mut rng, b"age,x\n0,1\n0.5,2\n1,3\n"))
                    .into_owned(),
            };
            c.files.push((s("t.csv"), bytes(body)));
            c.files.push((
                s(f),
                bytes(with_line(
                    "table t = \"t.csv\" (Ga, kg)\noutput tv = t(age) in kg",
                )),
            ));
            c.args = verb_on(&mut rng, f);
            c
        }
        15 => {
            // Include and table paths that leave the project or make no sense.
            let mut c = case(index, "paths");
            let path = *rng.pick(&[
                "/etc/passwd",
                "../../../../etc/passwd",
                "../outside.hadal",
                "sub/../../x.hadal",
                "",
                ".",
                "..",
                "/",
                "/dev/zero",
                "/proc/self/mem",
                "C:\\\\Windows\\\\x",
                "\\\\\\\\server\\\\share",
                "~/x.hadal",
                "a\\u0000b",
                "s.hadal",
            ]);
            let long = "d/".repeat(3000);
            let path = if rng.chance(0.1) { long.as_str() } else { path };
            let line = if rng.chance(0.5) {
                format!("include \"{path}\"")
            } else {
                format!("table t = \"{path}\" (Ga, kg)\noutput tv = t(age) in kg")
            };
            c.files.push((s(f), bytes(format!("{line}\n{BASE}"))));
            c.args = verb_on(&mut rng, f);
            c
        }
        16 => {
            // Scenario arguments that are odd paths.
            let mut c = case(index, "argument paths");
            c.files.push((s(f), bytes(BASE)));
            let long = format!("{}.hadal", "n".repeat(300));
            let p = rng
                .pick(&[
                    "missing.hadal",
                    "",
                    "-",
                    "--",
                    "/",
                    ".",
                    "/dev/stdin",
                    "/proc/self/fd/0",
                    "s.hadal/",
                    "./s.hadal",
                    "s.hadal\n",
                    long.as_str(),
                ])
                .to_string();
            c.args = verb_on(&mut rng, &p);
            c
        }
        17 | 18 => {
            // Options with values at and beyond their limits.
            let mut c = case(index, "options");
            c.files.push((s(f), bytes(format!("{BASE}{ENSEMBLE}"))));
            let big = *rng.pick(&[
                "0",
                "-1",
                "1",
                "abc",
                "",
                "1e3",
                "4294967296",
                "18446744073709551615",
                "18446744073709551616",
                "340282366920938463463374607431768211456",
                "٣",
                "1_000",
                " 2",
            ]);
            c.args = match rng.below(9) {
                0 => args(&[
                    "ensemble",
                    f,
                    "--no-plots",
                    "--members",
                    "4",
                    "--threads",
                    big,
                ]),
                1 => {
                    // Member counts: only those the tool must refuse quickly,
                    // or a handful (a legitimate million would just be slow).
                    let m = *rng.pick(&[
                        "0",
                        "-1",
                        "abc",
                        "",
                        "18446744073709551616",
                        "1e400",
                        "100000001",
                        "3",
                    ]);
                    args(&["ensemble", f, "--no-plots", "--members", m])
                }
                2 => args(&["ensemble", f, "--no-plots", "--members", "4", "--seed", big]),
                3 => {
                    let k = *rng.pick(&[
                        "0/0",
                        "1/0",
                        "0/1",
                        "5/3",
                        "a/b",
                        "1/",
                        "/1",
                        "1//2",
                        "1/18446744073709551616",
                        "18446744073709551615/18446744073709551615",
                        "2/1000000",
                        "1/2",
                        "-1/2",
                        "1/2/3",
                    ]);
                    args(&["ensemble", f, "--no-plots", "--members", "4", "--shard", k])
                }
                4 => {
                    let d = *rng.pick(&[
                        "18446744073709551615s",
                        "18446744073709551616s",
                        "99999999999999999999d",
                        "1e400d",
                        "-1d",
                        "0s",
                        "d",
                        "",
                        "30",
                        "30x",
                        "9223372036854775807h",
                        "1.5d",
                        "nand",
                    ]);
                    args(&["cache", "gc", "--older-than", d])
                }
                5 => {
                    let z = *rng.pick(&[
                        "18446744073709551615",
                        "18446744073709551616G",
                        "99999999999T",
                        "-1",
                        "0",
                        "G",
                        "",
                        "1.5G",
                        "1e400",
                        "17179869184P",
                    ]);
                    args(&["cache", "gc", "--max-size", z])
                }
                6 => {
                    let r = *rng.pick(&["nan", "-1", "inf", "1e400", "0", "abc", "1e-400", "-0"]);
                    args(&["verify", "--rtol", r, "m.json"])
                }
                7 => {
                    let v = *rng.pick(&[
                        "k",
                        "=",
                        "k=",
                        "=1",
                        "k=1\nflux drain: a -> outside = a",
                        "k=1 / 1 Gyr; cap = 1 kg",
                        "k=1e999 / 1 Gyr",
                        "k=0.2 / 1 Gyr # comment",
                        "k=(((((1 / 1 Gyr",
                        "k=1 kg",
                        "nosuch=1",
                        "k=\u{0}",
                        "k=1 / 1 Gyr)",
                        "a=1 kg",
                    ]);
                    let verb = *rng.pick(&["run", "params"]);
                    let mut a = args(&[verb, f, "--set", v]);
                    if verb == "run" {
                        a.push(s("--no-plots"));
                    }
                    a
                }
                _ => {
                    // Unknown flags, repeated flags, flags without values.
                    let extra = *rng.pick(&[
                        "--frobnicate",
                        "--out",
                        "--set",
                        "--threads",
                        "-x",
                        "--json=1",
                    ]);
                    args(&["run", f, extra])
                }
            };
            c
        }
        19 => {
            // Ensemble blocks that ask for too much or nothing at all.
            let mut c = case(index, "ensemble blocks");
            let vary = *rng.pick(&[
                "vary k ~ normal(0.5 / 1 Gyr, 0.1 / 1 Gyr), min = 64 / 1 Gyr",
                "vary k ~ normal(0.5 / 1 Gyr, 0.1 / 1 Gyr), max = -64 / 1 Gyr",
                "vary k ~ normal(0.5 / 1 Gyr, 0 / 1 Gyr)",
                "vary k ~ normal(0.5 / 1 Gyr, -1 / 1 Gyr)",
                "vary k ~ uniform(1 / 1 Gyr, 0.1 / 1 Gyr)",
                "vary k ~ uniform(0.1 / 1 Gyr, 0.1 / 1 Gyr)",
                "vary k ~ log_uniform(-1 / 1 Gyr, 1 / 1 Gyr)",
                "vary k ~ log_normal(0.5 / 1 Gyr, -1)",
                "vary k ~ list()",
                "vary k ~ grid(0.1 / 1 Gyr, 1 / 1 Gyr, 0)",
                "vary k ~ grid(0.1 / 1 Gyr, 1 / 1 Gyr, 1e30)",
                "vary k ~ grid(0.1 / 1 Gyr, 1 / 1 Gyr, 65536)\n  vary cap ~ grid(1e20 kg, 9e20 kg, 65536)\n  vary a ~ grid(1 kg, 2 kg, 65536)",
                "vary k ~ grid(0.1 / 1 Gyr, 1 / 1 Gyr, 4294967296)\n  vary cap ~ grid(1e20 kg, 9e20 kg, 4294967296)\n  vary k ~ grid(1, 2, 3)",
                "vary k ~ uniform(0.1 kg, 1 kg)",
                "vary nosuch ~ uniform(0, 1)",
                "vary k ~ uniform(nan / 1 Gyr, 1 / 1 Gyr)",
                "vary cap ~ normal(5e20 kg, 1e300 kg)",
                "vary cap ~ uniform(-1e308 kg, 1e308 kg)",
            ]);
            let members = *rng.pick(&[
                "members = 4",
                "members = 0",
                "members = -3",
                "members = 1e30",
                "members = 2.5",
                "",
            ]);
            let text = format!("{BASE}ensemble {{\n  {members}\n  seed = 1\n  {vary}\n}}\n");
            c.files.push((s(f), bytes(text)));
            c.args = if rng.chance(0.3) {
                args(&["check", f])
            } else {
                args(&["ensemble", f, "--no-plots", "--members", "4"])
            };
            c
        }
        20 => {
            // Expectations, stages and events at the edges.
            let mut c = case(index, "structure");
            let text = match rng.below(10) {
                0 => with_line("expect total at 2 Ga = 1 kg +- 1 kg"),
                1 => with_line("expect total at -1 Ga = 1 kg +- 1 kg"),
                2 => with_line("expect total at 0 Ga = 1 kg +- -1 kg"),
                3 => with_line("expect total at 0 Ga = 1 kg +- 0 kg"),
                4 => with_line("expect total at 0 Ga in 2 kg to 1 kg"),
                5 => replaced(
                    "stage two from 0.5 Ga to 0 Ga",
                    "stage two from 0.5 Ga to 0.5 Ga\nstage three from 0.5 Ga to 0 Ga",
                ),
                6 => replaced(
                    "stage one from 1 Ga to 0.5 Ga",
                    "stage one from 0.5 Ga to 1 Ga",
                ),
                7 => replaced("span 1 Ga to 0 Ga", "span 1 Ga to 1 Ga"),
                8 => with_line("expect half before 2 Ga\nexpect half after -5 Ga"),
                _ => with_line("event never = a < 0 kg\nexpect never before 0.5 Ga"),
            };
            c.files.push((s(f), bytes(text)));
            c.args = verb_on(&mut rng, f);
            c
        }
        21 | 22 => {
            // Manifests from someone else.
            let mut c = case(index, "manifests");
            c.files.push((s(f), bytes(BASE)));
            c.setup
                .push(args(&["run", f, "--no-plots", "--out", "out"]));
            let hostile = match rng.below(12) {
                0 => Some(Entry::Fifo),
                1 => Some(Entry::Symlink(s("/dev/zero"))),
                2 => Some(Entry::Sparse(3 << 30)),
                3 => Some(bytes(format!(
                    "{}1{}",
                    "[".repeat(200_000),
                    "]".repeat(200_000)
                ))),
                4 => Some(bytes("{}")),
                5 => Some(Entry::Dir),
                _ => None,
            };
            match hostile {
                Some(e) => c.after_setup.push((s("out/manifest.json"), e)),
                None => {
                    // Rewrite one path field of the real manifest.
                    let target = *rng.pick(&[
                        "/etc/passwd",
                        "../../../../../etc/passwd",
                        "/dev/zero",
                        "..",
                        "/",
                        "out/manifest.json",
                        "s.hadal/../../x",
                        "",
                    ]);
                    let field = *rng.pick(&["scenario", "root", "input", "output"]);
                    c.after_setup
                        .push((s("edit-manifest"), bytes(format!("{field}\n{target}"))));
                }
            }
            c.args = if rng.chance(0.8) {
                args(&["verify", "out/manifest.json"])
            } else {
                args(&["diff", "out/manifest.json", "out"])
            };
            c
        }
        23 | 24 => {
            // A cache with damaged entries, then a run that reads it.
            let mut c = case(index, "cache");
            c.files.push((s(f), bytes(BASE)));
            c.setup
                .push(args(&["run", f, "--no-plots", "--out", "first"]));
            let damage = match rng.below(7) {
                0 => Entry::Fifo,
                1 => Entry::Symlink(s("/dev/zero")),
                2 => Entry::Sparse(3 << 30),
                3 => bytes(Vec::new()),
                4 => Entry::Dir,
                5 => bytes(vec![0u8; 1 + rng.below(4096)]),
                _ => bytes(b"corrupt".to_vec()),
            };
            // `@cache-entries` is resolved when the setup has run: every
            // regular file under the cache directory gets the damage.
            c.after_setup.push((s("@cache-entries"), damage));
            c.args = match rng.below(4) {
                0 => args(&["cache", "verify"]),
                1 => args(&["cache", "stats"]),
                2 => args(&["cache", "gc", "--max-size", "1K"]),
                _ => args(&["run", f, "--no-plots", "--out", "second"]),
            };
            c
        }
        25 => {
            // The cache directory itself is not a directory.
            let mut c = case(index, "cache directory");
            c.files.push((s(f), bytes(BASE)));
            let entry = match rng.below(4) {
                0 => bytes(b"a file".to_vec()),
                1 => Entry::Fifo,
                2 => Entry::Symlink(s("/dev/null")),
                _ => Entry::Symlink(s("/proc/self")),
            };
            c.files.push((s("cachefile"), entry));
            c.env.push((s("HADAL_CACHE"), s("cachefile")));
            c.args = match rng.below(3) {
                0 => args(&["cache", "stats"]),
                1 => args(&["ensemble", f, "--no-plots", "--members", "3"]),
                _ => args(&["run", f, "--no-plots"]),
            };
            c
        }
        26 => {
            // Output directories that cannot be written as asked.
            let mut c = case(index, "output paths");
            c.files.push((s(f), bytes(BASE)));
            let (entry, out) = match rng.below(4) {
                0 => (Some(bytes(b"file".to_vec())), "taken"),
                1 => (Some(Entry::Fifo), "taken"),
                2 => (Some(Entry::Symlink(s("/dev/null"))), "taken"),
                _ => (None, "/proc/no/such/dir"),
            };
            if let Some(e) = entry {
                c.files.push((s(out), e));
            }
            c.args = args(&["run", f, "--no-plots", "--out", out]);
            c
        }
        27 => {
            // Directories for plot, report, diff and merge that hold junk.
            let mut c = case(index, "result directories");
            c.files.push((s("d"), Entry::Dir));
            let file = *rng.pick(&[
                "series.csv",
                "manifest.json",
                "members.csv",
                "summary.json",
                "stages.csv",
                "events.csv",
            ]);
            let entry = match rng.below(5) {
                0 => Entry::Fifo,
                1 => Entry::Symlink(s("/dev/zero")),
                2 => Entry::Sparse(3 << 30),
                3 => bytes(mutate(&mut rng, b"age [Ga],a [kg]\n1,2\n0.5,3\n0,4\n")),
                _ => bytes(b"\xff\xfe\x00garbage".to_vec()),
            };
            c.files.push((format!("d/{file}"), entry));
            c.files.push((s("e"), Entry::Dir));
            c.args = match rng.below(4) {
                0 => args(&["plot", "d"]),
                1 => args(&["report", "d"]),
                2 => args(&["diff", "d", "e"]),
                _ => args(&["merge", "d", "e", "--out", "m"]),
            };
            c
        }
        28 => {
            // A run that works, then the same run again: the happy path
            // under the same bounds, with and without the cache.
            let mut c = case(index, "baseline");
            c.files.push((s(f), bytes(format!("{BASE}{ENSEMBLE}"))));
            c.setup.push(args(&["run", f, "--no-plots", "--out", "o1"]));
            c.args = match rng.below(3) {
                0 => args(&["run", f, "--no-plots", "--out", "o2"]),
                1 => args(&["verify", "o1/manifest.json"]),
                _ => args(&["ensemble", f, "--no-plots", "--threads", "2"]),
            };
            c
        }
        _ => {
            // Several of the above at once: a damaged file in a damaged tree.
            let mut c = case(index, "combined");
            let line = format!("let r = {}", expression(&mut rng, 4));
            let text = mutate(&mut rng, with_line(&line).as_bytes());
            c.files.push((s("inc.hadal"), Entry::Fifo));
            c.files.push((s(f), bytes(text)));
            c.args = verb_on(&mut rng, f);
            c
        }
    }
}

/// How a case ended.
#[derive(Debug, Clone)]
pub struct Outcome {
    pub code: Option<i32>,
    pub signal: Option<i32>,
    pub timed_out: bool,
    pub peak_kib: u64,
    pub elapsed: Duration,
    pub stderr: String,
}

#[derive(Debug, Clone, Copy)]
pub struct Bounds {
    pub time: Duration,
    pub memory_kib: u64,
}

impl Default for Bounds {
    fn default() -> Bounds {
        Bounds {
            time: Duration::from_secs(20),
            memory_kib: 1024 * 1024,
        }
    }
}

/// Why an outcome breaks the corpus's promises, if it does.
pub fn judge(o: &Outcome, b: &Bounds) -> Option<String> {
    if o.timed_out {
        return Some(format!("ran over its time bound of {:?}", b.time));
    }
    if let Some(sig) = o.signal {
        return Some(format!("ended by signal {sig}"));
    }
    if o.stderr.contains("panicked") || o.stderr.contains("RUST_BACKTRACE") {
        return Some(s("panicked"));
    }
    match o.code {
        Some(0..=2) => {}
        other => return Some(format!("exit code {other:?} (documented: 0, 1, 2)")),
    }
    if o.peak_kib > b.memory_kib {
        return Some(format!(
            "peak memory {} MiB over the bound of {} MiB",
            o.peak_kib / 1024,
            b.memory_kib / 1024
        ));
    }
    None
}

fn make(root: &Path, rel: &str, entry: &Entry) -> std::io::Result<()> {
    let p = root.join(rel);
    if let Some(parent) = p.parent() {
        std::fs::create_dir_all(parent)?;
    }
    if p.symlink_metadata().is_ok() {
        if p.is_dir() && !p.symlink_metadata()?.file_type().is_symlink() {
            std::fs::remove_dir_all(&p)?;
        } else {
            std::fs::remove_file(&p)?;
        }
    }
    match entry {
        Entry::Bytes(b) => std::fs::write(&p, b),
        Entry::Dir => std::fs::create_dir_all(&p),
        Entry::Fifo => {
            let c = std::ffi::CString::new(p.as_os_str().as_encoded_bytes()).unwrap();
            // SAFETY: a valid NUL-terminated path.
            if unsafe { libc::mkfifo(c.as_ptr(), 0o644) } != 0 {
                return Err(std::io::Error::last_os_error());
            }
            Ok(())
        }
        Entry::Symlink(t) => std::os::unix::fs::symlink(t, &p),
        Entry::Sparse(len) => std::fs::File::create(&p)?.set_len(*len),
    }
}

fn files_under(dir: &Path, out: &mut Vec<PathBuf>) {
    let Ok(rd) = std::fs::read_dir(dir) else {
        return;
    };
    for e in rd.flatten() {
        let p = e.path();
        match e.file_type() {
            Ok(t) if t.is_dir() => files_under(&p, out),
            Ok(t) if t.is_file() => out.push(p),
            _ => {}
        }
    }
}

/// Edit one path field of a manifest the setup wrote.
fn edit_manifest(root: &Path, spec: &str) {
    let (field, target) = spec.split_once('\n').unwrap_or((spec, ""));
    let p = root.join("out/manifest.json");
    let Ok(text) = std::fs::read_to_string(&p) else {
        return;
    };
    let Ok(mut v) = serde_json::from_str::<serde_json::Value>(&text) else {
        return;
    };
    fn set_paths(v: &mut serde_json::Value, key: &str, target: &str, depth: usize) {
        match v {
            serde_json::Value::Object(m) => {
                for (k, x) in m.iter_mut() {
                    let hit = match key {
                        "scenario" => k == "scenario",
                        "root" => k.contains("root"),
                        "input" => k == "inputs",
                        _ => k == "outputs",
                    };
                    if hit {
                        replace_strings(x, target, depth == 0 || key != "scenario");
                    } else {
                        set_paths(x, key, target, depth + 1);
                    }
                }
            }
            serde_json::Value::Array(a) => a
                .iter_mut()
                .for_each(|x| set_paths(x, key, target, depth + 1)),
            _ => {}
        }
    }
    fn replace_strings(v: &mut serde_json::Value, target: &str, all: bool) {
        match v {
            serde_json::Value::String(s) => *s = target.to_owned(),
            serde_json::Value::Object(m) => {
                for (k, x) in m.iter_mut() {
                    let replace = k == "path" || all && k != "blake3";
                    if replace || !x.is_string() {
                        replace_strings(x, target, all);
                    }
                }
            }
            serde_json::Value::Array(a) => {
                a.iter_mut().for_each(|x| replace_strings(x, target, all))
            }
            _ => {}
        }
    }
    set_paths(&mut v, field, target, 0);
    let _ = std::fs::write(&p, serde_json::to_vec_pretty(&v).unwrap_or_default());
}

fn spawn_and_wait(
    bin: &Path,
    dir: &Path,
    args: &[String],
    env: &[(String, String)],
    bounds: &Bounds,
    log: &str,
) -> Outcome {
    use std::os::unix::process::CommandExt;
    let err_path = dir.join(format!("{log}.stderr"));
    let out_path = dir.join(format!("{log}.stdout"));
    let start = Instant::now();
    let mut cmd = Command::new(bin);
    cmd.args(args)
        .current_dir(dir)
        .env("NO_COLOR", "1")
        .env("HADAL_CACHE", dir.join("cache"))
        .env_remove("RUST_BACKTRACE")
        .stdin(Stdio::null())
        .stdout(
            std::fs::File::create(&out_path)
                .map(Stdio::from)
                .unwrap_or(Stdio::null()),
        )
        .stderr(
            std::fs::File::create(&err_path)
                .map(Stdio::from)
                .unwrap_or(Stdio::null()),
        );
    for (k, v) in env {
        cmd.env(k, dir.join(v));
    }
    // A safety net for the machine, far above the judged bound: a runaway
    // case fails its allocation instead of taking the machine down.
    // SAFETY: setrlimit is async-signal-safe.
    unsafe {
        cmd.pre_exec(|| {
            let lim = libc::rlimit {
                rlim_cur: 16 << 30,
                rlim_max: 16 << 30,
            };
            libc::setrlimit(libc::RLIMIT_AS, &lim);
            Ok(())
        });
    }
    let child = match cmd.spawn() {
        Ok(c) => c,
        Err(e) => {
            return Outcome {
                code: Some(-1),
                signal: None,
                timed_out: false,
                peak_kib: 0,
                elapsed: start.elapsed(),
                stderr: format!("could not start: {e}"),
            }
        }
    };
    let pid = child.id() as libc::pid_t;
    let mut status = 0;
    // SAFETY: zeroed rusage is a valid value to be overwritten.
    let mut usage: libc::rusage = unsafe { std::mem::zeroed() };
    let mut timed_out = false;
    loop {
        // SAFETY: pid is our own child, not yet reaped (std never waits on
        // it: `child` is dropped unwaited).
        let r = unsafe { libc::wait4(pid, &mut status, libc::WNOHANG, &mut usage) };
        if r == pid {
            break;
        }
        if r < 0 {
            break;
        }
        if start.elapsed() > bounds.time && !timed_out {
            timed_out = true;
            // SAFETY: signalling our own child.
            unsafe { libc::kill(pid, libc::SIGKILL) };
        }
        std::thread::sleep(Duration::from_millis(
            if start.elapsed() < Duration::from_millis(50) {
                1
            } else {
                10
            },
        ));
    }
    drop(child);
    let elapsed = start.elapsed();
    let (code, signal) = if libc::WIFEXITED(status) {
        (Some(libc::WEXITSTATUS(status)), None)
    } else if libc::WIFSIGNALED(status) {
        (None, Some(libc::WTERMSIG(status)))
    } else {
        (None, None)
    };
    let mut stderr = std::fs::read(&err_path).unwrap_or_default();
    stderr.truncate(64 * 1024);
    Outcome {
        code,
        signal: if timed_out { None } else { signal },
        timed_out,
        peak_kib: usage.ru_maxrss as u64,
        elapsed,
        stderr: String::from_utf8_lossy(&stderr).into_owned(),
    }
}

/// Lay out a case in `dir` (a fresh directory), run its setup and its
/// command, and return the outcome of the command (or of the first setup
/// step that broke a bound).
pub fn run_case(bin: &Path, dir: &Path, c: &Case, bounds: &Bounds) -> Outcome {
    let _ = std::fs::create_dir_all(dir.join(".git"));
    for (rel, e) in &c.files {
        let _ = make(dir, rel, e);
    }
    for (k, a) in c.setup.iter().enumerate() {
        let o = spawn_and_wait(bin, dir, a, &c.env, bounds, &format!("setup{k}"));
        if judge(&o, bounds).is_some() {
            return o;
        }
    }
    for (rel, e) in &c.after_setup {
        match rel.as_str() {
            "@cache-entries" => {
                let mut files = Vec::new();
                files_under(&dir.join("cache"), &mut files);
                for p in files {
                    let rel = p.strip_prefix(dir).unwrap().to_string_lossy().into_owned();
                    let _ = make(dir, &rel, e);
                }
            }
            "edit-manifest" => {
                if let Entry::Bytes(b) = e {
                    edit_manifest(dir, &String::from_utf8_lossy(b));
                }
            }
            _ => {
                let _ = make(dir, rel, e);
            }
        }
    }
    spawn_and_wait(bin, dir, &c.args, &c.env, bounds, "case")
}

/// Write a case's inputs and command line where a person can replay it.
pub fn describe(c: &Case) -> String {
    let mut out = format!("case {} ({})\n", c.index, c.family);
    for (rel, e) in c.files.iter().chain(&c.after_setup) {
        let what = match e {
            Entry::Bytes(b) if b.len() <= 400 => format!("{:?}", String::from_utf8_lossy(b)),
            Entry::Bytes(b) => format!(
                "{} bytes, starting {:?}",
                b.len(),
                String::from_utf8_lossy(&b[..200])
            ),
            other => format!("{other:?}"),
        };
        out.push_str(&format!("  file {rel}: {what}\n"));
    }
    for a in &c.setup {
        out.push_str(&format!("  setup: hadal {}\n", shell_words(a)));
    }
    out.push_str(&format!("  run: hadal {}\n", shell_words(&c.args)));
    out
}

fn shell_words(a: &[String]) -> String {
    a.iter()
        .map(|x| format!("{x:?}"))
        .collect::<Vec<_>>()
        .join(" ")
}

/// Totals of a campaign.
#[derive(Debug, Default, Clone)]
pub struct Tally {
    pub cases: u64,
    pub failed: u64,
    pub panics: u64,
    pub signals: u64,
    pub timeouts: u64,
    pub over_memory: u64,
    pub peak_kib: u64,
    pub slowest: Duration,
    pub by_code: [u64; 3],
}

impl Tally {
    pub fn add(&mut self, o: &Outcome, verdict: &Option<String>) {
        self.cases += 1;
        if verdict.is_some() {
            self.failed += 1;
        }
        if o.stderr.contains("panicked") {
            self.panics += 1;
        }
        if o.signal.is_some() {
            self.signals += 1;
        }
        if o.timed_out {
            self.timeouts += 1;
        }
        if verdict
            .as_deref()
            .is_some_and(|v| v.starts_with("peak memory"))
        {
            self.over_memory += 1;
        }
        self.peak_kib = self.peak_kib.max(o.peak_kib);
        self.slowest = self.slowest.max(o.elapsed);
        if let Some(c @ 0..=2) = o.code {
            self.by_code[c as usize] += 1;
        }
    }

    pub fn merge(&mut self, o: &Tally) {
        self.cases += o.cases;
        self.failed += o.failed;
        self.panics += o.panics;
        self.signals += o.signals;
        self.timeouts += o.timeouts;
        self.over_memory += o.over_memory;
        self.peak_kib = self.peak_kib.max(o.peak_kib);
        self.slowest = self.slowest.max(o.slowest);
        for k in 0..3 {
            self.by_code[k] += o.by_code[k];
        }
    }
}

/// Append a failing case's description and outcome to `log`.
pub fn record_failure(log: &mut impl Write, c: &Case, o: &Outcome, why: &str) {
    let _ = writeln!(
        log,
        "FAILED: {why}\n{}  exit {:?}, signal {:?}, {:?}, peak {} MiB\n  stderr: {}\n",
        describe(c),
        o.code,
        o.signal,
        o.elapsed,
        o.peak_kib / 1024,
        o.stderr
            .lines()
            .take(12)
            .collect::<Vec<_>>()
            .join("\n          ")
    );
}
