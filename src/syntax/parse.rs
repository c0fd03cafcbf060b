//! Text to syntax tree, through the pest grammar in `grammar/hadal.pest`.

use std::sync::OnceLock;

use pest::iterators::{Pair, Pairs};
use pest::pratt_parser::{Assoc, Op, PrattParser};
use pest::Parser;

use super::ast::*;
use crate::diagnostic::Problem;
use crate::span::Span;

#[derive(pest_derive::Parser)]
#[grammar = "../grammar/hadal.pest"]
struct HadalParser;

/// Most syntax errors reported for one file before giving up.
const MAX_SYNTAX_ERRORS: usize = 25;

/// Bytes that error recovery may parse again beyond twice the file's
/// length (small files get their 25 errors; a huge one stops sooner).
const MAX_RECOVERY_BYTES: usize = 1 << 20;

/// Largest text parsed, bytes. The parser holds about a hundred bytes per
/// byte of input; the loader refuses larger files before reading them, and
/// this guards callers that parse text themselves.
pub const MAX_SOURCE_BYTES: usize = 4 * 1024 * 1024;

/// Deepest expression nesting accepted; deeper input is a diagnostic, not a
/// stack overflow.
pub const MAX_NESTING: usize = 64;

/// Most operators (infix and prefix) in one statement. A chain of operators
/// is a deep tree too, and every later phase walks trees recursively; a
/// longer formula belongs in several `let` lines anyway.
pub const MAX_OPERATORS: usize = 128;

/// Parse one file. On failure, every independent syntax error is reported:
/// after an error the offending line is blanked out and parsing restarts,
/// which works because statements are line-oriented.
pub fn parse(text: &str, file: u32) -> Result<SyntaxFile, Vec<Problem>> {
    if text.len() > MAX_SOURCE_BYTES {
        return Err(vec![Problem::error(
            "H0102",
            format!(
                "the text is {} bytes; at most {MAX_SOURCE_BYTES} bytes are parsed",
                text.len()
            ),
        )
        .label(Span::new(file, 0, 0), "this file")
        .help("split the scenario into included files")]);
    }
    if let Some(problem) = nesting_problem(text, file) {
        return Err(vec![problem]);
    }
    parse_in_pieces(text, file).unwrap_or_else(|| parse_whole(text, file))
}

/// Parse the whole text at once, with error recovery.
fn parse_whole(text: &str, file: u32) -> Result<SyntaxFile, Vec<Problem>> {
    let mut errors = Vec::new();
    let mut work = text.to_owned();
    // Each recovery parses the whole file again (twice: plain, then with
    // detail); bound the total work so a large file with many broken lines
    // costs a few parses, not fifty.
    let budget = 2 * text.len() + MAX_RECOVERY_BYTES;
    let mut spent = 0usize;
    loop {
        spent += work.len();
        match HadalParser::parse(Rule::file, &work).map_err(|e| detailed_error(&work, e)) {
            Ok(mut pairs) => {
                if errors.is_empty() {
                    let root = pairs.next().expect("file rule yields one pair");
                    let too_long = operator_problems(root.clone(), file, 0);
                    if !too_long.is_empty() {
                        return Err(too_long);
                    }
                    let b = Builder {
                        file,
                        offset: 0,
                        first_line: 0,
                    };
                    return Ok(SyntaxFile {
                        entries: b.entries(root.into_inner()),
                    });
                }
                return Err(errors);
            }
            Err(err) => {
                let pos = match err.location {
                    pest::error::InputLocation::Pos(p) => p,
                    pest::error::InputLocation::Span((s, _)) => s,
                };
                let (pos, problem) = syntax_problem(&work, &err, pos, file);
                errors.push(problem);
                let line_start = work[..pos].rfind('\n').map_or(0, |i| i + 1);
                let line_end = work[pos..].find('\n').map_or(work.len(), |i| pos + i);
                let blank_from = if work[line_start..line_end].trim().is_empty() {
                    // The error sits on an empty line (e.g. a missing `}`); nothing
                    // more can be learned by blanking it.
                    return Err(errors);
                } else {
                    line_start
                };
                // Replace the line by spaces, one per byte, so offsets of
                // later lines stay valid whatever characters it held.
                let blank: String = work[blank_from..line_end]
                    .chars()
                    .map(|c| {
                        if c == '\r' {
                            "\r".to_owned()
                        } else {
                            " ".repeat(c.len_utf8())
                        }
                    })
                    .collect();
                work.replace_range(blank_from..line_end, &blank);
                // The failed parse ran twice (plain, then with detail).
                spent += work.len();
                if errors.len() >= MAX_SYNTAX_ERRORS || spent + work.len() > budget {
                    return Err(errors);
                }
            }
        }
    }
}

/// Bytes of text per piece parsed on its own (see [`parse_in_pieces`]).
const PIECE_BYTES: usize = 32 * 1024;

/// Parse a text that parses without error in pieces of about
/// [`PIECE_BYTES`], cut at the starts of lines outside any `{ ... }` block.
/// A file is a sequence of entries and no entry reaches past its line
/// except through a block, so the pieces' entries, put together, are the
/// whole file's; but pest's token list for a piece stays in the processor's
/// cache and its memory is reused by the next piece, which makes a large
/// file parse about twice as fast. `None` when a piece fails, so that the
/// caller parses the whole text and reports its errors as always.
fn parse_in_pieces(text: &str, file: u32) -> Option<Result<SyntaxFile, Vec<Problem>>> {
    let mut entries = Vec::new();
    let mut too_long = Vec::new();
    let (mut start, mut line) = (0usize, 0usize);
    for end in piece_ends(text) {
        let piece = &text[start..end];
        let root = HadalParser::parse(Rule::file, piece).ok()?.next()?;
        too_long.extend(operator_problems(root.clone(), file, start));
        if too_long.is_empty() {
            let b = Builder {
                file,
                offset: start,
                first_line: line,
            };
            entries.extend(b.entries(root.into_inner()));
        }
        line += piece.bytes().filter(|&b| b == b'\n').count();
        start = end;
    }
    Some(if too_long.is_empty() {
        Ok(SyntaxFile { entries })
    } else {
        Err(too_long)
    })
}

