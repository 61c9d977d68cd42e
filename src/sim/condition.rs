//! A condition's chain of operations run as one pass over the lanes.
//!
//! The conditions of structured products (an autocall trigger, a coupon barrier, a
//! knock-in at maturity) compile to a chain: a value per underlying (`ln S + ln w`,
//! [`crate::compile`]'s comparisons on logs), their `min` or `max`, a comparison with a
//! constant, and the mask of the paths still alive. Run operation by operation, each
//! link is a pass over the block that stores its lanes for the next to load; here the
//! chain runs over a chunk of lanes held in registers, and only the outcome is stored.
//!
//! The same outcome on every lane, bit for bit, with fewer steps: `min(v) ≥ t` is
//! "every value at or above `t`", `min(v) < t` "some value below `t` and none that is not
//! a number" (`min_or_nan` passes one on, and no comparison holds for it), `max` the
//! other way round; each value is the operations' own sum. A missing offset is taken as
//! `+ 0`, which changes only the sign of a zero, and no comparison sees that. The
//! registers the chain wrote on its way are not written: a chain is taken only when
//! nothing reads them afterwards.

use crate::compile::{Bin, Op, Program, Src, ALIVE};

/// Lanes the chain runs over at once, in registers.
const CHUNK: usize = 32;

/// The most values one chain combines.
pub(super) const MOST_TERMS: usize = 8;

/// `dst = mask ∧ ((shape over k of (sourceₖ + offsetₖ)) cmp threshold)`, standing for
/// the operations `ops[at..at + len]` of the program.
#[derive(Clone, Debug, PartialEq)]
pub(super) struct Condition {
    /// How many operations it stands for.
    pub len: usize,
    /// Each value: a source and the constant added to it, if any.
    pub terms: Vec<(Src, Option<f64>)>,
    /// The values' `max` (else their `min`; one value: itself).
    up: bool,
    /// `<`, `<=`, `>` or `>=`, with the threshold on the right (`left`: on the left).
    cmp: Bin,
    threshold: f64,
    left: bool,
    /// The mask the outcome is and-ed with, when the chain ends with an `and`.
    pub mask: Option<Src>,
    pub dst: u32,
}

/// Per operation, the condition whose chain starts there, if any. `reads_to[i]`: the
/// last grid date operation `i` reads; a chain is taken only when no link reads a later
/// date than its first (the paths are stepped before the first).
pub(super) fn conditions(p: &Program, reads_to: &[usize]) -> Vec<Option<Condition>> {
    let mut out: Vec<Option<Condition>> = vec![None; p.ops.len()];
    let mut at = 0;
    while at < p.ops.len() {
        match chain_at(p, at, reads_to) {
            Some(c) => {
                let len = c.len;
                out[at] = Some(c);
                at += len;
            }
            None => at += 1,
        }
    }
    out
}

/// A source read as it stands when the chain starts: not a constant, and not a register
/// the chain writes before.
fn plain(s: Src, written: &[u32]) -> bool {
    match s {
        Src::Const(_) => false,
        Src::Reg(r) => !written.contains(&r),
        _ => true,
    }
}

