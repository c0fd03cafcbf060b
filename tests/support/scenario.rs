//! Shared by the `reference_*` tests: write a scenario (and its tables) into
//! a project of its own, check it, solve it, and read the results back the
//! way a modeler would: series columns at report ages, and the scenario's
//! own expectations.

#![allow(dead_code)]

use std::path::{Path, PathBuf};

use hadal::check::{check_file, CheckError, CheckOptions};
use hadal::model::Model;
use hadal::report::{ExpectResult, Series};

/// A temporary project directory: a `.git` folder makes it its own project
/// root, so tables next to the scenario resolve and nothing outside leaks in.
pub struct Project {
    dir: tempfile::TempDir,
}

impl Project {
    pub fn new() -> Project {
        let dir = tempfile::tempdir().expect("temporary directory");
        std::fs::create_dir(dir.path().join(".git")).expect("project marker");
        Project { dir }
    }

    pub fn path(&self) -> &Path {
        self.dir.path()
    }

    /// Write `text` to `name` inside the project.
    pub fn write(&self, name: &str, text: &str) -> PathBuf {
        let path = self.dir.path().join(name);
        if let Some(parent) = path.parent() {
            std::fs::create_dir_all(parent).unwrap();
        }
        std::fs::write(&path, text).unwrap();
        path
    }

    /// Check and solve the scenario `name`.
    pub fn run(&self, name: &str) -> Ran {
        let path = self.dir.path().join(name);
        let model = match check_file(&path, &CheckOptions::default()) {
            Ok(c) => c.model,
            Err(CheckError::Invalid { problems, .. }) => panic!(
                "{name} does not check: {:#?}",
                problems
                    .iter()
                    .map(|p| format!("{} {}", p.code, p.message))
                    .collect::<Vec<_>>()
            ),
            Err(e) => panic!("{name}: {e:?}"),
        };
        let run =
            hadal::pipeline::solve_all(&model).unwrap_or_else(|p| panic!("{name}: solve: {p:?}"));
        let series =
            hadal::report::series(&model, &run).unwrap_or_else(|p| panic!("{name}: report: {p:?}"));
        let expectations = hadal::report::expectations(&model, &run);
        Ran {
            name: name.to_owned(),
            model,
            run,
            series,
            expectations,
        }
    }
}

/// A solved scenario.
pub struct Ran {
    pub name: String,
    pub model: Model,
    pub run: hadal::solve::Run,
    pub series: Series,
    pub expectations: Vec<ExpectResult>,
}

impl Ran {
    /// The value of column `column` (in the unit of its header) at the
    /// report row for `age_ga`.
    pub fn at(&self, column: &str, age_ga: f64) -> f64 {
        let c = self
            .series
            .column(column)
            .unwrap_or_else(|| panic!("{}: no column `{column}`", self.name));
        let a = self.series.column("age").expect("age column");
        let row = self
            .series
            .rows
            .iter()
            .find(|r| (r[a] - age_ga).abs() <= 1e-12 * age_ga.abs().max(1e-6))
            .unwrap_or_else(|| panic!("{}: no report row at {age_ga} Ga", self.name));
        row[c]
    }

    /// The unit written in the header of `column`.
    pub fn unit(&self, column: &str) -> &str {
        let c = self
            .series
            .column(column)
            .unwrap_or_else(|| panic!("{}: no column `{column}`", self.name));
        &self.series.columns[c].unit
    }

    /// The result of the expectation whose text starts with `prefix`.
    pub fn expectation(&self, prefix: &str) -> &ExpectResult {
        let found: Vec<&ExpectResult> = self
            .expectations
            .iter()
            .filter(|e| e.text.starts_with(prefix))
            .collect();
        assert_eq!(
            found.len(),
            1,
            "{}: expected one expectation starting with {prefix:?}, found {:?}",
            self.name,
            self.expectations
                .iter()
                .map(|e| &e.text)
                .collect::<Vec<_>>()
        );
        found[0]
    }

    /// Every expectation written in the scenario passes, and there are as
    /// many as the test counts on (so none is silently dropped).
    pub fn assert_expectations_pass(&self, count: usize) {
        assert_eq!(
            self.expectations.len(),
            count,
            "{}: number of expectations",
            self.name
        );
        let failed: Vec<String> = self
            .expectations
            .iter()
            .filter(|e| !e.pass)
            .map(|e| {
                format!(
                    "{} (value {} {}, misfit {})",
                    e.text, e.shown, e.unit, e.misfit
                )
            })
            .collect();
        assert!(
            failed.is_empty(),
            "{}: failed expectations: {failed:#?}",
            self.name
        );
    }

    /// The water budget closes in every stage.
    pub fn assert_budget_closes(&self, tolerance: f64) {
        for st in &self.run.stages {
            assert!(
                st.closure_error <= tolerance,
                "{}: stage {} closure {:e}",
                self.name,
                st.stage,
                st.closure_error
            );
        }
    }
}

/// An age in ka, in the Ga of the series' age column.
pub fn ka(x: f64) -> f64 {
    x * 1e-6
}

/// Relative difference of `a` from `b`.
pub fn rel(a: f64, b: f64) -> f64 {
    (a - b).abs() / b.abs()
}

/// Area of a sphere of radius `r`.
pub fn sphere_area(r: f64) -> f64 {
    4.0 * std::f64::consts::PI * r * r
}

/// A hypsometry CSV (elevation in m, cumulative area below it in m^2).
pub fn hypsometry_csv(rows: &[(f64, f64)]) -> String {
    let mut s = String::from("elevation,area\n");
    for (z, a) in rows {
        s.push_str(&format!("{z},{a:e}\n"));
    }
    s
}