/// Ends of the pieces of [`parse_in_pieces`]: just after a line feed, at
/// least [`PIECE_BYTES`] after the previous end, with no block open (braces
/// counted outside strings and comments); the last is the end of the text.
fn piece_ends(text: &str) -> Vec<usize> {
    let mut ends = Vec::new();
    let (mut depth, mut last) = (0i64, 0usize);
    for (i, b) in code_bytes(text) {
        match b {
            b'\n' if depth == 0 && i + 1 - last >= PIECE_BYTES && i + 1 < text.len() => {
                ends.push(i + 1);
                last = i + 1;
            }
            b'{' => depth += 1,
            b'}' => depth -= 1,
            _ => {}
        }
    }
    ends.push(text.len());
    ends
}

/// The bytes of `text` outside strings and comments, with their offsets,
/// and every line break (`\n` or `\r`, which also ends a string or a
/// comment): what the pre-scans of [`nesting_problem`] and [`piece_ends`]
/// look at.
fn code_bytes(text: &str) -> impl Iterator<Item = (usize, u8)> + '_ {
    let (mut in_string, mut in_comment, mut escaped) = (false, false, false);
    text.bytes().enumerate().filter(move |&(_, b)| {
        if b == b'\n' || b == b'\r' {
            (in_string, in_comment, escaped) = (false, false, false);
            return true;
        }
        if in_comment {
            return false;
        }
        if in_string {
            match b {
                _ if escaped => escaped = false,
                b'\\' => escaped = true,
                b'"' => in_string = false,
                _ => {}
            }
            return false;
        }
        match b {
            b'#' => in_comment = true,
            b'"' => in_string = true,
            _ => return true,
        }
        false
    })
}

/// Parse a text known to fail again, tracking literal tokens too (`=`,
/// `:`, `,`), so that a missing one is reported where it is missing rather
/// than at the start of the line. The tracking costs time, so only failed
/// parses pay for it. pest switches it with a process-wide flag; the lock
/// keeps concurrent detailed parses from switching it off under each other
/// (a plain parse meanwhile at worst tracks too).
fn detailed_error(text: &str, plain: pest::error::Error<Rule>) -> pest::error::Error<Rule> {
    static DETAIL: std::sync::Mutex<()> = std::sync::Mutex::new(());
    let _guard = DETAIL.lock().unwrap_or_else(|e| e.into_inner());
    pest::set_error_detail(true);
    let result = HadalParser::parse(Rule::file, text).map(|_| ());
    pest::set_error_detail(false);
    // The parse is deterministic, so it fails again; keep the plain error
    // should it ever not.
    result.err().unwrap_or(plain)
}

/// Reject pathologically deep brackets, and lines with more `if`s than
/// brackets may nest (each `if` nests its branches), before the
/// recursive-descent parser sees them. Comments and strings are skipped.
fn nesting_problem(text: &str, file: u32) -> Option<Problem> {
    let (mut depth, mut ifs) = (0usize, 0usize);
    let bytes = text.as_bytes();
    for (i, b) in code_bytes(text) {
        match b {
            b'\n' | b'\r' => (depth, ifs) = (0, 0),
            b'(' => {
                depth += 1;
                if depth > MAX_NESTING {
                    return Some(
                        Problem::error(
                            "H0102",
                            format!("expression nested more than {MAX_NESTING} deep"),
                        )
                        .label(Span::new(file, i, i + 1), "too deep here")
                        .help("split the expression into `let` definitions"),
                    );
                }
            }
            b')' => depth = depth.saturating_sub(1),
            b'i' if bytes[i..].starts_with(b"if")
                && (i == 0 || !is_word_byte(bytes[i - 1]))
                && bytes.get(i + 2).is_none_or(|&b| !is_word_byte(b)) =>
            {
                ifs += 1;
                if ifs > MAX_NESTING {
                    return Some(
                        Problem::error(
                            "H0102",
                            format!("more than {MAX_NESTING} `if`s in one statement"),
                        )
                        .label(Span::new(file, i, i + 2), "too deep here")
                        .help("split the expression into `let` definitions"),
                    );
                }
            }
            _ => {}
        }
    }
    None
}

fn is_word_byte(b: u8) -> bool {
    b.is_ascii_alphanumeric() || b == b'_'
}

/// Punctuation that separates the parts of a statement, in plain words.
fn punctuation_words(token: &str) -> Option<&'static str> {
    Some(match token {
        "=" => "`=`",
        ":" => "`:`",
        "->" => "`->`",
        "," => "`,`",
        "(" => "`(`",
        ")" => "`)`",
        "{" => "`{`",
        "}" => "`}`",
        "+-" | "±" => "`+-`",
        _ => return None,
    })
}

