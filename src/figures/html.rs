//! The one-page report of a run or an ensemble directory: one
//! self-contained HTML file (figures inlined as SVG, style inline, no
//! scripts, no links, nothing fetched), readable offline and printable.
//!
//! Sections: how to verify the result, the figures, the stages, the events,
//! the expectations (run) or constraints and member sets (ensemble), and a
//! summary of the manifest (versions and hashes). Sections whose files are
//! absent are left out.

use std::fmt::Write as _;
use std::path::Path;

use super::canvas::short_num;
use super::data::{parse_num, split_header, TextTable};
use super::{dir_kind, draw_dir, DirKind, FigureError, RunOptions};

/// Escape text for HTML element content and attribute values.
pub fn escape(s: &str) -> String {
    super::canvas::escape_xml(s)
}

const STYLE: &str = "\
body{font-family:system-ui,-apple-system,'Segoe UI',sans-serif;color:#222;max-width:980px;margin:1.5rem auto;padding:0 1rem;line-height:1.45}\
h1{font-size:1.6rem;margin-bottom:.2rem}h2{font-size:1.2rem;border-bottom:1px solid #ccc;padding-bottom:.2rem;margin-top:2rem}\
.sub{color:#555;margin-top:0}\
table{border-collapse:collapse;margin:.5rem 0 1rem;font-size:.92rem}\
th,td{border:1px solid #d4d4d4;padding:.25rem .55rem;text-align:left;vertical-align:top}\
th{background:#f1f1f1}td.n{text-align:right;font-variant-numeric:tabular-nums}\
code,pre,.h{font-family:ui-monospace,'SFMono-Regular',Menlo,Consolas,monospace;font-size:.88rem}\
pre{background:#f5f5f5;border:1px solid #ddd;padding:.6rem .8rem;overflow-x:auto}\
.h{word-break:break-all}.t{overflow-x:auto}h3{font-size:1rem;margin-bottom:.2rem}\
.pass{color:#0b6e4f;font-weight:600}.fail{color:#b3400a;font-weight:600}\
figure{margin:1rem 0 1.6rem}figure svg{max-width:100%;height:auto;display:block}\
figcaption{color:#555;font-size:.88rem}\
@media print{body{max-width:none}h2{break-after:avoid}figure,table{break-inside:avoid}}";

/// The path of `dir/manifest.json` as written on the verify command:
/// relative to the project root when the manifest says where it is (so
/// the command is the same on every machine), else as given.
fn verify_target(dir: &Path, manifest: Option<&serde_json::Value>) -> (String, bool) {
    let file = dir.join("manifest.json");
    let root = manifest
        .and_then(|m| m.pointer("/run/project_root_from_manifest"))
        .and_then(|v| v.as_str())
        .map(|r| dir.join(r));
    match root {
        Some(root) if root.is_dir() => (crate::manifest::relative(&file, &root), true),
        _ => (file.to_string_lossy().into_owned(), false),
    }
}

fn str_at<'a>(v: Option<&'a serde_json::Value>, ptr: &str) -> Option<&'a str> {
    v.and_then(|m| m.pointer(ptr)).and_then(|x| x.as_str())
}

/// A cell as a person reads it: numbers with up to four significant digits
/// (the CSV keeps every digit), other text as is.
fn cell(s: &str) -> (String, bool) {
    let t = s.trim();
    let looks_numeric = !t.is_empty()
        && t.chars()
            .all(|c| c.is_ascii_digit() || matches!(c, '.' | '-' | '+' | 'e' | 'E'));
    if looks_numeric {
        let v = parse_num(t);
        if v.is_finite() {
            let shown = if t.contains(['.', 'e', 'E']) {
                short_num(v)
            } else {
                t.to_owned()
            };
            return (escape(&shown), true);
        }
    }
    (escape(t), false)
}

