//! Designs and member values: how many members, and each member's
//! parameter values (random streams, grid and list axes, truncation).

use std::collections::BTreeSet;

use super::error::EnsembleError;
use crate::graph::{DepGraph, Node};
use crate::model::{DefId, DefKind, Dist, Expr, ExprKind, Model};
use crate::numeric::truncation::REJECTION_MIN_MASS;

/// Members when the scenario and the command line do not say.
pub const DEFAULT_MEMBERS: u64 = 1000;

// ---- random numbers --------------------------------------------------------

/// SplitMix64 (Steele, Lea & Flood 2014): small, fast, and good enough to
/// seed and to draw a handful of values per member (and for the random
/// arguments of tests, and the hostile corpus's cases).
pub struct SplitMix(pub u64);

impl SplitMix {
    // Not an iterator: the stream never ends, and callers draw by hand.
    #[allow(clippy::should_implement_trait)]
    pub fn next(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }
    /// Uniform in (0, 1), never 0.
    pub fn unit(&mut self) -> f64 {
        ((self.next() >> 11) as f64 + 0.5) / (1u64 << 53) as f64
    }
    fn normal(&mut self) -> f64 {
        // Box–Muller; one value per pair keeps streams simple.
        let (u, v) = (self.unit(), self.unit());
        libm::sqrt(-2.0 * libm::log(u)) * libm::cos(2.0 * std::f64::consts::PI * v)
    }
}

fn stream(seed: u64, member: u64, param: &str) -> SplitMix {
    let mut h = blake3::Hasher::new();
    h.update(b"hadal member draw");
    h.update(&seed.to_le_bytes());
    h.update(&member.to_le_bytes());
    h.update(param.as_bytes());
    let b = h.finalize();
    SplitMix(u64::from_le_bytes(
        b.as_bytes()[..8].try_into().expect("8 bytes"),
    ))
}

/// The design: members in total and the sizes of the grid/list axes.
pub fn design(model: &Model, members: Option<u64>) -> (u64, Vec<u64>) {
    let spec = model.ensemble.as_ref();
    let axes: Vec<u64> = spec
        .map(|e| e.vary.iter().filter_map(|v| v.dist.axis_len()).collect())
        .unwrap_or_default();
    // Checked: a product past 64 bits must not wrap to a small design. The
    // checker refuses designs past `MAX_MEMBERS` (H0413); a model built
    // another way gets a count that `run` refuses.
    let product = axes
        .iter()
        .try_fold(1u64, |p, &a| p.checked_mul(a))
        .unwrap_or(u64::MAX)
        .max(1);
    let n = members
        .or(spec.and_then(|e| e.members))
        .unwrap_or(if axes.is_empty() {
            DEFAULT_MEMBERS
        } else {
            product
        });
    (n, axes)
}

/// Parameter values of member `i`, in the order of the `vary` lines; an
/// error if a value cannot be drawn (the whole run is then refused).
pub fn member_values(model: &Model, seed: u64, i: u64) -> Result<Vec<f64>, EnsembleError> {
    let Some(spec) = &model.ensemble else {
        return Ok(Vec::new());
    };
    let (_, axes) = design(model, None);
    let mut axis = 0usize;
    let mut stride = 1u64;
    let mut out = Vec::with_capacity(spec.vary.len());
    for v in &spec.vary {
        let name = &model.defs[v.param].name;
        let mut rng = stream(seed, i, name);
        let draw = |rng: &mut SplitMix| match &v.dist {
            Dist::Uniform(a, b) => a + (b - a) * rng.unit(),
            Dist::LogUniform(a, b) => {
                libm::exp(libm::log(*a) + (libm::log(*b) - libm::log(*a)) * rng.unit())
            }
            Dist::Normal { mean, sd } => mean + sd * rng.normal(),
            Dist::LogNormal { median, sd_ln } => median * libm::exp(sd_ln * rng.normal()),
            Dist::List(_) | Dist::Grid { .. } => f64::NAN,
        };
        let value = match &v.dist {
            Dist::List(values) => {
                let k = (i / stride) % axes[axis];
                stride = stride.saturating_mul(axes[axis]);
                axis += 1;
                values[k as usize]
            }
            Dist::Grid { lo, hi, n } => {
                let k = (i / stride) % axes[axis];
                stride = stride.saturating_mul(axes[axis]);
                axis += 1;
                lo + (hi - lo) * k as f64 / (*n - 1) as f64
            }
            _ if (v.min.is_some() || v.max.is_some())
                && v.dist.mass_between(v.min, v.max) < REJECTION_MIN_MASS =>
            {
                // A thin slice (the checker refused slices below
                // MIN_TRUNCATED_MASS): invert the distribution function
                // there, with one uniform number.
                let x = v
                    .dist
                    .truncated_at(v.min, v.max, rng.unit())
                    .unwrap_or(f64::NAN);
                // Rounding in the last step may land a hair outside.
                x.max(v.min.unwrap_or(x)).min(v.max.unwrap_or(x))
            }
            _ => {
                // Truncation by rejection: deterministic, as the stream is.
                let mut x = draw(&mut rng);
                let mut tries = 0;
                while v.min.is_some_and(|m| x < m) || v.max.is_some_and(|m| x > m) {
                    tries += 1;
                    if tries > 100_000 {
                        return Err(EnsembleError::RarelyInRange {
                            param: name.clone(),
                        });
                    }
                    x = draw(&mut rng);
                }
                x
            }
        };
        // The checker bounds every distribution's reach, so this is a
        // guard: a parameter that is not a number must not become a member.
        if !value.is_finite() {
            return Err(EnsembleError::NotFinite {
                param: name.clone(),
                value,
            });
        }
        out.push(value);
    }
    Ok(out)
}

/// The model with the given parameters fixed at `values` (internal units).
pub fn with_params(model: &Model, params: &[(DefId, f64)]) -> Model {
    let mut m = model.clone();
    for &(d, v) in params {
        let span = m.defs[d].expr.span;
        m.defs[d].expr = Expr {
            kind: ExprKind::Num(v),
            span,
        };
    }
    m
}

/// The first stage whose result can depend on a varied parameter; stages
/// before it are the same for every member and are solved once.
pub fn first_varying_stage(model: &Model) -> usize {
    let Some(spec) = &model.ensemble else {
        return model.stages.len();
    };
    let g = DepGraph::build(model);
    let varied: BTreeSet<DefId> = spec.vary.iter().map(|v| v.param).collect();
    let initial: Vec<Node> = model
        .defs
        .iter()
        .enumerate()
        .filter(|(_, d)| matches!(d.kind, DefKind::Reservoir { .. } | DefKind::State { .. }))
        .map(|(i, _)| Node::Initial(i))
        .collect();
    let init = g.closure(&initial);
    if varied.iter().any(|p| init.contains(&Node::Def(*p))) {
        return 0;
    }
    for s in 0..model.stages.len() {
        let closure = g.stage_closure(model, s);
        let sets: BTreeSet<DefId> = model.stages[s].sets.iter().map(|(p, _)| *p).collect();
        if varied
            .iter()
            .any(|p| closure.contains(&Node::Def(*p)) && !sets.contains(p))
        {
            return s;
        }
    }
    model.stages.len()
}
