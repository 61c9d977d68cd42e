//! Partial runs: the statistics of a range of blocks, and their exact merge.
//!
//! A full run merges the results of blocks `0, 1, 2, …` one at a time into a running total
//! (Chan's pairwise update of the moments, plain sums of the per-date tallies). Floating
//! point addition is not associative, so merging the totals of two halves does not give
//! the bits of merging their blocks one by one; a partial run therefore keeps every block's
//! result, and [`finish`] replays the full run's sequence of merges in block order. Each
//! block's result is a fixed list of 64-bit words ([`to_words`]) that converts back bit
//! for bit ([`from_words`]).

use std::ops::Range;
use std::time::Instant;

use rayon::prelude::*;

use super::exec::Workspace;
use super::paths;
use super::stats::{BlockResult, Moments};
use super::{Estimate, Run, Settings, BLOCK, BLOCKS_IN_FLIGHT};
use crate::compile::Program;
use crate::diagnostic::Diagnostic;

/// The paths a run of these settings simulates: `paths`, made even for antithetic pairs.
pub fn paths_run(settings: &Settings) -> u64 {
    if settings.antithetic {
        settings.paths.div_ceil(2) * 2
    } else {
        settings.paths
    }
}

/// The number of blocks a run of these settings simulates.
pub fn blocks_run(settings: &Settings) -> u64 {
    paths_run(settings).div_ceil(BLOCK as u64)
}

/// The blocks of part `k` of `n` (numbered from 1) of a run of `blocks` blocks: contiguous
/// ranges in order, whose sizes differ by at most one.
pub fn part_blocks(blocks: u64, k: u64, n: u64) -> Range<u64> {
    let at = |i: u64| (u128::from(blocks) * u128::from(i) / u128::from(n)) as u64;
    at(k - 1)..at(k)
}

/// The shape of one block's result for a program: sample dimensions (the payoff and its
/// controls), event dates, payment dates and `pay` sites.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Shape {
    pub dims: usize,
    pub events: usize,
    pub payments: usize,
    pub sites: usize,
    /// Comparisons counted for operands that are not numbers ([`Program::condition_sites`]).
    pub conditions: usize,
}

impl Shape {
    pub fn of(program: &Program, settings: &Settings) -> Shape {
        let controls = super::controls_for(program, settings);
        Shape {
            dims: 1 + controls.len(),
            events: program.events.len(),
            payments: program.payments.len(),
            sites: program.pay_sites.len(),
            conditions: program.condition_sites.len(),
        }
    }

    /// Words of a block whose paths all paid finite amounts; one more per `pay` site when
    /// some did not.
    fn words(&self) -> usize {
        1 + self.dims + self.dims * self.dims + 3 + self.events + self.payments + 2
    }
}

/// Simulates the blocks `range` of the run `settings` describes, exactly as the full run
/// does, and returns each block's result in block order.
pub fn simulate_blocks(program: &Program, settings: &Settings, range: Range<u64>) -> Vec<BlockResult> {
    // Every part fits the same rule of early exercise: the fit depends on the seed only.
    let fitted = super::exercise::prepare(program, settings);
    let program = &*fitted;
    let model = paths::Model::new(program);
    let controls = super::controls_for(program, settings);
    let paths = paths_run(settings);
    let mut out = Vec::with_capacity((range.end - range.start) as usize);
    let mut next = range.start;
    while next < range.end {
        let end = (next + BLOCKS_IN_FLIGHT as u64).min(range.end);
        let results: Vec<BlockResult> = (next..end)
            .into_par_iter()
            .map_init(
                || Workspace::new(program, &model, &controls),
                |ws, b| {
                    let lanes = (paths - b * BLOCK as u64).min(BLOCK as u64) as usize;
                    ws.run_block(program, &model, &controls, settings, b, lanes)
                },
            )
            .collect();
        out.extend(results);
        next = end;
    }
    out
}

/// The full run rebuilt from its blocks: fed every block's result in block order, it makes
/// the same merges in the same order as [`super::simulate`], so it gives the same bits.
pub struct Replay<'a> {
    run: Run<'a>,
    blocks: u64,
}

impl<'a> Replay<'a> {
    pub fn new(program: &'a Program, settings: &'a Settings) -> Self {
        Replay { run: Run::new(program, settings), blocks: 0 }
    }

    /// Merges the result of the next block.
    pub fn add(&mut self, block: &BlockResult) {
        self.run.total.merge(block);
        self.blocks += 1;
    }

    /// The estimate, once every block of the run has been added.
    pub fn finish(mut self, started: Instant) -> Result<Estimate, Diagnostic> {
        let settings = self.run.settings;
        settings.validate().map_err(Diagnostic::new)?;
        if self.blocks != blocks_run(settings) {
            return Err(Diagnostic::new(format!(
                "{} of the run's {} blocks were merged",
                self.blocks,
                blocks_run(settings)
            )));
        }
        self.run.paths = paths_run(settings);
        self.run.finish(started)
    }
}