fn pass_cell(s: &str) -> Option<String> {
    match s.trim().to_ascii_lowercase().as_str() {
        "yes" | "true" | "pass" | "1" => Some("<td class=\"pass\">pass</td>".into()),
        "no" | "false" | "fail" | "0" => Some("<td class=\"fail\">fail</td>".into()),
        _ => None,
    }
}

/// A CSV table as an HTML table; columns named `pass`/`accepted` show
/// pass and fail.
fn table_html(t: &TextTable, out: &mut String) {
    out.push_str("<div class=\"t\"><table><thead><tr>");
    for h in &t.header {
        let (name, unit) = split_header(h);
        if unit.is_empty() {
            let _ = write!(out, "<th>{}</th>", escape(&name));
        } else {
            let _ = write!(
                out,
                "<th>{} [{}]</th>",
                escape(&name),
                escape(&super::canvas::pretty_unit(&unit))
            );
        }
    }
    out.push_str("</tr></thead><tbody>\n");
    let passy: Vec<bool> = t
        .header
        .iter()
        .map(|h| {
            let n = split_header(h).0.to_ascii_lowercase();
            n == "pass" || n == "accepted" || n.ends_with("_pass")
        })
        .collect();
    for row in &t.rows {
        out.push_str("<tr>");
        for (k, c) in row.iter().enumerate() {
            if passy.get(k).copied().unwrap_or(false) {
                if let Some(td) = pass_cell(c) {
                    out.push_str(&td);
                    continue;
                }
            }
            let (shown, numeric) = cell(c);
            if numeric {
                let _ = write!(out, "<td class=\"n\">{shown}</td>");
            } else {
                let _ = write!(out, "<td>{shown}</td>");
            }
        }
        out.push_str("</tr>\n");
    }
    out.push_str("</tbody></table></div>\n");
}

fn json_scalar(v: &serde_json::Value) -> String {
    match v {
        serde_json::Value::String(s) => escape(s),
        serde_json::Value::Number(n) => match n.as_f64() {
            Some(f) if n.is_f64() => escape(&short_num(f)),
            _ => escape(&n.to_string()),
        },
        serde_json::Value::Bool(b) => if *b { "yes" } else { "no" }.into(),
        serde_json::Value::Null => "–".into(),
        other => escape(&other.to_string()),
    }
}

/// Any JSON value as HTML: objects as two-column tables, arrays of objects
/// as tables with one column per key, other arrays as lists.
fn json_html(v: &serde_json::Value, depth: usize, out: &mut String) {
    use serde_json::Value;
    if depth > 4 {
        out.push_str(&escape(&v.to_string()));
        return;
    }
    match v {
        Value::Object(map) => {
            out.push_str("<table><tbody>\n");
            for (k, x) in map {
                let _ = write!(out, "<tr><th>{}</th><td>", escape(k));
                json_html(x, depth + 1, out);
                out.push_str("</td></tr>\n");
            }
            out.push_str("</tbody></table>\n");
        }
        Value::Array(items) if !items.is_empty() && items.iter().all(Value::is_object) => {
            let mut keys: Vec<&String> = Vec::new();
            for it in items {
                if let Value::Object(m) = it {
                    for k in m.keys() {
                        if !keys.contains(&k) {
                            keys.push(k);
                        }
                    }
                }
            }
            out.push_str("<table><thead><tr>");
            for k in &keys {
                let _ = write!(out, "<th>{}</th>", escape(k));
            }
            out.push_str("</tr></thead><tbody>\n");
            for it in items {
                out.push_str("<tr>");
                for k in &keys {
                    out.push_str("<td>");
                    if let Some(x) = it.get(k.as_str()) {
                        json_html(x, depth + 1, out);
                    }
                    out.push_str("</td>");
                }
                out.push_str("</tr>\n");
            }
            out.push_str("</tbody></table>\n");
        }
        Value::Array(items) => {
            let parts: Vec<String> = items.iter().map(json_scalar).collect();
            out.push_str(&parts.join(", "));
        }
        scalar => out.push_str(&json_scalar(scalar)),
    }
}

