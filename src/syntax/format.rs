//! The canonical layout. Printing a parsed file gives text that parses to
//! the same tree (spans aside), so formatting is idempotent and never changes
//! the model. Comments are kept; runs of blank lines become one; numbers and
//! units are kept as written.

use super::ast::*;

const INDENT: &str = "  ";

/// Print a whole file in canonical layout.
pub fn format_file(file: &SyntaxFile) -> String {
    let mut out = String::new();
    write_entries(&mut out, &file.entries, "", None);
    if out.is_empty() {
        return out;
    }
    while out.ends_with("\n\n") {
        out.pop();
    }
    if !out.ends_with('\n') {
        out.push('\n');
    }
    out
}

/// Print one statement in canonical layout, without a line end. A stage
/// body, if any, is printed with it.
pub fn format_stmt(stmt: &Stmt) -> String {
    let mut out = String::new();
    write_stmt(&mut out, stmt, "");
    out
}

fn entry_end_line(entry: &Entry) -> usize {
    match &entry.kind {
        EntryKind::Stmt(stmt) => match &stmt.kind {
            StmtKind::Stage {
                body: Some(body), ..
            }
            | StmtKind::Ensemble { body } => body.close_line,
            _ => entry.line,
        },
        _ => entry.line,
    }
}

fn write_entries(out: &mut String, entries: &[Entry], indent: &str, open_line: Option<usize>) {
    let mut prev_end = open_line;
    for entry in entries {
        if let Some(prev) = prev_end {
            if entry.line > prev + 1 {
                out.push('\n');
            }
        }
        out.push_str(indent);
        match &entry.kind {
            EntryKind::Comment(text) => out.push_str(text),
            EntryKind::Stmt(stmt) => write_stmt(out, stmt, indent),
        }
        if let Some(c) = &entry.trailing {
            out.push(' ');
            out.push_str(c);
        }
        out.push('\n');
        prev_end = Some(entry_end_line(entry));
    }
}

fn write_stmt(out: &mut String, stmt: &Stmt, indent: &str) {
    use std::fmt::Write;
    match &stmt.kind {
        StmtKind::Scenario { name, title } => {
            let _ = write!(out, "scenario {}", name.text);
            if let Some(t) = title {
                out.push(' ');
                write_string(out, &t.value);
            }
        }
        StmtKind::Span { from, to } => {
            let _ = write!(out, "span {} to {}", format_expr(from), format_expr(to));
        }
        StmtKind::Report { every } => {
            let _ = write!(out, "report every {}", format_expr(every));
        }
        StmtKind::Solver { key, value } => {
            let _ = write!(out, "solver {} = {}", key.text, format_expr(value));
        }
        StmtKind::Include { path } => {
            out.push_str("include ");
            write_string(out, &path.value);
        }
        StmtKind::Const { name, value } => {
            let _ = write!(out, "const {} = {}", name.text, format_expr(value));
        }
        StmtKind::Param { name, value } => {
            let _ = write!(out, "param {} = {}", name.text, format_expr(value));
        }
        StmtKind::Set { name, value } => {
            let _ = write!(out, "set {} = {}", name.text, format_expr(value));
        }
        StmtKind::Let { name, value } => {
            let _ = write!(out, "let {} = {}", name.text, format_expr(value));
        }
        StmtKind::Event { name, condition } => {
            let _ = write!(out, "event {} = {}", name.text, format_expr(condition));
        }
        StmtKind::Table {
            name,
            path,
            x_unit,
            y_unit,
        } => {
            let _ = write!(out, "table {} = ", name.text);
            write_string(out, &path.value);
            let _ = write!(out, " ({}, {})", x_unit.text, y_unit.text);
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
            let kw = if matches!(stmt.kind, StmtKind::Reservoir { .. }) {
                "reservoir"
            } else {
                "state"
            };
            let _ = write!(out, "{kw} {} = {}", name.text, format_expr(initial));
            for c in clauses {
                let _ = write!(out, ", {} = {}", c.key.text, format_expr(&c.value));
            }
        }
        StmtKind::Output { name, value, unit } => {
            let _ = write!(out, "output {} = {}", name.text, format_expr(value));
            if let Some(u) = unit {
                let _ = write!(out, " in {}", u.text);
            }
        }
        StmtKind::Flux {
            name,
            from,
            to,
            rate,
        } => {
            let _ = write!(
                out,
                "flux {}: {} -> {} = {}",
                name.text,
                from.text,
                to.text,
                format_expr(rate)
            );
        }
        StmtKind::Expect { subject, check } => {
            let _ = write!(out, "expect {}", format_expr(subject));
            match check {
                ExpectCheck::Target { at, value, sigma } => {
                    let _ = write!(
                        out,
                        " at {} = {} +- {}",
                        format_expr(at),
                        format_expr(value),
                        format_expr(sigma)
                    );
                }
                ExpectCheck::Range { at, low, high } => {
                    let _ = write!(
                        out,
                        " at {} in {} to {}",
                        format_expr(at),
                        format_expr(low),
                        format_expr(high)
                    );
                }
                ExpectCheck::Bound { at, op, value } => {
                    let _ = write!(
                        out,
                        " at {} {} {}",
                        format_expr(at),
                        op.symbol(),
                        format_expr(value)
                    );
                }
                ExpectCheck::Event { before, age } => {
                    let word = if *before { "before" } else { "after" };
                    let _ = write!(out, " {word} {}", format_expr(age));
                }
            }
        }
        StmtKind::Stage {
            name,
            from,
            to,
            body,
        } => {
            let _ = write!(
                out,
                "stage {} from {} to {}",
                name.text,
                format_expr(from),
                format_expr(to)
            );
            if let Some(body) = body {
                write_block(out, body, indent);
            }
        }
        StmtKind::Ensemble { body } => {
            out.push_str("ensemble");
            write_block(out, body, indent);
        }
        StmtKind::Vary {
            name,
            dist,
            clauses,
        } => {
            let _ = write!(out, "vary {} ~ {}", name.text, format_expr(dist));
            for c in clauses {
                let _ = write!(out, ", {} = {}", c.key.text, format_expr(&c.value));
            }
        }
        StmtKind::Option { key, value } => {
            let _ = write!(out, "{} = {}", key.text, format_expr(value));
        }
    }
}

