//! CSV tables as users really save them: every malformed one is a
//! diagnostic that points at the file and the line (checked through
//! `Sources::line_col` of the primary span), and the harmless variations a
//! spreadsheet produces (a byte-order mark, CRLF line ends, blank lines,
//! quoted cells, a decreasing first column) are accepted with the same
//! values.

use std::path::Path;

use hadal::check::{check_file, CheckError, CheckOptions, Checked};
use hadal::diagnostic::Problem;
use hadal::span::Sources;

/// A scenario that reads `t.csv` as a table of age (Ma) to temperature (K)
/// and uses it, so a good table makes a runnable model.
const SCENARIO: &str = "scenario tables\nspan 3 Ma to 0 Ga\nreport every 1 Myr\n\
table t = \"t.csv\" (Ma, K)\n\
const at_half = t(0.5 Ma)\n\
state T = 1000 K, rate = (t(age) - T) / 1 Myr\n\
stage all from 3 Ma to 0 Ga\n";

const GOOD: &str = "age,T\n0,1000\n1,1100\n2,1300\n3,1600\n";

fn check_with_table(dir: &Path, bytes: &[u8]) -> Result<Checked, CheckError> {
    std::fs::write(dir.join("s.hadal"), SCENARIO).unwrap();
    std::fs::write(dir.join("t.csv"), bytes).unwrap();
    check_file(&dir.join("s.hadal"), &CheckOptions::default())
}

/// The single error for a table; its file name and 1-based line.
fn table_error(bytes: &[u8]) -> (Problem, String, usize) {
    let dir = tempfile::tempdir().unwrap();
    let (sources, problems): (Sources, Vec<Problem>) = match check_with_table(dir.path(), bytes) {
        Ok(_) => panic!(
            "expected a table error for {:?}",
            String::from_utf8_lossy(bytes)
        ),
        Err(CheckError::Io { message, .. }) => panic!("I/O: {message}"),
        Err(CheckError::Invalid { sources, problems }) => (sources, problems),
    };
    let errors: Vec<&Problem> = problems.iter().filter(|p| !p.warning).collect();
    assert_eq!(
        errors.len(),
        1,
        "one table problem, not: {:?}",
        errors.iter().map(|p| &p.message).collect::<Vec<_>>()
    );
    let p = errors[0].clone();
    let span = p.primary().expect("a label");
    let (line, _) = sources.line_col(span);
    let file = sources.get(span.file).name.clone();
    let file = Path::new(&file)
        .file_name()
        .unwrap()
        .to_string_lossy()
        .into_owned();
    // The second label is the `table` line of the scenario.
    let named = p
        .labels
        .get(1)
        .expect("the table statement is labelled")
        .span;
    assert_eq!(sources.line_col(named).0, 4);
    (p, file, line)
}

/// The value of `at_half` (t at 0.5 Ma) and the table's knots.
fn accepted(bytes: &[u8]) -> (f64, Vec<f64>, Vec<f64>) {
    let dir = tempfile::tempdir().unwrap();
    let checked = match check_with_table(dir.path(), bytes) {
        Ok(c) => c,
        Err(CheckError::Invalid { problems, .. }) => panic!(
            "{:?} should be accepted: {} {}",
            String::from_utf8_lossy(bytes),
            problems[0].code,
            problems[0].message
        ),
        Err(CheckError::Io { message, .. }) => panic!("I/O: {message}"),
    };
    let m = &checked.model;
    let id = m.find("at_half").unwrap();
    let v = hadal::check::eval_const(m, &m.defs[id].expr).unwrap();
    (v, m.tables[0].xs.clone(), m.tables[0].ys.clone())
}

#[test]
fn a_plain_table_is_read_with_its_units() {
    let (v, xs, ys) = accepted(GOOD.as_bytes());
    assert_eq!(v, 1050.0);
    assert_eq!(xs, vec![0.0, 1e6, 2e6, 3e6]);
    assert_eq!(ys, vec![1000.0, 1100.0, 1300.0, 1600.0]);
}

