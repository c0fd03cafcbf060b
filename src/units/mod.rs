//! Physical dimensions and units.
//!
//! Internal unit system: kilogram, metre, Julian year (365.25 days), kelvin.
//! Every checked quantity is a number in these units plus a [`Dim`]. Ages are
//! years before present. Energy and power are derived (J = kg m^2 s^-2,
//! expressed with the year as time unit).
//!
//! Invariant: this module knows nothing of scenarios or syntax; it maps unit
//! names and powers to scale, offset and dimension.

use std::fmt;

/// Seconds in a Julian year (IAU: 365.25 days of 86400 s).
pub const SECONDS_PER_YEAR: f64 = 31_557_600.0;

/// Exponents of mass, length, time and temperature, and whether the value
/// is a point on an axis (an age, an absolute temperature) rather than an
/// amount or a difference.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Default)]
pub struct Dim {
    pub mass: i8,
    pub length: i8,
    pub time: i8,
    pub temp: i8,
    /// An age (for time^1) or an absolute Celsius temperature (for temp^1).
    pub point: bool,
}

impl Dim {
    pub const NONE: Dim = Dim::new(0, 0, 0, 0);

    /// Append exactly what `{:?}` writes (the canonical text of a
    /// definition carries it, so fingerprints depend on these bytes),
    /// without the formatting machinery: fingerprints are built on every run.
    pub fn push_debug(&self, out: &mut String) {
        let num = |out: &mut String, label: &str, v: i8| {
            out.push_str(label);
            if v < 0 {
                out.push('-');
            }
            let a = v.unsigned_abs();
            if a >= 100 {
                out.push(char::from(b'0' + a / 100));
            }
            if a >= 10 {
                out.push(char::from(b'0' + a / 10 % 10));
            }
            out.push(char::from(b'0' + a % 10));
        };
        num(out, "Dim { mass: ", self.mass);
        num(out, ", length: ", self.length);
        num(out, ", time: ", self.time);
        num(out, ", temp: ", self.temp);
        out.push_str(if self.point {
            ", point: true }"
        } else {
            ", point: false }"
        });
    }
    pub const MASS: Dim = Dim::new(1, 0, 0, 0);
    pub const LENGTH: Dim = Dim::new(0, 1, 0, 0);
    pub const AREA: Dim = Dim::new(0, 2, 0, 0);
    pub const VOLUME: Dim = Dim::new(0, 3, 0, 0);
    pub const TIME: Dim = Dim::new(0, 0, 1, 0);
    pub const TEMP: Dim = Dim::new(0, 0, 0, 1);
    pub const MASS_RATE: Dim = Dim::new(1, 0, -1, 0);
    pub const DENSITY: Dim = Dim::new(1, -3, 0, 0);
    pub const AGE: Dim = Dim {
        point: true,
        ..Dim::TIME
    };

    pub const fn new(mass: i8, length: i8, time: i8, temp: i8) -> Dim {
        Dim {
            mass,
            length,
            time,
            temp,
            point: false,
        }
    }

    fn exps(self) -> [i8; 4] {
        [self.mass, self.length, self.time, self.temp]
    }

    fn from_exps(e: [i32; 4]) -> Option<Dim> {
        let conv = |x: i32| i8::try_from(x).ok();
        Some(Dim::new(conv(e[0])?, conv(e[1])?, conv(e[2])?, conv(e[3])?))
    }

    /// The same dimension without the point flag.
    pub fn plain(self) -> Dim {
        Dim {
            point: false,
            ..self
        }
    }

    pub fn same_base(self, other: Dim) -> bool {
        self.exps() == other.exps()
    }

    pub fn is_dimensionless(self) -> bool {
        self.exps() == [0; 4]
    }

    pub fn is_age(self) -> bool {
        self.point && self.same_base(Dim::TIME)
    }

    pub fn is_abs_temperature(self) -> bool {
        self.point && self.same_base(Dim::TEMP)
    }

    /// Product; `None` when an exponent overflows.
    pub fn times(self, other: Dim) -> Option<Dim> {
        let (a, b) = (self.exps(), other.exps());
        Dim::from_exps([0, 1, 2, 3].map(|i| a[i] as i32 + b[i] as i32))
    }

    pub fn per(self, other: Dim) -> Option<Dim> {
        let (a, b) = (self.exps(), other.exps());
        Dim::from_exps([0, 1, 2, 3].map(|i| a[i] as i32 - b[i] as i32))
    }