/// Statements with more than [`MAX_OPERATORS`] operators, for a tree of
/// text that starts `offset` bytes into the file. The pest tree of an
/// operator chain is flat, so this walk is shallow whatever the input.
fn operator_problems(root: Pair<Rule>, file: u32, offset: usize) -> Vec<Problem> {
    let is_operator = |r: Rule| {
        matches!(
            r,
            Rule::neg
                | Rule::not
                | Rule::or
                | Rule::and
                | Rule::eq
                | Rule::ne
                | Rule::le
                | Rule::ge
                | Rule::lt
                | Rule::gt
                | Rule::add
                | Rule::sub
                | Rule::mul
                | Rule::div
                | Rule::pow
        )
    };
    let mut problems = Vec::new();
    let mut report = |stmt: &Pair<Rule>, count: usize| {
        if count > MAX_OPERATORS {
            let span = stmt.as_span();
            let end = stmt
                .as_str()
                .find('\n')
                .map_or(span.end(), |i| span.start() + i);
            problems.push(
                Problem::error(
                    "H0102",
                    format!(
                        "this statement has {count} operators; at most {MAX_OPERATORS} are allowed"
                    ),
                )
                .label(
                    Span::new(file, offset + span.start(), offset + end),
                    "too long",
                )
                .help("split the expression into `let` definitions"),
            );
        }
    };
    // One pass over the flat token sequence (pre-order): an operator counts
    // for the innermost statement around it, so the lines of a stage or
    // ensemble body count on their own and their header line without them.
    let mut open: Vec<(Pair<Rule>, usize)> = Vec::new();
    for p in root.into_inner().flatten() {
        let start = p.as_span().start();
        while open.last().is_some_and(|(s, _)| s.as_span().end() <= start) {
            let (s, count) = open.pop().expect("checked above");
            report(&s, count);
        }
        let rule = p.as_rule();
        if is_top_statement(rule)
            || matches!(rule, Rule::set_stmt | Rule::vary_stmt | Rule::option_stmt)
        {
            open.push((p, 0));
        } else if is_operator(rule) {
            if let Some((_, count)) = open.last_mut() {
                *count += 1;
            }
        }
    }
    while let Some((s, count)) = open.pop() {
        report(&s, count);
    }
    problems.sort_by_key(|p| p.primary().map(|s| s.start));
    problems
}

fn syntax_problem(
    text: &str,
    err: &pest::error::Error<Rule>,
    pos: usize,
    file: u32,
) -> (usize, Problem) {
    // pest places the error at the furthest *rule* it tried; a missing `=`
    // or `:` is a literal, tried further on the same line. Prefer that spot
    // when only punctuation was expected there.
    let mut pos = pos;
    let mut punctuation: Vec<&'static str> = Vec::new();
    let mut moved = false;
    if let Some(attempts) = err.parse_attempts() {
        let max = attempts.max_position;
        let same_line = max >= pos && max <= text.len() && !text[pos..max].contains('\n');
        if same_line {
            punctuation = attempts
                .expected_tokens()
                .iter()
                .filter_map(|t| punctuation_words(&t.to_string()))
                .collect();
            if !punctuation.is_empty() && max > pos {
                pos = max;
                moved = true;
            }
        }
    }
    let found = describe_found(text, pos);
    let mut expected: Vec<&'static str> = if moved {
        Vec::new()
    } else {
        match &err.variant {
            pest::error::ErrorVariant::ParsingError { positives, .. } => {
                positives.iter().filter_map(|r| rule_words(*r)).collect()
            }
            pest::error::ErrorVariant::CustomError { .. } => Vec::new(),
        }
    };
    // An opening bracket is always possible after a name (a call); naming
    // it helps only when it is the one thing missing.
    expected.extend(punctuation.into_iter().filter(|w| moved || *w != "`(`"));
    expected.sort_unstable();
    expected.dedup();
    // Say the most useful thing: a statement subsumes comments and the end of
    // the file, an expression subsumes names and numbers.
    // Inside a stage body only `set`, `flux` and `solver` lines may follow;
    // the keywords of the last two would otherwise read as "a statement".
    let body_line = expected.contains(&"a `set`, `flux` or `solver` line");
    if body_line || expected.contains(&"a statement") {
        expected.retain(|w| *w != "a comment" && *w != "end of file" && *w != "end of line");
    }
    if body_line {
        expected.retain(|w| *w != "a statement");
    }
    if expected.contains(&"an expression") {
        expected.retain(|w| *w != "a name" && *w != "a number");
    }
    let at_line_start = text[..pos]
        .rsplit('\n')
        .next()
        .is_none_or(|l| l.trim().is_empty());
    if expected.is_empty() && at_line_start {
        expected.push("a statement");
    }
    let message = if expected.is_empty() {
        format!("unexpected {found}")
    } else {
        format!("expected {}, found {found}", join_words(&expected))
    };
    // Mark the whole word that was found, or the one character.
    let rest = &text[pos..];
    let end = match rest.chars().next() {
        None | Some('\n') | Some('\r') => pos,
        Some(c) if c.is_alphanumeric() || c == '_' => {
            pos + rest
                .find(|c: char| !(c.is_alphanumeric() || c == '_' || c == '.'))
                .unwrap_or(rest.len())
        }
        Some(c) => pos + c.len_utf8(),
    };
    let mut problem =
        Problem::error("H0101", message).label(Span::new(file, pos, end.max(pos)), "here");
    problem = problem.help(syntax_hint(text, pos, &expected));
    (pos, problem)
}

