//! docs/tutorial.md, run: its code blocks are extracted in order and
//! executed in a fresh project directory, so the tutorial never goes stale.
//!
//! What the page may contain, and what this test does with it:
//! - a ```hadal or ```csv block right after `<!-- file: PATH -->` is
//!   written to PATH (replacing it); after `<!-- append: PATH -->` it is
//!   appended. Every ```hadal block must carry one of the two.
//! - a ```sh block holds commands, one a line, each `hadal ...` (run with
//!   the binary built from this crate; nothing else is supported). A
//!   trailing `# exits N` says the command must exit with N; otherwise it
//!   must exit 0. `<!-- creates: PATH... -->` before the block names files
//!   that must exist after it.
//! - a ```text block directly after a ```sh block shows (part of) what its
//!   commands print: every line shown must be a line of the output, up to
//!   runs of spaces, timings (`0.1 ms`, `0.10 s`, `(387 members/s)`) and
//!   rounding-level numbers (closure errors such as `2.12e-16`).
//! - a ```csv or ```text block after `<!-- excerpt: PATH -->` shows lines
//!   of a file the commands wrote; each must be a line of it.
//!
//! Any other block is an error, so nothing on the page escapes the test.

use std::path::Path;
use std::process::Command;

#[derive(Debug)]
enum Marker {
    File(String),
    Append(String),
    Creates(Vec<String>),
    Excerpt(String),
}

#[derive(Debug)]
struct Cmd {
    line: usize,
    text: String,
    args: Vec<String>,
    exit: i32,
}

#[derive(Debug)]
enum Block {
    Write {
        line: usize,
        path: String,
        text: String,
        append: bool,
    },
    Shell {
        cmds: Vec<Cmd>,
        creates: Vec<String>,
        shown: Option<(usize, Vec<String>)>,
    },
    Excerpt {
        line: usize,
        path: String,
        lines: Vec<String>,
    },
}

fn parse_marker(line: &str) -> Option<Marker> {
    let inner = line
        .trim()
        .strip_prefix("<!--")?
        .strip_suffix("-->")?
        .trim();
    let (kind, arg) = inner.split_once(':')?;
    let arg = arg.trim().to_owned();
    match kind.trim() {
        "file" => Some(Marker::File(arg)),
        "append" => Some(Marker::Append(arg)),
        "creates" => Some(Marker::Creates(
            arg.split_whitespace().map(str::to_owned).collect(),
        )),
        "excerpt" => Some(Marker::Excerpt(arg)),
        other => panic!("unknown marker `{other}` in {line:?}"),
    }
}

/// Split a command line into words: whitespace separates, single and
/// double quotes group (no escapes, no variables, no globs).
fn words(line: usize, text: &str) -> Vec<String> {
    let mut out = Vec::new();
    let mut cur = String::new();
    let mut in_word = false;
    let mut quote: Option<char> = None;
    for c in text.chars() {
        match quote {
            Some(q) if c == q => quote = None,
            Some(_) => cur.push(c),
            None if c == '"' || c == '\'' => {
                quote = Some(c);
                in_word = true;
            }
            None if c.is_whitespace() => {
                if in_word {
                    out.push(std::mem::take(&mut cur));
                    in_word = false;
                }
            }
            None => {
                for bad in ['|', '>', '<', '&', ';', '$', '`', '*', '\\'] {
                    assert!(
                        c != bad,
                        "line {line}: `{bad}` is not supported in {text:?}"
                    );
                }
                cur.push(c);
                in_word = true;
            }
        }
    }
    assert!(quote.is_none(), "line {line}: unclosed quote in {text:?}");
    if in_word {
        out.push(cur);
    }
    out
}