    pub fn powi(self, n: i32) -> Option<Dim> {
        let a = self.exps();
        Dim::from_exps([0, 1, 2, 3].map(|i| (a[i] as i32).checked_mul(n).unwrap_or(i32::MAX)))
    }

    /// Square root, if every exponent is even.
    pub fn sqrt(self) -> Option<Dim> {
        let a = self.exps();
        if a.iter().all(|x| x % 2 == 0) {
            Some(Dim::new(a[0] / 2, a[1] / 2, a[2] / 2, a[3] / 2))
        } else {
            None
        }
    }

    /// Plain words for messages: "mass per time", "energy", "dimensionless".
    pub fn words(self) -> String {
        if self.is_age() {
            return "an age".into();
        }
        if self.is_abs_temperature() {
            return "absolute temperature".into();
        }
        if let Some(name) = named_dim(self.plain()) {
            return name.into();
        }
        // Numerator and denominator from a few named building blocks.
        let base = ["mass", "length", "time", "temperature"];
        let e = self.exps();
        let mut num = Vec::new();
        let mut den = Vec::new();
        // Prefer energy/power as a block when mass^1 length^2 appears.
        let mut rest = e.map(|x| x as i32);
        for (name, block) in [("power", [1, 2, -3, 0]), ("energy", [1, 2, -2, 0])] {
            if rest[0] == 1 && rest[1] == 2 && rest[2] <= block[2] {
                num.push(name.to_owned());
                for i in 0..4 {
                    rest[i] -= block[i];
                }
                break;
            }
        }
        if rest[1] == 3 || rest[1] == -3 || rest[1] == 2 || rest[1] == -2 {
            let w = if rest[1].abs() == 3 { "volume" } else { "area" };
            if rest[1] > 0 {
                num.push(w.to_owned());
            } else {
                den.push(w.to_owned());
            }
            rest[1] = 0;
        }
        for i in 0..4 {
            let p = rest[i];
            let word = |p: i32| {
                if p.abs() == 1 {
                    base[i].to_owned()
                } else {
                    format!("{}^{}", base[i], p.abs())
                }
            };
            match p.cmp(&0) {
                std::cmp::Ordering::Greater => num.push(word(p)),
                std::cmp::Ordering::Less => den.push(word(p)),
                std::cmp::Ordering::Equal => {}
            }
        }
        let num = if num.is_empty() {
            "one".to_owned()
        } else {
            num.join(" times ")
        };
        if den.is_empty() {
            num
        } else {
            format!("{num} per {}", den.join(" per "))
        }
    }

    /// A UDUNITS-style unit string for the internal unit of this dimension,
    /// e.g. `kg yr-1`, `m3`, `1`.
    pub fn internal_unit(self) -> String {
        let names = ["kg", "m", "yr", "K"];
        let mut parts = Vec::new();
        for (i, &p) in self.exps().iter().enumerate() {
            match p {
                0 => {}
                1 => parts.push(names[i].to_owned()),
                p => parts.push(format!("{}{}", names[i], p)),
            }
        }
        if parts.is_empty() {
            "1".into()
        } else {
            parts.join(" ")
        }
    }
}

fn named_dim(d: Dim) -> Option<&'static str> {
    Some(match d.exps() {
        [0, 0, 0, 0] => "dimensionless",
        [1, 0, 0, 0] => "mass",
        [0, 1, 0, 0] => "length",
        [0, 2, 0, 0] => "area",
        [0, 3, 0, 0] => "volume",
        [0, 0, 1, 0] => "a duration",
        [0, 0, 0, 1] => "temperature",
        [1, 0, -1, 0] => "mass per time",
        [1, -3, 0, 0] => "density (mass per volume)",
        [0, 1, -1, 0] => "speed (length per time)",
        [1, 2, -2, 0] => "energy",
        [1, 2, -3, 0] => "power",
        [1, -1, -2, 0] => "pressure",
        [0, 0, -1, 0] => "per time",
        [0, 0, 0, -1] => "per temperature",
        [1, 2, -2, -1] => "energy per temperature",
        [1, 0, -3, 0] => "power per area",
        _ => return None,
    })
}

impl fmt::Display for Dim {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.words())
    }
}

/// A unit: value_internal = value * scale + offset.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Unit {
    pub scale: f64,
    pub offset: f64,
    pub dim: Dim,
}