fn write_block(out: &mut String, body: &StageBody, indent: &str) {
    out.push_str(" {");
    if let Some(c) = &body.open_comment {
        out.push(' ');
        out.push_str(c);
    }
    out.push('\n');
    let inner = format!("{indent}{INDENT}");
    let open_line = body
        .entries
        .first()
        .map(|e| e.line.min(body.close_line))
        .map(|first| first.saturating_sub(1));
    write_entries(out, &body.entries, &inner, open_line);
    out.push_str(indent);
    out.push('}');
}

fn write_string(out: &mut String, value: &str) {
    out.push('"');
    for c in value.chars() {
        if c == '"' || c == '\\' {
            out.push('\\');
        }
        out.push(c);
    }
    out.push('"');
}

/// Print an expression canonically: single spaces around binary operators
/// (none around `^`), parentheses exactly as written.
pub fn format_expr(expr: &Expr) -> String {
    let mut out = String::new();
    write_expr(&mut out, expr);
    out
}

fn write_expr(out: &mut String, expr: &Expr) {
    match &expr.kind {
        ExprKind::Quantity { text, unit, .. } => {
            out.push_str(text);
            if let Some(u) = unit {
                out.push(' ');
                out.push_str(&u.text);
            }
        }
        ExprKind::Name(id) => out.push_str(&id.text),
        ExprKind::Call { func, args } => {
            out.push_str(&func.text);
            out.push('(');
            for (i, a) in args.iter().enumerate() {
                if i > 0 {
                    out.push_str(", ");
                }
                write_expr(out, a);
            }
            out.push(')');
        }
        ExprKind::Unary { op, operand } => {
            match op {
                UnOp::Neg => out.push('-'),
                UnOp::Not => out.push_str("not "),
            }
            write_expr(out, operand);
        }
        ExprKind::Binary { op, lhs, rhs } => {
            write_expr(out, lhs);
            if *op == BinOp::Pow {
                // `2 m^2` would read as a unit power, so keep spaces after a
                // quantity that carries a unit.
                let spaced = matches!(&lhs.kind, ExprKind::Quantity { unit: Some(_), .. });
                out.push_str(if spaced { " ^ " } else { "^" });
            } else {
                out.push(' ');
                out.push_str(op.symbol());
                out.push(' ');
            }
            write_expr(out, rhs);
        }
        ExprKind::If {
            cond,
            then,
            otherwise,
        } => {
            out.push_str("if ");
            write_expr(out, cond);
            out.push_str(" then ");
            write_expr(out, then);
            out.push_str(" else ");
            write_expr(out, otherwise);
        }
        ExprKind::Paren(inner) => {
            out.push('(');
            write_expr(out, inner);
            out.push(')');
        }
    }
}
