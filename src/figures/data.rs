//! Reading the files of a run or ensemble directory back into numbers.
//!
//! Only the files are read, never the scenario: figures and the report can
//! be redrawn from a published output directory alone. Readers are lenient
//! about what they do not need (extra columns, missing optional files) and
//! strict about what they do (a series without an age column is an error).

use std::path::Path;

use super::FigureError;
use crate::units::{self, Unit};

/// One column of a CSV table whose header is `name [unit]`.
#[derive(Debug, Clone, PartialEq)]
pub struct Column {
    pub name: String,
    /// The unit as written in the header (UDUNITS style); empty if none.
    pub unit: String,
    /// Values in that unit; NaN where a cell was empty or not a number.
    pub values: Vec<f64>,
}

/// Split a header cell `name [unit]` into its name and unit.
pub fn split_header(cell: &str) -> (String, String) {
    let cell = cell.trim();
    if let Some(open) = cell.rfind(" [") {
        if let Some(inner) = cell[open + 2..].strip_suffix(']') {
            return (cell[..open].trim().to_owned(), inner.trim().to_owned());
        }
    }
    (cell.to_owned(), String::new())
}

/// Parse a number cell. Empty and unparsable cells are NaN, so a column of
/// numbers with holes still lines up with its ages.
pub fn parse_num(cell: &str) -> f64 {
    let t = cell.trim();
    match t {
        "" => f64::NAN,
        "inf" | "+inf" | "Infinity" => f64::INFINITY,
        "-inf" | "-Infinity" => f64::NEG_INFINITY,
        _ => t.parse::<f64>().unwrap_or(f64::NAN),
    }
}

/// A CSV file as text cells: header and rows.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct TextTable {
    pub header: Vec<String>,
    pub rows: Vec<Vec<String>>,
}

impl TextTable {
    pub fn parse(bytes: &[u8]) -> Result<TextTable, FigureError> {
        let mut r = csv_reader(bytes);
        let header = header_of(&mut r)?.iter().map(str::to_owned).collect();
        let mut rows = Vec::new();
        for rec in r.records() {
            let rec = rec.map_err(bad_row)?;
            rows.push(rec.iter().map(str::to_owned).collect());
        }
        Ok(TextTable { header, rows })
    }

    /// Read `dir/name`; `Ok(None)` when the file does not exist.
    pub fn read_optional(dir: &Path, name: &str) -> Result<Option<TextTable>, FigureError> {
        let path = dir.join(name);
        match crate::fsutil::read_bounded(&path, crate::fsutil::MAX_OUTPUT_BYTES) {
            Ok(b) => TextTable::parse(&b)
                .map(Some)
                .map_err(|e| e.at(&path.display().to_string())),
            Err(e) if e.is_not_found() => Ok(None),
            Err(e) => Err(FigureError::Read(format!(
                "cannot read {}: {e}",
                path.display()
            ))),
        }
    }

    /// Index of the column whose name (before any `[unit]`) is `name`.
    pub fn find(&self, name: &str) -> Option<usize> {
        self.header
            .iter()
            .position(|h| split_header(h).0.eq_ignore_ascii_case(name))
    }

    pub fn cell(&self, row: usize, col: usize) -> &str {
        self.rows
            .get(row)
            .and_then(|r| r.get(col))
            .map_or("", String::as_str)
    }

    /// Every column parsed as numbers.
    pub fn numeric_columns(&self) -> Vec<Column> {
        self.header
            .iter()
            .enumerate()
            .map(|(k, h)| {
                let (name, unit) = split_header(h);
                Column {
                    name,
                    unit,
                    values: (0..self.rows.len())
                        .map(|i| parse_num(self.cell(i, k)))
                        .collect(),
                }
            })
            .collect()
    }
}

/// Every column of a CSV file parsed as numbers, as
/// [`TextTable::numeric_columns`] gives them, read record by record: a
/// run's series may be millions of rows, and as text cells it took about
/// eight times the memory of its numbers. `Ok(None)` when the file does
/// not exist.
pub fn read_numeric_columns(path: &Path) -> Result<Option<Vec<Column>>, FigureError> {
    let file = match std::fs::File::open(path) {
        Ok(f) => f,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(None),
        Err(e) => {
            return Err(FigureError::Read(format!(
                "cannot read {}: {e}",
                path.display()
            )))
        }
    };
    numeric_columns_of(std::io::BufReader::new(file))
        .map(Some)
        .map_err(|e| e.at(&path.display().to_string()))
}

