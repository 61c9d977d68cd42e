//! Comparisons of levels with constants, made on the log levels.
//!
//! A level is `exp` of the log level the paths step. `min(perf(A), perf(B)) >= c` is
//! `min(ln S_A + ln w_A, ln S_B + ln w_B) >= ln c` (`w = 1/S(0)`), since `exp` is
//! increasing: the same outcome on every path (up to the rounding of a value that lies
//! within an ulp of the threshold), and no level needs computing for it. An autocallable
//! that reads its levels only to compare them (every observation but maturity) then needs
//! no `exp` on those dates (`sim::paths` skips the dates nothing else reads).
//!
//! What is rewritten: an unchecked comparison (`<`, `<=`, `>`, `>=`) of a positive
//! constant with a level, a positive multiple of one, or a `min` or `max` of such values.
//! The operations that built the value stay where something else reads it (`100 *
//! worst` at maturity) and go where nothing does.

use super::{Bin, Op, Src};

/// How a value is built from levels.
#[derive(Clone, Copy, Debug, PartialEq)]
enum Shape {
    One,
    Min,
    Max,
}

/// `shape over i of (wᵢ · level i)`, `wᵢ > 0`, levels by their source index.
#[derive(Clone, Debug, PartialEq)]
struct Lin {
    shape: Shape,
    terms: Vec<(u32, f64)>,
}

impl Lin {
    fn scaled(mut self, by: f64) -> Option<Lin> {
        if !(by.is_finite() && by > 0.0) {
            return None;
        }
        for t in &mut self.terms {
            t.1 *= by;
        }
        Some(self)
    }

    fn combined(self, other: Lin, up: bool) -> Option<Lin> {
        let shape = if up { Shape::Max } else { Shape::Min };
        let fits = |s: Shape| s == Shape::One || s == shape;
        if !fits(self.shape) || !fits(other.shape) {
            return None;
        }
        let mut terms = self.terms;
        terms.extend(other.terms);
        Some(Lin { shape, terms })
    }
}

/// Rewrites the comparisons of `ops` onto log levels (new registers from `*registers`
/// on) and drops the operations nothing reads any more.
/// `choice_reads[site]`: the regression variables of early-exercise date `site`, read
/// by its `Choose`.
pub(super) fn compare_in_logs(ops: Vec<Op>, registers: &mut u32, choice_reads: &[Vec<Src>]) -> Vec<Op> {
    let mut lin: Vec<Option<Lin>> = vec![None; *registers as usize];
    let mut out: Vec<Op> = Vec::with_capacity(ops.len());
    let mut rewritten = false;
    let read = |lin: &[Option<Lin>], s: Src| match s {
        Src::Level(i) => Some(Lin { shape: Shape::One, terms: vec![(i, 1.0)] }),
        Src::Reg(r) => lin.get(r as usize).cloned().flatten(),
        _ => None,
    };
    let konst = |s: Src| match s {
        Src::Const(c) => Some(c),
        _ => None,
    };
    for op in ops {
        let (dst, value) = match op {
            Op::Bin { op: cmp @ (Bin::Lt | Bin::Le | Bin::Gt | Bin::Ge), dst, a, b } => {
                let side = match (read(&lin, a), read(&lin, b)) {
                    (Some(l), None) => konst(b).filter(|c| c.is_finite() && *c > 0.0).map(|c| (l, c, true)),
                    (None, Some(l)) => konst(a).filter(|c| c.is_finite() && *c > 0.0).map(|c| (l, c, false)),
                    _ => None,
                };
                if let Some((l, c, left)) = side {
                    let x = emit_log(&l, &mut out, registers);
                    let threshold = Src::Const(c.ln());
                    let (a, b) = if left { (x, threshold) } else { (threshold, x) };
                    out.push(Op::Bin { op: cmp, dst, a, b });
                    rewritten = true;
                    set(&mut lin, dst, None);
                    continue;
                }
                (Some(dst), None)
            }
            Op::Bin { op: Bin::Mul, dst, a, b } => {
                let v = match (read(&lin, a), read(&lin, b)) {
                    (Some(l), None) => konst(b).and_then(|c| l.scaled(c)),
                    (None, Some(l)) => konst(a).and_then(|c| l.scaled(c)),
                    _ => None,
                };
                (Some(dst), v)
            }
            Op::Bin { op: Bin::Div, dst, a, b } => {
                (Some(dst), read(&lin, a).zip(konst(b)).and_then(|(l, c)| l.scaled(1.0 / c)))
            }
            Op::Bin { op: op @ (Bin::Min | Bin::Max), dst, a, b } => {
                (Some(dst), read(&lin, a).zip(read(&lin, b)).and_then(|(x, y)| x.combined(y, op == Bin::Max)))
            }
            Op::Copy { dst, src } => (Some(dst), read(&lin, src)),
            Op::Bin { dst, .. }
            | Op::Cmp { dst, .. }
            | Op::Un { dst, .. }
            | Op::Select { dst, .. }
            | Op::Acc { dst, .. }
            | Op::Assign { dst, .. }
            | Op::Choose { dst, .. } => (Some(dst), None),
            Op::Pay { .. } | Op::End { .. } => (None, None),
        };
        if let Some(dst) = dst {
            set(&mut lin, dst, value);
        }
        out.push(op);
    }
    if rewritten {
        drop_unread(out, *registers as usize, choice_reads)
    } else {
        out
    }
}

fn set(lin: &mut Vec<Option<Lin>>, r: u32, v: Option<Lin>) {
    if lin.len() <= r as usize {
        lin.resize(r as usize + 1, None);
    }
    lin[r as usize] = v;
}