impl Unit {
    const fn new(scale: f64, dim: Dim) -> Unit {
        Unit {
            scale,
            offset: 0.0,
            dim,
        }
    }

    pub fn to_internal(self, value: f64) -> f64 {
        value * self.scale + self.offset
    }

    pub fn from_internal(self, value: f64) -> f64 {
        (value - self.offset) / self.scale
    }
}

const S: f64 = 1.0 / SECONDS_PER_YEAR;
/// One joule in kg m^2 yr^-2.
const JOULE: f64 = 1.0 / (S * S);
/// One watt in kg m^2 yr^-3.
const WATT: f64 = JOULE / S;
const PASCAL: f64 = 1.0 / (S * S);

const ENERGY: Dim = Dim::new(1, 2, -2, 0);
const POWER: Dim = Dim::new(1, 2, -3, 0);
const PRESSURE: Dim = Dim::new(1, -1, -2, 0);

/// Every unit name the language knows, with its meaning. Kept in one table so
/// docs/language.md and the "did you mean" hints list the same names.
pub const UNITS: &[(&str, Unit)] = &[
    // mass
    ("kg", Unit::new(1.0, Dim::MASS)),
    ("g", Unit::new(1e-3, Dim::MASS)),
    ("t", Unit::new(1e3, Dim::MASS)),
    ("Mt", Unit::new(1e9, Dim::MASS)),
    ("Gt", Unit::new(1e12, Dim::MASS)),
    ("Tg", Unit::new(1e9, Dim::MASS)),
    ("Pg", Unit::new(1e12, Dim::MASS)),
    // length
    ("m", Unit::new(1.0, Dim::LENGTH)),
    ("cm", Unit::new(1e-2, Dim::LENGTH)),
    ("mm", Unit::new(1e-3, Dim::LENGTH)),
    ("km", Unit::new(1e3, Dim::LENGTH)),
    // durations
    ("s", Unit::new(S, Dim::TIME)),
    ("d", Unit::new(86400.0 * S, Dim::TIME)),
    ("yr", Unit::new(1.0, Dim::TIME)),
    ("kyr", Unit::new(1e3, Dim::TIME)),
    ("Myr", Unit::new(1e6, Dim::TIME)),
    ("Gyr", Unit::new(1e9, Dim::TIME)),
    // ages: points before present
    ("ka", Unit::new(1e3, Dim::AGE)),
    ("Ma", Unit::new(1e6, Dim::AGE)),
    ("Ga", Unit::new(1e9, Dim::AGE)),
    // temperature
    ("K", Unit::new(1.0, Dim::TEMP)),
    (
        "degC",
        Unit {
            scale: 1.0,
            offset: 273.15,
            dim: Dim {
                point: true,
                ..Dim::TEMP
            },
        },
    ),
    // energy and power
    ("J", Unit::new(JOULE, ENERGY)),
    ("kJ", Unit::new(1e3 * JOULE, ENERGY)),
    ("MJ", Unit::new(1e6 * JOULE, ENERGY)),
    ("GJ", Unit::new(1e9 * JOULE, ENERGY)),
    ("EJ", Unit::new(1e18 * JOULE, ENERGY)),
    ("ZJ", Unit::new(1e21 * JOULE, ENERGY)),
    ("W", Unit::new(WATT, POWER)),
    ("mW", Unit::new(1e-3 * WATT, POWER)),
    ("kW", Unit::new(1e3 * WATT, POWER)),
    ("MW", Unit::new(1e6 * WATT, POWER)),
    ("GW", Unit::new(1e9 * WATT, POWER)),
    ("TW", Unit::new(1e12 * WATT, POWER)),
    // pressure
    ("Pa", Unit::new(PASCAL, PRESSURE)),
    ("MPa", Unit::new(1e6 * PASCAL, PRESSURE)),
    ("GPa", Unit::new(1e9 * PASCAL, PRESSURE)),
    // fractions
    ("%", Unit::new(1e-2, Dim::NONE)),
    ("wt%", Unit::new(1e-2, Dim::NONE)),
    ("ppm", Unit::new(1e-6, Dim::NONE)),
    ("ppb", Unit::new(1e-9, Dim::NONE)),
];

pub fn lookup(name: &str) -> Option<Unit> {
    UNITS.iter().find(|(n, _)| *n == name).map(|(_, u)| *u)
}

