#!/usr/bin/env python3
"""Write src/numeric/tables.rs: the constants of hadal's exp and pow
(src/numeric/elementary.rs), computed with 60-digit decimal arithmetic and
rounded once to the nearest double.

    python3 tools/elementary_tables.py > src/numeric/tables.rs

The unit tests of src/numeric/elementary.rs check every entry against
libm, so a table that does not match this script's output fails there.
"""
import struct
from decimal import Decimal, getcontext

getcontext().prec = 60
N = 128  # table size of exp: 2^(j/N)
L = 128  # table size of log: parts of [1, 2)

LN2 = Decimal(2).ln()


def bits(x):
    return struct.unpack("<Q", struct.pack("<d", float(x)))[0]


def dd(x):
    """x as a pair of doubles hi + lo, hi the nearest double to x."""
    hi = float(x)
    lo = float(x - Decimal(hi))
    return hi, lo


def truncated(x, keep):
    """x rounded to a double, then cut to its first `keep` significant bits."""
    b = bits(x)
    drop = 52 - (keep - 1)
    return struct.unpack("<d", struct.pack("<Q", b & ~((1 << drop) - 1)))[0]


def hexf(x):
    return f"0x{bits(x):016x}"


out = []
out.append("//! Constants of `elementary.rs`, written by `tools/elementary_tables.py`")
out.append("//! (60-digit decimal arithmetic, each value rounded once). Regenerate with")
out.append("//! `python3 tools/elementary_tables.py > src/numeric/tables.rs`.")
out.append("")
ln2n_hi = truncated(LN2 / N, 36)
ln2n_lo = float(LN2 / N - Decimal(ln2n_hi))
ln2_hi = truncated(LN2, 42)
ln2_lo = float(LN2 - Decimal(ln2_hi))
out.append("/// ln 2 / 128 in two parts; the first has 36 significant bits, so that")
out.append("/// k times it is exact for |k| < 2^17.")
out.append(f"pub const LN2_N_HI: u64 = {hexf(ln2n_hi)};")
out.append(f"pub const LN2_N_LO: u64 = {hexf(ln2n_lo)};")
out.append("/// 128 / ln 2.")
out.append(f"pub const INV_LN2_N: u64 = {hexf(Decimal(N) / LN2)};")
out.append("/// ln 2 in two parts; the first has 42 significant bits, so that e times")
out.append("/// it is exact for any binary exponent e of a double.")
out.append(f"pub const LN2_HI: u64 = {hexf(ln2_hi)};")
out.append(f"pub const LN2_LO: u64 = {hexf(ln2_lo)};")
out.append("")
out.append("/// 2^(j/128) for j = 0..128, as the nearest double and the rest.")
out.append(f"pub const EXP2_TABLE: [(u64, u64); {N}] = [")
for j in range(N):
    v = Decimal(2) ** (Decimal(j) / N)
    hi, lo = dd(v)
    out.append(f"    ({hexf(hi)}, {hexf(lo)}),")
out.append("];")
out.append("")
out.append("/// For the 128 equal parts of [1, 2): the midpoint c = 1 + (i + 1/2) / 128")
out.append("/// (exact), 1 / c (nearest double), and ln c as the nearest double and")
out.append("/// the rest.")
out.append(f"pub const LOG_TABLE: [(u64, u64, u64, u64); {L}] = [")
for i in range(L):
    c = Decimal(1) + (Decimal(i) + Decimal("0.5")) / L
    assert float(c) == c
    hi, lo = dd(c.ln())
    out.append(f"    ({hexf(c)}, {hexf(1 / c)}, {hexf(hi)}, {hexf(lo)}),")
out.append("];")
print("\n".join(out))
