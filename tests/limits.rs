//! Resource limits: every one is a clear diagnostic (code, message, the
//! place), found before any large allocation, and an input just inside a
//! limit is accepted. The limits exist so that a hostile or mistyped
//! scenario cannot exhaust memory, the stack or hours of CPU.

use std::path::Path;
use std::time::{Duration, Instant};

use hadal::check::{
    check_file, check_text, CheckError, CheckOptions, Checked, MAX_DEPTH, MAX_ERRORS,
    MAX_FILE_BYTES, MAX_INCLUDE_DEPTH, MAX_REPORT_ROWS, MAX_SOURCE_BYTES, MAX_TABLE_ROWS,
    MAX_TOTAL_BYTES,
};
use hadal::diagnostic::Problem;
use hadal::span::Sources;

const HEAD: &str = "scenario limits\nspan 1 Ga to 0 Ga\nreport every 100 Myr\n";
const TAIL: &str = "reservoir a = 1e21 kg\nstage all from 1 Ga to 0 Ga\n";

fn check_in(dir: &Path, text: &str) -> Result<Checked, CheckError> {
    let path = dir.join("s.hadal");
    std::fs::write(&path, text).unwrap();
    check_text("s.hadal", &path, text, dir, &CheckOptions::default())
}

fn problems_in(dir: &Path, text: &str) -> (Sources, Vec<Problem>) {
    match check_in(dir, text) {
        Ok(_) => panic!("expected problems"),
        Err(CheckError::Io { message, .. }) => panic!("I/O: {message}"),
        Err(CheckError::Invalid { sources, problems }) => (sources, problems),
    }
}

/// The first error, its file name and 1-based line.
fn first_error(dir: &Path, text: &str) -> (Problem, String, usize) {
    let (sources, problems) = problems_in(dir, text);
    let p = problems.into_iter().find(|p| !p.warning).expect("an error");
    let span = p.primary().expect("a label");
    let (line, _) = sources.line_col(span);
    let file = sources.get(span.file).name.clone();
    (p, file, line)
}

fn assert_ok(dir: &Path, text: &str) -> Checked {
    match check_in(dir, text) {
        Ok(c) => c,
        Err(CheckError::Invalid { problems, .. }) => {
            panic!(
                "expected a clean check, got {} {}",
                problems[0].code, problems[0].message
            )
        }
        Err(CheckError::Io { message, .. }) => panic!("I/O: {message}"),
    }
}

#[test]
fn report_rows_of_a_whole_history_at_one_year_cadence() {
    let dir = tempfile::tempdir().unwrap();
    let (p, file, line) = first_error(
        dir.path(),
        &format!(
            "scenario limits\nspan 4.5 Ga to 0 Ga\nreport every 1 yr\n{}",
            TAIL.replace("1 Ga", "4.5 Ga")
        ),
    );
    assert_eq!(p.code, "H0412");
    assert_eq!(p.message, "the report would have 4500000000 rows");
    assert_eq!((file.as_str(), line), ("s.hadal", 3));
    assert_eq!(
        p.help.as_deref(),
        Some("at most 10000000 rows are written; choose a coarser cadence")
    );
    assert_eq!(MAX_REPORT_ROWS, 1e7);
}