/// Why a unit could not be built.
#[derive(Debug, Clone, PartialEq)]
pub enum UnitError {
    /// Factor index and name of an unknown unit.
    Unknown(usize, String),
    /// An exponent too large to represent.
    Overflow,
}

/// Combine factors (name, integer power) into one unit. A lone `degC` keeps
/// its 273.15 offset and is an absolute temperature; inside a compound unit
/// (`W/degC`, `degC^-1`) it is a temperature difference. Likewise an age
/// unit inside a compound is a plain duration.
/// Largest power of one unit factor (`m^127`); dimensions hold exponents
/// of that size too.
pub const MAX_UNIT_POWER: u32 = 127;

pub fn combine<'a>(factors: impl IntoIterator<Item = (&'a str, i32)>) -> Result<Unit, UnitError> {
    let factors: Vec<(&str, i32)> = factors.into_iter().collect();
    if let [(name, 1)] = factors.as_slice() {
        return lookup(name).ok_or_else(|| UnitError::Unknown(0, (*name).to_owned()));
    }
    let mut scale = 1.0;
    let mut dim = Dim::NONE;
    for (i, (name, power)) in factors.iter().enumerate() {
        let u = lookup(name).ok_or_else(|| UnitError::Unknown(i, (*name).to_owned()))?;
        // Checked before the loop below, which runs once per unit of power
        // (`ppm^2147483647` is dimensionless, but no real unit).
        if power.unsigned_abs() > MAX_UNIT_POWER {
            return Err(UnitError::Overflow);
        }
        dim = dim
            .times(u.dim.plain().powi(*power).ok_or(UnitError::Overflow)?)
            .ok_or(UnitError::Overflow)?;
        // Repeated multiplication rather than `powi`, whose evaluation order
        // the compiler may choose per platform.
        for _ in 0..power.unsigned_abs() {
            if *power > 0 {
                scale *= u.scale;
            } else {
                scale /= u.scale;
            }
        }
        if !scale.is_finite() || scale == 0.0 {
            return Err(UnitError::Overflow);
        }
    }
    Ok(Unit {
        scale,
        offset: 0.0,
        dim,
    })
}

/// Parse a unit string as written in the language (`kg/m^3`, `W.m^-2`,
/// `1/K`), for `--set` values and display units.
pub fn parse_unit(text: &str) -> Result<Unit, UnitError> {
    let mut factors = Vec::new();
    let mut rest = text;
    let mut sign = 1;
    if let Some(r) = rest.strip_prefix("1/") {
        rest = r;
        sign = -1;
    }
    let mut tokens: Vec<(i32, &str)> = Vec::new();
    let mut start = 0;
    let bytes = rest.as_bytes();
    for i in 0..=bytes.len() {
        if i == bytes.len() || bytes[i] == b'.' || bytes[i] == b'/' {
            tokens.push((sign, &rest[start..i]));
            if i < bytes.len() {
                sign = if bytes[i] == b'/' { -1 } else { 1 };
            }
            start = i + 1;
        }
    }
    for (i, (s, tok)) in tokens.iter().enumerate() {
        let (name, power) = match tok.split_once('^') {
            Some((n, p)) => (
                n,
                p.parse::<i32>()
                    .map_err(|_| UnitError::Unknown(i, (*tok).to_owned()))?,
            ),
            None => (*tok, 1),
        };
        if name.is_empty() {
            return Err(UnitError::Unknown(i, (*tok).to_owned()));
        }
        factors.push((name, power.saturating_mul(*s)));
    }
    combine(factors)
}

/// A unit suitable for displaying values of dimension `dim` to a person.
pub fn display_unit(dim: Dim) -> (&'static str, Unit) {
    let candidates: &[&str] = match dim.exps() {
        _ if dim.is_age() => &["Ga"],
        [1, 0, 0, 0] => &["kg"],
        [0, 0, 1, 0] => &["yr"],
        [1, 2, -3, 0] => &["TW"],
        [1, 2, -2, 0] => &["J"],
        _ => &[],
    };
    for c in candidates {
        if let Some(u) = lookup(c) {
            return (c, u);
        }
    }
    ("", Unit::new(1.0, dim))
}

/// A unit name the language knows that is close to `name`.
pub fn suggest(name: &str) -> Option<&'static str> {
    crate::diagnostic::nearest(name, UNITS.iter().map(|(n, _)| *n))
}

