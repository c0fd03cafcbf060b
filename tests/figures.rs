//! Figures and the report, from real run and ensemble directories written
//! by the binary: rendered to pixels with a pure-Rust rasterizer (text is
//! not rasterized; labels are checked in the SVG text), checked for a
//! non-blank plot, a past-to-present age axis, labels with units, a legend
//! below the data, byte-identical redraws, and a self-contained report.

use std::path::{Path, PathBuf};
use std::process::Command;

use hadal::figures::{self, data::TextTable, InventoryUnit, MarkShape, RunOptions};

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

fn hadal(args: &[&str], cache: &Path) {
    let o = Command::new(env!("CARGO_BIN_EXE_hadal"))
        .current_dir(root())
        .args(args)
        .env("HADAL_CACHE", cache)
        .env("NO_COLOR", "1")
        .output()
        .unwrap();
    assert!(
        o.status.success(),
        "{args:?}: {}",
        String::from_utf8_lossy(&o.stderr)
    );
}

/// A fresh run of a demo scenario into a temporary directory.
fn run_dir(scenario: &str) -> (tempfile::TempDir, PathBuf) {
    let tmp = tempfile::tempdir().unwrap();
    let out = tmp.path().join("run");
    let cache = tmp.path().join("cache");
    hadal(
        &[
            "run",
            scenario,
            "--out",
            out.to_str().unwrap(),
            "--no-cache",
        ],
        &cache,
    );
    (tmp, out)
}

fn figure<'a>(files: &'a [(String, Vec<u8>)], name: &str) -> &'a str {
    let (_, b) = files
        .iter()
        .find(|(n, _)| n == name)
        .unwrap_or_else(|| panic!("no {name} among {:?}", names(files)));
    std::str::from_utf8(b).unwrap()
}

fn names(files: &[(String, Vec<u8>)]) -> Vec<&str> {
    files.iter().map(|(n, _)| n.as_str()).collect()
}

/// A text element of an SVG: position (drawing units), anchor, content.
#[derive(Debug)]
struct Label {
    x: f64,
    y: f64,
    anchor: String,
    text: String,
}

fn attr(tag: &str, name: &str) -> Option<String> {
    let key = format!(" {name}=\"");
    let start = tag.find(&key)? + key.len();
    let end = tag[start..].find('"')? + start;
    Some(tag[start..end].to_owned())
}

fn unescape(s: &str) -> String {
    s.replace("&lt;", "<")
        .replace("&gt;", ">")
        .replace("&quot;", "\"")
        .replace("&apos;", "'")
        .replace("&amp;", "&")
}

fn labels(svg: &str) -> Vec<Label> {
    let mut out = Vec::new();
    let mut rest = svg;
    while let Some(i) = rest.find("<text ") {
        rest = &rest[i..];
        let close = rest.find('>').unwrap();
        let tag = &rest[..close];
        let end = rest.find("</text>").unwrap();
        let text = unescape(rest[close + 1..end].trim());
        out.push(Label {
            x: attr(tag, "x").unwrap().parse().unwrap(),
            y: attr(tag, "y").unwrap().parse().unwrap(),
            anchor: attr(tag, "text-anchor").unwrap_or_default(),
            text,
        });
        rest = &rest[end..];
    }
    out
}

fn parse_tick(s: &str) -> Option<f64> {
    s.replace('\u{2212}', "-").parse().ok()
}

/// The age-axis tick labels, left to right: the row of centred numeric
/// labels with the most members.
fn x_ticks(svg: &str) -> Vec<(f64, f64)> {
    let ls = labels(svg);
    let mut rows: Vec<(f64, Vec<(f64, f64)>)> = Vec::new();
    for l in ls.iter().filter(|l| l.anchor == "middle") {
        if let Some(v) = parse_tick(&l.text) {
            match rows.iter_mut().find(|(y, _)| *y == l.y) {
                Some((_, r)) => r.push((l.x, v)),
                None => rows.push((l.y, vec![(l.x, v)])),
            }
        }
    }
    let mut best = rows
        .into_iter()
        .max_by_key(|(_, r)| r.len())
        .map(|(_, r)| r)
        .unwrap_or_default();
    best.sort_by(|a, b| a.0.total_cmp(&b.0));
    best
}