#[test]
fn report_rows_times_values_within_the_memory_budget() {
    let dir = tempfile::tempdir().unwrap();
    // 1 Gyr at 200 yr: 5 million rows of two values (the age and `a`) fit.
    let small = format!("scenario limits\nspan 1 Ga to 0 Ga\nreport every 200 yr\n{TAIL}");
    assert_ok(dir.path(), &small);
    // The same rows with eight outputs do not: refused before any work,
    // with the estimate, the budget and how many rows would fit.
    let outputs: String = (0..8).map(|k| format!("output o{k} = a * {k}\n")).collect();
    let (p, file, line) = first_error(dir.path(), &format!("{small}{outputs}"));
    assert_eq!(p.code, "H0412");
    assert_eq!(
        p.message,
        "the report would have 5000002 rows of 10 values, about 1469 MiB in memory, more than the budget of 1024 MiB"
    );
    assert_eq!((file.as_str(), line), ("s.hadal", 3));
    assert_eq!(
        p.help.as_deref(),
        Some("choose a coarser `report every`: at most 3486174 rows of 10 values fit")
    );
    // An ensemble also keeps quantile sketches of every value.
    let ensemble = format!(
        "scenario limits\nspan 1 Ga to 0 Ga\nreport every 10 kyr\nparam k = 1\noutput o = a * k\n\
         ensemble {{\n  members = 10\n  vary k ~ uniform(1, 2)\n}}\n{TAIL}"
    );
    let (p, _, line) = first_error(dir.path(), &ensemble);
    assert_eq!(p.code, "H0412");
    assert!(
        p.message
            .contains("per member and in the ensemble's quantile sketches"),
        "{}",
        p.message
    );
    assert_eq!(line, 3);
    assert_ok(dir.path(), &ensemble.replace("10 kyr", "100 kyr"));
}

#[test]
fn bracket_nesting_depth() {
    let dir = tempfile::tempdir().unwrap();
    let deep = |n: usize| format!("{}1{}", "(".repeat(n), ")".repeat(n));
    let (p, _, line) = first_error(dir.path(), &format!("{HEAD}let x = {}\n{TAIL}", deep(65)));
    assert_eq!(p.code, "H0102");
    assert_eq!(p.message, "expression nested more than 64 deep");
    assert_eq!(line, 4);
    assert_ok(dir.path(), &format!("{HEAD}let x = {}\n{TAIL}", deep(64)));
    // Brackets in comments and strings are not expressions.
    assert_ok(
        dir.path(),
        &format!(
            "{HEAD}# {}\nlet x = 1 # {}\n{TAIL}",
            "(".repeat(200),
            "(".repeat(200)
        ),
    );
}

#[test]
fn if_nesting_depth() {
    let dir = tempfile::tempdir().unwrap();
    let chain = |n: usize| {
        let mut s = String::new();
        for _ in 0..n {
            s.push_str("if age > 1 Ga then 1 else ");
        }
        s.push('2');
        s
    };
    let (p, _, line) = first_error(dir.path(), &format!("{HEAD}let x = {}\n{TAIL}", chain(65)));
    assert_eq!(p.code, "H0102");
    assert_eq!(p.message, "more than 64 `if`s in one statement");
    assert_eq!(line, 4);
    assert_ok(dir.path(), &format!("{HEAD}let x = {}\n{TAIL}", chain(64)));
    // `if` inside a name or a comment does not count.
    assert_ok(
        dir.path(),
        &format!("{HEAD}const diff_if = 1\n# {}\n{TAIL}", "if ".repeat(100)),
    );
}

#[test]
fn an_enormous_if_chain_is_refused_not_a_stack_overflow() {
    // 200k nested `if`s would overflow any stack in the recursive parser.
    let dir = tempfile::tempdir().unwrap();
    let mut s = String::from(HEAD);
    s.push_str("let x = ");
    for _ in 0..200_000 {
        s.push_str("if age > 1 Ga then ");
    }
    s.push('1');
    for _ in 0..200_000 {
        s.push_str(" else 2");
    }
    s.push('\n');
    let (p, _, _) = first_error(dir.path(), &s);
    assert_eq!(p.code, "H0102");
}

#[test]
fn operators_per_statement() {
    let dir = tempfile::tempdir().unwrap();
    let sum = |n: usize| vec!["1 kg"; n + 1].join(" + ");
    let (p, _, line) = first_error(dir.path(), &format!("{HEAD}let x = {}\n{TAIL}", sum(129)));
    assert_eq!(p.code, "H0102");
    assert_eq!(
        p.message,
        "this statement has 129 operators; at most 128 are allowed"
    );
    assert_eq!(line, 4);
    assert_ok(dir.path(), &format!("{HEAD}let x = {}\n{TAIL}", sum(128)));
    // A long chain of prefix operators is a deep tree too.
    let (p, _, _) = first_error(
        dir.path(),
        &format!("{HEAD}let x = {}1\n{TAIL}", "-".repeat(5000)),
    );
    assert_eq!(p.code, "H0102");
}

