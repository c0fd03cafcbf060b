//! A mergeable quantile sketch with a relative-error guarantee, after
//! Masson, Rim & Lee (2019), "DDSketch: a fast and fully-mergeable quantile
//! sketch with relative-error guarantees", PVLDB 12(12).
//!
//! Values fall into logarithmic buckets; a sketch is only counts, so merging
//! two sketches adds counts. The result does not depend on the order in which
//! values arrived, on the number of threads or on how an ensemble was split
//! into shards: that is what makes ensemble quantiles byte-identical however
//! they were computed. Each quantile is within `ALPHA` relative error of the
//! true value at its rank.

/// Relative accuracy of every quantile.
pub const ALPHA: f64 = 2e-3;

fn gamma_ln() -> f64 {
    static LN: std::sync::OnceLock<f64> = std::sync::OnceLock::new();
    *LN.get_or_init(|| libm::log((1.0 + ALPHA) / (1.0 - ALPHA)))
}

/// Where a value goes in a sketch; computed once, added to several sketches.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Bucket {
    value: f64,
    slot: Slot,
}

#[derive(Debug, Clone, Copy, PartialEq)]
enum Slot {
    Skip,
    Zero,
    Pos(i32),
    Neg(i32),
}

impl Bucket {
    pub fn of(x: f64) -> Bucket {
        let slot = if !x.is_finite() {
            Slot::Skip
        } else if x.abs() < TINY {
            Slot::Zero
        } else {
            let k = bucket_index(x.abs());
            if x > 0.0 {
                Slot::Pos(k)
            } else {
                Slot::Neg(k)
            }
        };
        Bucket { value: x, slot }
    }
}

/// The bucket of magnitude `a` (finite, at least [`TINY`]):
/// `ceil(ln a / ln gamma)` exactly as [`exact_index`] computes it. Every
/// member's every report value goes through here, so this is most of the
/// fold. With a = 2^e * m, m in [1, 2), the index is
/// e * log_gamma(2) + log_gamma(m), and log_gamma(m) comes from the chord of
/// a 1,024-part table ([`chords`]), good to 3e-5 of a bucket; only when `a`
/// lies within 2e-4 of a bucket of an edge is `libm::log` asked. The
/// buckets, and so every quantile, are the defining formula's bits (tested
/// against [`exact_index`] on millions of values, edges included).
fn bucket_index(a: f64) -> i32 {
    if a < f64::MIN_POSITIVE {
        return exact_index(a); // subnormal
    }
    const MANTISSA: u64 = (1 << 52) - 1;
    const ONE: u64 = 1023 << 52;
    let bits = a.to_bits();
    let e = ((bits >> 52) as i64 - 1023) as f64;
    let part = (bits >> (52 - CHORD_BITS)) & ((1 << CHORD_BITS) - 1);
    let m = f64::from_bits((bits & MANTISSA) | ONE);
    // m's part's left end; m - left is exact (same binade, Sterbenz).
    let left = f64::from_bits((bits & MANTISSA & !((1 << (52 - CHORD_BITS)) - 1)) | ONE);
    let c = chords();
    let (at_left, slope) = c.parts[part as usize];
    let t = e * c.per_binade + at_left + (m - left) * slope;
    // ceil(t) by truncation (|t| < 2^18 here): `f64::ceil` is a call into
    // the C library on a baseline x86-64.
    let truncated = t as i32;
    let k = if f64::from(truncated) < t {
        truncated + 1
    } else {
        truncated
    };
    let above = f64::from(k) - t;
    if !(EDGE_BAND..=1.0 - EDGE_BAND).contains(&above) {
        return exact_index(a);
    }
    k
}

/// The binade [1, 2) is cut into 2^CHORD_BITS equal parts.
const CHORD_BITS: u32 = 10;

/// Values closer than this (in buckets) to a bucket edge are placed by
/// [`exact_index`]: well above the chords' error of 3e-5 of a bucket
/// (h^2 / 8 times the largest curvature of log_gamma on [1, 2), 1 / ln
/// gamma, with h = 2^-10), so the chords never pick a different bucket.
const EDGE_BAND: f64 = 2e-4;