/// A reader of CSV text that starts with a header line. Rows may be
/// shorter or longer than the header: each caller says what a missing
/// cell means.
fn csv_reader<R: std::io::Read>(from: R) -> csv::Reader<R> {
    csv::ReaderBuilder::new()
        .has_headers(true)
        .flexible(true)
        .from_reader(from)
}

fn header_of<R: std::io::Read>(r: &mut csv::Reader<R>) -> Result<&csv::StringRecord, FigureError> {
    r.headers()
        .map_err(|e| FigureError::Invalid(format!("bad CSV header: {e}")))
}

fn bad_row(e: csv::Error) -> FigureError {
    FigureError::Invalid(format!("bad CSV row: {e}"))
}

/// Every column of CSV text parsed as numbers (see [`read_numeric_columns`]).
fn numeric_columns_of(from: impl std::io::Read) -> Result<Vec<Column>, FigureError> {
    let mut r = csv_reader(from);
    let mut cols = header_columns(header_of(&mut r)?);
    let mut rec = csv::StringRecord::new();
    while r.read_record(&mut rec).map_err(bad_row)? {
        for (k, c) in cols.iter_mut().enumerate() {
            c.values.push(parse_num(rec.get(k).unwrap_or("")));
        }
    }
    Ok(cols)
}

fn header_columns(header: &csv::StringRecord) -> Vec<Column> {
    header
        .iter()
        .map(|h| {
            let (name, unit) = split_header(h);
            Column {
                name,
                unit,
                values: Vec::new(),
            }
        })
        .collect()
}

/// The columns of a series CSV held in memory (as a run makes it), the
/// same numbers [`read_numeric_columns`] reads from the written file.
pub fn decode_series(bytes: &[u8]) -> Result<Vec<Column>, FigureError> {
    decode_series_columns(bytes, |_, _| true)
}

/// [`decode_series`], keeping only the columns for which `keep(name,
/// unit)` holds; the cells of the others are not parsed. The rows of a
/// series are numbers that are never quoted, so they are split directly,
/// without the CSV reader's records; text with a quote anywhere after the
/// header goes through the CSV reader instead.
pub fn decode_series_columns(
    bytes: &[u8],
    keep: impl Fn(&str, &str) -> bool,
) -> Result<Vec<Column>, FigureError> {
    let mut r = csv_reader(bytes);
    let header = header_of(&mut r)?.clone();
    let body = &bytes[(r.position().byte() as usize).min(bytes.len())..];
    if body.contains(&b'"') {
        let mut cols = numeric_columns_of(bytes)?;
        cols.retain(|c| keep(&c.name, &c.unit));
        return Ok(cols);
    }
    // The kept columns and their positions in a row.
    let (at, mut cols): (Vec<usize>, Vec<Column>) = header_columns(&header)
        .into_iter()
        .enumerate()
        .filter(|(_, c)| keep(&c.name, &c.unit))
        .unzip();
    let lines = body.iter().filter(|&&b| b == b'\n').count() + 1;
    for c in &mut cols {
        c.values.reserve(lines);
    }
    for line in body.split(|&b| b == b'\n') {
        let line = line.strip_suffix(b"\r").unwrap_or(line);
        // The CSV reader skips empty lines too.
        if line.is_empty() {
            continue;
        }
        let line = std::str::from_utf8(line)
            .map_err(|e| FigureError::Invalid(format!("bad CSV row: {e}")))?;
        let mut cells = line.split(',').enumerate();
        for (c, &k) in cols.iter_mut().zip(&at) {
            // Cells before the next kept one are skipped unparsed; a short
            // row leaves the rest empty (NaN), as the CSV reader does.
            let cell = cells.find(|(i, _)| *i == k).map_or("", |(_, t)| t);
            c.values.push(parse_num(cell));
        }
    }
    Ok(cols)
}