#[test]
fn include_depth() {
    let dir = tempfile::tempdir().unwrap();
    // inc1 includes inc2 ... ; the last one defines nothing more.
    let write_chain = |n: usize| {
        for k in 1..=n {
            let next = if k < n {
                format!("include \"inc{}.hadal\"\n", k + 1)
            } else {
                String::new()
            };
            std::fs::write(
                dir.path().join(format!("inc{k}.hadal")),
                format!("{next}const c{k} = {k} kg\n"),
            )
            .unwrap();
        }
    };
    write_chain(MAX_INCLUDE_DEPTH);
    assert_ok(dir.path(), &format!("{HEAD}include \"inc1.hadal\"\n{TAIL}"));
    write_chain(MAX_INCLUDE_DEPTH + 1);
    let (p, file, line) = first_error(dir.path(), &format!("{HEAD}include \"inc1.hadal\"\n{TAIL}"));
    assert_eq!(p.code, "H0506");
    assert_eq!(p.message, "includes nested more than 16 deep");
    assert_eq!((file.as_str(), line), ("inc16.hadal", 1));
}

#[test]
fn file_size_of_the_scenario_an_include_and_a_table() {
    let dir = tempfile::tempdir().unwrap();
    // Sparse files: the length is refused before a byte is read.
    let big = |name: &str, len: u64| {
        let f = std::fs::File::create(dir.path().join(name)).unwrap();
        f.set_len(len).unwrap();
    };
    big("big.hadal", MAX_SOURCE_BYTES + 1);
    big("big.csv", MAX_FILE_BYTES + 1);
    let source = format!(
        "is {} bytes, more than the limit of {MAX_SOURCE_BYTES} bytes",
        MAX_SOURCE_BYTES + 1
    );
    let table = format!(
        "is {} bytes, more than the limit of {MAX_FILE_BYTES} bytes",
        MAX_FILE_BYTES + 1
    );
    match check_file(&dir.path().join("big.hadal"), &CheckOptions::default()) {
        Err(CheckError::Io { message, .. }) => assert_eq!(message, source),
        _ => panic!("a scenario over the limit must be an I/O error"),
    }
    let (p, _, line) = first_error(dir.path(), &format!("{HEAD}include \"big.hadal\"\n{TAIL}"));
    assert_eq!((p.code, line), ("H0501", 4));
    assert_eq!(
        p.message,
        format!("cannot read included file `big.hadal`: {source}")
    );
    let (p, _, line) = first_error(
        dir.path(),
        &format!("{HEAD}table t = \"big.csv\" (Ma, K)\n{TAIL}"),
    );
    assert_eq!((p.code, line), ("H0503", 4));
    assert_eq!(p.message, format!("cannot read table `big.csv`: {table}"));
    // A table may be larger than a scenario.
    big("mid.csv", MAX_SOURCE_BYTES + 1);
    let (p, _, _) = first_error(
        dir.path(),
        &format!("{HEAD}table t = \"mid.csv\" (Ma, K)\n{TAIL}"),
    );
    assert_ne!(p.code, "H0503", "{}", p.message);
}

#[test]
fn text_parsed_directly_is_limited_too() {
    // A caller that parses text itself (not through the loader) gets a
    // diagnostic, not gigabytes of parse tree.
    let text = "let a = 1\n".repeat(MAX_SOURCE_BYTES as usize / 10 + 1);
    let t = Instant::now();
    let problems = hadal::syntax::parse(&text, 0).expect_err("refused");
    assert_eq!(problems[0].code, "H0102");
    assert_eq!(
        problems[0].message,
        format!(
            "the text is {} bytes; at most {MAX_SOURCE_BYTES} bytes are parsed",
            text.len()
        )
    );
    assert!(t.elapsed() < Duration::from_secs(5));
}