fn syntax_hint(text: &str, pos: usize, expected: &[&str]) -> String {
    let line_start = text[..pos].rfind('\n').map_or(0, |i| i + 1);
    let before = text[line_start..pos].trim_end();
    let rest = &text[pos..];
    if rest.starts_with('=')
        && before.ends_with(|c: char| c.is_alphanumeric())
        && !before.contains('=')
    {
        return "every statement starts with a keyword such as `param`, `let` or `reservoir`; see docs/language.md".into();
    }
    if rest.starts_with("+-") || rest.starts_with('±') {
        return "`+-` belongs only in `expect NAME at AGE = VALUE +- SIGMA`".into();
    }
    let at_line_end = rest.is_empty() || rest.starts_with(['\n', '\r']);
    if expected.contains(&"`}`") && rest.trim().is_empty() {
        return "a stage body ends with `}` on a line of its own".into();
    }
    if expected.contains(&"`)`") && at_line_end {
        return "close every `(` with a `)` on the same line".into();
    }
    if before.is_empty() {
        return "a line starts with a keyword: scenario, span, report, solver, include, const, param, table, reservoir, state, let, output, flux, event, expect or stage".into();
    }
    if expected.contains(&"an operator") || expected.contains(&"end of line") {
        return "one statement per line; put a comment after `#`, and write a product with `*`"
            .into();
    }
    let first_word = before.split_whitespace().next().unwrap_or("");
    match statement_form(first_word) {
        Some(form) => {
            let article = if first_word.starts_with(['a', 'e', 'i', 'o', 'u']) {
                "an"
            } else {
                "a"
            };
            format!("{article} `{first_word}` line reads `{form}`; see docs/language.md")
        }
        None => "see docs/language.md for the form of each statement".into(),
    }
}

/// The shape of each statement, for hints.
fn statement_form(keyword: &str) -> Option<&'static str> {
    Some(match keyword {
        "scenario" => "scenario NAME \"title\"",
        "span" => "span AGE to AGE",
        "report" => "report every DURATION",
        "solver" => "solver SETTING = VALUE",
        "include" => "include \"file.hadal\"",
        "const" => "const NAME = VALUE",
        "param" => "param NAME = VALUE",
        "let" => "let NAME = EXPR",
        "event" => "event NAME = CONDITION",
        "set" => "set NAME = VALUE",
        "output" => "output NAME = EXPR in UNIT",
        "table" => "table NAME = \"file.csv\" (X_UNIT, Y_UNIT)",
        "reservoir" => "reservoir NAME = INITIAL, capacity = EXPR",
        "state" => "state NAME = INITIAL, rate = EXPR",
        "flux" => "flux NAME: FROM -> TO = RATE",
        "stage" => "stage NAME from AGE to AGE {",
        "expect" => "expect EXPR at AGE = VALUE +- SIGMA",
        _ => return None,
    })
}

fn describe_found(text: &str, pos: usize) -> String {
    let rest = &text[pos..];
    match rest.chars().next() {
        None => "end of file".into(),
        Some('\n') | Some('\r') => "end of line".into(),
        Some(c) if c.is_alphanumeric() || c == '_' => {
            let word: String = rest
                .chars()
                .take_while(|c| c.is_alphanumeric() || *c == '_' || *c == '.')
                .collect();
            format!("`{word}`")
        }
        Some(c) => format!("`{c}`"),
    }
}

fn join_words(words: &[&str]) -> String {
    match words {
        [] => String::new(),
        [one] => (*one).to_owned(),
        [init @ .., last] => format!("{} or {last}", init.join(", ")),
    }
}

/// Statements that may stand on a line of their own outside any block.
fn is_top_statement(rule: Rule) -> bool {
    matches!(
        rule,
        Rule::scenario_stmt
            | Rule::span_stmt
            | Rule::report_stmt
            | Rule::solver_stmt
            | Rule::include_stmt
            | Rule::const_stmt
            | Rule::param_stmt
            | Rule::table_stmt
            | Rule::reservoir_stmt
            | Rule::state_stmt
            | Rule::let_stmt
            | Rule::output_stmt
            | Rule::flux_stmt
            | Rule::event_stmt
            | Rule::expect_stmt
            | Rule::stage_stmt
            | Rule::ensemble_stmt
    )
}

/// Grammar rule names in plain words; `None` hides a rule from messages.
fn rule_words(rule: Rule) -> Option<&'static str> {
    Some(match rule {
        Rule::EOI => "end of file",
        Rule::line_end => "end of line",
        Rule::comment => "a comment",
        Rule::name => "a name",
        Rule::string => "a quoted string",
        Rule::op_expr | Rule::if_expr | Rule::age_expr => "an expression",
        Rule::quantity | Rule::number => "a number",
        Rule::unit | Rule::unit_factor | Rule::unit_name | Rule::unit_one => "a unit",
        Rule::call | Rule::paren => "an expression",
        Rule::neg | Rule::not => "an expression",
        Rule::or
        | Rule::and
        | Rule::eq
        | Rule::ne
        | Rule::le
        | Rule::ge
        | Rule::lt
        | Rule::gt
        | Rule::add
        | Rule::sub
        | Rule::mul
        | Rule::div
        | Rule::pow
        | Rule::op_start => "an operator",
        Rule::clause => "`, capacity = ...` or `, rate = ...`",
        Rule::cmp_op => "a comparison",
        Rule::expect_target => "`= VALUE +- SIGMA`",
        Rule::expect_range => "`in LOW to HIGH`",
        Rule::expect_bound => "a bound such as `< VALUE`",
        Rule::expect_event => "`before AGE` or `after AGE`",
        Rule::stage_body | Rule::ensemble_body => "`{`",
        Rule::vary_stmt | Rule::option_stmt => {
            "a `vary` line or a setting such as `members = 1000`"
        }
        Rule::stage_close => "`}`",
        r if is_top_statement(r) => "a statement",
        Rule::set_stmt => "a `set`, `flux` or `solver` line",
        Rule::kw_scenario
        | Rule::kw_span
        | Rule::kw_report
        | Rule::kw_solver
        | Rule::kw_include
        | Rule::kw_const
        | Rule::kw_param
        | Rule::kw_table
        | Rule::kw_reservoir
        | Rule::kw_state
        | Rule::kw_let
        | Rule::kw_output
        | Rule::kw_flux
        | Rule::kw_event
        | Rule::kw_expect
        | Rule::kw_ensemble
        | Rule::kw_stage => "a statement",
        Rule::kw_vary => "a `vary` line or a setting such as `members = 1000`",
        Rule::kw_set => "a `set`, `flux` or `solver` line",
        Rule::kw_if => "an expression",
        Rule::kw_to => "`to`",
        Rule::kw_at => "`at`",
        Rule::kw_in => "`in`",
        Rule::kw_from => "`from`",
        Rule::kw_every => "`every`",
        Rule::kw_then => "`then`",
        Rule::kw_else => "`else`",
        Rule::kw_before | Rule::kw_after => "`before` or `after`",
        _ => return None,
    })
}

