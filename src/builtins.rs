//! The built-in functions of the language, described once.
//!
//! [`BUILTINS`] is the only list of them. The checker looks names up here and
//! types a call by the row's form; both constant folders and the interpreter
//! compute a function of numbers with the row's kernel (from
//! `crate::numeric`), and native code calls that same kernel through one
//! trampoline per arity; docs/language.md and the fuzzer's vocabulary are
//! checked against, or taken from, this table. A function of numbers is one
//! row: nothing else in the compiler changes when one is added (see
//! DEVELOPERS.md, "How to add a built-in function").
//!
//! The special forms (`decay`, reading a reservoir, a hypsometry) have rows
//! too, so every name is here, but their meaning lives in exhaustive matches
//! over [`Form`] and `model::Builtin`: a new form fails to compile until
//! every phase handles it.

use crate::numeric;
use crate::units::Dim;

/// A numeric kernel: the function's value for arguments in internal units.
/// Its shape fixes the function's number of arguments.
#[derive(Clone, Copy)]
pub enum Kernel {
    /// One argument.
    F1(fn(f64) -> f64),
    /// Exactly two arguments.
    F2(fn(f64, f64) -> f64),
    /// Exactly three arguments.
    F3(fn(f64, f64, f64) -> f64),
    /// Two or more arguments, folded from the left: `f(a, b, c)` is
    /// `f(f(a, b), c)`, as compiled programs chain it.
    Fold(fn(f64, f64) -> f64),
}

impl Kernel {
    pub fn arity(self) -> Arity {
        match self {
            Kernel::F1(_) => Arity::Exactly(1),
            Kernel::F2(_) => Arity::Exactly(2),
            Kernel::F3(_) => Arity::Exactly(3),
            Kernel::Fold(_) => Arity::AtLeast(2),
        }
    }

    /// The value for constant arguments, as compiled programs compute it.
    /// The checker admits no other number of arguments than [`Kernel::arity`];
    /// any other count gives NaN rather than a panic.
    pub fn apply(self, v: &[f64]) -> f64 {
        match (self, v) {
            (Kernel::F1(f), [x]) => f(*x),
            (Kernel::F2(f), [a, b]) => f(*a, *b),
            (Kernel::F3(f), [a, b, c]) => f(*a, *b, *c),
            (Kernel::Fold(f), [a, rest @ ..]) if !rest.is_empty() => {
                rest.iter().fold(*a, |acc, &b| f(acc, b))
            }
            _ => f64::NAN,
        }
    }
}

/// How many arguments a built-in takes.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Arity {
    Exactly(usize),
    AtLeast(usize),
}

impl Arity {
    /// The least and the most (`usize::MAX`: no limit).
    pub fn range(self) -> (usize, usize) {
        match self {
            Arity::Exactly(n) => (n, n),
            Arity::AtLeast(n) => (n, usize::MAX),
        }
    }
}

/// The dimension rule of a function of numbers.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Dims {
    /// Dimensionless arguments, a dimensionless result.
    Dimensionless,
    /// The square root of the argument's dimension, whose powers must be
    /// even.
    Root,
    /// The argument's dimension as a difference (no point flag).
    Magnitude,
    /// Arguments of one dimension; the result has it, and is a point (an
    /// age, an absolute temperature) only if every argument is.
    Alike,
    /// Arguments of one dimension; a dimensionless result.
    AlikeToNumber,
}

/// How a function of numbers is compiled.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Lowering {
    /// The generic call instruction of its arity: the interpreter calls the
    /// kernel, native code calls it through a trampoline. A new function
    /// uses this.
    Call,
    /// Its own instructions, kept for speed and for the bits they pin:
    /// `exp` fuses with multiplications (`ExpMul`, `MulExpMul`); the others
    /// are inline native code. Each computes its kernel's bits (tested).
    Exp,
    Abs,
    Min,
    Max,
    Clamp,
}

/// A function of numbers: kernel, dimension rule and compilation.
#[derive(Clone, Copy)]
pub struct Num {
    pub kernel: Kernel,
    pub dims: Dims,
    pub lowering: Lowering,
}

/// What a reservoir-reading form gives.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ReservoirRead {
    /// The reservoir's capacity.
    Capacity,
    /// Inventory over capacity.
    Fill,
    /// The inventory above capacity.
    Excess,
}

