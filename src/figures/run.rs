//! The figures of one run, chosen from the columns of its series:
//! inventories (columns in kg), temperature (columns in K or degC), and
//! sea level relative to present (columns in m whose name contains `sea`),
//! each with the run's stages as bands.

use super::age_plot::{self, age_text, age_unit, AgePlot, EventLine, Line};
use super::canvas::{pretty_unit, series_style};
use super::data::{convert, Column, RunData};

/// One ocean mass, the unit inventories are drawn in by default (the
/// prelude's `ocean_mass`).
pub const OCEAN_MASS_KG: f64 = 1.4e21;

/// The unit of the inventory figure.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum InventoryUnit {
    /// Ocean masses of 1.4e21 kg.
    #[default]
    OceanMasses,
    /// Kilograms, as in series.csv.
    Kg,
}

/// Options for the run figures.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct RunOptions {
    pub inventory: InventoryUnit,
}

/// Names of the figure files a run gets, in order.
pub const RUN_FIGURES: [&str; 3] = ["inventories.svg", "temperature.svg", "sea_level.svg"];

fn lines(ages: &[f64], cols: &[(String, Vec<f64>)]) -> Vec<Line> {
    cols.iter()
        .enumerate()
        .map(|(i, (label, values))| Line {
            label: label.clone(),
            ages: ages.to_vec(),
            values: values.clone(),
            style: series_style(i),
        })
        .collect()
}

/// Whether a run's figures draw the column `name [unit]`: a figure reads
/// no other column, so a caller holding a large series in memory decodes
/// only these (`api::RunResult::figure_data`).
pub fn is_drawn(name: &str, unit: &str) -> bool {
    let c = Column {
        name: name.to_owned(),
        unit: unit.to_owned(),
        values: Vec::new(),
    };
    is_inventory(&c) || is_temperature(&c) || is_sea_level(&c)
}

fn is_inventory(c: &Column) -> bool {
    c.unit == "kg"
}

fn is_temperature(c: &Column) -> bool {
    c.unit == "K" || c.unit == "degC"
}

fn is_sea_level(c: &Column) -> bool {
    c.unit == "m" && c.name.to_ascii_lowercase().contains("sea")
}

/// The inventory figure, if the run has columns in kg.
pub fn inventories(run: &RunData, opts: &RunOptions) -> Option<AgePlot> {
    let cols: Vec<&Column> = run.columns.iter().filter(|c| is_inventory(c)).collect();
    if cols.is_empty() {
        return None;
    }
    let (div, unit, title) = match opts.inventory {
        InventoryUnit::OceanMasses => (
            OCEAN_MASS_KG,
            "ocean masses".to_owned(),
            "Water inventories (1 ocean mass = 1.4×10²¹ kg)".to_owned(),
        ),
        InventoryUnit::Kg => (1.0, "kg".to_owned(), "Water inventories".to_owned()),
    };
    let data: Vec<(String, Vec<f64>)> = cols
        .iter()
        .map(|c| (c.name.clone(), c.values.iter().map(|v| v / div).collect()))
        .collect();
    Some(AgePlot {
        title,
        y_quantity: "water".into(),
        y_unit: unit,
        lines: lines(&run.ages, &data),
        stages: run.stages.clone(),
        from_zero: true,
        ..AgePlot::default()
    })
}

fn same_values(a: &[f64], b: &[f64]) -> bool {
    a.len() == b.len()
        && a.iter()
            .zip(b)
            .all(|(x, y)| (x - y).abs() <= 1e-9 * x.abs().max(y.abs()).max(1.0))
}

/// The temperature figure: columns in K or degC, the mantle's alone when
/// some column names the mantle. All are drawn in the unit of the first;
/// a column that only repeats another in a different unit is left out.
pub fn temperature(run: &RunData) -> Option<AgePlot> {
    let temps: Vec<&Column> = run.columns.iter().filter(|c| is_temperature(c)).collect();
    let mantle: Vec<&Column> = temps
        .iter()
        .copied()
        .filter(|c| c.name.to_ascii_lowercase().contains("mantle"))
        .collect();
    let (chosen, title) = if mantle.is_empty() {
        (temps, "Temperature")
    } else {
        (mantle, "Mantle temperature")
    };
    let unit = chosen.first()?.unit.clone();
    let mut data: Vec<(String, Vec<f64>)> = Vec::new();
    for c in chosen {
        let vals: Vec<f64> = c
            .values
            .iter()
            .map(|&v| convert(v, &c.unit, &unit).unwrap_or(f64::NAN))
            .collect();
        if data.iter().any(|(_, d)| same_values(d, &vals)) {
            continue;
        }
        let label = if c.unit == unit {
            c.name.clone()
        } else {
            format!("{} (from {})", c.name, pretty_unit(&c.unit))
        };
        data.push((label, vals));
    }
    Some(AgePlot {
        title: title.into(),
        y_quantity: "temperature".into(),
        y_unit: pretty_unit(&unit),
        lines: lines(&run.ages, &data),
        stages: run.stages.clone(),
        ..AgePlot::default()
    })
}

/// The sea-level figure: each column in m whose name contains `sea`,
/// minus its value at the youngest age, with the land-emergence event (an
/// event whose name contains `land`) marked.
pub fn sea_level(run: &RunData) -> Option<AgePlot> {
    let cols: Vec<&Column> = run.columns.iter().filter(|c| is_sea_level(c)).collect();
    if cols.is_empty() {
        return None;
    }
    // The youngest report age is the reference ("present" when the run
    // ends at 0 Ga).
    let (ref_at, ref_age) = run
        .ages
        .iter()
        .enumerate()
        .min_by(|a, b| a.1.total_cmp(b.1))
        .map(|(i, &a)| (i, a))?;
    let data: Vec<(String, Vec<f64>)> = cols
        .iter()
        .map(|c| {
            let r = c.values.get(ref_at).copied().unwrap_or(f64::NAN);
            (c.name.clone(), c.values.iter().map(|v| v - r).collect())
        })
        .collect();
    let oldest = run.ages.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    let (unit, _) = age_unit(oldest - ref_age);
    let mut events = Vec::new();
    for ev in run
        .events
        .iter()
        .filter(|e| e.name.to_ascii_lowercase().contains("land"))
    {
        match ev.age_ga {
            Some(a) => events.push(EventLine {
                label: format!("{} at {}", ev.name, age_text(a, unit)),
                age_ga: a,
            }),
            None => events.push(EventLine {
                label: format!("{}: never", ev.name),
                age_ga: f64::NAN,
            }),
        }
    }
    let (reference, quantity) = if ref_age.abs() < 1e-12 {
        ("present".to_owned(), "sea level relative to present")
    } else {
        (age_text(ref_age, unit), "sea level relative to run end")
    };
    Some(AgePlot {
        title: format!("Sea level relative to {reference}"),
        y_quantity: quantity.into(),
        y_unit: "m".into(),
        lines: lines(&run.ages, &data),
        stages: run.stages.clone(),
        events,
        zero_line: true,
        ..AgePlot::default()
    })
}

/// Every figure the run's columns allow: (file name, SVG bytes).
pub fn figures(
    run: &RunData,
    opts: &RunOptions,
) -> Result<Vec<(String, Vec<u8>)>, super::FigureError> {
    let plots = [inventories(run, opts), temperature(run), sea_level(run)];
    let mut out = Vec::new();
    for (name, plot) in RUN_FIGURES.iter().zip(plots) {
        if let Some(p) = plot {
            out.push(((*name).to_owned(), age_plot::draw(&p)?));
        }
    }
    Ok(out)
}