fn assert_past_to_present(svg: &str, oldest: f64, youngest: f64) {
    let ticks = x_ticks(svg);
    assert!(ticks.len() >= 3, "too few age ticks: {ticks:?}");
    for w in ticks.windows(2) {
        assert!(
            w[0].1 > w[1].1,
            "age ticks must fall from left to right: {ticks:?}"
        );
    }
    assert!(ticks[0].1 <= oldest && ticks[0].1 >= youngest, "{ticks:?}");
    assert!(ticks.last().unwrap().1 >= youngest, "{ticks:?}");
}

/// The figure rasterized: width, height, RGBA pixels (premultiplied over
/// an opaque white background, so equal to straight RGB).
fn raster(svg: &str) -> (u32, u32, Vec<[u8; 3]>) {
    let tree = resvg::usvg::Tree::from_data(svg.as_bytes(), &resvg::usvg::Options::default())
        .expect("the SVG parses");
    let size = tree.size().to_int_size();
    let mut pm = resvg::tiny_skia::Pixmap::new(size.width(), size.height()).unwrap();
    resvg::render(
        &tree,
        resvg::tiny_skia::Transform::default(),
        &mut pm.as_mut(),
    );
    let px = pm
        .pixels()
        .iter()
        .map(|p| [p.red(), p.green(), p.blue()])
        .collect();
    (size.width(), size.height(), px)
}

fn coloured(p: [u8; 3]) -> bool {
    let (r, g, b) = (p[0] as i32, p[1] as i32, p[2] as i32);
    (r - g).abs().max((g - b).abs()).max((r - b).abs()) > 40
}

/// Checks on the pixels of a figure: it has a white background, its data
/// (the only coloured ink: frame, grid and stage bands are grey) covers
/// most of the width, and returns the mean row of coloured pixels in the
/// leftmost and rightmost tenth of that span (above the legend).
fn check_pixels(svg: &str, what: &str) -> (f64, f64) {
    let (w, h, px) = raster(svg);
    assert!(w >= 400 && h >= 250, "{what}: {w}x{h}");
    assert_eq!(px[0], [255, 255, 255], "{what}: the background is white");
    let top_part = (h as f64 * 0.75) as u32;
    let mut pts = Vec::new();
    for y in 0..top_part {
        for x in 0..w {
            if coloured(px[(y * w + x) as usize]) {
                pts.push((x, y));
            }
        }
    }
    assert!(
        pts.len() > 400,
        "{what}: the plot area is nearly blank ({} coloured pixels)",
        pts.len()
    );
    let x0 = pts.iter().map(|p| p.0).min().unwrap();
    let x1 = pts.iter().map(|p| p.0).max().unwrap();
    assert!(
        (x1 - x0) as f64 > 0.6 * w as f64,
        "{what}: the data spans only x = {x0}..{x1} of {w}"
    );
    let tenth = (x1 - x0) / 10;
    let mean = |sel: &dyn Fn(u32) -> bool| {
        let ys: Vec<f64> = pts
            .iter()
            .filter(|p| sel(p.0))
            .map(|p| p.1 as f64)
            .collect();
        ys.iter().sum::<f64>() / ys.len() as f64
    };
    (mean(&|x| x <= x0 + tenth), mean(&|x| x >= x1 - tenth))
}

fn texts(svg: &str) -> Vec<String> {
    labels(svg).into_iter().map(|l| l.text).collect()
}

fn has_text(svg: &str, t: &str) -> bool {
    texts(svg).iter().any(|s| s == t)
}

/// Every legend label sits below every age tick label (so below the plot).
fn assert_legend_below(svg: &str, legend: &[&str]) {
    let ls = labels(svg);
    let tick_y = ls
        .iter()
        .filter(|l| l.anchor == "middle" && parse_tick(&l.text).is_some())
        .map(|l| l.y)
        .fold(f64::NEG_INFINITY, f64::max);
    for name in legend {
        let l = ls
            .iter()
            .find(|l| l.text == *name)
            .unwrap_or_else(|| panic!("legend entry {name:?} missing: {:?}", texts(svg)));
        assert!(l.y > tick_y, "legend entry {name:?} is not below the plot");
    }
}