/// One command line of a ```sh block: the command and its expected exit.
fn command(line: usize, raw: &str) -> Cmd {
    // A comment starts at a `#` outside quotes.
    let mut quote = None;
    let mut cut = raw.len();
    for (i, c) in raw.char_indices() {
        match quote {
            Some(q) if c == q => quote = None,
            Some(_) => {}
            None if c == '"' || c == '\'' => quote = Some(c),
            None if c == '#' => {
                cut = i;
                break;
            }
            None => {}
        }
    }
    let (text, comment) = (raw[..cut].trim(), raw[cut..].trim_start_matches('#').trim());
    let exit = match comment.strip_prefix("exits ") {
        Some(n) => n
            .trim()
            .parse()
            .unwrap_or_else(|_| panic!("line {line}: bad exit note {comment:?}")),
        None => 0,
    };
    let args = words(line, text);
    assert!(
        args.first().map(String::as_str) == Some("hadal") && args.len() > 1,
        "line {line}: only `hadal ...` commands are supported, found {text:?}"
    );
    Cmd {
        line,
        text: text.to_owned(),
        args: args[1..].to_vec(),
        exit,
    }
}

fn parse(md: &str) -> Vec<Block> {
    let lines: Vec<&str> = md.lines().collect();
    let mut blocks = Vec::new();
    let mut marker: Option<Marker> = None;
    // Whether the last fence closed was a ```sh block (a ```text block
    // straight after it shows its output).
    let mut last_was_shell = false;
    let mut i = 0;
    while i < lines.len() {
        let line = lines[i];
        let Some(lang) = line.strip_prefix("```") else {
            if let Some(m) = parse_marker(line) {
                marker = Some(m);
            } else if !line.trim().is_empty() {
                marker = None;
            }
            i += 1;
            continue;
        };
        let start = i + 1; // 1-based line of the fence
        let mut body = Vec::new();
        i += 1;
        while i < lines.len() && !lines[i].starts_with("```") {
            body.push(lines[i]);
            i += 1;
        }
        assert!(i < lines.len(), "line {start}: unclosed code block");
        i += 1;
        let mut text = body.join("\n");
        if !body.is_empty() {
            text.push('\n');
        }
        let m = marker.take();
        let shell_before = std::mem::replace(&mut last_was_shell, false);
        match (lang.trim(), m) {
            ("hadal" | "csv", Some(Marker::File(path))) => blocks.push(Block::Write {
                line: start,
                path,
                text,
                append: false,
            }),
            ("hadal" | "csv", Some(Marker::Append(path))) => blocks.push(Block::Write {
                line: start,
                path,
                text,
                append: true,
            }),
            ("csv" | "text", Some(Marker::Excerpt(path))) => blocks.push(Block::Excerpt {
                line: start,
                path,
                lines: body.iter().map(|s| s.to_string()).collect(),
            }),
            ("sh", m) => {
                let creates = match m {
                    None => Vec::new(),
                    Some(Marker::Creates(paths)) => paths,
                    Some(other) => panic!("line {start}: {other:?} cannot precede a sh block"),
                };
                let cmds: Vec<Cmd> = body
                    .iter()
                    .enumerate()
                    .filter(|(_, l)| !l.trim().is_empty() && !l.trim().starts_with('#'))
                    .map(|(k, l)| command(start + 1 + k, l))
                    .collect();
                assert!(!cmds.is_empty(), "line {start}: sh block without commands");
                blocks.push(Block::Shell {
                    cmds,
                    creates,
                    shown: None,
                });
                last_was_shell = true;
            }
            ("text", None) if shell_before => {
                let Some(Block::Shell { shown, .. }) = blocks.last_mut() else {
                    unreachable!()
                };
                *shown = Some((start, body.iter().map(|s| s.to_string()).collect()));
            }
            (lang, m) => panic!(
                "line {start}: a ```{lang} block here ({m:?}) is neither a file, a command \
                 block, its output nor an excerpt, so this test cannot check it"
            ),
        }
    }
    blocks
}