/// log_gamma(2), and for each part of [1, 2) log_gamma at its left end and
/// the slope of the chord across it.
struct Chords {
    per_binade: f64,
    parts: Vec<(f64, f64)>,
}

fn chords() -> &'static Chords {
    static CHORDS: std::sync::OnceLock<Chords> = std::sync::OnceLock::new();
    CHORDS.get_or_init(|| {
        let n = 1usize << CHORD_BITS;
        let log_gamma = |x: f64| libm::log(x) / gamma_ln();
        let width = 1.0 / n as f64;
        let parts = (0..n)
            .map(|j| {
                let (x0, x1) = (1.0 + j as f64 * width, 1.0 + (j + 1) as f64 * width);
                let (y0, y1) = (log_gamma(x0), log_gamma(x1));
                (y0, (y1 - y0) / width)
            })
            .collect();
        Chords {
            per_binade: log_gamma(2.0),
            parts,
        }
    })
}

/// The defining formula of the bucket index.
fn exact_index(a: f64) -> i32 {
    libm::ceil(libm::log(a) / gamma_ln()) as i32
}

/// Smallest magnitude kept apart from zero.
const TINY: f64 = 1e-300;

#[derive(Debug, Clone, PartialEq, Default)]
struct Store {
    /// Bucket index of `counts[0]`.
    offset: i32,
    counts: Vec<u32>,
}

impl Store {
    #[inline]
    fn add(&mut self, k: i32, n: u32) {
        if let Some(c) = k
            .checked_sub(self.offset)
            .and_then(|i| usize::try_from(i).ok())
            .and_then(|i| self.counts.get_mut(i))
        {
            *c += n;
            return;
        }
        self.grow(k, n);
    }

    #[cold]
    fn grow(&mut self, k: i32, n: u32) {
        if self.counts.is_empty() {
            self.offset = k;
            self.counts.push(0);
        }
        if k < self.offset {
            let grow = (self.offset - k) as usize;
            let mut v = vec![0u32; grow];
            v.extend_from_slice(&self.counts);
            self.counts = v;
            self.offset = k;
        }
        let i = (k - self.offset) as usize;
        if i >= self.counts.len() {
            self.counts.resize(i + 1, 0);
        }
        self.counts[i] += n;
    }

    fn merge(&mut self, o: &Store) {
        for (i, &c) in o.counts.iter().enumerate() {
            if c > 0 {
                self.add(o.offset + i as i32, c);
            }
        }
    }

    fn total(&self) -> u64 {
        self.counts.iter().map(|&c| c as u64).sum()
    }
}

#[derive(Debug, Clone, PartialEq)]
pub struct Sketch {
    pos: Store,
    neg: Store,
    zero: u64,
    /// Exact extremes, to clamp estimates (a constant series stays exact).
    min: f64,
    max: f64,
}

impl Default for Sketch {
    fn default() -> Self {
        Sketch {
            pos: Store::default(),
            neg: Store::default(),
            zero: 0,
            min: f64::INFINITY,
            max: f64::NEG_INFINITY,
        }
    }
}

impl Sketch {
    pub fn count(&self) -> u64 {
        self.pos.total() + self.neg.total() + self.zero
    }

    pub fn add(&mut self, x: f64) {
        self.add_bucket(Bucket::of(x));
    }

    pub fn add_bucket(&mut self, b: Bucket) {
        match b.slot {
            Slot::Skip => return,
            Slot::Zero => self.zero += 1,
            Slot::Pos(k) => self.pos.add(k, 1),
            Slot::Neg(k) => self.neg.add(k, 1),
        }
        self.min = self.min.min(b.value);
        self.max = self.max.max(b.value);
    }

    pub fn merge(&mut self, o: &Sketch) {
        self.pos.merge(&o.pos);
        self.neg.merge(&o.neg);
        self.zero += o.zero;
        self.min = self.min.min(o.min);
        self.max = self.max.max(o.max);
    }

    fn value(k: i32) -> f64 {
        // The bucket (g^(k-1), g^k] is represented by 2 g^k / (g + 1).
        let g = libm::exp(gamma_ln());
        2.0 * libm::exp(k as f64 * gamma_ln()) / (g + 1.0)
    }