/// Appends the operations that compute `ln` of `l` and returns where it is.
fn emit_log(l: &Lin, out: &mut Vec<Op>, registers: &mut u32) -> Src {
    let mut fresh = || {
        let r = *registers;
        *registers += 1;
        r
    };
    let mut acc: Option<Src> = None;
    for &(i, w) in &l.terms {
        let term = if w == 1.0 {
            Src::LogLevel(i)
        } else {
            let dst = fresh();
            out.push(Op::Bin { op: Bin::Add, dst, a: Src::LogLevel(i), b: Src::Const(w.ln()) });
            Src::Reg(dst)
        };
        acc = Some(match acc {
            None => term,
            Some(prev) => {
                let dst = fresh();
                let op = if l.shape == Shape::Max { Bin::Max } else { Bin::Min };
                out.push(Op::Bin { op, dst, a: prev, b: term });
                Src::Reg(dst)
            }
        });
    }
    acc.unwrap_or(Src::Const(f64::NAN))
}

/// Drops the plain operations (`Bin`, `Un`, `Select`, `Copy`) whose result nothing
/// live reads ([`super::live_ops`]; every other operation has an effect: a payment, an
/// end, a choice, an assignment, an accumulation, a checked comparison's count).
fn drop_unread(ops: Vec<Op>, registers: usize, choice_reads: &[Vec<Src>]) -> Vec<Op> {
    let plain = |op: &Op| matches!(op, Op::Bin { .. } | Op::Un { .. } | Op::Select { .. } | Op::Copy { .. });
    let live = super::live_ops(&ops, registers, choice_reads, |op| !plain(op));
    ops.into_iter().zip(live).filter_map(|(op, keep)| keep.then_some(op)).collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::compile::ALIVE;

    /// `worst = min(perf(A), perf(B))` (spots 100 and 50) on one date, compared with 1
    /// and paid where it holds; `pay_worst` also pays `worst` itself.
    fn program(pay_worst: bool) -> Vec<Op> {
        let mut ops = vec![
            Op::Bin { op: Bin::Mul, dst: 1, a: Src::Level(2), b: Src::Const(0.01) },
            Op::Bin { op: Bin::Mul, dst: 2, a: Src::Level(3), b: Src::Const(0.02) },
            Op::Bin { op: Bin::Min, dst: 3, a: Src::Reg(1), b: Src::Reg(2) },
            Op::Bin { op: Bin::Ge, dst: 4, a: Src::Reg(3), b: Src::Const(1.0) },
            Op::Bin { op: Bin::And, dst: 5, a: Src::Reg(ALIVE), b: Src::Reg(4) },
            Op::Pay { mask: 5, amount: Src::Const(100.0), slot: 0, discount: 1.0, site: 0 },
        ];
        if pay_worst {
            ops.push(Op::Pay { mask: ALIVE, amount: Src::Reg(3), slot: 0, discount: 1.0, site: 1 });
        }
        ops
    }

    #[test]
    fn a_worst_of_comparison_is_made_on_logs_and_its_levels_go() {
        let mut registers = 6;
        let ops = compare_in_logs(program(false), &mut registers, &[]);
        let (a, b) = ((0.01f64).ln(), (0.02f64).ln());
        assert_eq!(
            ops,
            vec![
                Op::Bin { op: Bin::Add, dst: 6, a: Src::LogLevel(2), b: Src::Const(a) },
                Op::Bin { op: Bin::Add, dst: 7, a: Src::LogLevel(3), b: Src::Const(b) },
                Op::Bin { op: Bin::Min, dst: 8, a: Src::Reg(6), b: Src::Reg(7) },
                Op::Bin { op: Bin::Ge, dst: 4, a: Src::Reg(8), b: Src::Const(0.0) },
                Op::Bin { op: Bin::And, dst: 5, a: Src::Reg(ALIVE), b: Src::Reg(4) },
                Op::Pay { mask: 5, amount: Src::Const(100.0), slot: 0, discount: 1.0, site: 0 },
            ]
        );
        assert_eq!(registers, 9);
    }

    #[test]
    fn a_value_also_paid_keeps_the_operations_that_build_it() {
        let mut registers = 6;
        let ops = compare_in_logs(program(true), &mut registers, &[]);
        let original = program(true);
        // The three operations building `worst` stay; the comparison reads logs.
        assert_eq!(&ops[..3], &original[..3]);
        assert!(ops.iter().any(|op| matches!(op, Op::Bin { op: Bin::Ge, dst: 4, b: Src::Const(c), .. } if *c == 0.0)));
        assert_eq!(ops.last(), original.last());
    }

    #[test]
    fn comparisons_with_no_positive_constant_are_left_alone() {
        for c in [0.0, -1.0, f64::INFINITY] {
            let mut ops = program(false);
            ops[3] = Op::Bin { op: Bin::Ge, dst: 4, a: Src::Reg(3), b: Src::Const(c) };
            let mut registers = 6;
            assert_eq!(compare_in_logs(ops.clone(), &mut registers, &[]), ops);
            assert_eq!(registers, 6);
        }
        // Two levels compared with each other: no constant.
        let ops = vec![
            Op::Bin { op: Bin::Gt, dst: 1, a: Src::Level(2), b: Src::Level(3) },
            Op::Pay { mask: 1, amount: Src::Const(1.0), slot: 0, discount: 1.0, site: 0 },
        ];
        let mut registers = 2;
        assert_eq!(compare_in_logs(ops.clone(), &mut registers, &[]), ops);
    }
}