/// A unit written UDUNITS style in a CSV header (`kg`, `W m-2`, `cm yr-1`,
/// `degC`, `1`), as the project's unit table knows it. `None` for units the
/// table does not know; such columns are plotted in their own unit, never
/// converted.
pub fn header_unit(text: &str) -> Option<Unit> {
    let text = text.trim();
    if text.is_empty() || text == "1" {
        return units::combine(std::iter::empty()).ok();
    }
    let mut factors: Vec<(&str, i32)> = Vec::new();
    for tok in text.split_whitespace() {
        let split = tok
            .char_indices()
            .find(|&(i, c)| i > 0 && (c == '-' || c.is_ascii_digit()))
            .map_or(tok.len(), |(i, _)| i);
        let (name, pow) = tok.split_at(split);
        let pow = if pow.is_empty() {
            1
        } else {
            pow.parse::<i32>().ok()?
        };
        factors.push((name, pow));
    }
    units::combine(factors).ok()
}

/// Convert `v` from unit `from` to unit `to` (header spellings), when both
/// are known and measure the same kind of quantity.
pub fn convert(v: f64, from: &str, to: &str) -> Option<f64> {
    if from == to {
        return Some(v);
    }
    let (a, b) = (header_unit(from)?, header_unit(to)?);
    if a.dim.plain() != b.dim.plain() {
        return None;
    }
    Some(b.from_internal(a.to_internal(v)))
}

/// Ages in Ga from a column in any age unit (Ga, Ma, ka, yr).
fn ages_in_ga(col: &Column) -> Result<Vec<f64>, FigureError> {
    let unit = if col.unit.is_empty() { "Ga" } else { &col.unit };
    let per_ga = match unit {
        "Ga" => 1.0,
        "Ma" => 1e3,
        "ka" => 1e6,
        "yr" | "a" => 1e9,
        other => {
            return Err(FigureError::Invalid(format!(
                "the age column is in `{other}`, not an age unit"
            )))
        }
    };
    Ok(col.values.iter().map(|v| v / per_ga).collect())
}

/// One stage of a run: its name and span.
#[derive(Debug, Clone, PartialEq)]
pub struct StageSpan {
    pub name: String,
    pub from_ga: f64,
    pub to_ga: f64,
    /// Every cell of the stage's row in stages.csv, for the report.
    pub cells: Vec<String>,
}

/// An event and the first age at which it happened (None: never).
#[derive(Debug, Clone, PartialEq)]
pub struct EventAge {
    pub name: String,
    pub age_ga: Option<f64>,
}

/// What a run directory holds, as numbers.
#[derive(Debug, Clone)]
pub struct RunData {
    /// Report ages in Ga, in file order (oldest first).
    pub ages: Vec<f64>,
    /// Every column after the age column.
    pub columns: Vec<Column>,
    pub stages: Vec<StageSpan>,
    pub stages_header: Vec<String>,
    pub events: Vec<EventAge>,
    /// The manifest, if present and readable as JSON.
    pub manifest: Option<serde_json::Value>,
}

impl RunData {
    /// Read `series.csv` (required), `stages.csv`, `events.csv` and
    /// `manifest.json` (optional) from a run directory.
    pub fn load(dir: &Path) -> Result<RunData, FigureError> {
        let cols = read_numeric_columns(&dir.join("series.csv"))?
            .ok_or_else(|| FigureError::Read(format!("{} has no series.csv", dir.display())))?;
        let stages = TextTable::read_optional(dir, "stages.csv")?;
        let events = TextTable::read_optional(dir, "events.csv")?;
        let manifest =
            crate::fsutil::read_bounded(&dir.join("manifest.json"), crate::fsutil::MAX_JSON_BYTES)
                .ok()
                .and_then(|b| serde_json::from_slice(&b).ok());
        let series = dir.join("series.csv");
        RunData::from_parts(
            cols,
            stages,
            events,
            manifest,
            &series.display().to_string(),
        )
    }