/// One block's result as 64-bit words, in this order: the sample count, means and
/// co-moment matrix (row by row) of the payoff and its controls; the same three of the
/// payoff per single path; the paths ending on each event date; the discounted sum paid on
/// each payment date; the largest sum of one `pay` and its site; then, only if some amount
/// was not finite, the count of such paths per `pay` site. Numbers are the bits of their
/// IEEE 754 double, counts are integers.
pub fn to_words(b: &BlockResult) -> Vec<u64> {
    let mut w = Vec::new();
    for m in [&b.moments, &b.raw] {
        let (n, mean, m2) = m.parts();
        w.push(n.to_bits());
        w.extend(mean.iter().chain(m2).map(|x| x.to_bits()));
    }
    w.extend(b.ended.iter().chain(&b.paid).map(|x| x.to_bits()));
    w.push(b.largest.0.to_bits());
    w.push(u64::from(b.largest.1));
    w.extend(&b.bad_paths);
    w
}

/// The block result [`to_words`] gave, for a program of this shape; an error says what
/// does not fit.
pub fn from_words(words: &[u64], shape: &Shape) -> Result<BlockResult, String> {
    let fixed = shape.words();
    let counted = shape.sites + shape.conditions;
    if words.len() != fixed && words.len() != fixed + counted {
        return Err(format!(
            "a block holds {} numbers where this payoff's blocks hold {fixed} (or {})",
            words.len(),
            fixed + counted
        ));
    }
    let mut at = 0;
    let mut take = |k: usize| {
        let s = &words[at..at + k];
        at += k;
        s
    };
    let floats = |s: &[u64]| s.iter().map(|&x| f64::from_bits(x)).collect::<Vec<f64>>();
    let d = shape.dims;
    let n = f64::from_bits(take(1)[0]);
    let (mean, m2) = (floats(take(d)), floats(take(d * d)));
    let moments = Moments::from_parts(n, mean, m2).ok_or("bad moments")?;
    let rn = f64::from_bits(take(1)[0]);
    let (rmean, rm2) = (floats(take(1)), floats(take(1)));
    let raw = Moments::from_parts(rn, rmean, rm2).ok_or("bad moments")?;
    let ended = floats(take(shape.events));
    let paid = floats(take(shape.payments));
    let size = f64::from_bits(take(1)[0]);
    let site = take(1)[0];
    let site = u32::try_from(site).ok().filter(|&s| (s as usize) < shape.sites.max(1)).ok_or_else(|| {
        format!("a block names `pay` number {site}, but the payoff has {} `pay` statements", shape.sites)
    })?;
    let bad_paths = take(words.len() - fixed).to_vec();
    Ok(BlockResult { moments, raw, ended, paid, bad_paths, largest: (size, site) })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn parts_tile_the_blocks_in_order() {
        for blocks in [1u64, 2, 7, 16, 40, 1001] {
            for n in 1..=blocks.min(20) {
                let mut next = 0;
                for k in 1..=n {
                    let r = part_blocks(blocks, k, n);
                    assert_eq!(r.start, next, "blocks {blocks}, part {k}/{n}");
                    assert!(r.end > r.start, "no part is empty when n ≤ blocks");
                    next = r.end;
                }
                assert_eq!(next, blocks);
            }
        }
    }

    /// Why a partial result keeps every block: merging the totals of two parts is not the
    /// sequence of merges of the full run, and its bits differ.
    #[test]
    fn merging_part_totals_is_not_the_full_runs_sequence() {
        let block = |b: u32| {
            let x: Vec<f64> = (0..128).map(|i| (f64::from(b * 128 + i) * 0.618).sin() * 1e4 + 9e5).collect();
            let mut r = BlockResult::new(1, 0, 1);
            r.moments = Moments::of_columns(&[&x]);
            r.raw = Moments::of_columns(&[&x]);
            r.paid = vec![super::super::stats::sum(&x)];
            r
        };
        let blocks: Vec<BlockResult> = (0..8).map(block).collect();
        let mut full = BlockResult::new(1, 0, 1);
        blocks.iter().for_each(|b| full.merge(b));
        let (mut first, mut second) = (BlockResult::new(1, 0, 1), BlockResult::new(1, 0, 1));
        blocks[..4].iter().for_each(|b| first.merge(b));
        blocks[4..].iter().for_each(|b| second.merge(b));
        first.merge(&second);
        assert_ne!(to_words(&first), to_words(&full));
    }

    #[test]
    fn words_round_trip_bit_for_bit() {
        let shape = Shape { dims: 2, events: 2, payments: 1, sites: 3, conditions: 0 };
        let odd = [f64::NAN, -0.0, f64::INFINITY, 1e-310, 0.1 + 0.2];
        let mut b = BlockResult::new(2, 2, 1);
        b.moments = Moments::from_parts(128.0, vec![odd[0], odd[1]], vec![odd[2], odd[3], odd[4], 1.0]).unwrap();
        b.raw = Moments::from_parts(256.0, vec![std::f64::consts::PI], vec![f64::MIN_POSITIVE]).unwrap();
        b.ended = vec![3.0, 253.0];
        b.paid = vec![-1.5e300];
        b.largest = (f64::INFINITY, 2);
        for bad in [vec![], vec![0, 5, 1]] {
            b.bad_paths = bad;
            let back = from_words(&to_words(&b), &shape).unwrap();
            assert_eq!(to_words(&back), to_words(&b));
            assert_eq!(back.moments.parts().1[0].to_bits(), f64::NAN.to_bits());
            assert_eq!(back.bad_paths, b.bad_paths);
        }
        assert!(from_words(&to_words(&b)[1..], &shape).is_err());
    }
}