/// The chain starting at operation `at`, when it is one and worth running as one.
fn chain_at(p: &Program, at: usize, reads_to: &[usize]) -> Option<Condition> {
    // Registers holding partial values, each with the terms it combines.
    let mut pending: Vec<(u32, Vec<usize>)> = Vec::new();
    let mut terms: Vec<(Src, Option<f64>)> = Vec::new();
    let mut written: Vec<u32> = Vec::new();
    let mut shape: Option<Bin> = None;
    let konst = |s: Src| match s {
        Src::Const(c) => Some(c),
        _ => None,
    };
    let mut i = at;
    // The links before the comparison.
    let (cmp, threshold, left, value) = loop {
        let Op::Bin { op, dst, a, b } = *p.ops.get(i)? else { return None };
        if dst == ALIVE || pending.iter().any(|v| v.0 == dst) {
            return None;
        }
        // One operand as a value: a partial one (taken) or a plain source (a new term).
        let operand = |s: Src, pending: &mut Vec<(u32, Vec<usize>)>, terms: &mut Vec<(Src, Option<f64>)>| {
            if let Src::Reg(r) = s {
                if let Some(k) = pending.iter().position(|v| v.0 == r) {
                    return Some(pending.remove(k).1);
                }
            }
            plain(s, &written).then(|| {
                terms.push((s, None));
                vec![terms.len() - 1]
            })
        };
        match op {
            Bin::Add => {
                let (s, c) = match (konst(a), konst(b)) {
                    (None, Some(c)) => (a, c),
                    (Some(c), None) => (b, c),
                    _ => return None,
                };
                if !plain(s, &written) {
                    return None;
                }
                terms.push((s, Some(c)));
                pending.push((dst, vec![terms.len() - 1]));
            }
            Bin::Min | Bin::Max => {
                if shape.is_some_and(|s| s != op) {
                    return None;
                }
                shape = Some(op);
                let mut x = operand(a, &mut pending, &mut terms)?;
                x.extend(operand(b, &mut pending, &mut terms)?);
                pending.push((dst, x));
            }
            Bin::Lt | Bin::Le | Bin::Gt | Bin::Ge => {
                let (s, t, left) = match (konst(a), konst(b)) {
                    (None, Some(t)) => (a, t, false),
                    (Some(t), None) => (b, t, true),
                    _ => return None,
                };
                let value = operand(s, &mut pending, &mut terms)?;
                written.push(dst);
                i += 1;
                break (op, t, left, (dst, value));
            }
            _ => return None,
        }
        written.push(dst);
        i += 1;
    };
    // Every partial value ends in the comparison.
    if !pending.is_empty() || value.1.len() != terms.len() {
        return None;
    }
    let mut dst = value.0;
    let mut mask = None;
    if let Some(&Op::Bin { op: Bin::And, dst: and, a, b }) = p.ops.get(i) {
        let other = if a == Src::Reg(dst) {
            Some(b)
        } else if b == Src::Reg(dst) {
            Some(a)
        } else {
            None
        };
        if let Some(m) = other.filter(|&m| plain(m, &written) && and != ALIVE) {
            mask = Some(m);
            dst = and;
            written.push(and);
            i += 1;
        }
    }
    let len = i - at;
    let first = reads_to[at];
    let reads_later = reads_to[at..i].iter().any(|&to| to > first);
    let reads_own = terms.iter().map(|t| t.0).chain(mask).any(|s| s == Src::Reg(dst));
    if len < 2 || terms.len() > MOST_TERMS || reads_later || reads_own {
        return None;
    }
    // What the chain does not write must not be read afterwards.
    if written.iter().any(|&r| r != dst && read_after(p, i, r)) {
        return None;
    }
    Some(Condition { len, terms, up: shape == Some(Bin::Max), cmp, threshold, left, mask, dst })
}

/// Whether register `r` may be read from operation `from` on before a write of every
/// lane of it (the alive flags and the states are read after the last operation).
fn read_after(p: &Program, from: usize, r: u32) -> bool {
    for op in &p.ops[from..] {
        let reads = op.sources().any(|s| s == Src::Reg(r))
            || match *op {
                Op::Acc { dst, .. } => dst == r,
                Op::Assign { dst, mask, .. } => dst == r || mask == r,
                Op::Pay { mask, .. } | Op::End { mask, .. } => mask == r,
                Op::Choose { mask, site, .. } => mask == r || p.choices[site as usize].using.contains(&Src::Reg(r)),
                _ => false,
            };
        if reads {
            return true;
        }
        let writes = match *op {
            Op::Bin { dst, .. } | Op::Cmp { dst, .. } | Op::Un { dst, .. } | Op::Select { dst, .. } => dst == r,
            Op::Copy { dst, src } => dst == r && src != Src::Reg(r),
            _ => false,
        };
        if writes {
            return false;
        }
    }
    r == ALIVE || (r as usize) <= p.states.len()
}

