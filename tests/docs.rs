//! The documents agree with the repository: the code map of
//! docs/ARCHITECTURE.md names every source file and only files that exist,
//! every source the code and tests cite is listed in docs/sources.md, and
//! nothing refers to a path outside the repository.

use std::collections::BTreeSet;
use std::path::{Path, PathBuf};

fn root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).to_path_buf()
}

fn read(rel: &str) -> String {
    std::fs::read_to_string(root().join(rel)).unwrap_or_else(|e| panic!("{rel}: {e}"))
}

/// Every file under `dir` (relative to the root), sorted, with `/` separators.
fn files_under(dir: &str) -> Vec<String> {
    fn walk(base: &Path, d: &Path, out: &mut Vec<String>) {
        let Ok(entries) = std::fs::read_dir(d) else {
            return;
        };
        for e in entries.flatten() {
            let p = e.path();
            if p.is_dir() {
                walk(base, &p, out);
            } else if let Ok(rel) = p.strip_prefix(base) {
                let parts: Vec<_> = rel
                    .components()
                    .map(|c| c.as_os_str().to_string_lossy())
                    .collect();
                out.push(parts.join("/"));
            }
        }
    }
    let mut out = Vec::new();
    walk(&root(), &root().join(dir), &mut out);
    out.sort();
    out
}

/// The backticked words of a text.
fn ticked(text: &str) -> Vec<&str> {
    text.split('`').skip(1).step_by(2).collect()
}

/// The pieces of a Markdown text that one statement of the code map can
/// span: each table row alone, and each other paragraph.
fn map_units(md: &str) -> Vec<String> {
    let mut units = Vec::new();
    let mut para = String::new();
    for line in md.lines() {
        if line.trim_start().starts_with('|') {
            units.push(line.to_owned());
        } else if line.trim().is_empty() {
            if !para.is_empty() {
                units.push(std::mem::take(&mut para));
            }
        } else {
            para.push_str(line);
            para.push('\n');
        }
    }
    if !para.is_empty() {
        units.push(para);
    }
    units
}

#[test]
fn the_code_map_names_every_source_file_and_only_files_that_exist() {
    let md = read("docs/ARCHITECTURE.md");
    let units = map_units(&md);
    let mut problems = Vec::new();
    // Every path under src/ that the page names exists, and every bare file
    // name exists in one of the folders its paragraph or row names.
    for unit in &units {
        let words = ticked(unit);
        // The folders a row or paragraph names, and those of the files it
        // names (`src/main.rs` puts `main.rs` in `src/`).
        let folders: Vec<&str> = words
            .iter()
            .filter(|w| w.starts_with("src/"))
            .filter_map(|w| w.rfind('/').map(|i| &w[..=i]))
            .collect();
        for w in &words {
            if w.starts_with("src/") {
                if !root().join(w).exists() {
                    problems.push(format!("`{w}` does not exist"));
                }
            } else if !w.contains('/')
                && !w.contains(' ')
                && (w.ends_with(".rs") || w.ends_with(".hadal"))
                && !folders.is_empty()
                && !folders.iter().any(|f| root().join(f).join(w).exists())
            {
                problems.push(format!("`{w}` is in none of {folders:?}"));
            }
        }
    }
    // Every file under src/ is named: by its path, by its name beside its
    // folder, or (for a folder holding only `mod.rs`) by the folder.
    for file in files_under("src") {
        let (folder, name) = match file.rfind('/') {
            Some(i) => (&file[..=i], &file[i + 1..]),
            None => unreachable!("files_under returns paths under src/"),
        };
        let full = format!("`{file}`");
        let named = md.contains(&full)
            || units.iter().any(|u| {
                let words = ticked(u);
                words.contains(&folder)
                    && (words.contains(&name)
                        || files_under(folder.trim_end_matches('/')) == [format!("{folder}mod.rs")])
            });
        if !named {
            problems.push(format!("{file} is not in the code map"));
        }
    }
    assert!(
        problems.is_empty(),
        "docs/ARCHITECTURE.md and the tree differ:\n{}",
        problems.join("\n")
    );
}