    /// The value at quantile `q` (0..=1), or `None` for an empty sketch.
    pub fn quantile(&self, q: f64) -> Option<f64> {
        self.bucket_quantile(q).map(|v| v.clamp(self.min, self.max))
    }

    fn bucket_quantile(&self, q: f64) -> Option<f64> {
        let n = self.count();
        if n == 0 {
            return None;
        }
        // Rank of the wanted value among the sorted values (0-based).
        let rank = libm::floor(q.clamp(0.0, 1.0) * (n - 1) as f64) as u64;
        let mut seen = 0u64;
        // Negative values, most negative first.
        for (i, &c) in self.neg.counts.iter().enumerate().rev() {
            seen += c as u64;
            if seen > rank {
                return Some(-Self::value(self.neg.offset + i as i32));
            }
        }
        seen += self.zero;
        if seen > rank {
            return Some(0.0);
        }
        for (i, &c) in self.pos.counts.iter().enumerate() {
            seen += c as u64;
            if seen > rank {
                return Some(Self::value(self.pos.offset + i as i32));
            }
        }
        None
    }

    /// Sparse encoding: for each store its offset, the number of non-empty
    /// buckets, then (gap to the previous one, count) as LEB128 varints.
    pub fn write(&self, out: &mut Vec<u8>) {
        fn varint(out: &mut Vec<u8>, mut v: u64) {
            loop {
                let b = (v & 0x7f) as u8;
                v >>= 7;
                if v == 0 {
                    out.push(b);
                    return;
                }
                out.push(b | 0x80);
            }
        }
        for st in [&self.pos, &self.neg] {
            out.extend_from_slice(&st.offset.to_le_bytes());
            let nonzero: Vec<(usize, u32)> = st
                .counts
                .iter()
                .enumerate()
                .filter(|(_, &c)| c > 0)
                .map(|(i, &c)| (i, c))
                .collect();
            varint(out, nonzero.len() as u64);
            let mut prev = 0usize;
            for (i, c) in nonzero {
                varint(out, (i - prev) as u64);
                varint(out, c as u64);
                prev = i;
            }
        }
        out.extend_from_slice(&self.zero.to_le_bytes());
        out.extend_from_slice(&self.min.to_le_bytes());
        out.extend_from_slice(&self.max.to_le_bytes());
    }

    pub fn read(input: &mut &[u8]) -> Option<Sketch> {
        fn take<const N: usize>(input: &mut &[u8]) -> Option<[u8; N]> {
            if input.len() < N {
                return None;
            }
            let (a, b) = input.split_at(N);
            *input = b;
            a.try_into().ok()
        }
        fn varint(input: &mut &[u8]) -> Option<u64> {
            let mut v = 0u64;
            for shift in (0..64).step_by(7) {
                let [b] = take::<1>(input)?;
                v |= ((b & 0x7f) as u64) << shift;
                if b & 0x80 == 0 {
                    return Some(v);
                }
            }
            None
        }
        let mut stores = [Store::default(), Store::default()];
        for st in &mut stores {
            let offset = i32::from_le_bytes(take::<4>(input)?);
            let n = varint(input)? as usize;
            if n > input.len() {
                return None;
            }
            let mut at = 0usize;
            for k in 0..n {
                let gap = varint(input)? as usize;
                let c = u32::try_from(varint(input)?).ok()?;
                at = at.checked_add(gap)?;
                if k > 0 && gap == 0 || c == 0 || at > 1 << 26 {
                    return None;
                }
                st.add(offset.checked_add(i32::try_from(at).ok()?)?, c);
            }
        }
        let zero = u64::from_le_bytes(take::<8>(input)?);
        let min = f64::from_le_bytes(take::<8>(input)?);
        let max = f64::from_le_bytes(take::<8>(input)?);
        let [pos, neg] = stores;
        Some(Sketch {
            pos,
            neg,
            zero,
            min,
            max,
        })
    }
}