#[cfg(unix)]
#[test]
fn an_endless_device_is_refused_unread() {
    // /dev/zero reports no length and never ends: it is not a regular file,
    // so not a byte of it is read.
    let t = Instant::now();
    match check_file(Path::new("/dev/zero"), &CheckOptions::default()) {
        Err(CheckError::Io { message, .. }) => {
            assert_eq!(message, "is not a regular file (a pipe or a device)")
        }
        _ => panic!("/dev/zero must be refused"),
    }
    assert!(t.elapsed() < Duration::from_secs(30));
}

#[test]
fn table_rows() {
    let dir = tempfile::tempdir().unwrap();
    let mut csv = String::with_capacity(12 * (MAX_TABLE_ROWS + 2));
    csv.push_str("x,y\n");
    for k in 0..=MAX_TABLE_ROWS {
        csv.push_str(&k.to_string());
        csv.push_str(",1\n");
    }
    std::fs::write(dir.path().join("t.csv"), &csv).unwrap();
    let (p, file, line) = first_error(
        dir.path(),
        &format!("{HEAD}table t = \"t.csv\" (Ma, K)\n{TAIL}"),
    );
    assert_eq!(p.code, "H0504");
    assert_eq!(p.message, "table `t.csv` has more than 1000000 rows");
    // The header is line 1; row k is line k + 2; the refused row is the last.
    assert_eq!((file.as_str(), line), ("t.csv", MAX_TABLE_ROWS + 2));
}

#[test]
fn bytes_read_for_one_scenario() {
    // Reading one large file again and again must not go on without end:
    // the scenario and everything it reads may total MAX_TOTAL_BYTES. (A
    // table with a bad header is read whole but not parsed, which keeps
    // this test quick.)
    let dir = tempfile::tempdir().unwrap();
    let size = (MAX_FILE_BYTES - 1024) as usize;
    let mut body = String::with_capacity(size);
    body.push_str("a,b,c\n");
    while body.len() + 6 <= size {
        body.push_str("1,2,3\n");
    }
    std::fs::write(dir.path().join("big.csv"), &body).unwrap();
    let times = (MAX_TOTAL_BYTES / body.len() as u64) as usize + 1;
    let tables: String = (0..times)
        .map(|k| format!("table t{k} = \"big.csv\" (Ma, K)\n"))
        .collect();
    let (sources, problems) = problems_in(dir.path(), &format!("{HEAD}{tables}{TAIL}"));
    let p = problems
        .iter()
        .find(|p| p.code == "H0503")
        .expect("the read that passes the budget is refused");
    assert_eq!(
        p.message,
        format!("cannot read table `big.csv`: the scenario with its includes and tables would pass {MAX_TOTAL_BYTES} bytes read")
    );
    assert_eq!(sources.line_col(p.primary().unwrap()).0, 3 + times);
    // The files before it were read (and found malformed).
    assert_eq!(
        problems.iter().filter(|p| p.code == "H0504").count(),
        times - 1
    );
}

#[test]
fn errors_per_scenario_are_capped_and_quick() {
    // Ten thousand unknown names: each would search every name for a
    // suggestion (minutes); only the first MAX_ERRORS are kept, quickly.
    let dir = tempfile::tempdir().unwrap();
    let mut s = String::from(HEAD);
    for k in 0..10_000 {
        s.push_str(&format!("let u{k} = missing_{k} + other{k}\n"));
    }
    s.push_str(TAIL);
    let t = Instant::now();
    let (_, problems) = problems_in(dir.path(), &s);
    assert_eq!(problems.iter().filter(|p| !p.warning).count(), MAX_ERRORS);
    assert_eq!(problems[0].message, "unknown name `missing_0`");
    assert!(
        t.elapsed() < Duration::from_secs(60),
        "took {:?}",
        t.elapsed()
    );
}