fn files_table(list: &serde_json::Value, out: &mut String) {
    let Some(items) = list.as_array() else {
        return;
    };
    out.push_str(
        "<div class=\"t\"><table><thead><tr><th>file</th><th>bytes</th><th>blake3</th></tr></thead><tbody>\n",
    );
    for f in items {
        let path = f.get("path").and_then(|p| p.as_str()).unwrap_or("");
        let bytes = f
            .get("bytes")
            .and_then(serde_json::Value::as_u64)
            .map(|b| b.to_string())
            .unwrap_or_default();
        let hash = f.get("blake3").and_then(|p| p.as_str()).unwrap_or("");
        let _ = writeln!(
            out,
            "<tr><td><code>{}</code></td><td class=\"n\">{}</td><td class=\"h\">{}</td></tr>",
            escape(path),
            escape(&bytes),
            escape(hash)
        );
    }
    out.push_str("</tbody></table></div>\n");
}

/// Per-stage solver settings, stage first, in a fixed column order.
fn solver_table(stages: &[serde_json::Value], out: &mut String) {
    const KEYS: [(&str, &str); 8] = [
        ("stage", "stage"),
        ("method", "method"),
        ("rtol", "rtol"),
        ("atol", "atol"),
        ("max_step_yr", "max step [yr]"),
        ("initial_step_yr", "initial step [yr]"),
        ("max_steps", "max steps"),
        ("budget_tolerance", "budget tolerance"),
    ];
    out.push_str("<div class=\"t\"><table><thead><tr>");
    for (_, head) in KEYS {
        let _ = write!(out, "<th>{head}</th>");
    }
    out.push_str("</tr></thead><tbody>\n");
    for st in stages {
        out.push_str("<tr>");
        for (key, _) in KEYS {
            let v = st.get(key).unwrap_or(&serde_json::Value::Null);
            let class = if v.is_number() { " class=\"n\"" } else { "" };
            let _ = write!(out, "<td{class}>{}</td>", json_scalar(v));
        }
        out.push_str("</tr>\n");
    }
    out.push_str("</tbody></table></div>\n");
}

fn manifest_section(m: &serde_json::Value, out: &mut String) {
    let c = m.get("compared");
    let get = |p: &str| str_at(Some(m), p).unwrap_or("");
    out.push_str("<section id=\"manifest\"><h2>Manifest</h2>\n<table><tbody>\n");
    let rows: [(&str, String); 6] = [
        ("format", get("/format").to_owned()),
        ("hadal version", get("/compared/hadal_version").to_owned()),
        (
            "engine version",
            m.pointer("/compared/engine_version")
                .map(|v| v.to_string())
                .unwrap_or_default(),
        ),
        ("scenario", get("/compared/scenario/name").to_owned()),
        ("scenario file", get("/compared/scenario/path").to_owned()),
        (
            "canonical hash",
            get("/compared/scenario/canonical_hash").to_owned(),
        ),
    ];
    for (k, v) in rows {
        if !v.is_empty() {
            let _ = writeln!(
                out,
                "<tr><th>{k}</th><td class=\"h\">{}</td></tr>",
                escape(&v)
            );
        }
    }
    if let Some(run) = m.get("run") {
        for (k, key) in [("platform", "platform"), ("series reused", "series_reused")] {
            if let Some(v) = run.get(key) {
                let _ = writeln!(out, "<tr><th>{k}</th><td>{}</td></tr>", json_scalar(v));
            }
        }
        if let Some(ms) = run.get("wall_ms").and_then(serde_json::Value::as_f64) {
            let _ = writeln!(
                out,
                "<tr><th>wall time</th><td>{} ms</td></tr>",
                escape(&short_num(ms))
            );
        }
    }
    out.push_str("</tbody></table>\n");
    if let Some(ov) = c
        .and_then(|c| c.get("overrides"))
        .and_then(|o| o.as_array())
    {
        if !ov.is_empty() {
            out.push_str("<h3>Overrides</h3>\n");
            json_html(&serde_json::Value::Array(ov.clone()), 1, out);
        }
    }
    if let Some(inputs) = c.and_then(|c| c.get("inputs")) {
        out.push_str("<h3>Inputs</h3>\n");
        files_table(inputs, out);
    }
    if let Some(outputs) = c.and_then(|c| c.get("outputs")) {
        out.push_str("<h3>Outputs</h3>\n");
        files_table(outputs, out);
    }
    if let Some(solver) = c.and_then(|c| c.get("solver")).and_then(|s| s.as_array()) {
        out.push_str("<h3>Solver settings</h3>\n");
        solver_table(solver, out);
    }
    out.push_str("</section>\n");
}