/// Convert a UDUNITS-ish unit for a CSV header: the language's own spelling
/// (`kg/yr`) becomes `kg yr-1`, and `degC` stays `degC`.
pub fn udunits(text: &str) -> String {
    let Ok(_) = parse_unit(text) else {
        return text.to_owned();
    };
    let mut rest = text;
    let mut sign = 1;
    if let Some(r) = rest.strip_prefix("1/") {
        rest = r;
        sign = -1;
    }
    let mut parts = Vec::new();
    let mut start = 0;
    let bytes = rest.as_bytes();
    for i in 0..=bytes.len() {
        if i == bytes.len() || bytes[i] == b'.' || bytes[i] == b'/' {
            let tok = &rest[start..i];
            let (name, p) = match tok.split_once('^') {
                Some((n, p)) => (n, p.parse::<i32>().unwrap_or(1)),
                None => (tok, 1),
            };
            let p = p * sign;
            parts.push(if p == 1 {
                name.to_owned()
            } else {
                format!("{name}{p}")
            });
            if i < bytes.len() {
                sign = if bytes[i] == b'/' { -1 } else { 1 };
            }
            start = i + 1;
        }
    }
    parts.join(" ")
}

#[cfg(test)]
mod tests {
    #[test]
    fn dim_push_debug_writes_what_debug_writes() {
        for m in [-128i8, -100, -12, -1, 0, 1, 9, 10, 99, 100, 127] {
            for point in [false, true] {
                let d = Dim {
                    mass: m,
                    length: -(m / 3),
                    time: m / 7,
                    temp: 1,
                    point,
                };
                let mut s = String::new();
                d.push_debug(&mut s);
                assert_eq!(s, format!("{d:?}"));
            }
        }
    }

    use super::*;

    #[test]
    fn celsius_alone_is_absolute_in_compounds_a_difference() {
        let c = parse_unit("degC").unwrap();
        assert_eq!(c.to_internal(1350.0), 1623.15);
        assert!(c.dim.is_abs_temperature());
        let per_c = parse_unit("1/degC").unwrap();
        assert_eq!(per_c.offset, 0.0);
        assert_eq!(per_c.scale, 1.0);
        assert_eq!(per_c.dim, Dim::new(0, 0, 0, -1));
        let k = parse_unit("K").unwrap();
        assert!(!k.dim.point);
    }

    #[test]
    fn compound_units_scale_and_dimension() {
        let u = parse_unit("kg/m^3").unwrap();
        assert_eq!(u.dim, Dim::DENSITY);
        assert_eq!(u.scale, 1.0);
        let v = parse_unit("km^3").unwrap();
        assert_eq!(v.scale, 1e9);
        assert_eq!(v.dim, Dim::VOLUME);
        let r = parse_unit("Gt/yr").unwrap();
        assert_eq!(r.dim, Dim::MASS_RATE);
        assert_eq!(r.scale, 1e12);
        // 1 TW over one Julian year is 3.15576e19 J.
        let tw = parse_unit("TW").unwrap();
        let j = parse_unit("J").unwrap();
        assert!(
            (tw.scale / j.scale - 1e12 * SECONDS_PER_YEAR).abs() / (1e12 * SECONDS_PER_YEAR)
                < 1e-15
        );
        let wm2 = parse_unit("W.m^-2").unwrap();
        assert_eq!(wm2.dim, Dim::new(1, 0, -3, 0));
    }

    #[test]
    fn unknown_units_are_named() {
        assert_eq!(
            parse_unit("kg/fortnight"),
            Err(UnitError::Unknown(1, "fortnight".into()))
        );
        assert_eq!(suggest("Gyrs"), Some("Gyr"));
    }

    #[test]
    fn words_spell_out_dimensions() {
        assert_eq!(Dim::MASS_RATE.words(), "mass per time");
        assert_eq!(Dim::MASS.words(), "mass");
        assert_eq!(Dim::new(1, 2, -3, -1).words(), "power per temperature");
        assert_eq!(Dim::AGE.words(), "an age");
        assert_eq!(Dim::NONE.words(), "dimensionless");
    }

    #[test]
    fn udunits_strings() {
        assert_eq!(udunits("kg/yr"), "kg yr-1");
        assert_eq!(udunits("W.m^-2"), "W m-2");
        assert_eq!(udunits("degC"), "degC");
        assert_eq!(Dim::MASS_RATE.internal_unit(), "kg yr-1");
    }
}