/// Author-year citations in a text: the first author's name (or the
/// issuing body) and the year, as in `Dormand & Prince 1980`,
/// `Masson, Rim & Lee (2019)`, `Morlighem et al. 2020` or `3rd CGPM, 1901`.
fn citations(text: &str) -> Vec<(String, String)> {
    let is_name = |w: &str| {
        // A `;` or `:` ends the previous citation: not part of this one.
        let w = w.trim_end_matches(',').trim_start_matches('(');
        let mut cs = w.chars();
        cs.next().is_some_and(char::is_uppercase)
            && w.chars()
                .skip(1)
                .all(|c| c.is_alphabetic() || c == '-' || c == '\'')
    };
    let joins = |w: &str| matches!(w, "&" | "and" | "et" | "al." | "al.,");
    let mut out = Vec::new();
    for line in text.lines() {
        let b = line.as_bytes();
        for i in 0..b.len().saturating_sub(3) {
            // Only at an ASCII digit, which is always a character boundary.
            if !b[i].is_ascii_digit() {
                continue;
            }
            let digits = b[i..].iter().take_while(|c| c.is_ascii_digit()).count();
            let before = i.checked_sub(1).map(|j| b[j]);
            let after = b.get(i + digits).copied();
            if digits != 4
                || before.is_some_and(|c| c.is_ascii_alphanumeric() || c == b'.' || c == b'_')
                || after.is_some_and(|c| c.is_ascii_alphanumeric() || c == b'.' || c == b'_')
            {
                continue;
            }
            let y: u32 = line[i..i + 4].parse().unwrap_or(0);
            if !(1800..=2029).contains(&y) {
                continue;
            }
            let head = line[..i].trim_end().trim_end_matches(['(', ',']).trim_end();
            let words: Vec<&str> = head.split_whitespace().collect();
            let mut k = words.len();
            while k > 0 && (is_name(words[k - 1]) || joins(words[k - 1])) {
                k -= 1;
            }
            let group = &words[k..];
            // A group ends on the name right before the year: `Name 1980`,
            // `Name et al. 1980` or `Name & Name 1980`.
            let ends_well = group.last().is_some_and(|w| is_name(w) || *w == "al.");
            if let (true, Some(first)) = (ends_well, group.iter().find(|w| is_name(w))) {
                let name = first.trim_end_matches(',').trim_start_matches('(');
                out.push((name.to_owned(), line[i..i + 4].to_owned()));
            }
        }
    }
    out
}

#[test]
fn the_citation_finder_finds_the_forms_the_code_uses() {
    let found = citations(
        "// Dormand & Prince 1980 and Masson, Rim & Lee (2019), PVLDB\n\
         //! Morlighem et al. 2020, Nature; Lambeck et al. 2014; 3rd CGPM, 1901; seed 2025; at 1200 C\n\
         // SI Brochure, 9th edition (BIPM 2019), report every 2000 yr",
    );
    let want = [
        ("Dormand", "1980"),
        ("Masson", "2019"),
        ("Morlighem", "2020"),
        ("Lambeck", "2014"),
        ("CGPM", "1901"),
        ("BIPM", "2019"),
    ];
    let want: Vec<(String, String)> = want
        .iter()
        .map(|(a, y)| (a.to_string(), y.to_string()))
        .collect();
    assert_eq!(found, want);
}

#[test]
fn every_cited_source_is_listed_in_docs_sources() {
    let sources = read("docs/sources.md");
    let mut missing = BTreeSet::new();
    let mut seen = 0;
    for dir in ["src", "tests"] {
        for file in files_under(dir) {
            if !(file.ends_with(".rs") || file.ends_with(".hadal")) || file == "tests/docs.rs" {
                continue;
            }
            let text = read(&file);
            for (name, year) in citations(&text) {
                seen += 1;
                let listed = sources
                    .lines()
                    .any(|l| l.contains(&name) && l.contains(&year));
                if !listed {
                    missing.insert(format!("{name} {year} (cited in {file})"));
                }
            }
        }
    }
    // The finder must keep finding the code's citations (a pattern that
    // matched nothing would pass this test vacuously).
    assert!(seen >= 40, "only {seen} citations found in src/ and tests/");
    assert!(
        missing.is_empty(),
        "cited but not in docs/sources.md:\n{}",
        missing.into_iter().collect::<Vec<_>>().join("\n")
    );
}

#[test]
fn nothing_refers_to_a_path_outside_the_repository() {
    // Built from pieces so that this file does not match itself.
    let machine = ["/", "work", "/"].concat();
    let old_list = ["reference", "-values.md"].concat();
    let mut files: Vec<String> = ["README.md", "DEVELOPERS.md", "Cargo.toml", ".ci/run"]
        .iter()
        .map(|s| s.to_string())
        .collect();
    for dir in [
        "docs",
        "src",
        "tests",
        "benches",
        "examples",
        "tools",
        "scenarios",
        "grammar",
    ] {
        files.extend(files_under(dir));
    }
    let mut hits = Vec::new();
    for file in &files {
        let Ok(text) = std::fs::read_to_string(root().join(file)) else {
            continue; // not text
        };
        for (n, line) in text.lines().enumerate() {
            if line.contains(&machine) || line.contains(&old_list) {
                hits.push(format!("{file}:{}: {}", n + 1, line.trim()));
            }
        }
    }
    assert!(files.len() > 50, "only {} files read", files.len());
    assert!(
        hits.is_empty(),
        "paths outside the repository:\n{}",
        hits.join("\n")
    );
}