/// The stage table: stages.csv, with each stage's cache status and
/// fingerprint from the manifest where it has them.
fn stages_section(
    dir: &Path,
    manifest: Option<&serde_json::Value>,
    out: &mut String,
) -> Result<(), FigureError> {
    let Some(mut t) = TextTable::read_optional(dir, "stages.csv")? else {
        return Ok(());
    };
    let status = manifest
        .and_then(|m| m.pointer("/run/stage_status"))
        .and_then(|s| s.as_array());
    let fps = manifest
        .and_then(|m| m.pointer("/compared/stages"))
        .and_then(|s| s.as_array());
    if let Some(status) = status.filter(|s| s.len() == t.rows.len()) {
        t.header.push("status".into());
        for (row, s) in t.rows.iter_mut().zip(status) {
            row.push(s.as_str().unwrap_or("").to_owned());
        }
    }
    if let Some(fps) = fps.filter(|s| s.len() == t.rows.len()) {
        t.header.push("fingerprint".into());
        for (row, s) in t.rows.iter_mut().zip(fps) {
            let fp = s.get("fingerprint").and_then(|f| f.as_str()).unwrap_or("");
            row.push(fp.chars().take(16).collect());
        }
    }
    out.push_str("<section id=\"stages\"><h2>Stages</h2>\n");
    table_html(&t, out);
    out.push_str("</section>\n");
    Ok(())
}

fn events_section(dir: &Path, out: &mut String) -> Result<(), FigureError> {
    let Some(mut t) = TextTable::read_optional(dir, "events.csv")? else {
        return Ok(());
    };
    if t.rows.is_empty() {
        return Ok(());
    }
    for row in &mut t.rows {
        if row.get(1).is_some_and(|c| c.trim().is_empty()) {
            row[1] = "never".into();
        }
    }
    out.push_str(
        "<section id=\"events\"><h2>Events</h2>\n<p>First age at which each event happened.</p>\n",
    );
    table_html(&t, out);
    out.push_str("</section>\n");
    Ok(())
}

fn expectations_section(dir: &Path, out: &mut String) -> Result<(), FigureError> {
    let Some(t) = TextTable::read_optional(dir, "expectations.csv")? else {
        return Ok(());
    };
    if t.rows.is_empty() {
        return Ok(());
    }
    let pass_col = t.find("pass");
    let passed = pass_col.map_or(0, |k| {
        (0..t.rows.len())
            .filter(|&i| pass_cell(t.cell(i, k)).is_some_and(|c| c.contains("pass\">")))
            .count()
    });
    let _ = writeln!(
        out,
        "<section id=\"expectations\"><h2>Expectations</h2>\n<p>{passed} of {} pass.</p>",
        t.rows.len()
    );
    table_html(&t, out);
    out.push_str("</section>\n");
    Ok(())
}

/// The constraint a members.csv pass column is about: `pass_3` → `3`,
/// `ocean_now_pass` → `ocean_now`.
fn constraint_key(column: &str) -> Option<String> {
    let lower = column.to_ascii_lowercase();
    if let Some(rest) = lower.strip_prefix("pass_") {
        return Some(column[column.len() - rest.len()..].to_owned());
    }
    lower
        .strip_suffix("_pass")
        .map(|base| column[..base.len()].to_owned())
}