/// Runs the chain over the lanes of `out`: `terms[k]` the lanes of the condition's
/// `k`-th source, `mask` the mask's, each as many lanes as `out` or more (up to a whole
/// number of chunks: the lanes past `out`'s are read and not used).
pub(super) fn run(c: &Condition, out: &mut [f64], terms: &[&[f64]], mask: Option<&[f64]>) {
    #[cfg(target_arch = "x86_64")]
    {
        if super::wide_lanes() {
            // SAFETY: the CPU has just been checked for these AVX-512 subsets.
            unsafe { run_avx512(c, out, terms, mask) };
            return;
        }
        if std::is_x86_feature_detected!("avx2") {
            // SAFETY: the CPU has just been checked for AVX2.
            unsafe { run_avx2(c, out, terms, mask) };
            return;
        }
    }
    run_generic(c, out, terms, mask);
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
unsafe fn run_avx2(c: &Condition, out: &mut [f64], terms: &[&[f64]], mask: Option<&[f64]>) {
    run_generic(c, out, terms, mask);
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f,avx512dq,avx512vl")]
unsafe fn run_avx512(c: &Condition, out: &mut [f64], terms: &[&[f64]], mask: Option<&[f64]>) {
    run_generic(c, out, terms, mask);
}

/// One loop per kind of comparison and of combination, so that each is straight code.
#[inline(always)]
fn run_generic(c: &Condition, out: &mut [f64], terms: &[&[f64]], mask: Option<&[f64]>) {
    let t = c.threshold;
    // The comparison as written, the threshold on its own side; then `min(v) ≥ t` is
    // every value at or above `t`, `min(v) < t` some value below it (and none not a
    // number), `max` likewise the other way round.
    let up = c.up;
    match (c.cmp, c.left) {
        (Bin::Lt, false) | (Bin::Gt, true) => chain(c, out, terms, mask, up, |x| x < t),
        (Bin::Le, false) | (Bin::Ge, true) => chain(c, out, terms, mask, up, |x| x <= t),
        (Bin::Gt, false) | (Bin::Lt, true) => chain(c, out, terms, mask, !up, |x| x > t),
        _ => chain(c, out, terms, mask, !up, |x| x >= t),
    }
}

/// `every`: the outcome is every value's `holds`; else some value's, with no value that
/// is not a number (which `min` and `max` would pass on, and no comparison holds for).
#[inline(always)]
fn chain(
    c: &Condition,
    out: &mut [f64],
    terms: &[&[f64]],
    mask: Option<&[f64]>,
    every: bool,
    holds: impl Fn(f64) -> bool + Copy,
) {
    let n = out.len();
    let whole = n - n % CHUNK;
    let lanes = |s: &[f64], from: usize| -> [f64; CHUNK] { s[from..from + CHUNK].try_into().expect("a whole chunk") };
    for from in (0..whole).step_by(CHUNK) {
        let o = outcome(c, |k| lanes(terms[k], from), mask.map(|m| lanes(m, from)), every, holds);
        out[from..from + CHUNK].copy_from_slice(&o);
    }
    if whole < n {
        // The last lanes: read a whole chunk where the sources have one (their lanes past
        // `n` are read and not used), else a chunk padded with zeros.
        let last = |s: &[f64]| match s.get(whole..whole + CHUNK) {
            Some(s) => s.try_into().expect("a whole chunk"),
            None => {
                let mut x = [0.0; CHUNK];
                x[..n - whole].copy_from_slice(&s[whole..n]);
                x
            }
        };
        let o = outcome(c, |k| last(terms[k]), mask.map(last), every, holds);
        out[whole..].copy_from_slice(&o[..n - whole]);
    }
}

/// The outcome on one chunk of lanes, `term(k)` the lanes of the `k`-th source.
#[inline(always)]
fn outcome(
    c: &Condition,
    term: impl Fn(usize) -> [f64; CHUNK],
    mask: Option<[f64; CHUNK]>,
    every: bool,
    holds: impl Fn(f64) -> bool,
) -> [f64; CHUNK] {
    // Flags as 1 or 0 in doubles, so that each update is a compare and a select.
    let mut all = mask.map_or([1.0; CHUNK], |m| m.map(|m| if m != 0.0 { 1.0 } else { 0.0 }));
    let mut some = [0.0; CHUNK];
    for (k, &(_, offset)) in c.terms.iter().enumerate() {
        // No offset adds zero: that changes only the sign of a zero, which no comparison
        // sees, and spares a branch per value.
        let o = offset.unwrap_or(0.0);
        let x = term(k).map(|x| x + o);
        for j in 0..CHUNK {
            if every {
                all[j] = if holds(x[j]) { all[j] } else { 0.0 };
            } else {
                some[j] = if holds(x[j]) { 1.0 } else { some[j] };
                all[j] = if x[j].is_nan() { 0.0 } else { all[j] };
            }
        }
    }
    if every {
        return all;
    }
    let mut o = [0.0; CHUNK];
    for j in 0..CHUNK {
        o[j] = if some[j] != 0.0 { all[j] } else { 0.0 };
    }
    o
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::typing::{max_or_nan, min_or_nan};
    use rand::{Rng, SeedableRng};

    /// The operations a condition stands for, as `exec` runs them one by one (the
    /// additions, then `min_or_nan` or `max_or_nan` in the order written, a comparison
    /// giving 1 or 0, an `and` of two flags), on one lane: what its one pass must give.
    fn by_operations(c: &Condition, terms: &[Vec<f64>], mask: Option<&[f64]>, lane: usize) -> f64 {
        let combine = if c.up { max_or_nan } else { min_or_nan };
        let values = c.terms.iter().zip(terms).map(|(&(_, o), s)| o.map_or(s[lane], |o| s[lane] + o));
        let v = values.reduce(combine).expect("a value");
        let (a, b) = if c.left { (c.threshold, v) } else { (v, c.threshold) };
        let holds = match c.cmp {
            Bin::Lt => a < b,
            Bin::Le => a <= b,
            Bin::Gt => a > b,
            _ => a >= b,
        };
        let flag = |x: bool| if x { 1.0 } else { 0.0 };
        match mask {
            Some(m) => flag(m[lane] != 0.0 && flag(holds) != 0.0),
            None => flag(holds),
        }
    }

    /// A value that is ordinary or awkward: near the threshold, on it after the offset,
    /// a zero of either sign, infinite, not a number.
    fn value(rng: &mut rand_pcg::Pcg64, threshold: f64, offset: f64) -> f64 {
        match rng.gen_range(0..10) {
            0 => f64::NAN,
            1 => 0.0,
            2 => -0.0,
            3 => f64::INFINITY,
            4 => f64::NEG_INFINITY,
            5 => threshold - offset,
            _ => threshold - offset + rng.gen_range(-1.0..1.0),
        }
    }

    /// Every kind of chain (`min` or `max`, each comparison with the threshold on either
    /// side, with and without a mask, one to five values, with and without offsets) gives
    /// the bits of its operations on every lane, for lane counts on and off the chunk size,
    /// with sources exactly as long as the lanes (the padded last chunk) and longer.
    #[test]
    fn a_chain_gives_the_bits_of_its_operations_on_every_lane() {
        let mut rng = rand_pcg::Pcg64::seed_from_u64(17);
        let mut checked = 0;
        for up in [false, true] {
            for cmp in [Bin::Lt, Bin::Le, Bin::Gt, Bin::Ge] {
                for left in [false, true] {
                    for masked in [false, true] {
                        for count in 1..=5 {
                            for n in [1usize, 7, 31, 32, 33, 64, 70, 100] {
                                for longer in [false, true] {
                                    let threshold = [0.0, 1.0, -0.5][rng.gen_range(0..3)];
                                    let terms: Vec<(Src, Option<f64>)> = (0..count)
                                        .map(|k| {
                                            (Src::Reg(k as u32 + 1), (k % 2 == 0).then(|| rng.gen_range(-1.0..1.0)))
                                        })
                                        .collect();
                                    let len: usize = if longer { n.div_ceil(CHUNK) * CHUNK } else { n };
                                    let lanes: Vec<Vec<f64>> = terms
                                        .iter()
                                        .map(|t| {
                                            (0..len).map(|_| value(&mut rng, threshold, t.1.unwrap_or(0.0))).collect()
                                        })
                                        .collect();
                                    let mask: Option<Vec<f64>> = masked.then(|| {
                                        (0..len).map(|_| [0.0, 1.0, -0.0, 2.5, f64::NAN][rng.gen_range(0..5)]).collect()
                                    });
                                    let c = Condition {
                                        len: count + 2,
                                        terms,
                                        up,
                                        cmp,
                                        threshold,
                                        left,
                                        mask: masked.then_some(Src::Reg(0)),
                                        dst: 9,
                                    };
                                    let mut out = vec![0.5; n];
                                    let slices: Vec<&[f64]> = lanes.iter().map(|l| &l[..]).collect();
                                    run(&c, &mut out, &slices, mask.as_deref());
                                    for (lane, o) in out.iter().enumerate() {
                                        let want = by_operations(&c, &lanes, mask.as_deref(), lane);
                                        assert_eq!(o.to_bits(), want.to_bits(), "{c:?}, lane {lane} of {n}");
                                    }
                                    run_generic(&c, &mut out, &slices, mask.as_deref());
                                    for (lane, o) in out.iter().enumerate() {
                                        let want = by_operations(&c, &lanes, mask.as_deref(), lane);
                                        assert_eq!(
                                            o.to_bits(),
                                            want.to_bits(),
                                            "{c:?}, lane {lane} of {n}, baseline build"
                                        );
                                    }
                                    checked += 1;
                                }
                            }
                        }
                    }
                }
            }
        }
        assert_eq!(checked, 2 * 4 * 2 * 2 * 5 * 8 * 2);
    }
}