#[test]
fn run_figures_show_histories_past_to_present_with_units() {
    let (_tmp, dir) = run_dir("scenarios/hot_start.hadal");
    let files = figures::draw_run(&dir).unwrap();
    assert_eq!(
        names(&files),
        ["inventories.svg", "temperature.svg", "sea_level.svg"]
    );

    let inv = figure(&files, "inventories.svg");
    assert!(has_text(inv, "age [Ga]"), "{:?}", texts(inv));
    assert!(has_text(inv, "water [ocean masses]"), "{:?}", texts(inv));
    for stage in ["early", "middle", "late"] {
        assert!(has_text(inv, stage), "stage {stage} labelled");
    }
    assert_legend_below(inv, &["ocean", "upper_mantle", "transition_zone"]);
    assert_past_to_present(inv, 4.5, 0.0);
    check_pixels(inv, "inventories");

    // The mantle cools: hotter (higher on the page) at the left, the past.
    let temp = figure(&files, "temperature.svg");
    assert!(has_text(temp, "temperature [K]"), "{:?}", texts(temp));
    assert_legend_below(temp, &["T_mantle"]);
    assert!(
        !texts(temp).iter().any(|t| t.starts_with("T_celsius")),
        "the same temperature in degC is not drawn twice"
    );
    assert_past_to_present(temp, 4.5, 0.0);
    let (left_y, right_y) = check_pixels(temp, "temperature");
    assert!(
        left_y + 50.0 < right_y,
        "the hot early mantle must be drawn at the left: mean rows {left_y} (left) and {right_y} (right)"
    );

    // Sea level falls towards the present, where it is zero by definition;
    // land emergence is marked with its age.
    let sea = figure(&files, "sea_level.svg");
    assert!(
        has_text(sea, "sea level relative to present [m]"),
        "{:?}",
        texts(sea)
    );
    let events = TextTable::read_optional(&dir, "events.csv")
        .unwrap()
        .unwrap();
    let land = events.find("first_age").unwrap();
    let age: f64 = events.rows[0][land].parse().unwrap();
    assert_eq!(events.rows[0][0], "land_appears");
    let label = format!("land_appears at {:.3} Ga", age);
    assert!(has_text(sea, &label), "{label:?} in {:?}", texts(sea));
    assert_legend_below(sea, &["sea_surface", &label]);
    assert_past_to_present(sea, 4.5, 0.0);
    let (left_y, right_y) = check_pixels(sea, "sea level");
    assert!(left_y < right_y, "sea level was higher in the past");
}

#[test]
fn short_spans_are_labelled_in_ma_and_stages_stay_readable() {
    let (_tmp, dir) = run_dir("scenarios/glacial_window.hadal");
    let files = figures::draw_run(&dir).unwrap();
    for (name, svg) in &files {
        let svg = std::str::from_utf8(svg).unwrap();
        assert!(has_text(svg, "age [Ma]"), "{name}: {:?}", texts(svg));
        assert_past_to_present(svg, 40.0, 0.0);
        assert!(has_text(svg, "ice_free") && has_text(svg, "glacial"));
        check_pixels(svg, name);
    }
    let temp = figure(&files, "temperature.svg");
    assert!(has_text(temp, "temperature [°C]"), "{:?}", texts(temp));
    assert!(has_text(temp, "Temperature"), "not a mantle temperature");
    // No land event in this scenario: nothing is marked.
    let sea = figure(&files, "sea_level.svg");
    assert!(!texts(sea).iter().any(|t| t.contains("land")));
}

#[test]
fn inventories_can_be_drawn_in_kg() {
    let (_tmp, dir) = run_dir("scenarios/hot_start.hadal");
    let opts = RunOptions {
        inventory: InventoryUnit::Kg,
    };
    let files = figures::draw_run_with(&dir, &opts).unwrap();
    let inv = figure(&files, "inventories.svg");
    assert!(has_text(inv, "water [10²¹ kg]"), "{:?}", texts(inv));
    // Ocean masses: the present ocean is about 2.15, in kg about 3.0e21;
    // either way the tick labels stay short.
    assert!(labels(inv)
        .iter()
        .filter_map(|l| parse_tick(&l.text))
        .all(|v| v.abs() < 100.0));
}

#[test]
fn figures_are_byte_identical_for_the_same_files() {
    let (tmp, dir) = run_dir("scenarios/hot_start.hadal");
    let a = figures::draw_run(&dir).unwrap();
    let b = figures::draw_run(&dir).unwrap();
    assert_eq!(a, b);
    // The same files elsewhere draw the same bytes: nothing depends on the
    // directory, the clock or chance.
    let copy = tmp.path().join("copy");
    std::fs::create_dir_all(&copy).unwrap();
    for f in ["series.csv", "stages.csv", "events.csv", "manifest.json"] {
        std::fs::copy(dir.join(f), copy.join(f)).unwrap();
    }
    assert_eq!(a, figures::draw_run(&copy).unwrap());
    for (name, svg) in &a {
        let s = std::str::from_utf8(svg).unwrap();
        assert!(!s.contains(" id=\""), "{name} has element ids");
    }
    // A second, independent run gives the same figures too.
    let (_tmp2, again) = run_dir("scenarios/hot_start.hadal");
    assert_eq!(a, figures::draw_run(&again).unwrap());
}