/// A constraint's statement from summary.json when it lists one under the
/// same id or name; the key itself otherwise.
fn constraint_name(key: &str, summary: Option<&serde_json::Value>) -> String {
    let found = summary
        .and_then(|s| s.get("constraints"))
        .and_then(|c| c.as_array())
        .and_then(|list| {
            list.iter().find(|c| {
                let id = c.get("id").map(|v| match v {
                    serde_json::Value::String(s) => s.clone(),
                    other => other.to_string(),
                });
                let name = c.get("name").and_then(|v| v.as_str());
                id.as_deref() == Some(key) || name == Some(key)
            })
        })
        .and_then(|c| {
            ["expectation", "text", "name"]
                .iter()
                .find_map(|k| c.get(*k).and_then(|v| v.as_str()))
        });
    match found {
        Some(text) => format!("{key}: {text}"),
        None => key.to_owned(),
    }
}

/// For each constraint of members.csv (columns `pass_<id>` or
/// `<name>_pass`), the share
/// of all members and of accepted members that pass it.
fn member_sets_section(
    dir: &Path,
    summary: Option<&serde_json::Value>,
    out: &mut String,
) -> Result<(), FigureError> {
    let members = TextTable::read_optional(dir, "members.csv")?;
    if let Some(m) = &members {
        let acc = m.find("accepted");
        let is_acc = |i: usize| {
            acc.is_none_or(|a| pass_cell(m.cell(i, a)).is_some_and(|c| c.contains("pass\">")))
        };
        let n = m.rows.len();
        let n_acc = (0..n).filter(|&i| is_acc(i)).count();
        let _ = writeln!(
            out,
            "<section id=\"constraints\"><h2>Constraints and member sets</h2>\n<p>{n_acc} of {n} members accepted.</p>"
        );
        let cols: Vec<(usize, String)> = m
            .header
            .iter()
            .enumerate()
            .filter_map(|(k, h)| {
                let name = split_header(h).0;
                constraint_key(&name).map(|key| (k, constraint_name(&key, summary)))
            })
            .collect();
        if !cols.is_empty() {
            out.push_str("<table><thead><tr><th>constraint</th><th>all members passing</th><th>accepted members passing</th></tr></thead><tbody>\n");
            for (k, name) in cols {
                let pass =
                    |i: usize| pass_cell(m.cell(i, k)).is_some_and(|c| c.contains("pass\">"));
                let all = (0..n).filter(|&i| pass(i)).count();
                let accp = (0..n).filter(|&i| is_acc(i) && pass(i)).count();
                let pct = |a: usize, b: usize| {
                    if b == 0 {
                        "–".to_owned()
                    } else {
                        format!("{a} of {b} ({} %)", short_num(100.0 * a as f64 / b as f64))
                    }
                };
                let _ = writeln!(
                    out,
                    "<tr><td>{}</td><td class=\"n\">{}</td><td class=\"n\">{}</td></tr>",
                    escape(&name),
                    escape(&pct(all, n)),
                    escape(&pct(accp, n_acc))
                );
            }
            out.push_str("</tbody></table>\n");
        }
    } else {
        out.push_str("<section id=\"constraints\"><h2>Constraints and member sets</h2>\n");
    }
    if let Some(s) = summary {
        out.push_str("<h3>Summary</h3>\n");
        json_html(s, 0, out);
    }
    out.push_str("</section>\n");
    Ok(())
}