/// A line as compared: runs of whitespace collapsed, timings masked.
fn normalize(line: &str) -> String {
    let toks: Vec<&str> = line.split_whitespace().collect();
    let mut out: Vec<&str> = Vec::with_capacity(toks.len());
    let mut k = 0;
    while k < toks.len() {
        let next = toks.get(k + 1).copied();
        let number = toks[k].parse::<f64>().is_ok();
        if number && matches!(next, Some("ms" | "s")) {
            out.push("<time>");
            k += 2;
        } else if number && toks[k].contains('e') && toks[k].parse::<f64>().unwrap().abs() < 1e-12 {
            // A rounding-level measure (a water-budget closure error): its
            // digits change with any reordering of floating-point work.
            out.push("<rounding>");
            k += 1;
        } else if toks[k].starts_with('(') && next == Some("members/s)") {
            out.push("<rate>");
            k += 2;
        } else {
            out.push(toks[k]);
            k += 1;
        }
    }
    out.join(" ")
}

fn run_tutorial() -> (Vec<Block>, Vec<String>) {
    let md_path = Path::new(env!("CARGO_MANIFEST_DIR")).join("docs/tutorial.md");
    let md = std::fs::read_to_string(&md_path).expect("docs/tutorial.md");
    let blocks = parse(&md);
    let dir = tempfile::tempdir().unwrap();
    let root = dir.path();
    std::fs::create_dir(root.join(".git")).unwrap();
    let bin = env!("CARGO_BIN_EXE_hadal");
    let mut failures = Vec::new();
    for block in &blocks {
        match block {
            Block::Write {
                line,
                path,
                text,
                append,
            } => {
                let p = root.join(path);
                std::fs::create_dir_all(p.parent().unwrap()).unwrap();
                if *append {
                    assert!(
                        p.exists(),
                        "line {line}: appending to `{path}`, which does not exist"
                    );
                    let mut old = std::fs::read_to_string(&p).unwrap();
                    old.push_str(text);
                    std::fs::write(&p, old).unwrap();
                } else {
                    std::fs::write(&p, text).unwrap();
                }
            }
            Block::Shell {
                cmds,
                creates,
                shown,
            } => {
                let mut printed = String::new();
                for c in cmds {
                    let out = Command::new(bin)
                        .args(&c.args)
                        .current_dir(root)
                        .env_remove("HADAL_CACHE")
                        .env("NO_COLOR", "1")
                        .output()
                        .unwrap_or_else(|e| panic!("line {}: cannot run hadal: {e}", c.line));
                    let stdout = String::from_utf8_lossy(&out.stdout);
                    let stderr = String::from_utf8_lossy(&out.stderr);
                    let code = out.status.code().unwrap_or(-1);
                    if code != c.exit {
                        failures.push(format!(
                            "line {}: `{}` exited {code}, the tutorial says {}\n--- stdout\n{stdout}--- stderr\n{stderr}",
                            c.line, c.text, c.exit
                        ));
                    }
                    printed.push_str(&stdout);
                    printed.push_str(&stderr);
                }
                for p in creates {
                    if !root.join(p).is_file() {
                        failures.push(format!("`{p}` was not written by the commands before it"));
                    }
                }
                if let Some((line, want)) = shown {
                    let got: Vec<String> = printed.lines().map(normalize).collect();
                    for w in want {
                        if !got.contains(&normalize(w)) {
                            failures.push(format!(
                                "output block at line {line}: {w:?} is not in what the commands printed:\n{printed}"
                            ));
                        }
                    }
                }
            }
            Block::Excerpt { line, path, lines } => {
                let text = std::fs::read_to_string(root.join(path))
                    .unwrap_or_else(|e| panic!("line {line}: `{path}`: {e}"));
                let have: Vec<&str> = text.lines().collect();
                for l in lines {
                    if !have.contains(&l.as_str()) {
                        failures.push(format!(
                            "excerpt at line {line}: {l:?} is not a line of `{path}`"
                        ));
                    }
                }
            }
        }
    }
    (blocks, failures)
}