#[test]
fn a_changed_series_changes_the_figure() {
    let (tmp, dir) = run_dir("scenarios/hot_start.hadal");
    let before = figures::draw_run(&dir).unwrap();
    let copy = tmp.path().join("edited");
    std::fs::create_dir_all(&copy).unwrap();
    for f in ["stages.csv", "events.csv"] {
        std::fs::copy(dir.join(f), copy.join(f)).unwrap();
    }
    let series = std::fs::read_to_string(dir.join("series.csv")).unwrap();
    // Drop the last (present-day) row: the span and the present change.
    let mut lines: Vec<&str> = series.lines().collect();
    lines.truncate(lines.len() - 60);
    std::fs::write(copy.join("series.csv"), lines.join("\n") + "\n").unwrap();
    let after = figures::draw_run(&copy).unwrap();
    assert_ne!(
        figure(&before, "temperature.svg"),
        figure(&after, "temperature.svg")
    );
    let sea = figure(&after, "sea_level.svg");
    assert!(
        has_text(sea, "sea level relative to run end [m]"),
        "{:?}",
        texts(sea)
    );
}

fn assert_self_contained(html: &str) {
    let lower = html.to_ascii_lowercase();
    for bad in ["src=", "href=", "<script", "<link", "url(", "@import"] {
        assert!(!lower.contains(bad), "the report contains {bad:?}");
    }
    // The only URL is the SVG namespace name, which is never fetched.
    let without_ns = lower.replace("xmlns=\"http://www.w3.org/2000/svg\"", "");
    assert!(!without_ns.contains("http:") && !without_ns.contains("https:"));
}

#[test]
fn the_run_report_is_one_self_contained_page() {
    let (_tmp, dir) = run_dir("scenarios/hot_start.hadal");
    let html = figures::html::report(&dir).unwrap();
    assert_self_contained(&html);
    assert!(html.starts_with("<!DOCTYPE html>"));
    assert_eq!(html.matches("<svg ").count(), 3, "three figures inlined");
    assert!(html.contains("<h2>Stages</h2>") && html.contains("<td>middle</td>"));
    assert!(html.contains("<td>land_appears</td>"));
    assert!(html.contains("<h2>Expectations</h2>"));
    assert!(html.contains("canonical hash"));
    let manifest: serde_json::Value =
        serde_json::from_slice(&std::fs::read(dir.join("manifest.json")).unwrap()).unwrap();
    let hash = manifest
        .pointer("/compared/scenario/canonical_hash")
        .and_then(|h| h.as_str())
        .unwrap();
    assert!(html.contains(hash));
    // The verify command names the manifest from the project root.
    let target = hadal::manifest::relative(&dir.join("manifest.json"), &root());
    assert!(
        html.contains(&format!("<code>hadal verify {target}</code>")),
        "verify command for {target}"
    );
    assert_eq!(html, figures::html::report(&dir).unwrap(), "deterministic");
}

#[test]
fn the_report_of_a_bare_run_leaves_out_what_is_missing() {
    let (tmp, dir) = run_dir("scenarios/glacial_window.hadal");
    let bare = tmp.path().join("bare");
    std::fs::create_dir_all(&bare).unwrap();
    std::fs::copy(dir.join("series.csv"), bare.join("series.csv")).unwrap();
    let html = figures::html::report(&bare).unwrap();
    assert_self_contained(&html);
    assert!(html.contains("has no <code>manifest.json</code>"));
    assert!(!html.contains("<h2>Stages</h2>"));
    assert!(!html.contains("<h2>Expectations</h2>"));
    assert!(!html.contains("<h2>Manifest</h2>"));
    assert_eq!(html.matches("<svg ").count(), 3);
    // Not an output directory at all: an error, not an empty page.
    assert!(figures::html::report(tmp.path()).is_err());
}