#[cfg(test)]
mod tests {
    #[test]
    fn table_buckets_are_the_defining_formulas_buckets() {
        use super::{bucket_index, exact_index, gamma_ln, TINY};
        let mut rng = crate::ensemble::SplitMix(0x2545_f491_4f6c_dd1d);
        let mut checked = 0;
        let mut check = |a: f64| {
            if a.is_finite() && a >= TINY {
                assert_eq!(bucket_index(a), exact_index(a), "{a:e}");
                checked += 1;
            }
        };
        // Magnitudes spread over the whole range, and all the bits of
        // mantissas.
        for _ in 0..1_000_000 {
            check(f64::from_bits(rng.next() >> 1));
            check(libm::exp(rng.unit() * 1380.0 - 690.0));
        }
        // At and around the edges of buckets, where the table alone could
        // be wrong.
        for k in -170_000..170_000 {
            if k % 7 != 0 {
                continue;
            }
            let edge = libm::exp(f64::from(k) * gamma_ln());
            let mut a = edge;
            for _ in 0..3 {
                a = f64::from_bits(a.to_bits() - 1);
            }
            for _ in 0..7 {
                check(a);
                a = f64::from_bits(a.to_bits() + 1);
            }
        }
        assert!(checked > 2_000_000, "{checked}");
    }

    use super::*;

    /// The chords' error is far inside the band in which the formula
    /// decides.
    #[test]
    fn chords_are_within_3e_5_of_a_bucket_of_log_gamma() {
        let c = chords();
        let mut rng = crate::ensemble::SplitMix(17);
        let mut worst = 0.0f64;
        for _ in 0..1_000_000 {
            let m = 1.0 + rng.unit() * (1.0 - f64::EPSILON);
            let bits = m.to_bits();
            let part = ((bits >> (52 - CHORD_BITS)) & ((1 << CHORD_BITS) - 1)) as usize;
            let left = f64::from_bits(bits & !((1 << (52 - CHORD_BITS)) - 1));
            let (at_left, slope) = c.parts[part];
            let err = (at_left + (m - left) * slope - libm::log(m) / gamma_ln()).abs();
            worst = worst.max(err);
        }
        assert!(worst < 3e-5, "{worst:e}");
        assert!(worst > 1e-6, "the bound is not loose by orders: {worst:e}");
        assert!(3.0 * worst < EDGE_BAND);
        assert!((c.per_binade - std::f64::consts::LN_2 / gamma_ln()).abs() < 1e-9);
    }

    #[test]
    fn quantiles_are_within_the_relative_error() {
        let mut s = Sketch::default();
        let values: Vec<f64> = (1..=1000).map(|i| i as f64 * 1e18).collect();
        for v in &values {
            s.add(*v);
        }
        for q in [0.05, 0.25, 0.5, 0.75, 0.95] {
            let exact = values[(q * 999.0f64).floor() as usize];
            let got = s.quantile(q).unwrap();
            assert!(
                (got - exact).abs() / exact <= ALPHA * 1.0001,
                "q {q}: {got} vs {exact}"
            );
        }
    }

    #[test]
    fn merging_in_any_split_and_order_gives_the_same_sketch() {
        let values: Vec<f64> = (0..500).map(|i| ((i * 37) % 101) as f64 - 50.0).collect();
        let mut whole = Sketch::default();
        for v in &values {
            whole.add(*v);
        }
        let mut a = Sketch::default();
        let mut b = Sketch::default();
        for v in values.iter().rev().take(200) {
            a.add(*v);
        }
        for v in values.iter().rev().skip(200) {
            b.add(*v);
        }
        b.merge(&a);
        assert_eq!(whole, b);
        let mut bytes = Vec::new();
        whole.write(&mut bytes);
        let back = Sketch::read(&mut bytes.as_slice()).unwrap();
        assert_eq!(back, whole);
        assert_eq!(whole.quantile(0.5), Some(0.0));
        let mut constant = Sketch::default();
        for _ in 0..10 {
            constant.add(1e21);
        }
        assert_eq!(constant.quantile(0.05), Some(1e21));
        assert!(whole.quantile(0.0).unwrap() < -49.0);
    }
}