#[test]
fn every_block_of_the_tutorial_runs_as_it_says() {
    let (blocks, failures) = run_tutorial();
    assert!(
        failures.is_empty(),
        "docs/tutorial.md is out of date ({} problems):\n\n{}",
        failures.len(),
        failures.join("\n\n")
    );

    // The tutorial covers what it promises (issue: a three-reservoir
    // scenario with a computed thermal history, a run, a figure, an edit that
    // reruns one stage, an ensemble with one constraint, and verify).
    let verbs: Vec<&str> = blocks
        .iter()
        .filter_map(|b| match b {
            Block::Shell { cmds, .. } => Some(cmds),
            _ => None,
        })
        .flatten()
        .map(|c| c.args[0].as_str())
        .collect();
    for verb in ["check", "run", "plot", "ensemble", "verify"] {
        assert!(
            verbs.contains(&verb),
            "the tutorial never runs `hadal {verb}`"
        );
    }
    let mut scenario = String::new();
    for b in &blocks {
        if let Block::Write {
            path, text, append, ..
        } = b
        {
            if path == "tutorial/quillane.hadal" {
                if !append {
                    scenario.clear();
                }
                scenario.push_str(text);
            }
        }
    }
    let count = |prefix: &str| {
        scenario
            .lines()
            .filter(|l| l.trim_start().starts_with(prefix))
            .count()
    };
    assert_eq!(count("reservoir "), 3, "three reservoirs");
    assert_eq!(count("state "), 1, "a computed thermal history");
    assert!(scenario.contains("rate = (radiogenic - heat_loss)"));
    assert_eq!(count("expect "), 1, "one constraint");
    assert_eq!(count("ensemble {"), 1);
    assert!(count("stage ") >= 2);
    // The rerun after the edit shows reused and recomputed stages, and why.
    let outputs: Vec<String> = blocks
        .iter()
        .filter_map(|b| match b {
            Block::Shell {
                shown: Some((_, lines)),
                ..
            } => Some(lines.join("\n")),
            _ => None,
        })
        .collect();
    assert!(outputs.iter().any(|o| o.contains(" reused ")
        && o.contains(" computed ")
        && o.contains("computed: changed:")));
    assert!(outputs.iter().any(|o| o.contains("byte-identical")));
    assert!(outputs.iter().any(|o| o.contains("accepted")));
}

#[test]
fn the_block_parser_reads_markers_exits_and_quotes() {
    let md = "\
<!-- file: a/b.hadal -->
```hadal
scenario x
```

```sh
hadal run a/b.hadal --set q0=\"22 K\"  # exits 1
hadal check a
```

```text
  ok   a/b.hadal   in 0.5 ms (12 members/s) 2.1e-16 0.00e0 1e-3
```
";
    let blocks = parse(md);
    assert_eq!(blocks.len(), 2);
    match &blocks[0] {
        Block::Write {
            path, text, append, ..
        } => {
            assert_eq!(path, "a/b.hadal");
            assert_eq!(text, "scenario x\n");
            assert!(!append);
        }
        other => panic!("{other:?}"),
    }
    match &blocks[1] {
        Block::Shell { cmds, shown, .. } => {
            assert_eq!(cmds[0].args, ["run", "a/b.hadal", "--set", "q0=22 K"]);
            assert_eq!(cmds[0].exit, 1);
            assert_eq!(cmds[1].exit, 0);
            let (_, lines) = shown.as_ref().unwrap();
            assert_eq!(
                normalize(&lines[0]),
                "ok a/b.hadal in <time> <rate> <rounding> <rounding> 1e-3"
            );
        }
        other => panic!("{other:?}"),
    }
}

#[test]
#[should_panic(expected = "cannot check it")]
fn an_unmarked_scenario_block_is_rejected() {
    parse("```hadal\nscenario x\n```\n");
}