#[test]
fn definitions_nested_through_each_other() {
    let dir = tempfile::tempdir().unwrap();
    // Declared user-first: the checker meets the whole chain on first use.
    let forward = |n: usize| {
        let mut s = String::from(HEAD);
        for k in 0..n {
            s.push_str(&format!("let v{k} = v{} * 2\n", k + 1));
        }
        s.push_str(&format!("const v{n} = 1\noutput o = v0\n{TAIL}"));
        s
    };
    // Declared in dependency order: checking never recurses, but compiling
    // `o` would walk the whole chain.
    let backward = |n: usize| {
        let mut s = format!("{HEAD}const v{n} = 1\n");
        for k in (0..n).rev() {
            s.push_str(&format!("let v{k} = v{} * 2\n", k + 1));
        }
        s.push_str(&format!("output o = v0\n{TAIL}"));
        s
    };
    for text in [forward(20_000), backward(20_000)] {
        let (p, _, _) = first_error(dir.path(), &text);
        assert_eq!(p.code, "H0102", "{}", p.message);
        assert!(
            p.message.contains(&format!("{MAX_DEPTH}")) && p.message.contains("deep"),
            "{}",
            p.message
        );
        assert!(
            p.help.as_deref().unwrap_or("").contains("v0 -> v1")
                || p.help.as_deref().unwrap_or("").contains(" -> ")
        );
    }
    // Well inside the limit, the model checks and solves on a test thread's
    // stack (2 MiB by default), unoptimized.
    let n = MAX_DEPTH / 2 - 10;
    for text in [forward(n), backward(n)] {
        let m = assert_ok(dir.path(), &text).model;
        let run = hadal::pipeline::solve_all(&m).expect("solves");
        let series = hadal::report::series(&m, &run).expect("reports");
        let col = series.column("o").expect("column o");
        // 2^n overflows to infinity for n > 1023; n is below that.
        assert!(series.rows[0][col] > 1e100);
    }
}

#[test]
fn constants_that_double_each_other_fold_in_linear_time() {
    // Each constant uses the one before twice: naive folding costs 2^n.
    let dir = tempfile::tempdir().unwrap();
    let mut s = format!("{HEAD}const c0 = 1\n");
    for k in 1..=200 {
        s.push_str(&format!("const c{k} = (c{} + c{}) / 2\n", k - 1, k - 1));
    }
    s.push_str(TAIL);
    let t = Instant::now();
    let checked = assert_ok(dir.path(), &s);
    assert!(
        t.elapsed() < Duration::from_secs(10),
        "took {:?}",
        t.elapsed()
    );
    let id = checked.model.find("c200").unwrap();
    assert_eq!(
        hadal::check::eval_const(&checked.model, &checked.model.defs[id].expr),
        Some(1.0)
    );
}

#[cfg(unix)]
#[test]
fn a_pipe_as_an_include_or_a_table_is_refused_not_waited_on() {
    // Opening a pipe with no writer would block forever.
    let dir = tempfile::tempdir().unwrap();
    for name in ["p.hadal", "p.csv"] {
        let ok = std::process::Command::new("mkfifo")
            .arg(dir.path().join(name))
            .status()
            .expect("mkfifo")
            .success();
        assert!(ok, "mkfifo failed");
    }
    let t = Instant::now();
    let (p, _, line) = first_error(dir.path(), &format!("{HEAD}include \"p.hadal\"\n{TAIL}"));
    assert_eq!((p.code, line), ("H0501", 4));
    assert_eq!(
        p.message,
        "cannot read included file `p.hadal`: is not a regular file (a pipe or a device)"
    );
    let (p, _, _) = first_error(
        dir.path(),
        &format!("{HEAD}table t = \"p.csv\" (Ma, K)\n{TAIL}"),
    );
    assert_eq!(p.code, "H0503");
    assert!(t.elapsed() < Duration::from_secs(30));
}