fn pratt() -> &'static PrattParser<Rule> {
    static PRATT: OnceLock<PrattParser<Rule>> = OnceLock::new();
    PRATT.get_or_init(|| {
        PrattParser::new()
            .op(Op::infix(Rule::or, Assoc::Left))
            .op(Op::infix(Rule::and, Assoc::Left))
            .op(Op::prefix(Rule::not))
            .op(Op::infix(Rule::eq, Assoc::Left)
                | Op::infix(Rule::ne, Assoc::Left)
                | Op::infix(Rule::lt, Assoc::Left)
                | Op::infix(Rule::le, Assoc::Left)
                | Op::infix(Rule::gt, Assoc::Left)
                | Op::infix(Rule::ge, Assoc::Left))
            .op(Op::infix(Rule::add, Assoc::Left) | Op::infix(Rule::sub, Assoc::Left))
            .op(Op::infix(Rule::mul, Assoc::Left) | Op::infix(Rule::div, Assoc::Left))
            .op(Op::prefix(Rule::neg))
            .op(Op::infix(Rule::pow, Assoc::Right))
    })
}

/// Builds the syntax tree of a piece of a file that starts `offset` bytes
/// and `first_line` lines into it.
struct Builder {
    file: u32,
    offset: usize,
    first_line: usize,
}

impl Builder {
    fn span(&self, pair: &Pair<Rule>) -> Span {
        let s = pair.as_span();
        Span::new(self.file, self.offset + s.start(), self.offset + s.end())
    }

    /// 0-based line of the file where `pair` starts.
    fn line(&self, pair: &Pair<Rule>) -> usize {
        self.first_line + pair.line_col().0 - 1
    }