/// The report page of `dir` (a run or an ensemble directory) as HTML.
pub fn report(dir: &Path) -> Result<String, FigureError> {
    let kind = dir_kind(dir).ok_or_else(|| FigureError::NotAnOutputDir(dir.to_owned()))?;
    let manifest: Option<serde_json::Value> =
        crate::fsutil::read_bounded(&dir.join("manifest.json"), crate::fsutil::MAX_JSON_BYTES)
            .ok()
            .and_then(|b| serde_json::from_slice(&b).ok());
    let summary: Option<serde_json::Value> =
        crate::fsutil::read_bounded(&dir.join("summary.json"), crate::fsutil::MAX_JSON_BYTES)
            .ok()
            .and_then(|b| serde_json::from_slice(&b).ok());
    let m = manifest.as_ref();
    let name = str_at(m, "/compared/scenario/name")
        .or_else(|| str_at(summary.as_ref(), "/scenario"))
        .map(str::to_owned)
        .unwrap_or_else(|| {
            dir.file_name()
                .map(|n| n.to_string_lossy().into_owned())
                .unwrap_or_else(|| "hadal output".into())
        });
    let what = match kind {
        DirKind::Run => "run",
        DirKind::Ensemble => "ensemble",
    };
    let mut out = String::new();
    let _ = write!(
        out,
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n<title>{} — hadal {what} report</title>\n<style>{STYLE}</style>\n</head>\n<body>\n",
        escape(&name)
    );
    let _ = writeln!(out, "<h1>{}</h1>", escape(&name));
    let mut sub = vec![format!("hadal {what} report")];
    if let Some(p) = str_at(m, "/compared/scenario/path") {
        sub.push(format!("scenario <code>{}</code>", escape(p)));
    }
    if let Some(v) = str_at(m, "/compared/hadal_version") {
        sub.push(format!("hadal {}", escape(v)));
    }
    let _ = writeln!(out, "<p class=\"sub\">{}</p>", sub.join(" · "));

    // How to check it.
    out.push_str("<section id=\"verify\"><h2>Verify</h2>\n");
    if m.is_some() {
        let (target, from_root) = verify_target(dir, m);
        let where_ = if from_root {
            "From the project root, rerun"
        } else {
            "Rerun"
        };
        let _ = writeln!(
            out,
            "<p>{where_} the scenario from scratch and compare every output with its recorded hash:</p>\n<pre><code>hadal verify {}</code></pre>",
            escape(&target)
        );
    } else if let (DirKind::Ensemble, Some(seed), Some(n)) = (
        kind,
        summary.as_ref().and_then(|s| s.get("seed")),
        summary.as_ref().and_then(|s| s.get("members")),
    ) {
        let _ = writeln!(
            out,
            "<p>Rerunning <code>hadal ensemble</code> on scenario <code>{}</code> with <code>--seed {} --members {}</code> reproduces <code>members.csv</code>, <code>quantiles.csv</code> and <code>summary.json</code> byte for byte, on any number of threads or shards.</p>",
            escape(&name),
            json_scalar(seed),
            json_scalar(n)
        );
    } else {
        out.push_str(
            "<p>This directory has no <code>manifest.json</code>, so it cannot be verified.</p>\n",
        );
    }
    out.push_str("</section>\n");

    // Figures, drawn afresh from the files.
    let figures = draw_dir(dir, &RunOptions::default())?;
    if !figures.is_empty() {
        out.push_str("<section id=\"figures\"><h2>Figures</h2>\n");
        for (file, svg) in &figures {
            let svg = String::from_utf8_lossy(svg);
            let _ = writeln!(
                out,
                "<figure>\n{}\n<figcaption>{}</figcaption>\n</figure>",
                svg.trim_end(),
                escape(file)
            );
        }
        out.push_str("</section>\n");
    }

    stages_section(dir, m, &mut out)?;
    events_section(dir, &mut out)?;
    match kind {
        DirKind::Run => expectations_section(dir, &mut out)?,
        DirKind::Ensemble => member_sets_section(dir, summary.as_ref(), &mut out)?,
    }
    if let Some(m) = m {
        manifest_section(m, &mut out);
    }
    out.push_str("</body>\n</html>\n");
    Ok(out)
}