    /// A run's data from its parts, wherever they were read (files for
    /// `hadal plot`, memory for `hadal run`): the series' columns, the
    /// stages and events tables and the manifest. `series` names the
    /// series in errors.
    pub fn from_parts(
        mut cols: Vec<Column>,
        stages: Option<TextTable>,
        events: Option<TextTable>,
        manifest: Option<serde_json::Value>,
        series: &str,
    ) -> Result<RunData, FigureError> {
        let age_at = cols
            .iter()
            .position(|c| c.name.eq_ignore_ascii_case("age"))
            .ok_or_else(|| FigureError::Invalid(format!("{series} has no `age` column")))?;
        let age = cols.remove(age_at);
        let ages = ages_in_ga(&age)?;
        if ages.iter().any(|a| !a.is_finite()) {
            return Err(FigureError::Invalid(format!(
                "{series} has an empty or non-numeric age"
            )));
        }
        let (stages, stages_header) = match stages {
            Some(t) => (read_stages(&t), t.header.clone()),
            None => (Vec::new(), Vec::new()),
        };
        let events = events.map(|t| read_events(&t)).unwrap_or_default();
        Ok(RunData {
            ages,
            columns: cols,
            stages,
            stages_header,
            events,
            manifest,
        })
    }

    pub fn column(&self, name: &str) -> Option<&Column> {
        self.columns.iter().find(|c| c.name == name)
    }
}

/// How many of a header's age unit make a Ga (ages are divided by it, so
/// 20 ka is exactly the double nearest 2e-5 Ga).
fn per_ga(header: &str) -> f64 {
    match split_header(header).1.as_str() {
        "Ma" => 1e3,
        "ka" => 1e6,
        "yr" => 1e9,
        _ => 1.0,
    }
}

/// The stages of `dir/stages.csv` (none when the file is absent).
pub fn load_stages(dir: &Path) -> Result<Vec<StageSpan>, FigureError> {
    Ok(TextTable::read_optional(dir, "stages.csv")?
        .map(|t| read_stages(&t))
        .unwrap_or_default())
}

fn read_stages(t: &TextTable) -> Vec<StageSpan> {
    let name = t.find("stage").unwrap_or(0);
    let (Some(from), Some(to)) = (t.find("from"), t.find("to")) else {
        return Vec::new();
    };
    let (ff, ft) = (per_ga(&t.header[from]), per_ga(&t.header[to]));
    (0..t.rows.len())
        .filter_map(|i| {
            let a = parse_num(t.cell(i, from)) / ff;
            let b = parse_num(t.cell(i, to)) / ft;
            (a.is_finite() && b.is_finite()).then(|| StageSpan {
                name: t.cell(i, name).to_owned(),
                from_ga: a,
                to_ga: b,
                cells: t.rows[i].clone(),
            })
        })
        .collect()
}

fn read_events(t: &TextTable) -> Vec<EventAge> {
    let name = t.find("event").unwrap_or(0);
    let age = t
        .header
        .iter()
        .position(|h| split_header(h).0.contains("age"))
        .unwrap_or(1);
    let f = t.header.get(age).map_or(1.0, |h| per_ga(h));
    (0..t.rows.len())
        .map(|i| {
            let a = parse_num(t.cell(i, age)) / f;
            EventAge {
                name: t.cell(i, name).to_owned(),
                age_ga: a.is_finite().then_some(a),
            }
        })
        .collect()
}

/// The five quantile levels of an ensemble, in percent.
pub const LEVELS: [u32; 5] = [5, 25, 50, 75, 95];

/// Per-age quantiles of one variable for one member set.
#[derive(Debug, Clone, PartialEq)]
pub struct QuantileSet {
    /// `q[k][i]`: level `LEVELS[k]` at age `i` (NaN where the set is empty).
    pub q: [Vec<f64>; 5],
}

/// Quantiles of one variable against age, for all and for accepted members.
#[derive(Debug, Clone, PartialEq)]
pub struct VariableQuantiles {
    pub variable: String,
    pub unit: String,
    pub ages: Vec<f64>,
    pub all: QuantileSet,
    pub accepted: Option<QuantileSet>,
}