#[test]
fn a_byte_order_mark_is_accepted() {
    let mut bytes = "\u{feff}".as_bytes().to_vec();
    bytes.extend_from_slice(GOOD.as_bytes());
    assert_eq!(accepted(&bytes), accepted(GOOD.as_bytes()));
}

#[test]
fn crlf_line_ends_are_accepted() {
    let crlf = GOOD.replace('\n', "\r\n");
    assert_eq!(accepted(crlf.as_bytes()), accepted(GOOD.as_bytes()));
    // Both at once, as a spreadsheet on another system saves them.
    let mut bom = "\u{feff}".as_bytes().to_vec();
    bom.extend_from_slice(crlf.as_bytes());
    assert_eq!(accepted(&bom), accepted(GOOD.as_bytes()));
}

#[test]
fn blank_lines_spaces_quotes_and_a_decreasing_column_are_accepted() {
    let messy = "age , T\n\n 3 , 1600\n\"2\",\"1300\"\n1,1100\n\n0,1000\n\n";
    assert_eq!(accepted(messy.as_bytes()), accepted(GOOD.as_bytes()));
}

#[test]
fn a_missing_final_newline_is_accepted() {
    assert_eq!(
        accepted(GOOD.trim_end().as_bytes()),
        accepted(GOOD.as_bytes())
    );
}

#[test]
fn an_empty_file() {
    for bytes in [&b""[..], b"\n\n", "\u{feff}".as_bytes(), b"   \r\n"] {
        let (p, file, line) = table_error(bytes);
        assert_eq!(p.code, "H0504");
        assert_eq!(p.message, "table `t.csv` is empty");
        assert_eq!((file.as_str(), line), ("t.csv", 1));
    }
}

#[test]
fn a_header_without_rows() {
    let (p, file, line) = table_error(b"age,T\n");
    assert_eq!(p.code, "H0504");
    assert_eq!(p.message, "table `t.csv` needs at least two rows");
    assert_eq!((file.as_str(), line), ("t.csv", 1));
    let (p, _, _) = table_error(b"age,T\n0,1000\n");
    assert_eq!(p.message, "table `t.csv` needs at least two rows");
}

#[test]
fn a_missing_header_is_not_silently_a_lost_row() {
    let (p, file, line) = table_error(b"0,1000\n1,1100\n2,1300\n");
    assert_eq!(p.code, "H0504");
    assert_eq!(
        p.message,
        "the first line of `t.csv` holds numbers, not column names"
    );
    assert_eq!((file.as_str(), line), ("t.csv", 1));
}

#[test]
fn wrong_column_counts() {
    let (p, file, line) = table_error(b"age,T,note\n0,1,x\n1,2,y\n");
    assert_eq!(p.code, "H0504");
    assert_eq!(p.message, "the header of `t.csv` has 3 columns, not 2");
    assert_eq!((file.as_str(), line), ("t.csv", 1));

    let (p, file, line) = table_error(b"age,T\n0,1000\n1,1100,7\n2,1300\n");
    assert_eq!(p.message, "row has 3 columns, not 2");
    assert_eq!((file.as_str(), line), ("t.csv", 3));

    let (p, _, line) = table_error(b"age,T\n0,1000\n1,1100\n2\n");
    assert_eq!(p.message, "row has 1 column, not 2");
    assert_eq!(line, 4);

    let (p, _, _) = table_error(b"age\n0\n1\n");
    assert_eq!(p.message, "the header of `t.csv` has 1 columns, not 2");
}

#[test]
fn the_line_is_right_with_crlf_and_a_byte_order_mark() {
    let mut bytes = "\u{feff}".as_bytes().to_vec();
    bytes.extend_from_slice(b"age,T\r\n0,1000\r\n\r\n1,1100\r\n2,warm\r\n");
    let (p, file, line) = table_error(&bytes);
    assert_eq!(p.message, "`warm` is not a number");
    assert_eq!((file.as_str(), line), ("t.csv", 5));
}

