//! Which operations a program's outcome depends on.

use super::{Op, Src};

/// A backward pass from the operations `effect` marks (and, always, every `pay`, `end`
/// and `may end`) through the registers each live operation reads: an operation is live
/// when it has an effect or writes a register something live reads later. A register
/// written whole (not an assignment under a mask, not an accumulation) is dead before
/// its write. `choice_reads[site]`: the regression variables a `may end` reads.
pub fn live_ops(ops: &[Op], registers: usize, choice_reads: &[Vec<Src>], effect: impl Fn(&Op) -> bool) -> Vec<bool> {
    let mut needed = vec![false; registers.max(1)];
    let mut live = vec![false; ops.len()];
    let need = |needed: &mut Vec<bool>, s: Src| {
        if let Src::Reg(r) = s {
            if let Some(n) = needed.get_mut(r as usize) {
                *n = true;
            }
        }
    };
    for (i, op) in ops.iter().enumerate().rev() {
        let written = match *op {
            Op::Pay { .. } | Op::End { .. } => None,
            Op::Assign { dst, .. } | Op::Acc { dst, .. } | Op::Choose { dst, .. } => Some((dst, false)),
            Op::Bin { dst, .. }
            | Op::Cmp { dst, .. }
            | Op::Un { dst, .. }
            | Op::Select { dst, .. }
            | Op::Copy { dst, .. } => Some((dst, true)),
        };
        let pays = matches!(op, Op::Pay { .. } | Op::End { .. } | Op::Choose { .. });
        let read_later = written.is_some_and(|(dst, _)| needed.get(dst as usize).copied().unwrap_or(true));
        if !(pays || effect(op) || read_later) {
            continue;
        }
        live[i] = true;
        if let Some((dst, true)) = written {
            if let Some(n) = needed.get_mut(dst as usize) {
                *n = false;
            }
        }
        match *op {
            Op::Pay { mask, .. } | Op::End { mask, .. } | Op::Choose { mask, .. } | Op::Assign { mask, .. } => {
                need(&mut needed, Src::Reg(mask))
            }
            // An accumulation reads the register it writes.
            Op::Acc { dst, .. } => need(&mut needed, Src::Reg(dst)),
            _ => {}
        }
        if let Op::Choose { site, .. } = *op {
            for &s in choice_reads.get(site as usize).map_or(&[][..], |v| &v[..]) {
                need(&mut needed, s);
            }
        }
        for s in op.sources() {
            need(&mut needed, s);
        }
    }
    live
}