impl ReservoirRead {
    /// Its name, which is also its row's (and its canonical text's).
    pub const fn name(self) -> &'static str {
        match self {
            ReservoirRead::Capacity => "capacity",
            ReservoirRead::Fill => "fill",
            ReservoirRead::Excess => "excess",
        }
    }

    pub fn result(self) -> Dim {
        match self {
            ReservoirRead::Capacity | ReservoirRead::Excess => Dim::MASS,
            ReservoirRead::Fill => Dim::NONE,
        }
    }
}

/// What a hypsometry form computes from its table.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum HypsRead {
    SeaLevel,
    /// Sea level with the water load compensated (two densities follow).
    SeaLevelIsostatic,
    LandFraction,
    BasinVolume,
}

impl HypsRead {
    /// Its name, which is also its row's (and its canonical text's).
    pub const fn name(self) -> &'static str {
        match self {
            HypsRead::SeaLevel => "sea_level",
            HypsRead::SeaLevelIsostatic => "sea_level_isostatic",
            HypsRead::LandFraction => "land_fraction",
            HypsRead::BasinVolume => "basin_volume",
        }
    }

    /// The dimension of the argument after the table's name.
    pub fn argument(self) -> Dim {
        match self {
            HypsRead::SeaLevel | HypsRead::SeaLevelIsostatic | HypsRead::LandFraction => {
                Dim::VOLUME
            }
            HypsRead::BasinVolume => Dim::LENGTH,
        }
    }

    pub fn result(self) -> Dim {
        match self {
            HypsRead::SeaLevel | HypsRead::SeaLevelIsostatic => Dim::LENGTH,
            HypsRead::LandFraction => Dim::NONE,
            HypsRead::BasinVolume => Dim::VOLUME,
        }
    }

    /// Densities (of water, then mantle) after the argument.
    pub fn densities(self) -> usize {
        match self {
            HypsRead::SeaLevelIsostatic => 2,
            HypsRead::SeaLevel | HypsRead::LandFraction | HypsRead::BasinVolume => 0,
        }
    }
}

/// The kind of a built-in.
#[derive(Clone, Copy)]
pub enum Form {
    /// A function of its arguments' values.
    Num(Num),
    /// `decay(q, half_life)`: reads the clock; compiled to its own
    /// instructions (`Decay`, fused into `DecayAdd`).
    Decay,
    /// Takes a reservoir's name and reads its inventory or capacity.
    Reservoir(ReservoirRead),
    /// Takes a hypsometry table's name and a volume or an elevation.
    Hypsometry(HypsRead),
}

/// One built-in function.
#[derive(Clone, Copy)]
pub struct Spec {
    /// The name scenarios call it by; a reserved word.
    pub name: &'static str,
    pub form: Form,
}

impl Spec {
    pub fn arity(&self) -> Arity {
        match self.form {
            Form::Num(n) => n.kernel.arity(),
            Form::Decay => Arity::Exactly(2),
            Form::Reservoir(_) => Arity::Exactly(1),
            Form::Hypsometry(h) => Arity::Exactly(2 + h.densities()),
        }
    }
}

/// A row for a function of numbers.
const fn num(name: &'static str, kernel: Kernel, dims: Dims, lowering: Lowering) -> Spec {
    Spec {
        name,
        form: Form::Num(Num {
            kernel,
            dims,
            lowering,
        }),
    }
}

/// The name of `decay`, its row's and its canonical text's.
pub const DECAY: &str = "decay";

const fn reservoir(read: ReservoirRead) -> Spec {
    Spec {
        name: read.name(),
        form: Form::Reservoir(read),
    }
}

const fn hypsometry(read: HypsRead) -> Spec {
    Spec {
        name: read.name(),
        form: Form::Hypsometry(read),
    }
}