    fn entries<'i>(&self, pairs: impl IntoIterator<Item = Pair<'i, Rule>>) -> Vec<Entry> {
        let mut out: Vec<Entry> = Vec::new();
        let mut last_stmt_line: Option<usize> = None;
        for pair in pairs {
            let line = self.line(&pair);
            match pair.as_rule() {
                Rule::comment => {
                    let text = pair.as_str().trim_end().to_owned();
                    // A comment on the same line as the statement before it trails it.
                    if let (Some(l), Some(last)) = (last_stmt_line, out.last_mut()) {
                        if l == line && last.trailing.is_none() {
                            last.trailing = Some(text);
                            continue;
                        }
                    }
                    out.push(Entry {
                        line,
                        kind: EntryKind::Comment(text),
                        trailing: None,
                    });
                    last_stmt_line = None;
                }
                Rule::EOI | Rule::stage_close | Rule::line_end => {}
                _ => {
                    let stmt = self.stmt(pair);
                    // A statement ending with a stage body ends on the `}` line.
                    last_stmt_line = Some(match &stmt.kind {
                        StmtKind::Stage {
                            body: Some(body), ..
                        } => body.close_line,
                        _ => line,
                    });
                    out.push(Entry {
                        line,
                        kind: EntryKind::Stmt(Box::new(stmt)),
                        trailing: None,
                    });
                }
            }
        }
        out
    }

    fn ident(&self, pair: Pair<Rule>) -> Ident {
        Ident {
            text: pair.as_str().to_owned(),
            span: self.span(&pair),
        }
    }

    fn string(&self, pair: Pair<Rule>) -> StringLit {
        let span = self.span(&pair);
        let inner = pair.into_inner().next().map_or("", |p| p.as_str());
        let mut value = String::with_capacity(inner.len());
        let mut chars = inner.chars();
        while let Some(c) = chars.next() {
            if c == '\\' {
                if let Some(n) = chars.next() {
                    value.push(n);
                }
            } else {
                value.push(c);
            }
        }
        StringLit { value, span }
    }

    fn unit(&self, pair: Pair<Rule>) -> UnitText {
        let span = self.span(&pair);
        let text = pair.as_str().to_owned();
        let mut factors = Vec::new();
        // Walk the unit text: factors separated by `.` (times) or `/` (per).
        let mut sign = 1;
        let base = span.start as usize;
        let mut i = 0;
        let bytes = text.as_bytes();
        if text.starts_with("1/") {
            i = 2;
            sign = -1;
        }
        while i < bytes.len() {
            let start = i;
            while i < bytes.len() && bytes[i] != b'.' && bytes[i] != b'/' {
                i += 1;
            }
            let factor = &text[start..i];
            let (name, power) = match factor.split_once('^') {
                // The grammar admits only digits: a failure is an overflow,
                // kept as the largest power so the checker rejects it.
                Some((n, p)) => (
                    n,
                    p.parse::<i32>().unwrap_or(if p.starts_with('-') {
                        i32::MIN
                    } else {
                        i32::MAX
                    }),
                ),
                None => (factor, 1),
            };
            factors.push(UnitFactor {
                name: name.to_owned(),
                power: power.saturating_mul(sign),
                span: Span::new(self.file, base + start, base + i),
            });
            if i < bytes.len() {
                sign = if bytes[i] == b'/' { -1 } else { 1 };
                i += 1;
            }
        }
        UnitText {
            text,
            factors,
            span,
        }
    }

    fn stmt(&self, pair: Pair<Rule>) -> Stmt {
        let span = self.span(&pair);
        let rule = pair.as_rule();
        // Keywords are tokens in the tree; drop them.
        let mut it = pair.into_inner().filter(|p| !is_keyword(p.as_rule()));
        let mut next = || it.next().expect("grammar guarantees this child");
        let kind = match rule {
            Rule::scenario_stmt => {
                let name = self.ident(next());
                StmtKind::Scenario { name, title: None }
            }
            Rule::span_stmt => StmtKind::Span {
                from: self.expr(next()),
                to: self.expr(next()),
            },
            Rule::report_stmt => StmtKind::Report {
                every: self.expr(next()),
            },
            Rule::solver_stmt => StmtKind::Solver {
                key: self.ident(next()),
                value: self.expr(next()),
            },
            Rule::include_stmt => StmtKind::Include {
                path: self.string(next()),
            },
            Rule::const_stmt => StmtKind::Const {
                name: self.ident(next()),
                value: self.expr(next()),
            },
            Rule::param_stmt => StmtKind::Param {
                name: self.ident(next()),
                value: self.expr(next()),
            },
            Rule::set_stmt => StmtKind::Set {
                name: self.ident(next()),
                value: self.expr(next()),
            },
            Rule::let_stmt => StmtKind::Let {
                name: self.ident(next()),
                value: self.expr(next()),
            },
            Rule::event_stmt => StmtKind::Event {
                name: self.ident(next()),
                condition: self.expr(next()),
            },
            Rule::table_stmt => StmtKind::Table {
                name: self.ident(next()),
                path: self.string(next()),
                x_unit: self.unit(next()),
                y_unit: self.unit(next()),
            },
            Rule::reservoir_stmt | Rule::state_stmt => {
                let name = self.ident(next());
                let initial = self.expr(next());
                let mut clauses = Vec::new();
                for c in it.by_ref() {
                    let mut ci = c.into_inner();
                    let key = self.ident(ci.next().expect("clause key"));
                    let value = self.expr(ci.next().expect("clause value"));
                    clauses.push(Clause { key, value });
                }
                if rule == Rule::reservoir_stmt {
                    StmtKind::Reservoir {
                        name,
                        initial,
                        clauses,
                    }
                } else {
                    StmtKind::State {
                        name,
                        initial,
                        clauses,
                    }
                }
            }
            Rule::output_stmt => {
                let name = self.ident(next());
                let value = self.expr(next());
                let unit = it.next().map(|p| self.unit(p));
                StmtKind::Output { name, value, unit }
            }
            Rule::flux_stmt => StmtKind::Flux {
                name: self.ident(next()),
                from: self.ident(next()),
                to: self.ident(next()),
                rate: self.expr(next()),
            },
            Rule::expect_stmt => {
                let subject = self.expr(next());
                let first = next();
                let check = if first.as_rule() == Rule::expect_event {
                    let mut ei = first.into_inner();
                    let kw = ei.next().expect("before/after");
                    let before = kw.as_rule() == Rule::kw_before;
                    ExpectCheck::Event {
                        before,
                        age: self.expr(ei.next().expect("event age")),
                    }
                } else {
                    let at = self.expr(first);
                    let value = next();
                    let vr = value.as_rule();
                    let mut vi = value.into_inner().filter(|p| !is_keyword(p.as_rule()));
                    match vr {
                        Rule::expect_target => ExpectCheck::Target {
                            at,
                            value: self.expr(vi.next().expect("target")),
                            sigma: self.expr(vi.next().expect("sigma")),
                        },
                        Rule::expect_range => ExpectCheck::Range {
                            at,
                            low: self.expr(vi.next().expect("low")),
                            high: self.expr(vi.next().expect("high")),
                        },
                        _ => {
                            let op = match vi.next().expect("cmp").as_str() {
                                "<" => CmpOp::Lt,
                                "<=" => CmpOp::Le,
                                ">" => CmpOp::Gt,
                                _ => CmpOp::Ge,
                            };
                            ExpectCheck::Bound {
                                at,
                                op,
                                value: self.expr(vi.next().expect("bound")),
                            }
                        }
                    }
                };
                StmtKind::Expect { subject, check }
            }
            Rule::stage_stmt => {
                let name = self.ident(next());
                let from = self.expr(next());
                let to = self.expr(next());
                let body = it.next().map(|b| self.body(b));
                StmtKind::Stage {
                    name,
                    from,
                    to,
                    body,
                }
            }
            Rule::ensemble_stmt => StmtKind::Ensemble {
                body: self.body(next()),
            },
            Rule::vary_stmt => {
                let name = self.ident(next());
                let dist = self.primary(next());
                let mut clauses = Vec::new();
                for c in it.by_ref() {
                    let mut ci = c.into_inner();
                    let key = self.ident(ci.next().expect("clause key"));
                    let value = self.expr(ci.next().expect("clause value"));
                    clauses.push(Clause { key, value });
                }
                StmtKind::Vary {
                    name,
                    dist,
                    clauses,
                }
            }
            Rule::option_stmt => StmtKind::Option {
                key: self.ident(next()),
                value: self.expr(next()),
            },
            other => unreachable!("not a statement rule: {other:?}"),
        };
        // The scenario title is optional and comes last.
        let kind = match kind {
            StmtKind::Scenario { name, .. } => StmtKind::Scenario {
                name,
                title: it.next().map(|p| self.string(p)),
            },
            k => k,
        };
        Stmt { kind, span }
    }

    /// A block body: entries up to the closing brace.
    fn body(&self, b: Pair<Rule>) -> StageBody {
        let mut open_comment = None;
        let mut close_line = self.line(&b);
        let open_line = close_line;
        let mut inner: Vec<Pair<Rule>> = b.into_inner().collect();
        if let Some(first) = inner.first() {
            if first.as_rule() == Rule::comment && self.line(first) == open_line {
                open_comment = Some(first.as_str().trim_end().to_owned());
                inner.remove(0);
            }
        }
        if let Some(close) = inner.iter().find(|p| p.as_rule() == Rule::stage_close) {
            close_line = self.line(close);
        }
        StageBody {
            open_comment,
            entries: self.entries(inner),
            close_line,
        }
    }

    fn expr(&self, pair: Pair<Rule>) -> Expr {
        let span = self.span(&pair);
        match pair.as_rule() {
            Rule::if_expr => {
                let mut it = pair.into_inner().filter(|p| !is_keyword(p.as_rule()));
                let cond = self.expr(it.next().expect("cond"));
                let then = self.expr(it.next().expect("then"));
                let otherwise = self.expr(it.next().expect("else"));
                Expr {
                    kind: ExprKind::If {
                        cond: Box::new(cond),
                        then: Box::new(then),
                        otherwise: Box::new(otherwise),
                    },
                    span,
                }
            }
            Rule::op_expr | Rule::age_expr => self.pratt_expr(pair.into_inner()),
            _ => self.primary(pair),
        }
    }

    fn pratt_expr(&self, pairs: Pairs<Rule>) -> Expr {
        pratt()
            .map_primary(|p| self.primary(p))
            .map_prefix(|op, operand| {
                let span = self.span(&op).join(operand.span);
                let op = if op.as_rule() == Rule::neg {
                    UnOp::Neg
                } else {
                    UnOp::Not
                };
                Expr {
                    kind: ExprKind::Unary {
                        op,
                        operand: Box::new(operand),
                    },
                    span,
                }
            })
            .map_infix(|lhs, op, rhs| {
                let span = lhs.span.join(rhs.span);
                let op = match op.as_rule() {
                    Rule::or => BinOp::Or,
                    Rule::and => BinOp::And,
                    Rule::eq => BinOp::Eq,
                    Rule::ne => BinOp::Ne,
                    Rule::lt => BinOp::Lt,
                    Rule::le => BinOp::Le,
                    Rule::gt => BinOp::Gt,
                    Rule::ge => BinOp::Ge,
                    Rule::add => BinOp::Add,
                    Rule::sub => BinOp::Sub,
                    Rule::mul => BinOp::Mul,
                    Rule::div => BinOp::Div,
                    _ => BinOp::Pow,
                };
                Expr {
                    kind: ExprKind::Binary {
                        op,
                        lhs: Box::new(lhs),
                        rhs: Box::new(rhs),
                    },
                    span,
                }
            })
            .parse(pairs)
    }

    fn primary(&self, pair: Pair<Rule>) -> Expr {
        let span = self.span(&pair);
        let kind = match pair.as_rule() {
            Rule::quantity => {
                let mut it = pair.into_inner();
                let num = it.next().expect("number");
                let text = num.as_str().to_owned();
                // The grammar admits only decimal digits, so this parses; an
                // overlong exponent becomes infinity and the checker rejects it.
                let value = text.parse::<f64>().unwrap_or(f64::INFINITY);
                let unit = it.next().map(|u| self.unit(u));
                ExprKind::Quantity { text, value, unit }
            }
            Rule::name => ExprKind::Name(self.ident(pair)),
            Rule::call => {
                let mut it = pair.into_inner();
                let func = self.ident(it.next().expect("function name"));
                let args = it.map(|a| self.expr(a)).collect();
                ExprKind::Call { func, args }
            }
            Rule::paren => {
                let inner = pair.into_inner().next().expect("paren content");
                ExprKind::Paren(Box::new(self.expr(inner)))
            }
            // `expr` is silent: its pairs are these.
            Rule::op_expr | Rule::if_expr => return self.expr(pair),
            other => unreachable!("not a primary rule: {other:?}"),
        };
        Expr { kind, span }
    }
}

