//! Reading tabulated series from CSV files.

use super::Checker;
use crate::diagnostic::Problem;
use crate::model::{DefId, Table, TableId};
use crate::span::Span;
use crate::syntax::{StringLit, UnitText};
use crate::units::{self, Unit};

/// Most rows a table may have.
pub const MAX_TABLE_ROWS: usize = 1_000_000;

impl Checker {
    fn table_unit(&mut self, u: &UnitText) -> Option<Unit> {
        match units::combine(u.factors.iter().map(|f| (f.name.as_str(), f.power))) {
            Ok(unit) => Some(unit),
            Err(e) => {
                self.unit_error(u, e);
                None
            }
        }
    }

    /// Load a two-column CSV table. Problems inside the file are reported
    /// with the file's own line numbers (the file joins the source set).
    pub(crate) fn load_table(
        &mut self,
        def: DefId,
        path: &StringLit,
        x_unit: &UnitText,
        y_unit: &UnitText,
    ) -> TableId {
        let name = self.defs[def].name.clone();
        let xu = self.table_unit(x_unit);
        let yu = self.table_unit(y_unit);
        let mut table = Table {
            name: name.clone(),
            display_path: path.value.clone(),
            path: Default::default(),
            x_dim: xu.map_or(Default::default(), |u| u.dim),
            y_dim: yu.map_or(Default::default(), |u| u.dim),
            xs: Vec::new(),
            ys: Vec::new(),
            hash: String::new(),
        };
        let id = self.tables.len();
        let Some(file_path) = self.resolve_path(path.span.file, &path.value, path.span) else {
            self.tables.push(table);
            return id;
        };
        table.path = file_path.clone();
        let text = match self
            .read_input(&file_path, super::MAX_FILE_BYTES)
            .and_then(|t| self.take_bytes(t.len()).map(|_| t))
        {
            Ok(t) => t,
            Err(why) => {
                self.error(
                    Problem::error(
                        "H0503",
                        format!("cannot read table `{}`: {why}", path.value),
                    )
                    .label(path.span, "table file named here")
                    .help("paths are relative to the scenario file that names them"),
                );
                self.tables.push(table);
                return id;
            }
        };
        table.hash = blake3::hash(text.as_bytes()).to_hex().to_string();
        let base_name = self.sources.get(path.span.file).name.clone();
        let display = std::path::Path::new(&base_name)
            .parent()
            .map(|p| p.join(&path.value).to_string_lossy().replace('\\', "/"))
            .unwrap_or_else(|| path.value.clone());
        let file = self.sources.add(display, file_path, text.clone());
        if let (Some(xu), Some(yu)) = (xu, yu) {
            if let Some((xs, ys)) = self.parse_table_text(file, &text, path, xu, yu) {
                table.xs = xs;
                table.ys = ys;
            }
        }
        self.tables.push(table);
        id
    }