/// Every built-in, in the order error messages list them (and the fuzzer
/// picks from).
pub static BUILTINS: &[Spec] = &[
    num(
        "exp",
        Kernel::F1(numeric::exp),
        Dims::Dimensionless,
        Lowering::Exp,
    ),
    num(
        "ln",
        Kernel::F1(numeric::ln),
        Dims::Dimensionless,
        Lowering::Call,
    ),
    num(
        "log10",
        Kernel::F1(numeric::log10),
        Dims::Dimensionless,
        Lowering::Call,
    ),
    num(
        "sin",
        Kernel::F1(numeric::sin),
        Dims::Dimensionless,
        Lowering::Call,
    ),
    num(
        "cos",
        Kernel::F1(numeric::cos),
        Dims::Dimensionless,
        Lowering::Call,
    ),
    num(
        "tan",
        Kernel::F1(numeric::tan),
        Dims::Dimensionless,
        Lowering::Call,
    ),
    num(
        "asin",
        Kernel::F1(numeric::asin),
        Dims::Dimensionless,
        Lowering::Call,
    ),
    num(
        "acos",
        Kernel::F1(numeric::acos),
        Dims::Dimensionless,
        Lowering::Call,
    ),
    num(
        "atan",
        Kernel::F1(numeric::atan),
        Dims::Dimensionless,
        Lowering::Call,
    ),
    num(
        "tanh",
        Kernel::F1(numeric::tanh),
        Dims::Dimensionless,
        Lowering::Call,
    ),
    num(
        "floor",
        Kernel::F1(numeric::floor),
        Dims::Dimensionless,
        Lowering::Call,
    ),
    num(
        "ceil",
        Kernel::F1(numeric::ceil),
        Dims::Dimensionless,
        Lowering::Call,
    ),
    num(
        "sign",
        Kernel::F1(numeric::sign),
        Dims::AlikeToNumber,
        Lowering::Call,
    ),
    num(
        "sqrt",
        Kernel::F1(numeric::sqrt),
        Dims::Root,
        Lowering::Call,
    ),
    num(
        "abs",
        Kernel::F1(numeric::abs),
        Dims::Magnitude,
        Lowering::Abs,
    ),
    num(
        "min",
        Kernel::Fold(numeric::min),
        Dims::Alike,
        Lowering::Min,
    ),
    num(
        "max",
        Kernel::Fold(numeric::max),
        Dims::Alike,
        Lowering::Max,
    ),
    num(
        "clamp",
        Kernel::F3(numeric::clamp),
        Dims::Alike,
        Lowering::Clamp,
    ),
    num(
        "smoothstep",
        Kernel::F3(numeric::smoothstep),
        Dims::AlikeToNumber,
        Lowering::Call,
    ),
    Spec {
        name: DECAY,
        form: Form::Decay,
    },
    reservoir(ReservoirRead::Capacity),
    reservoir(ReservoirRead::Fill),
    reservoir(ReservoirRead::Excess),
    hypsometry(HypsRead::SeaLevel),
    hypsometry(HypsRead::SeaLevelIsostatic),
    hypsometry(HypsRead::LandFraction),
    hypsometry(HypsRead::BasinVolume),
    // A throwaway function that exists only in the library's unit tests,
    // added the way DEVELOPERS.md says (see `tests::a_throwaway_builtin`).
    #[cfg(test)]
    num(
        tests::THROWAWAY,
        Kernel::F2(tests::throwaway_kernel),
        Dims::AlikeToNumber,
        Lowering::Call,
    ),
];

/// The built-in called `name`.
pub fn lookup(name: &str) -> Option<&'static Spec> {
    BUILTINS.iter().find(|s| s.name == name)
}

/// The names of every built-in, in table order.
pub fn names() -> impl Iterator<Item = &'static str> {
    BUILTINS.iter().map(|s| s.name)
}

/// A function of numbers as a checked model refers to it: a row of
/// [`BUILTINS`] whose form is [`Form::Num`], with that form at hand, so the
/// compiler never meets a `Func` without a kernel.
#[derive(Clone, Copy)]
pub struct Func {
    spec: &'static Spec,
    num: &'static Num,
}

impl Func {
    /// The function of numbers of row `spec`, whose form is `num`.
    pub(crate) fn new(spec: &'static Spec, num: &'static Num) -> Func {
        debug_assert!(matches!(&spec.form, Form::Num(n) if std::ptr::eq(n, num)));
        Func { spec, num }
    }

    pub fn name(self) -> &'static str {
        self.spec.name
    }

    pub fn num(self) -> &'static Num {
        self.num
    }
}

// Rows are unique by name (tested), so the name is the identity.
impl PartialEq for Func {
    fn eq(&self, other: &Func) -> bool {
        self.spec.name == other.spec.name
    }
}