#[test]
fn ensemble_figures_show_bands_constraints_and_parameters() {
    let tmp = tempfile::tempdir().unwrap();
    let out = tmp.path().join("ens");
    hadal(
        &[
            "ensemble",
            "scenarios/hot_start.hadal",
            "--members",
            "40",
            "--out",
            out.to_str().unwrap(),
            "--no-cache",
        ],
        &tmp.path().join("cache"),
    );
    assert_eq!(figures::dir_kind(&out), Some(figures::DirKind::Ensemble));
    let files = figures::draw_ensemble(&out).unwrap();
    let t = figure(&files, "bands_T_mantle.svg");
    for entry in [
        "all: median",
        "accepted: median",
        "all: 90 % band",
        "accepted: 50 % band",
    ] {
        assert!(has_text(t, entry), "{entry:?} in {:?}", texts(t));
    }
    assert_legend_below(t, &["all: median", "accepted: 90 % band"]);
    assert!(has_text(t, "T_mantle [K]"));
    // The target on T_mantle at 0 Ga is drawn (stated in degC, drawn in K).
    assert!(
        texts(t)
            .iter()
            .any(|s| s.starts_with("T_mantle at 0 Ga = 1350 degC")),
        "{:?}",
        texts(t)
    );
    assert_past_to_present(t, 4.5, 0.0);
    check_pixels(t, "T_mantle bands");
    let ocean = figure(&files, "bands_ocean.svg");
    assert!(
        has_text(ocean, "ocean [ocean masses]"),
        "{:?}",
        texts(ocean)
    );
    assert!(texts(ocean)
        .iter()
        .any(|s| s.contains("2.7e21 kg to 3.3e21 kg")));

    let p = figure(&files, "parameters.svg");
    let (_, _, px) = raster(p);
    assert!(px.iter().filter(|p| coloured(**p)).count() > 200);
    assert!(texts(p).iter().any(|s| s.starts_with("q0")));
    assert!(texts(p).iter().any(|s| s.starts_with("accepted (")));

    assert_eq!(files, figures::draw_ensemble(&out).unwrap());
    let html = figures::html::report(&out).unwrap();
    assert_self_contained(&html);
    assert!(html.contains("Constraints and member sets"));
    assert!(html.contains("1: expect T_mantle at 0 Ga = 1350 degC +- 30 K"));
    assert!(html.contains("--members 40</code>"), "how to reproduce it");
    assert_eq!(html.matches("<svg ").count(), files.len());
}

#[test]
fn constraints_are_read_from_their_statements() {
    use figures::ensemble::parse_constraint;
    let c = parse_constraint("expect T_mantle at 0 Ga = 1350 degC +- 30 K").unwrap();
    assert_eq!(c.variable, "T_mantle");
    assert_eq!(c.unit, "degC");
    assert_eq!(c.mark.age_ga, Some(0.0));
    assert_eq!(
        c.mark.shape,
        MarkShape::Target {
            value: 1350.0,
            half_width: 2.0 * 30.0
        }
    );
    let c = parse_constraint("expect ice at 20 ka in 2e19 kg to 4e19 kg").unwrap();
    assert_eq!(c.mark.age_ga, Some(20e-6));
    assert_eq!(
        c.mark.shape,
        MarkShape::Range {
            low: 2e19,
            high: 4e19
        }
    );
    let c = parse_constraint("expect ice at 3 Ma < 2e19 kg").unwrap();
    assert_eq!(c.mark.shape, MarkShape::Upper { value: 2e19 });
    assert_eq!(c.mark.age_ga, Some(3e-3));
    // Expressions and events are listed, not drawn.
    assert!(parse_constraint("expect ocean + ice at 0 Ga = 1e21 kg +- 1e18 kg").is_none());
    assert!(parse_constraint("expect land_appears before 2 Ga").is_none());

    // Drawn in the variable's unit: degC becomes K, the 2-sigma bar stays 60.
    let v = hadal::figures::data::VariableQuantiles {
        variable: "T_mantle".into(),
        unit: "K".into(),
        ages: vec![1.0, 0.0],
        all: hadal::figures::data::QuantileSet {
            q: std::array::from_fn(|k| vec![1600.0 + k as f64, 1500.0 + k as f64]),
        },
        accepted: None,
    };
    let c = parse_constraint("expect T_mantle at 0 Ga = 1350 degC +- 30 K").unwrap();
    let plot = figures::ensemble::band_figure(&v, &[c], &[]);
    assert_eq!(plot.marks.len(), 1);
    match plot.marks[0].shape {
        MarkShape::Target { value, half_width } => {
            assert!((value - 1623.15).abs() < 1e-9, "{value}");
            assert!((half_width - 60.0).abs() < 1e-9, "{half_width}");
        }
        ref other => panic!("{other:?}"),
    }
}