    fn parse_table_text(
        &mut self,
        file: u32,
        text: &str,
        path: &StringLit,
        xu: Unit,
        yu: Unit,
    ) -> Option<(Vec<f64>, Vec<f64>)> {
        let mut reader = csv::ReaderBuilder::new()
            .has_headers(true)
            .flexible(true)
            .trim(csv::Trim::All)
            .from_reader(text.as_bytes());
        let whole = Span::new(file, 0, text.trim_end().len());
        let problem = |c: &mut Checker, span: Span, msg: String, help: &str| {
            c.error(
                Problem::error("H0504", msg)
                    .label(span, "here")
                    .label(path.span, "table named here")
                    .help(help.to_owned()),
            );
        };
        // The header and each record can fail alike (bad UTF-8, a broken quote).
        let unreadable = |c: &mut Checker, e: csv::Error| {
            problem(
                c,
                whole,
                format!("cannot read `{}` as CSV: {e}", path.value),
                "save the file as plain comma-separated text",
            );
        };
        match reader.headers() {
            Ok(h) if h.len() == 2 && h.iter().all(|c| c.parse::<f64>().is_ok()) => {
                // Without a header the first row would silently be dropped.
                problem(
                    self,
                    Span::new(file, 0, text.find(['\r', '\n']).unwrap_or(text.len())),
                    format!(
                        "the first line of `{}` holds numbers, not column names",
                        path.value
                    ),
                    "start the table with a header line naming its two columns, e.g. `age,forcing`",
                );
                return None;
            }
            Ok(h) if h.len() == 2 => {}
            Ok(h) if h.is_empty() || text.trim().is_empty() => {
                problem(
                    self,
                    whole,
                    format!("table `{}` is empty", path.value),
                    "a table has a header line and at least two rows of two numbers",
                );
                return None;
            }
            Ok(h) => {
                problem(
                    self,
                    Span::new(file, 0, text.find('\n').unwrap_or(text.len())),
                    format!(
                        "the header of `{}` has {} columns, not 2",
                        path.value,
                        h.len()
                    ),
                    "a table has two columns: the argument and the value",
                );
                return None;
            }
            Err(e) => {
                unreadable(self, e);
                return None;
            }
        }
        let mut rows: Vec<(f64, f64, Span)> = Vec::new();
        for rec in reader.records() {
            let rec = match rec {
                Ok(r) => r,
                Err(e) => {
                    unreadable(self, e);
                    return None;
                }
            };
            // With CRLF line ends the reader places a record at the `\n`
            // ending the line before it; a record never starts with a line
            // end, so step over them.
            let mut pos = rec
                .position()
                .map_or(0, |p| p.byte() as usize)
                .min(text.len());
            while matches!(text.as_bytes().get(pos), Some(b'\r' | b'\n')) {
                pos += 1;
            }
            let mut line_end = text[pos..].find('\n').map_or(text.len(), |i| pos + i);
            if line_end > pos && text.as_bytes()[line_end - 1] == b'\r' {
                line_end -= 1;
            }
            let line_span = Span::new(file, pos, line_end);
            if rec.iter().all(|c| c.is_empty()) {
                continue;
            }
            if rec.len() != 2 {
                problem(
                    self,
                    line_span,
                    format!(
                        "row has {} column{}, not 2",
                        rec.len(),
                        if rec.len() == 1 { "" } else { "s" }
                    ),
                    "every row holds two numbers separated by a comma",
                );
                return None;
            }
            let mut vals = [0.0; 2];
            for (k, cell) in rec.iter().enumerate() {
                match cell.parse::<f64>() {
                    Ok(v) if v.is_finite() => vals[k] = v,
                    _ => {
                        let what = if cell.is_empty() {
                            "a cell of this row is empty".to_owned()
                        } else {
                            format!("`{cell}` is not a number")
                        };
                        problem(
                            self,
                            line_span,
                            what,
                            "cells hold plain numbers in the units declared after the path",
                        );
                        return None;
                    }
                }
            }
            if rows.len() >= MAX_TABLE_ROWS {
                problem(
                    self,
                    line_span,
                    format!("table `{}` has more than {MAX_TABLE_ROWS} rows", path.value),
                    "thin the table; linear interpolation needs far fewer knots",
                );
                return None;
            }
            let (x, y) = (xu.to_internal(vals[0]), yu.to_internal(vals[1]));
            if !x.is_finite() || !y.is_finite() {
                problem(
                    self,
                    line_span,
                    "a value of this row is too large in the declared units".to_owned(),
                    "cells hold plain numbers in the units declared after the path",
                );
                return None;
            }
            rows.push((x, y, line_span));
        }
        if rows.len() < 2 {
            problem(
                self,
                whole,
                format!("table `{}` needs at least two rows", path.value),
                "a table has a header line and at least two rows of two numbers",
            );
            return None;
        }
        let increasing = rows[1].0 > rows[0].0;
        for w in rows.windows(2) {
            let ok = if increasing {
                w[1].0 > w[0].0
            } else {
                w[1].0 < w[0].0
            };
            if !ok {
                problem(
                    self,
                    w[1].2,
                    "the first column is not strictly monotone here".to_owned(),
                    "sort the rows by the first column, with no repeated values",
                );
                return None;
            }
        }
        if !increasing {
            rows.reverse();
        }
        Some(rows.into_iter().map(|(x, y, _)| (x, y)).unzip())
    }
}