impl Eq for Func {}

impl std::hash::Hash for Func {
    fn hash<H: std::hash::Hasher>(&self, h: &mut H) {
        self.spec.name.hash(h);
    }
}

impl std::fmt::Debug for Func {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.spec.name)
    }
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;
    use crate::check::{check_text, CheckOptions};
    use crate::compile::{compile, Wants};

    pub const THROWAWAY: &str = "throwaway_atan2";

    /// The throwaway function's kernel: the angle of the point (b, a), not
    /// symmetric in its arguments, so swapped operands would show.
    pub fn throwaway_kernel(a: f64, b: f64) -> f64 {
        libm::atan2(a, b)
    }

    #[test]
    fn names_are_unique_and_reserved() {
        let mut seen = std::collections::BTreeSet::new();
        for s in BUILTINS {
            assert!(seen.insert(s.name), "{} twice", s.name);
            let taken = scenario(&format!("const {} = 1 kg", s.name));
            assert!(
                check(&taken).is_err(),
                "a definition may not be called {}",
                s.name
            );
        }
    }

    /// Each own-instruction lowering fits its kernel's shape (the compiler
    /// emits the instruction's operands from the arguments).
    #[test]
    fn own_instructions_fit_their_kernels() {
        for s in BUILTINS {
            let Form::Num(n) = s.form else { continue };
            let fits = match n.lowering {
                Lowering::Call => true,
                Lowering::Exp | Lowering::Abs => matches!(n.kernel, Kernel::F1(_)),
                Lowering::Min | Lowering::Max => matches!(n.kernel, Kernel::Fold(_)),
                Lowering::Clamp => matches!(n.kernel, Kernel::F3(_)),
            };
            assert!(
                fits,
                "{}: {:?} on a kernel of {:?}",
                s.name,
                n.lowering,
                n.kernel.arity()
            );
        }
    }

    fn scenario(body: &str) -> String {
        format!(
            "scenario t \"throwaway\"\nspan 1 Ga to 0 Ga\nreport every 100 Myr\nreservoir ocean = 1e21 kg\nreservoir mantle = 1e20 kg\n{body}\nstage all from 1 Ga to 0 Ga\n"
        )
    }

    fn check(text: &str) -> Result<crate::check::Checked, Vec<crate::diagnostic::Problem>> {
        let dir = std::path::Path::new(".");
        check_text(
            "t.hadal",
            &dir.join("t.hadal"),
            text,
            dir,
            &CheckOptions::default(),
        )
        .map_err(|e| match e {
            crate::check::CheckError::Invalid { problems, .. } => problems,
            crate::check::CheckError::Io { message, .. } => panic!("{message}"),
        })
    }

    /// The throwaway function, added as one row (above) and its kernel
    /// (here), is known to the checker with its dimension rule, folds to its
    /// kernel's value in both constant folders, compiles, and computes the
    /// kernel's bits interpreted and in native code.
    #[test]
    fn a_throwaway_builtin() {
        // Lookup and reservation.
        let spec = lookup(THROWAWAY).expect("in the table");
        assert_eq!(spec.arity(), Arity::Exactly(2));
        // Dimension rule: two masses give a number; a mass and a length do
        // not check.
        let text = scenario(&format!(
            "const a = 3 kg\nconst b = {THROWAWAY}(a, 4 kg)\nlet c = {THROWAWAY}(ocean, mantle)\noutput c_out = c\nflux f: ocean -> mantle = c * 1 kg / 1 Gyr"
        ));
        let checked = check(&text).expect("checks");
        let model = checked.model;
        let bad = scenario(&format!("const b = {THROWAWAY}(3 kg, 4 m)"));
        let Err(err) = check(&bad) else {
            panic!("a mass and a length check")
        };
        assert!(err.iter().any(|p| p.code == "H0301"), "{err:?}");
        let arity = scenario(&format!("const b = {THROWAWAY}(3 kg)"));
        let Err(err) = check(&arity) else {
            panic!("one argument checks")
        };
        assert!(err.iter().any(|p| p.code == "H0205"), "{err:?}");
        // The checker's constant folder.
        let b = model.find("b").expect("b");
        let folded = crate::check::eval_const(&model, &model.defs[b].expr).expect("constant");
        let angle = throwaway_kernel(3.0, 4.0);
        assert_eq!(folded.to_bits(), angle.to_bits());
        assert!((folded - 0.6435011087932844).abs() < 1e-15, "atan(3/4)");
        // The compiler's folder: the constant is a register's start value.
        let wants = Wants {
            rhs: true,
            defs: vec![b, model.find("c").expect("c")],
            exprs: Vec::new(),
        };
        let mut p = compile(&model, Some(0), &wants);
        let mut regs = p.regs();
        // The state in the program's order (by name: mantle, then ocean).
        let inventory = |d: usize| {
            if model.defs[d].name == "ocean" {
                1e21
            } else {
                1e20
            }
        };
        let y: Vec<f64> = p.state_defs.iter().map(|&d| inventory(d)).collect();
        p.eval_interpreted(&mut regs, &y, 0.0, 1e9);
        let value = |p: &crate::compile::Program, regs: &crate::compile::Regs, name: &str| {
            let d = model.find(name).expect("defined");
            let reg = p.observed.iter().find(|o| o.0 == d).expect("observed").1;
            p.value(regs, reg)
        };
        assert_eq!(value(&p, &regs, "b").to_bits(), angle.to_bits());
        // The interpreter: the kernel's value of the state.
        let want = throwaway_kernel(1e21, 1e20);
        assert_eq!(value(&p, &regs, "c").to_bits(), want.to_bits());
        // Native code (where there is any) computes the same bits.
        if p.make_native() {
            let mut rn = p.regs();
            p.eval(&mut rn, &y, 0.0, 1e9);
            assert_eq!(value(&p, &rn, "c").to_bits(), want.to_bits());
        }
    }

    /// Every function of numbers, whether compiled to its own instruction
    /// or to the call of its kernel, computes its kernel's bits: folded by
    /// the checker and by the compiler, interpreted, and in native code.
    #[test]
    fn every_function_of_numbers_computes_its_kernels_bits() {
        let rows: Vec<(&str, Kernel)> = BUILTINS
            .iter()
            .filter_map(|s| match s.form {
                Form::Num(n) => Some((s.name, n.kernel)),
                Form::Decay | Form::Reservoir(_) | Form::Hypsometry(_) => None,
            })
            .collect();
        let consts = [0.3, 0.7, 1.2];
        let mut body =
            String::from("let xa = ocean / 1e21 kg\nlet xb = mantle / 1e20 kg\nlet xc = xa * xb\n");
        // Arguments per function: one more than the least where more are
        // allowed, to see the fold.
        let count = |k: Kernel| match k.arity() {
            Arity::Exactly(n) => n,
            Arity::AtLeast(n) => n + 1,
        };
        for &(name, k) in &rows {
            let n = count(k);
            let vars = ["xa", "xb", "xc"][..n].join(", ");
            let nums: Vec<String> = consts[..n].iter().map(|v| v.to_string()).collect();
            body.push_str(&format!(
                "let d_{name} = {name}({vars})\nconst k_{name} = {name}({})\n",
                nums.join(", ")
            ));
        }
        body.push_str("flux f: ocean -> mantle = xc * 1 kg / 1 Gyr");
        let model = check(&scenario(&body)).expect("checks").model;
        let id = |n: String| model.find(&n).expect("defined");
        let defs: Vec<usize> = rows
            .iter()
            .flat_map(|(name, _)| [id(format!("d_{name}")), id(format!("k_{name}"))])
            .collect();
        let wants = Wants {
            rhs: true,
            defs,
            exprs: Vec::new(),
        };
        let mut p = compile(&model, Some(0), &wants);
        let native = p.make_native();
        let value = |regs: &crate::compile::Regs, d: usize| {
            let reg = p.observed.iter().find(|o| o.0 == d).expect("observed").1;
            p.value(regs, reg)
        };
        for (ocean, mantle) in [(1e21, 1e20), (3e20, 2.5e20), (2.9e21, 1e19)] {
            let y: Vec<f64> = p
                .state_defs
                .iter()
                .map(|&d| {
                    if model.defs[d].name == "ocean" {
                        ocean
                    } else {
                        mantle
                    }
                })
                .collect();
            let (xa, xb) = (ocean / 1e21, mantle / 1e20);
            let xs = [xa, xb, xa * xb];
            let (mut ri, mut rn) = (p.regs(), p.regs());
            p.eval_interpreted(&mut ri, &y, 0.0, 1e9);
            p.eval(&mut rn, &y, 0.0, 1e9);
            for &(name, k) in &rows {
                let n = count(k);
                let want = k.apply(&xs[..n]);
                let d = id(format!("d_{name}"));
                assert_eq!(
                    value(&ri, d).to_bits(),
                    want.to_bits(),
                    "{name} interpreted"
                );
                if native {
                    assert_eq!(value(&rn, d).to_bits(), want.to_bits(), "{name} native");
                }
                let c = id(format!("k_{name}"));
                let want = k.apply(&consts[..n]);
                let folded = crate::check::eval_const(&model, &model.defs[c].expr);
                assert_eq!(
                    folded.map(f64::to_bits),
                    Some(want.to_bits()),
                    "{name} checker"
                );
                assert_eq!(value(&ri, c).to_bits(), want.to_bits(), "{name} compiler");
            }
        }
    }

    /// docs/language.md lists exactly the table's functions (the throwaway
    /// of these tests aside), each once, in its table of functions.
    #[test]
    fn the_language_reference_lists_exactly_the_builtins() {
        let doc = include_str!("../docs/language.md");
        let start = doc.find("### Functions").expect("a section of functions");
        let section = &doc[start..];
        let end = section[4..].find("\n#").map_or(section.len(), |e| e + 4);
        let mut listed = Vec::new();
        for line in section[..end].lines().filter(|l| l.starts_with("| `")) {
            let first = line.split(" | ").next().unwrap_or("");
            for cell in first.split('`').skip(1).step_by(2) {
                if let Some(open) = cell.find('(') {
                    listed.push(cell[..open].to_owned());
                }
            }
        }
        let mut sorted = listed.clone();
        sorted.sort();
        sorted.dedup();
        assert_eq!(
            sorted.len(),
            listed.len(),
            "a function listed twice: {listed:?}"
        );
        let mut table: Vec<String> = names()
            .filter(|&n| n != THROWAWAY)
            .map(str::to_owned)
            .collect();
        table.sort();
        assert_eq!(sorted, table, "docs/language.md against src/builtins.rs");
    }

    /// The hypsometry forms of constant arguments fold while checking to
    /// the bits compiled programs compute (they once did not fold at all,
    /// so a constant that used one was "not a finite number").
    #[test]
    fn hypsometry_constants_fold_when_checking_as_when_compiling() {
        let dir = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("scenarios");
        let text = scenario(
            "table hyps = \"shared/hypsometry_mirrowen.csv\" (m, m^2)\n\
             const v = 1.2e21 kg / 1027 kg/m^3\n\
             const s = sea_level(hyps, v)\n\
             const si = sea_level_isostatic(hyps, v, 1027 kg/m^3, 3300 kg/m^3)\n\
             const lf = land_fraction(hyps, v)\n\
             const bv = basin_volume(hyps, 4000 m)\n\
             flux f: ocean -> mantle = (s + si) / 1 m * lf * bv / 1 m^3 * 1 kg / 1 Gyr",
        );
        let checked = check_text(
            "t.hadal",
            &dir.join("t.hadal"),
            &text,
            &dir,
            &Default::default(),
        );
        let Ok(checked) = checked else {
            panic!("checks")
        };
        let model = checked.model;
        let names = ["s", "si", "lf", "bv"];
        let ids: Vec<usize> = names
            .iter()
            .map(|n| model.find(n).expect("defined"))
            .collect();
        let p = compile(
            &model,
            Some(0),
            &Wants {
                rhs: false,
                defs: ids.clone(),
                exprs: Vec::new(),
            },
        );
        let regs = p.regs();
        for (name, &d) in names.iter().zip(&ids) {
            let folded = crate::check::eval_const(&model, &model.defs[d].expr);
            let reg = p.observed.iter().find(|o| o.0 == d).expect("observed").1;
            let compiled = p.value(&regs, reg);
            assert!(
                compiled.is_finite() && compiled != 0.0,
                "{name} = {compiled}"
            );
            assert_eq!(folded.map(f64::to_bits), Some(compiled.to_bits()), "{name}");
        }
    }
}