/// Which member set and level a quantile column holds, from its name:
/// any name containing a level (5, 25, 50, 75, 95; `median` for 50) and,
/// for the accepted set, the word `acc` (`accepted_p05`, `q50_accepted`,
/// `accepted 95 %`). Columns naming no level are not quantiles.
fn quantile_column(name: &str) -> Option<(bool, usize)> {
    let lower = name.to_ascii_lowercase();
    let accepted = lower.contains("acc");
    let level = if lower.contains("median") {
        Some(50)
    } else {
        let mut digits = String::new();
        let mut found = None;
        for c in lower.chars().chain(std::iter::once(' ')) {
            if c.is_ascii_digit() {
                digits.push(c);
            } else if !digits.is_empty() {
                found = digits.parse::<u32>().ok();
                break;
            }
        }
        found
    };
    let k = LEVELS.iter().position(|&l| Some(l) == level)?;
    Some((accepted, k))
}

/// Parse `quantiles.csv`: long format, one row per (age, variable), with an
/// `age [unit]` column, a `variable` column (its cells may carry a
/// `[unit]`), an optional `unit` column, and quantile columns as described
/// at [`quantile_column`]. Variables keep their first-seen order.
pub fn parse_quantiles(t: &TextTable) -> Result<Vec<VariableQuantiles>, FigureError> {
    let age = t
        .header
        .iter()
        .position(|h| split_header(h).0.eq_ignore_ascii_case("age"))
        .ok_or_else(|| FigureError::Invalid("quantiles.csv has no `age` column".into()))?;
    let af = per_ga(&t.header[age]);
    let var = t
        .find("variable")
        .ok_or_else(|| FigureError::Invalid("quantiles.csv has no `variable` column".into()))?;
    let unit_col = t.find("unit");
    let qcols: Vec<(usize, bool, usize)> = t
        .header
        .iter()
        .enumerate()
        .filter(|(k, _)| *k != age && *k != var && Some(*k) != unit_col)
        .filter_map(|(k, h)| quantile_column(&split_header(h).0).map(|(a, l)| (k, a, l)))
        .collect();
    if !qcols.iter().any(|&(_, a, _)| !a) {
        return Err(FigureError::Invalid(
            "quantiles.csv has no quantile columns for all members".into(),
        ));
    }
    let has_accepted = qcols.iter().any(|&(_, a, _)| a);
    let mut out: Vec<VariableQuantiles> = Vec::new();
    for i in 0..t.rows.len() {
        let (name, mut unit) = split_header(t.cell(i, var));
        if let Some(u) = unit_col {
            unit = t.cell(i, u).trim().to_owned();
        }
        if unit.is_empty() {
            // The unit may sit in the quantile column headers instead.
            unit = split_header(&t.header[qcols[0].0]).1;
        }
        let a = parse_num(t.cell(i, age)) / af;
        if !a.is_finite() {
            continue;
        }
        let at = match out.iter().position(|v| v.variable == name) {
            Some(p) => p,
            None => {
                let empty = || QuantileSet {
                    q: Default::default(),
                };
                out.push(VariableQuantiles {
                    variable: name.clone(),
                    unit: unit.clone(),
                    ages: Vec::new(),
                    all: empty(),
                    accepted: has_accepted.then(empty),
                });
                out.len() - 1
            }
        };
        let v = &mut out[at];
        v.ages.push(a);
        let mut row_all = [f64::NAN; 5];
        let mut row_acc = [f64::NAN; 5];
        for &(k, acc, l) in &qcols {
            let x = parse_num(t.cell(i, k));
            if acc {
                row_acc[l] = x;
            } else {
                row_all[l] = x;
            }
        }
        for l in 0..5 {
            v.all.q[l].push(row_all[l]);
            if let Some(s) = v.accepted.as_mut() {
                s.q[l].push(row_acc[l]);
            }
        }
    }
    Ok(out)
}

/// The members table of an ensemble.
#[derive(Debug, Clone, PartialEq)]
pub struct Members {
    /// Parameter columns: name, unit, one value per member.
    pub params: Vec<Column>,
    /// Whether each member was accepted (all true when the file says nothing).
    pub accepted: Vec<bool>,
}

fn truthy(cell: &str) -> bool {
    matches!(
        cell.trim().to_ascii_lowercase().as_str(),
        "1" | "true" | "yes" | "pass" | "accepted" | "y" | "t"
    )
}