fn is_keyword(rule: Rule) -> bool {
    matches!(
        rule,
        Rule::kw_scenario
            | Rule::kw_span
            | Rule::kw_report
            | Rule::kw_every
            | Rule::kw_solver
            | Rule::kw_include
            | Rule::kw_const
            | Rule::kw_param
            | Rule::kw_table
            | Rule::kw_reservoir
            | Rule::kw_state
            | Rule::kw_let
            | Rule::kw_output
            | Rule::kw_flux
            | Rule::kw_event
            | Rule::kw_ensemble
            | Rule::kw_vary
            | Rule::kw_expect
            | Rule::kw_stage
            | Rule::kw_from
            | Rule::kw_to
            | Rule::kw_at
            | Rule::kw_in
            | Rule::kw_set
            | Rule::kw_if
            | Rule::kw_then
            | Rule::kw_else
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    const KEYWORDS: &str = "scenario span report every solver include const param table \
        reservoir state let output flux event expect stage ensemble vary from to at in set if \
        then else and or not before after";

    /// The value of the first `let` in `text`, with names as plain text.
    fn let_value(text: &str) -> Option<String> {
        let file = parse(text, 0).ok()?;
        file.entries.into_iter().find_map(|e| match e.kind {
            EntryKind::Stmt(stmt) => match stmt.kind {
                StmtKind::Let { value, .. } => Some(match value.kind {
                    ExprKind::Name(id) => format!("name {}", id.text),
                    ExprKind::Call { func, args } => format!("call {}/{}", func.text, args.len()),
                    other => format!("{other:?}"),
                }),
                _ => None,
            },
            EntryKind::Comment(_) => None,
        })
    }

    #[test]
    fn no_keyword_is_a_name_but_every_longer_or_shorter_word_is() {
        let keywords: Vec<&str> = KEYWORDS.split_whitespace().collect();
        assert_eq!(keywords.len(), 32);
        for &kw in &keywords {
            assert!(
                parse(&format!("const {kw} = 1\n"), 0).is_err(),
                "`{kw}` was taken as a name"
            );
            // Words that start like a keyword, extend one, or stop short of
            // one (the grammar tests keywords by first letter).
            let short = &kw[..kw.len() - 1];
            for word in [
                format!("{kw}x"),
                format!("{kw}_"),
                format!("{kw}9"),
                format!("x{kw}"),
            ] {
                assert_eq!(
                    let_value(&format!("let a = {word}\n")),
                    Some(format!("name {word}")),
                    "`{word}` is a name"
                );
            }
            if !short.is_empty() && !keywords.contains(&short) {
                assert_eq!(
                    let_value(&format!("let a = {short}\n")),
                    Some(format!("name {short}")),
                    "`{short}` is a name"
                );
            }
        }
    }

    #[test]
    fn a_call_may_have_space_before_its_parenthesis_and_a_name_is_not_a_call() {
        assert_eq!(let_value("let a = max (1, b)\n"), Some("call max/2".into()));
        assert_eq!(let_value("let a = max(1)\n"), Some("call max/1".into()));
        assert_eq!(let_value("let a = max\n"), Some("name max".into()));
    }

    #[test]
    fn operators_count_per_line_also_inside_a_stage_body() {
        let sum = |n: usize| format!("1{}", " + 1".repeat(n));
        let max = MAX_OPERATORS;
        // Header and body lines at the limit each, far beyond it together.
        let ok = format!(
            "stage s from {} Ga to 0 Ga {{\n  set a = {}\n  set b = {}\n}}\n",
            sum(max),
            sum(max),
            sum(max)
        );
        assert!(parse(&ok, 0).is_ok());
        let long_body = format!(
            "stage s from 1 Ga to 0 Ga {{\n  set a = 1\n  set b = {}\n}}\n",
            sum(max + 1)
        );
        let problems = parse(&long_body, 0).unwrap_err();
        assert_eq!(problems.len(), 1);
        assert_eq!(
            problems[0].message,
            format!(
                "this statement has {} operators; at most {max} are allowed",
                max + 1
            )
        );
        // The label is the body line, not the stage header.
        let at = problems[0].primary().expect("a label").start as usize;
        assert_eq!(&long_body[at..at + 9], "set b = 1");
        let long_header = format!(
            "stage s from {} Ga to 0 Ga {{\n  set a = 1\n}}\n",
            sum(max + 1)
        );
        let problems = parse(&long_header, 0).unwrap_err();
        assert_eq!(problems.len(), 1);
        assert_eq!(problems[0].primary().expect("a label").start, 0);
    }

    /// Texts of many pieces, with blocks, comments and strings holding
    /// braces near where pieces are cut.
    fn large_texts() -> Vec<String> {
        let demos = [
            include_str!("../../scenarios/hot_start.hadal"),
            include_str!("../../scenarios/glacial_window.hadal"),
        ];
        let mut texts = Vec::new();
        for demo in demos {
            let mut t = String::new();
            while t.len() < 6 * PIECE_BYTES {
                t.push_str(demo);
                t.push_str("let odd = 1 # a comment with { a brace\n");
                t.push_str("scenario s \"a title with { and # inside\"\n\n");
            }
            texts.push(t.replace('\n', "\r\n"));
            texts.push(t);
        }
        texts
    }

    #[test]
    fn parsing_in_pieces_gives_the_whole_files_tree() {
        for text in large_texts() {
            assert!(piece_ends(&text).len() >= 4, "several pieces");
            let pieces = parse_in_pieces(&text, 3).expect("every piece parses");
            assert_eq!(
                format!("{pieces:?}"),
                format!("{:?}", parse_whole(&text, 3))
            );
            assert!(pieces.is_ok());
        }
    }

    #[test]
    fn a_file_with_problems_in_a_later_piece_reports_as_a_whole() {
        for text in large_texts() {
            let at = text.len() - 100;
            let line_start = text[..at].rfind('\n').unwrap() + 1;
            // An operator chain that is too long, then a broken line.
            let long = format!("let long = 1{}\n", " + 1".repeat(MAX_OPERATORS + 1));
            let with_long = format!("{}{long}{}", &text[..line_start], &text[line_start..]);
            let got = parse(&with_long, 0);
            assert_eq!(
                format!("{got:?}"),
                format!("{:?}", parse_whole(&with_long, 0))
            );
            assert_eq!(
                got.unwrap_err()[0].primary().unwrap().start as usize,
                line_start
            );
            let broken = format!("{}const = 1\n{}", &text[..line_start], &text[line_start..]);
            let got = parse(&broken, 0);
            assert_eq!(format!("{got:?}"), format!("{:?}", parse_whole(&broken, 0)));
            assert_eq!(got.unwrap_err().len(), 1);
        }
    }
}