#[test]
fn non_numeric_cells() {
    for (cell, line) in [
        ("warm", 3),
        ("1,5", 3),
        ("NaN", 3),
        ("inf", 3),
        ("0x10", 3),
        ("1e", 3),
    ] {
        let text = format!("age,T\n0,1000\n1,\"{cell}\"\n2,1300\n");
        let (p, file, l) = table_error(text.as_bytes());
        assert_eq!(p.code, "H0504", "{cell}");
        assert_eq!(p.message, format!("`{cell}` is not a number"), "{cell}");
        assert_eq!((file.as_str(), l), ("t.csv", line), "{cell}");
    }
    let (p, _, line) = table_error(b"age,T\nzero,1000\n1,1100\n");
    assert_eq!(p.message, "`zero` is not a number");
    assert_eq!(line, 2);
    for row in ["1,", ",1100", "1,\"\""] {
        let text = format!("age,T\n0,1000\n{row}\n2,1300\n");
        let (p, _, line) = table_error(text.as_bytes());
        assert_eq!(p.message, "a cell of this row is empty", "{row}");
        assert_eq!(line, 3);
    }
}

#[test]
fn a_value_too_large_for_its_unit() {
    // 1e305 Ma is 1e311 years: beyond any number.
    let (p, file, line) = table_error(b"age,T\n0,1000\n1e305,1100\n");
    assert_eq!(p.code, "H0504");
    assert_eq!(
        p.message,
        "a value of this row is too large in the declared units"
    );
    assert_eq!((file.as_str(), line), ("t.csv", 3));
}

#[test]
fn non_monotone_ages() {
    // Turns back.
    let (p, file, line) = table_error(b"age,T\n0,1000\n1,1100\n0.5,1200\n2,1300\n");
    assert_eq!(p.code, "H0504");
    assert_eq!(p.message, "the first column is not strictly monotone here");
    assert_eq!((file.as_str(), line), ("t.csv", 4));
    // Repeats a value.
    let (p, _, line) = table_error(b"age,T\n0,1000\n1,1100\n1,1200\n");
    assert_eq!(p.message, "the first column is not strictly monotone here");
    assert_eq!(line, 4);
    // Decreasing, then turning up.
    let (_, _, line) = table_error(b"age,T\n3,1\n2,1\n1,1\n5,1\n");
    assert_eq!(line, 5);
}

#[test]
fn a_table_that_is_not_utf8_or_is_a_directory() {
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(dir.path().join("s.hadal"), SCENARIO).unwrap();
    std::fs::write(dir.path().join("t.csv"), b"age,T\n0,10\xff00\n1,1\n").unwrap();
    let p = match check_file(&dir.path().join("s.hadal"), &CheckOptions::default()) {
        Err(CheckError::Invalid { problems, .. }) => problems.into_iter().next().unwrap(),
        _ => panic!("expected an error"),
    };
    assert_eq!(p.code, "H0503");
    assert_eq!(
        p.message,
        "cannot read table `t.csv`: is not UTF-8 text (bad byte at offset 10)"
    );
    std::fs::remove_file(dir.path().join("t.csv")).unwrap();
    std::fs::create_dir(dir.path().join("t.csv")).unwrap();
    let p = match check_file(&dir.path().join("s.hadal"), &CheckOptions::default()) {
        Err(CheckError::Invalid { problems, .. }) => problems.into_iter().next().unwrap(),
        _ => panic!("expected an error"),
    };
    assert_eq!(p.code, "H0503");
    assert_eq!(
        p.message,
        "cannot read table `t.csv`: is a directory, not a file"
    );
}

#[test]
fn an_accepted_table_runs_and_writes_finite_numbers() {
    let dir = tempfile::tempdir().unwrap();
    let mut bytes = "\u{feff}".as_bytes().to_vec();
    bytes.extend_from_slice(GOOD.replace('\n', "\r\n").as_bytes());
    let m = check_with_table(dir.path(), &bytes).expect("checks").model;
    let run = hadal::pipeline::solve_all(&m).expect("solves");
    let series = hadal::report::series(&m, &run).expect("reports");
    let csv = String::from_utf8(series.to_csv()).unwrap();
    assert!(!csv.contains("NaN") && !csv.contains("inf"), "{csv}");
    assert_eq!(series.rows.len(), 4);
}