/// Parse `members.csv`: a member id column (`member`, `id`, `member_id`),
/// parameter columns, per-constraint columns whose names contain `misfit`
/// or `pass`, and an `accepted` column. Parameters are the numeric columns
/// that are none of the others.
pub fn parse_members(t: &TextTable) -> Members {
    let acc = t.find("accepted");
    let mut params = Vec::new();
    for (k, h) in t.header.iter().enumerate() {
        let (name, unit) = split_header(h);
        let lower = name.to_ascii_lowercase();
        if Some(k) == acc
            || matches!(lower.as_str(), "member" | "id" | "member_id" | "index")
            || lower.contains("misfit")
            || lower.contains("pass")
        {
            continue;
        }
        let values: Vec<f64> = (0..t.rows.len()).map(|i| parse_num(t.cell(i, k))).collect();
        if values.iter().any(|v| v.is_finite()) {
            params.push(Column { name, unit, values });
        }
    }
    let accepted = (0..t.rows.len())
        .map(|i| acc.is_none_or(|a| truthy(t.cell(i, a))))
        .collect();
    Members { params, accepted }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Columns with their values as bits, so that NaN holes and -0 compare.
    fn bits(cols: &[Column]) -> Vec<(String, String, Vec<u64>)> {
        cols.iter()
            .map(|c| {
                let v = c.values.iter().map(|v| v.to_bits()).collect();
                (c.name.clone(), c.unit.clone(), v)
            })
            .collect()
    }

    #[test]
    fn numeric_columns_read_record_by_record_match_the_text_table() {
        let text = "age [Ga],ocean [kg],sea_level [m]\n4.5,1.4e21,-20\n4.4,,inf\n4.3,1e21\n4.2,x,3,extra\n";
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("series.csv");
        std::fs::write(&path, text).unwrap();
        let streamed = read_numeric_columns(&path).unwrap().unwrap();
        let whole = TextTable::parse(text.as_bytes()).unwrap().numeric_columns();
        // NaN marks holes in both; compare bits.
        assert_eq!(bits(&streamed), bits(&whole));
        assert_eq!(streamed[1].values.len(), 4);
        assert!(read_numeric_columns(&dir.path().join("none.csv"))
            .unwrap()
            .is_none());
    }

    #[test]
    fn a_series_decoded_in_memory_is_the_series_read_from_its_file() {
        // Holes, infinities, NaN, short and long rows, a blank line, CRLF,
        // a header the CSV writer quoted, and the bits of -0 and subnormals.
        let texts = [
            "age [Ga],ocean [kg],sea_level [m]\n4.5,1.4e21,-20\n4.4,,inf\n4.3,1e21\n4.2,x,3,extra\n",
            "age [Ga],\"a, b [kg]\"\r\n1,-0,NaN\r\n\r\n0.5,5e-324,-inf\r\n",
            "age [Ma],v []\n",
            "age [Ga],v [1]\n1,\"2\"\n",
            "age [Ga],v [1]\n1,2",
        ];
        for text in texts {
            let read = numeric_columns_of(text.as_bytes()).unwrap();
            let decoded = decode_series(text.as_bytes()).unwrap();
            assert_eq!(bits(&decoded), bits(&read), "{text:?}");
        }
    }

    #[test]
    fn decoding_some_columns_gives_those_columns_of_the_whole_series() {
        let texts = [
            "age [Ga],ocean [kg],t [K],sea_level [m]\n4.5,1.4e21,1600,-20\n4.4,,inf\n4.3\n4.2,x,3,5,extra\n",
            "age [Ga],\"a, b [kg]\",t [K]\n1,2,3\n",
        ];
        let keep = |n: &str, u: &str| n == "age" || u == "kg" || u == "m";
        for text in texts {
            let mut whole = decode_series(text.as_bytes()).unwrap();
            whole.retain(|c| keep(&c.name, &c.unit));
            let some = decode_series_columns(text.as_bytes(), keep).unwrap();
            let bits = |cols: &[Column]| -> Vec<(String, Vec<u64>)> {
                cols.iter()
                    .map(|c| {
                        (
                            c.name.clone(),
                            c.values.iter().map(|v| v.to_bits()).collect(),
                        )
                    })
                    .collect()
            };
            assert_eq!(bits(&some), bits(&whole), "{text:?}");
            assert!(some.len() < decode_series(text.as_bytes()).unwrap().len());
        }
    }
}
