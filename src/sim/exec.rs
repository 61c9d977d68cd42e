//! Runs a compiled program over one block of paths.
//!
//! Every operation is a tight loop over the block's lanes (one lane per path), so the
//! match on the operation is paid once per block and the loops vectorise. Masks are
//! registers holding 1 or 0 per lane: a statement under `if` runs on all lanes and only
//! writes where its mask is 1.

use rand_pcg::Pcg64;

use super::condition::{self, Condition};
use super::pack::Packing;
use super::paths::{Controls, Model, PathBuffers};
use super::rule;
use super::sobol::Qmc;
use super::stats::{sum, sums, BlockResult, Moments};
use super::{Settings, BLOCK};
use crate::compile::{Acc, Bin, Op, Program, Src, Un, ALIVE};
use crate::typing::{max_or_nan, min_or_nan};

/// One worker's buffers, reused block after block.
pub struct Workspace {
    paths: PathBuffers,
    regs: Vec<Vec<f64>>,
    monitors: Vec<Vec<f64>>,
    path_values: Vec<Vec<f64>>,
    pv: Vec<f64>,
    /// Scratch lanes: one payment's amounts, or the lanes one `end` closes.
    paid: Vec<f64>,
    /// Scratch lanes: the lanes a redemption closes (its amounts are in `paid`).
    gone: Vec<f64>,
    columns: Vec<Vec<f64>>,
    /// The lanes an early-exercise decision reads (`may end`).
    choice: rule::Lanes,
    /// Per lane, the grid index from which the path is known to have ended (the last
    /// grid index while it runs on); kept only when the controls ask for it.
    stop: Vec<f64>,
    /// A quasi-random sampler's normals for one block, and its scratch (allocated on
    /// first use).
    given: Vec<f64>,
    qmc_scratch: Vec<f64>,
    /// Whether the block's paths are stepped date by date as the operations read them,
    /// only while they run ([`stops_early`]); per operation, the last grid index it reads
    /// and, for an `end`, the grid index of its own date; per lane, the grid index of the
    /// date it ended on (infinite while it runs).
    stops_early: bool,
    reads_to: Vec<usize>,
    /// Per operation, the condition whose chain of operations starts there.
    conditions: Vec<Option<Condition>>,
    /// Whether a payment and the end of the same paths run as one pass ([`Self::redeem`];
    /// a test runs them one by one).
    redeems: bool,
    end_dates: Vec<usize>,
    ended_at: Vec<f64>,
    /// While paths are stepped as they run: the lanes the operations ran over last (the
    /// paths that ended were packed behind them), and what a packing moves where.
    active: usize,
    packing: Packing,
    /// Whether to pack, from the lanes, the running ones and the steps left
    /// ([`worth_packing`]; a test packs always or never).
    packs: fn(usize, usize, usize) -> bool,
    /// Per operation index where the paths may be stepped (and at the end), what a
    /// packing there moves.
    plans: Vec<Option<Plan>>,
}

/// What packing the running paths before an operation moves, besides the payoff and
/// where each path ended: the registers still to be read, and per grid index whether
/// its levels are.
struct Plan {
    registers: Vec<usize>,
    dates: Vec<bool>,
}

/// Whether a program's paths can stop being simulated once they end: it has an `end` that
/// can come before its last date, nothing reads a path between dates or after its end
/// (no continuously monitored window, value along the path, early-exercise rule, log
/// levels, or control other than the stopped hedges and the last date's levels, which a
/// stopped path is given by one exact step; no dated digitals, which read every date),
/// and no operation before an `end` reads a date after the `end`'s own ([`end_dates`]).
pub fn stops_early(p: &Program, controls: &Controls) -> bool {
    let ends_early = p.ops.iter().any(|op| matches!(op, Op::End { mask, .. } if *mask != ALIVE));
    ends_early
        && p.monitors.is_empty()
        && p.path_values.is_empty()
        && p.choices.is_empty()
        && !controls.needs_logs()
        && !controls.reads_every_date()
        && p.grid.len() > 1
        && end_dates(p).is_some()
}

/// Per grid index, whether anything reads the levels of that date (not only their logs):
/// an operation, an exercise rule's variables, a control, a barrier or a value read
/// between dates (those last two: every date, to be safe).
fn levels_read(p: &Program, controls: &Controls) -> Vec<bool> {
    let na = p.assets.len().max(1);
    let n = p.grid.len();
    if controls.tracks_ends() || !p.monitors.is_empty() || !p.path_values.is_empty() {
        return vec![true; n];
    }
    let mut read = vec![false; n];
    let choice_reads = p.choices.iter().flat_map(|c| c.using.iter().copied());
    for src in p.ops.iter().flat_map(|op| op.sources()).chain(choice_reads) {
        if let Src::Level(k) = src {
            read[(k as usize / na).min(n - 1)] = true;
        }
    }
    if controls.reads_last_date() {
        read[n - 1] = true;
    }
    read
}

/// The last grid index each operation reads (0 when it reads no level).
fn reads_to(p: &Program) -> Vec<usize> {
    let na = p.assets.len().max(1);
    p.ops
        .iter()
        .map(|op| {
            op.sources()
                .filter_map(|src| match src {
                    Src::Level(k) | Src::LogLevel(k) => Some(k as usize / na),
                    _ => None,
                })
                .max()
                .unwrap_or(0)
        })
        .collect()
}

/// Per operation, for an `end`, the grid index of its own date (0 for other operations);
/// `None` when an operation before an `end` reads a later date than the `end`'s.
///
/// Then every `end` of a date before `t` comes before every read of `t` or later, so the
/// paths stepped to `t` are exactly those that did not end on an earlier date, whatever
/// the order the operations are written in: two writings of one payoff draw the same.
fn end_dates(p: &Program) -> Option<Vec<usize>> {
    let reads = reads_to(p);
    let last = p.grid.len().saturating_sub(1);
    let mut read = 0;
    let mut dates = Vec::with_capacity(p.ops.len());
    for (op, &to) in p.ops.iter().zip(&reads) {
        read = read.max(to);
        let date = match op {
            Op::End { slot, .. } => {
                let time = p.events[*slot as usize].time;
                let own = p.grid.iter().position(|&g| (g - time).abs() < 1e-12).unwrap_or(last);
                if read > own {
                    return None;
                }
                own
            }
            _ => 0,
        };
        dates.push(date);
    }
    Some(dates)
}

/// What stepping the paths as the operations read them needs (their normals are the
/// block's, in the path buffers).
struct Stepping<'a> {
    model: &'a Model,
}

/// Where a block's normals come from when they are quasi-random: randomisation `r` of a
/// Sobol run, from point `first` on.
#[derive(Clone, Copy)]
pub struct Points<'a> {
    pub qmc: &'a Qmc,
    pub r: usize,
    pub first: u32,
}

/// An operand resolved for one block: a lane slice or one value for all lanes.
#[derive(Clone, Copy)]
enum Arg<'a> {
    Lanes(&'a [f64]),
    Same(f64),
}

impl Workspace {
    pub fn new(p: &Program, model: &Model, controls: &Controls) -> Self {
        let reads_logs = p.ops.iter().any(|op| op.sources().any(|s| matches!(s, Src::LogLevel(_))));
        let keep_logs = reads_logs || !p.monitors.is_empty() || !p.path_values.is_empty() || controls.needs_logs();
        let mut paths = PathBuffers::new(p, model, keep_logs, BLOCK);
        paths.compute_levels_on(levels_read(p, controls));
        let stops_early = stops_early(p, controls);
        paths.steps_running_lanes(stops_early);
        let reads_to = reads_to(p);
        Workspace {
            paths,
            regs: vec![vec![0.0; BLOCK]; p.registers],
            monitors: vec![vec![0.0; BLOCK]; p.monitors.len()],
            path_values: vec![vec![0.0; BLOCK]; p.path_values.len()],
            pv: vec![0.0; BLOCK],
            paid: vec![0.0; BLOCK],
            gone: vec![0.0; BLOCK],
            columns: vec![vec![0.0; BLOCK]; 1 + controls.len()],
            choice: rule::Lanes::new(p.choices.iter().map(|c| c.using.len()).max().unwrap_or(0), BLOCK),
            stop: vec![0.0; BLOCK],
            given: Vec::new(),
            qmc_scratch: Vec::new(),
            stops_early,
            conditions: condition::conditions(p, &reads_to),
            reads_to,
            redeems: true,
            end_dates: end_dates(p).unwrap_or_default(),
            ended_at: vec![f64::INFINITY; BLOCK],
            active: BLOCK,
            packing: Packing::default(),
            packs: worth_packing,
            plans: if stops_early { plans(p, controls) } else { Vec::new() },
        }
    }

    /// Simulates every path to the last date, also those that end early: the normals a
    /// path draws then never depend on which others have ended, as common random numbers
    /// across scenarios need (a bumped scenario's paths end on other dates).
    pub fn simulate_whole_paths(&mut self) {
        self.stops_early = false;
        self.paths.steps_running_lanes(false);
        self.plans.clear();
    }

    /// The discounted payoff of each lane of the last block run, in lane order.
    pub fn payoffs(&self) -> &[f64] {
        &self.pv
    }

    /// The samples of the last block run (a path, or the mean of an antithetic pair; the
    /// block's first `units` entries of each): the discounted payoff, then each control.
    pub fn samples(&self) -> &[Vec<f64>] {
        &self.columns
    }

    /// What the last block's recorded early-exercise date kept ([`rule::Lanes`]).
    pub fn recorded(&self) -> &rule::Lanes {
        &self.choice
    }

    /// Simulates block `index` (of `lanes` paths) and returns its statistics.
    pub fn run_block(
        &mut self,
        p: &Program,
        model: &Model,
        controls: &Controls,
        settings: &Settings,
        index: u64,
        lanes: usize,
    ) -> BlockResult {
        self.run_block_from(p, model, controls, settings, index, lanes, None)
    }

    /// [`Workspace::run_block`], with the normals from `points` when given (block
    /// `index` still seeds the stream of everything else the block draws).
    #[allow(clippy::too_many_arguments)]
    pub fn run_block_from(
        &mut self,
        p: &Program,
        model: &Model,
        controls: &Controls,
        settings: &Settings,
        index: u64,
        lanes: usize,
        points: Option<Points<'_>>,
    ) -> BlockResult {
        let mut result = BlockResult::new(0, 0, 0);
        self.run_block_into(p, model, controls, settings, index, lanes, points, &mut result);
        result
    }

    /// [`Workspace::run_block_from`], writing the block's statistics over `result`
    /// (whatever it held): the same bits, and no allocation once `result` has held a
    /// block of this program.
    #[allow(clippy::too_many_arguments)]
    pub fn run_block_into(
        &mut self,
        p: &Program,
        model: &Model,
        controls: &Controls,
        settings: &Settings,
        index: u64,
        lanes: usize,
        points: Option<Points<'_>>,
        result: &mut BlockResult,
    ) {
        let mut rng = block_rng(settings.seed, index);
        let drawn = if settings.antithetic { lanes / 2 } else { lanes };
        let given = match points {
            Some(pt) => {
                let cells = p.grid.len().saturating_sub(1) * p.assets.len() * BLOCK;
                if self.given.len() < cells {
                    self.given = vec![0.0; cells];
                }
                pt.qmc.fill(pt.r, pt.first, drawn, BLOCK, &mut rng, &mut self.given, &mut self.qmc_scratch);
                Some(&self.given[..])
            }
            None => None,
        };
        let antithetic = settings.antithetic;
        // Antithetic pairs seldom both end early (the mirror of a path that redeems
        // tends not to), so pairs are simulated to the end.
        let early = self.stops_early && given.is_none() && !antithetic;
        if early {
            self.paths.start(p, model, &mut rng, lanes, BLOCK);
        } else {
            self.paths.generate(p, model, &mut rng, lanes, antithetic, BLOCK, given);
            self.paths.monitors(p, model, lanes, BLOCK, &mut self.monitors);
            if !p.path_values.is_empty() {
                self.paths.path_values(p, model, &mut rng, lanes, antithetic, BLOCK, &mut self.path_values);
            }
        }
        result.reset(self.columns.len(), p.events.len(), p.payments.len());
        let stepping = early.then_some(Stepping { model });
        self.execute(p, controls, lanes, result, stepping);
        if early {
            // The paths still running go on to the last date; the others get their last
            // level by one step when a control reads it.
            let last = p.grid.len() - 1;
            self.advance(p, controls, model, p.ops.len(), last, self.active, lanes);
            if controls.reads_last_date() {
                self.paths.jump_stopped_to_last(p, model, lanes, BLOCK);
            }
        }
        // Paths still alive after the last operation end on the last run date.
        if let Some(last) = p.events.len().checked_sub(1) {
            result.ended[last] += sum(&self.regs[ALIVE as usize][..lanes]);
        }
        controls.fill(p, &self.paths, &self.stop, &mut rng, lanes, BLOCK, &mut self.columns[1..]);
        // An antithetic pair is one sample: the mean of its two paths.
        let units = if settings.antithetic { lanes / 2 } else { lanes };
        if settings.antithetic {
            // The payoff's column is read from the lanes directly: no copy first.
            let (first, mirror) = self.pv[..2 * units].split_at(units);
            for ((x, a), b) in self.columns[0][..units].iter_mut().zip(first).zip(mirror) {
                *x = 0.5 * (a + b);
            }
            for col in &mut self.columns[1..] {
                let (first, mirror) = col[..2 * units].split_at_mut(units);
                for (x, y) in first.iter_mut().zip(&*mirror) {
                    *x = 0.5 * (*x + y);
                }
            }
        } else {
            self.columns[0][..lanes].copy_from_slice(&self.pv[..lanes]);
        }
        // The column slices, on the stack unless there are many controls.
        const ON_STACK: usize = 8;
        let mut on_stack: [&[f64]; ON_STACK] = [&[]; ON_STACK];
        let on_heap: Vec<&[f64]>;
        let cols = if self.columns.len() <= ON_STACK {
            for (c, col) in on_stack.iter_mut().zip(&self.columns) {
                *c = &col[..units];
            }
            &on_stack[..self.columns.len()]
        } else {
            on_heap = self.columns.iter().map(|c| &c[..units]).collect();
            &on_heap[..]
        };
        if settings.antithetic {
            // The raw moments are over the paths, the others over the pairs: two batches.
            Moments::fill_two(&mut result.moments, cols, &mut result.raw, &[&self.pv[..lanes]]);
        } else {
            // Without pairs a sample is a path: the payoff's column holds the lanes, and
            // its moments are the raw moments, computed by the same sums.
            result.moments.fill_from_columns(cols);
            result.raw.copy_first(&result.moments);
        }
    }

    /// Runs the program's operations over the block's lanes; with AVX2 when the CPU has
    /// it. The operations are additions, multiplications, divisions, comparisons, selects
    /// and library calls, never fused: the same bits either way.
    fn execute(
        &mut self,
        p: &Program,
        controls: &Controls,
        lanes: usize,
        result: &mut BlockResult,
        stepping: Option<Stepping<'_>>,
    ) {
        #[cfg(target_arch = "x86_64")]
        {
            if super::wide_lanes() {
                // SAFETY: the CPU has just been checked for these AVX-512 subsets.
                unsafe { self.execute_avx512(p, controls, lanes, result, stepping) };
                return;
            }
            if std::is_x86_feature_detected!("avx2") {
                // SAFETY: the CPU has just been checked for AVX2.
                unsafe { self.execute_avx2(p, controls, lanes, result, stepping) };
                return;
            }
        }
        self.execute_generic(p, controls, lanes, result, stepping);
    }

    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2")]
    unsafe fn execute_avx2(
        &mut self,
        p: &Program,
        controls: &Controls,
        lanes: usize,
        result: &mut BlockResult,
        stepping: Option<Stepping<'_>>,
    ) {
        self.execute_generic(p, controls, lanes, result, stepping);
    }

    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx512f,avx512dq,avx512vl")]
    unsafe fn execute_avx512(
        &mut self,
        p: &Program,
        controls: &Controls,
        lanes: usize,
        result: &mut BlockResult,
        stepping: Option<Stepping<'_>>,
    ) {
        self.execute_generic(p, controls, lanes, result, stepping);
    }

    #[inline(always)]
    fn execute_generic(
        &mut self,
        p: &Program,
        controls: &Controls,
        lanes: usize,
        result: &mut BlockResult,
        mut stepping: Option<Stepping<'_>>,
    ) {
        self.regs[ALIVE as usize][..lanes].fill(1.0);
        if controls.tracks_ends() {
            self.stop[..lanes].fill((p.grid.len() - 1) as f64);
        }
        for (s, init) in p.states.iter().enumerate() {
            self.regs[1 + s][..lanes].fill(*init);
        }
        self.pv[..lanes].fill(0.0);
        self.choice.recorded = false;
        let early = stepping.is_some();
        if early {
            self.ended_at[..lanes].fill(f64::INFINITY);
        }
        // The lanes the operations run over: all of them, unless paths that ended are
        // packed away behind the running ones (which only happens when stepping them
        // as they run).
        let all = lanes;
        let mut lanes = lanes;
        let conditions = std::mem::take(&mut self.conditions);
        let mut next = 0;
        while let Some(op) = p.ops.get(next) {
            let index = next;
            if let Some(st) = &mut stepping {
                let to = self.reads_to[index];
                if to > self.paths.stepped() {
                    lanes = self.advance(p, controls, st.model, index, to, lanes, all);
                }
            }
            if let Some(c) = &conditions[index] {
                self.condition(c, lanes);
                next += c.len;
                continue;
            }
            next += 1;
            match *op {
                Op::Bin { op, dst, a, b } => {
                    let mut out = std::mem::take(&mut self.regs[dst as usize]);
                    let (a, b) = (self.arg(a, lanes), self.arg(b, lanes));
                    binary(op, &mut out[..lanes], a, b);
                    self.regs[dst as usize] = out;
                }
                Op::Cmp { op, dst, a, b, site } => {
                    let mut out = std::mem::take(&mut self.regs[dst as usize]);
                    let (a, b) = (self.arg(a, lanes), self.arg(b, lanes));
                    binary(op, &mut out[..lanes], a, b);
                    // A comparison with a value that is not a number has no answer; count
                    // the paths so the run is refused instead of taking the `else` side.
                    // A path that has ended is not counted: nothing it decides is paid
                    // (and once ended it may not be simulated further).
                    let bad = not_a_number(a, lanes) | not_a_number(b, lanes);
                    if bad {
                        let alive = &self.regs[ALIVE as usize][..lanes];
                        let count = (0..lanes)
                            .filter(|&i| alive[i] != 0.0 && (at(a, i).is_nan() || at(b, i).is_nan()))
                            .count() as u64;
                        let sites = p.pay_sites.len() + p.condition_sites.len();
                        result.note_bad(p.pay_sites.len() + site as usize, sites, count);
                    }
                    self.regs[dst as usize] = out;
                }
                Op::Un { op, dst, a } => {
                    let mut out = std::mem::take(&mut self.regs[dst as usize]);
                    unary(op, &mut out[..lanes], self.arg(a, lanes));
                    self.regs[dst as usize] = out;
                }
                Op::Select { dst, cond, a, b } => {
                    let mut out = std::mem::take(&mut self.regs[dst as usize]);
                    let (c, a, b) = (self.arg(cond, lanes), self.arg(a, lanes), self.arg(b, lanes));
                    select(&mut out[..lanes], c, a, b);
                    self.regs[dst as usize] = out;
                }
                Op::Acc { op, dst, src } => {
                    if src == Src::Reg(dst) {
                        continue;
                    }
                    let mut out = std::mem::take(&mut self.regs[dst as usize]);
                    let s = self.arg(src, lanes);
                    let out_l = &mut out[..lanes];
                    match op {
                        Acc::Add => apply2(out_l, s, |x, y| x + y),
                        Acc::Min => keep_or_take(out_l, None, s, Keep::Lower),
                        Acc::Max => keep_or_take(out_l, None, s, Keep::Higher),
                    }
                    self.regs[dst as usize] = out;
                }
                Op::Copy { dst, src } => {
                    if src == Src::Reg(dst) {
                        continue;
                    }
                    let mut out = std::mem::take(&mut self.regs[dst as usize]);
                    match self.arg(src, lanes) {
                        Arg::Lanes(s) => out[..lanes].copy_from_slice(s),
                        Arg::Same(x) => out[..lanes].fill(x),
                    }
                    self.regs[dst as usize] = out;
                }
                Op::Assign { dst, mask, src } => {
                    if src == Src::Reg(dst) {
                        continue;
                    }
                    let mut out = std::mem::take(&mut self.regs[dst as usize]);
                    let s = self.arg(src, lanes);
                    let m = &self.regs[mask as usize][..lanes];
                    keep_or_take(&mut out[..lanes], Some(m), s, Keep::Unmasked);
                    self.regs[dst as usize] = out;
                }
                Op::Pay { mask, amount, slot, discount, site } => {
                    // A payment to the paths that end just after (a redemption): one pass.
                    if let Some(&Op::End { mask: ends, slot: end_slot }) = p.ops.get(next) {
                        if ends == mask && mask != ALIVE && self.redeems {
                            let end = End { slot: end_slot, index: next, early };
                            self.redeem(
                                p,
                                controls,
                                Payment { mask, amount, slot, discount, site },
                                end,
                                lanes,
                                result,
                            );
                            next += 1;
                            continue;
                        }
                    }
                    // Branch-free over lanes: the discounted amount where the mask is set,
                    // else 0, kept in `paid` for the total.
                    let (mut paid, mut pvs) = (std::mem::take(&mut self.paid), std::mem::take(&mut self.pv));
                    let a = self.arg(amount, lanes);
                    let m = &self.regs[mask as usize][..lanes];
                    let pay = |m: f64, a: f64, _: f64| if m != 0.0 { a * discount } else { 0.0 };
                    match a {
                        Arg::Lanes(a) => lanes3(&mut paid[..lanes], m, a, pay),
                        Arg::Same(x) => lanes3(&mut paid[..lanes], m, x, pay),
                    }
                    for (pv, v) in pvs[..lanes].iter_mut().zip(&paid[..lanes]) {
                        *pv += v;
                    }
                    let total = sum(&paid[..lanes]);
                    book(p, result, &paid[..lanes], total, slot, site);
                    (self.paid, self.pv) = (paid, pvs);
                }
                Op::End { mask, slot } => {
                    let mut alive = std::mem::take(&mut self.regs[ALIVE as usize]);
                    let ended;
                    if mask == ALIVE {
                        ended = sum(&alive[..lanes]);
                        if early {
                            let own = self.end_dates[index] as f64;
                            // A lane alive has not ended (+∞): the minimum puts its date.
                            // (Written as `if alive { own } else { e }`, the loop becomes
                            // a masked store, slow on some CPUs.)
                            for (e, a) in self.ended_at[..lanes].iter_mut().zip(&alive[..lanes]) {
                                *e = e.min(if *a != 0.0 { own } else { f64::INFINITY });
                            }
                        }
                        if let Some(from) = controls.end_known_from(index) {
                            for (s, a) in self.stop[..lanes].iter_mut().zip(&alive[..lanes]) {
                                *s = s.min(if *a != 0.0 { from } else { f64::INFINITY });
                            }
                        }
                        alive[..lanes].fill(0.0);
                    } else {
                        let m = &self.regs[mask as usize][..lanes];
                        let mut gone = std::mem::take(&mut self.paid);
                        // Selects, not branches (which lanes end is random): `&` evaluates
                        // both sides, and the loops vectorise.
                        for (i, (a, g)) in alive[..lanes].iter_mut().zip(gone[..lanes].iter_mut()).enumerate() {
                            let end = (m[i] != 0.0) & (*a != 0.0);
                            *g = flag(end);
                            *a *= flag(!end);
                        }
                        ended = sum(&gone[..lanes]);
                        self.note_ends(controls, &gone[..lanes], End { slot, index, early });
                        self.paid = gone;
                    }
                    result.ended[slot as usize] += ended;
                    self.regs[ALIVE as usize] = alive;
                }
                Op::Choose { site, mask, amount, discount, dst } => {
                    let choice = &p.choices[site as usize];
                    let mut lanes_in = std::mem::take(&mut self.choice);
                    for (row, &src) in lanes_in.vars.iter_mut().zip(&choice.using) {
                        fill(&mut row[..lanes], self.arg(src, lanes));
                    }
                    fill(&mut lanes_in.amount[..lanes], self.arg(amount, lanes));
                    let mut out = std::mem::take(&mut self.regs[dst as usize]);
                    let (m, alive) = (&self.regs[mask as usize][..lanes], &self.regs[ALIVE as usize][..lanes]);
                    rule::decide(choice, discount, m, alive, &self.pv[..lanes], &mut lanes_in, &mut out[..lanes]);
                    self.regs[dst as usize] = out;
                    self.choice = lanes_in;
                }
            }
        }
        self.conditions = conditions;
        self.active = lanes;
    }

    /// Runs a condition's chain of operations in one pass ([`condition`]).
    fn condition(&mut self, c: &Condition, lanes: usize) {
        let mut out = std::mem::take(&mut self.regs[c.dst as usize]);
        // Every lane of the block: the chain reads whole chunks of lanes.
        let lanes_of = |src: Src| match self.arg(src, BLOCK) {
            Arg::Lanes(s) => s,
            Arg::Same(_) => unreachable!("a condition's sources are lanes"),
        };
        let mut terms: [&[f64]; condition::MOST_TERMS] = [&[]; condition::MOST_TERMS];
        for (t, s) in terms.iter_mut().zip(&c.terms) {
            *t = lanes_of(s.0);
        }
        condition::run(c, &mut out[..lanes], &terms[..c.terms.len()], c.mask.map(lanes_of));
        self.regs[c.dst as usize] = out;
    }

    /// Records where the lanes `gone` flags end: their date when the paths are stepped as
    /// they run, and where the controls learn the product's end.
    #[inline(always)]
    fn note_ends(&mut self, controls: &Controls, gone: &[f64], end: End) {
        let lanes = gone.len();
        if end.early {
            let own = self.end_dates[end.index] as f64;
            for (e, g) in self.ended_at[..lanes].iter_mut().zip(gone) {
                *e = e.min(if *g != 0.0 { own } else { f64::INFINITY });
            }
        }
        if let Some(from) = controls.end_known_from(end.index) {
            for (s, g) in self.stop[..lanes].iter_mut().zip(gone) {
                *s = s.min(if *g != 0.0 { from } else { f64::INFINITY });
            }
        }
    }

    /// A payment and the end of the paths it is paid on (`pay ...` then `end` under one
    /// mask): the amounts, the present values, the alive flags and the lanes that end
    /// in one pass, then both totals in another. The arithmetic of the two operations.
    #[inline(always)]
    fn redeem(
        &mut self,
        p: &Program,
        controls: &Controls,
        pay: Payment,
        end: End,
        lanes: usize,
        result: &mut BlockResult,
    ) {
        let (mut paid, mut pvs, mut gone) =
            (std::mem::take(&mut self.paid), std::mem::take(&mut self.pv), std::mem::take(&mut self.gone));
        let mut alive = std::mem::take(&mut self.regs[ALIVE as usize]);
        let m = &self.regs[pay.mask as usize][..lanes];
        let out = Redeemed {
            alive: &mut alive[..lanes],
            gone: &mut gone[..lanes],
            paid: &mut paid[..lanes],
            pv: &mut pvs[..lanes],
        };
        match self.arg(pay.amount, lanes) {
            Arg::Lanes(a) => redeem_lanes(m, a, pay.discount, out),
            Arg::Same(x) => redeem_lanes(m, x, pay.discount, out),
        }
        let (total, ended) = sums(&paid[..lanes], &gone[..lanes]);
        book(p, result, &paid[..lanes], total, pay.slot, pay.site);
        self.note_ends(controls, &gone[..lanes], end);
        result.ended[end.slot as usize] += ended;
        (self.paid, self.pv, self.gone) = (paid, pvs, gone);
        self.regs[ALIVE as usize] = alive;
    }

    /// Steps the paths still running among the first `lanes` to grid index `to`, for the
    /// operations from `index` on; first, when enough of those lanes need no further step
    /// (they ended on a date already stepped to), packs the others into the lowest lanes.
    /// Returns how many lanes the operations run over from here (of `all` in the block).
    #[allow(clippy::too_many_arguments)]
    fn advance(
        &mut self,
        p: &Program,
        controls: &Controls,
        model: &Model,
        index: usize,
        to: usize,
        lanes: usize,
        all: usize,
    ) -> usize {
        let running = self.packing.plan(&self.ended_at[..lanes], self.paths.stepped() as f64);
        let lanes = if (self.packs)(lanes, running, p.grid.len() - 1 - self.paths.stepped()) {
            self.pack(p, controls, index, lanes);
            running
        } else {
            lanes
        };
        let from = self.paths.stepped();
        self.paths.step_running_to(p, model, to, &self.ended_at[..lanes], lanes, BLOCK);
        if lanes < all && !controls.is_empty() {
            // Controls read every lane's levels, the packed-away lanes' too.
            self.paths.carry(p, from, to, lanes..all, BLOCK);
        }
        lanes
    }

    /// Moves the running paths among the first `lanes` to the lowest lanes, in lane
    /// order, and those that ended behind them: what is read of a running lane from
    /// operation `index` on moves with it (the registers still to be read, its levels),
    /// and what is read of every lane after the last operation moves with all of them
    /// (the payoff, the alive flags, and for the controls where each path ended and its
    /// levels). The operations and the steps then run over the running lanes alone.
    fn pack(&mut self, p: &Program, controls: &Controls, index: usize, lanes: usize) {
        let running = self.packing.running();
        let plan = self.plans[index].as_ref().expect("a plan at every operation that steps the paths");
        for &r in &plan.registers {
            self.packing.front(&mut self.regs[r]);
        }
        // The lanes behind have ended: their alive flag is 0 (it is read over every lane
        // after the last operation), and nothing reads where they ended any more.
        self.regs[ALIVE as usize][running..lanes].fill(0.0);
        self.packing.front(&mut self.ended_at);
        self.packing.all(&mut self.pv);
        if controls.tracks_ends() {
            self.packing.all(&mut self.stop);
        }
        // The controls read every lane's levels; without them only the operations read
        // levels, of the running lanes.
        self.paths.pack(p, &mut self.packing, !controls.is_empty(), &plan.dates, BLOCK);
    }

    fn arg(&self, src: Src, lanes: usize) -> Arg<'_> {
        match src {
            Src::Reg(r) => Arg::Lanes(&self.regs[r as usize][..lanes]),
            Src::Level(k) => {
                let start = k as usize * BLOCK;
                Arg::Lanes(&self.paths.levels[start..start + lanes])
            }
            Src::LogLevel(k) => {
                let start = k as usize * BLOCK;
                Arg::Lanes(&self.paths.logs[start..start + lanes])
            }
            Src::Const(x) => Arg::Same(x),
            Src::Monitor(m) => Arg::Lanes(&self.monitors[m as usize][..lanes]),
            Src::Path(v) => Arg::Lanes(&self.path_values[v as usize][..lanes]),
        }
    }
}

/// A `pay` operation's fields.
#[derive(Clone, Copy)]
struct Payment {
    mask: u32,
    amount: Src,
    slot: u32,
    discount: f64,
    site: u32,
}

/// An `end` operation: its event slot, its place among the operations, and whether the
/// paths are stepped as they run (then each lane's end date is kept).
#[derive(Clone, Copy)]
struct End {
    slot: u32,
    index: usize,
    early: bool,
}

/// The lanes a redemption writes.
struct Redeemed<'a> {
    alive: &'a mut [f64],
    gone: &'a mut [f64],
    paid: &'a mut [f64],
    pv: &'a mut [f64],
}

/// One pass of a redemption over the lanes of mask `m`: the discounted amount where it is
/// set (else 0) paid and added to the present value, and the lanes alive there ended.
/// Selects, not branches: which lanes are set is random.
#[inline(always)]
fn redeem_lanes(m: &[f64], amount: impl Lane, discount: f64, out: Redeemed<'_>) {
    let n = m.len();
    let (alive, gone, paid, pv) = (&mut out.alive[..n], &mut out.gone[..n], &mut out.paid[..n], &mut out.pv[..n]);
    for i in 0..n {
        let set = m[i] != 0.0;
        let v = if set { amount.lane(i) * discount } else { 0.0 };
        paid[i] = v;
        pv[i] += v;
        let ends = set & (alive[i] != 0.0);
        gone[i] = flag(ends);
        alive[i] *= flag(!ends);
    }
}

/// Adds a payment's total over the block to the result, noting its size and, when the
/// total is not a finite number, the paths whose amount was not.
fn book(p: &Program, result: &mut BlockResult, paid: &[f64], total: f64, slot: u32, site: u32) {
    result.paid[slot as usize] += total;
    result.note_total(total, site);
    // A non-finite amount makes the total non-finite; only then look closer (a total of
    // finite amounts can also overflow).
    if !total.is_finite() {
        let bad = paid.iter().filter(|v| !v.is_finite()).count() as u64;
        if bad > 0 {
            let sites = p.pay_sites.len() + p.condition_sites.len();
            result.note_bad(site as usize, sites, bad);
        }
    }
}

/// Whether packing the running paths of `lanes` (of which `running` still run) is worth
/// its moves, with `steps` grid steps left: a few moves per lane against the steps the
/// ended lanes would be taken through, once those add up to a step of every lane.
/// Measured on the yardstick's autocallable: packing whenever a lane has ended was 10%
/// slower, and at half or twice this bar no faster.
fn worth_packing(lanes: usize, running: usize, steps: usize) -> bool {
    let ended = lanes - running;
    ended > 0 && ended * steps >= lanes
}

/// The packing plans of a program whose paths are stepped as they run: one before each
/// operation that may step them (it reads a later date than any before it) and one after
/// the last operation, where the paths still running are stepped to the last date.
fn plans(p: &Program, controls: &Controls) -> Vec<Option<Plan>> {
    let reads = reads_to(p);
    let mut plans: Vec<Option<Plan>> = (0..=p.ops.len()).map(|_| None).collect();
    let mut read = 0;
    for (index, plan) in plans.iter_mut().enumerate() {
        let to = reads.get(index).copied().unwrap_or(usize::MAX);
        if to > read {
            read = to;
            *plan = Some(plan_at(p, controls, index));
        }
    }
    plans
}

/// What a packing before operation `index` moves. A register moves when an operation
/// from `index` on may read its value before another writes every lane of it, or when it
/// is read after the last operation (the alive flags); a date's levels move when a later
/// operation or a control reads them.
fn plan_at(p: &Program, controls: &Controls, index: usize) -> Plan {
    let mut live = vec![false; p.registers];
    let mut written = vec![false; p.registers];
    live[ALIVE as usize] = true;
    let na = p.assets.len().max(1);
    let mut dates = vec![!controls.is_empty(); p.grid.len()];
    for op in &p.ops[index..] {
        let mut reads: Vec<u32> = Vec::new();
        for src in op.sources() {
            match src {
                Src::Reg(r) => reads.push(r),
                Src::Level(k) | Src::LogLevel(k) => dates[k as usize / na] = true,
                _ => {}
            }
        }
        match *op {
            // These read their destination (or a mask) besides their sources.
            Op::Acc { dst, .. } => reads.push(dst),
            Op::Assign { dst, mask, .. } => reads.extend([dst, mask]),
            Op::Pay { mask, .. } | Op::End { mask, .. } | Op::Choose { mask, .. } => reads.push(mask),
            _ => {}
        }
        for r in reads {
            if !written[r as usize] {
                live[r as usize] = true;
            }
        }
        match *op {
            Op::Bin { dst, .. } | Op::Cmp { dst, .. } | Op::Un { dst, .. } | Op::Select { dst, .. } => {
                written[dst as usize] = true
            }
            Op::Copy { dst, src } if src != Src::Reg(dst) => written[dst as usize] = true,
            _ => {}
        }
    }
    let registers: Vec<usize> = (0..p.registers).filter(|&r| live[r]).collect();
    Plan { registers, dates }
}

/// The RNG of block `index`: PCG-64 with the seed spread over its state and the block
/// index as its stream, so blocks are independent and each is reproducible alone.
pub fn block_rng(seed: u64, index: u64) -> Pcg64 {
    let hi = splitmix64(seed);
    let lo = splitmix64(hi ^ 0x5851_f42d_4c95_7f2d);
    Pcg64::new((u128::from(hi) << 64) | u128::from(lo), u128::from(index))
}

fn splitmix64(mut x: u64) -> u64 {
    x = x.wrapping_add(0x9e37_79b9_7f4a_7c15);
    x = (x ^ (x >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
    x = (x ^ (x >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
    x ^ (x >> 31)
}

/// `out = a`, lane by lane.
fn fill(out: &mut [f64], a: Arg<'_>) {
    match a {
        Arg::Lanes(s) => out.copy_from_slice(s),
        Arg::Same(x) => out.fill(x),
    }
}

#[inline(always)]
fn at(a: Arg<'_>, i: usize) -> f64 {
    match a {
        Arg::Lanes(s) => s[i],
        Arg::Same(x) => x,
    }
}

/// A value per lane (a slice) or one for all lanes, read without a branch per lane, so
/// that loops generic over it vectorise.
trait Lane: Copy {
    fn lane(self, i: usize) -> f64;
}

impl Lane for &[f64] {
    #[inline(always)]
    fn lane(self, i: usize) -> f64 {
        self[i]
    }
}

impl Lane for f64 {
    #[inline(always)]
    fn lane(self, _: usize) -> f64 {
        self
    }
}

/// `out[i] = f(a[i], b[i], out[i])`.
#[inline(always)]
fn lanes3(out: &mut [f64], a: impl Lane, b: impl Lane, f: impl Fn(f64, f64, f64) -> f64) {
    for (i, o) in out.iter_mut().enumerate() {
        *o = f(a.lane(i), b.lane(i), *o);
    }
}

/// `out = if c then a else b`, one loop per kind of operand.
fn select(out: &mut [f64], c: Arg<'_>, a: Arg<'_>, b: Arg<'_>) {
    let n = out.len();
    let Arg::Lanes(c) = c else {
        // A constant condition picks one side for every lane.
        let pick = if at(c, 0) != 0.0 { a } else { b };
        match pick {
            Arg::Lanes(s) => out.copy_from_slice(&s[..n]),
            Arg::Same(x) => out.fill(x),
        }
        return;
    };
    let c = &c[..n];
    let f = |c: f64, a: f64, b: f64| if c != 0.0 { a } else { b };
    match (a, b) {
        (Arg::Lanes(a), Arg::Lanes(b)) => {
            let (a, b) = (&a[..n], &b[..n]);
            for (i, o) in out.iter_mut().enumerate() {
                *o = f(c[i], a[i], b[i]);
            }
        }
        (Arg::Lanes(a), Arg::Same(y)) => lanes3(out, c, &a[..n], |c, a, _| f(c, a, y)),
        (Arg::Same(x), Arg::Lanes(b)) => lanes3(out, c, &b[..n], |c, b, _| f(c, x, b)),
        (Arg::Same(x), Arg::Same(y)) => lanes3(out, c, 0.0, |c, _, _| f(c, x, y)),
    }
}

/// When [`keep_or_take`] keeps a lane's value rather than take the operand's.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum Keep {
    /// The accumulated minimum: kept while below the operand, or not a number.
    Lower,
    /// The accumulated maximum: kept while above the operand, or not a number.
    Higher,
    /// An assignment under a mask: kept where the mask is 0.
    Unmasked,
}

impl Keep {
    #[inline(always)]
    fn keeps(self, o: f64, y: f64, m: f64) -> bool {
        match self {
            Keep::Lower => o < y || o.is_nan(),
            Keep::Higher => o > y || o.is_nan(),
            Keep::Unmasked => m == 0.0,
        }
    }
}

/// `out[i] = if keep { out[i] } else { y[i] }`: the running minimum (`min_or_nan`), the
/// running maximum (`max_or_nan`) or an assignment under the mask `m`. Written as a
/// select over lanes, a loop that keeps most lanes compiles to a masked store, slow on
/// AMD's cores (a sixth of a daily lookback's time); with AVX2 each group of four is
/// blended and stored whole instead. The same bits either way (tested).
fn keep_or_take(out: &mut [f64], m: Option<&[f64]>, y: Arg<'_>, keep: Keep) {
    #[cfg(target_arch = "x86_64")]
    {
        if std::is_x86_feature_detected!("avx2") {
            // SAFETY: the CPU has just been checked for AVX2.
            unsafe { keep_or_take_avx2(out, m, y, keep) };
            return;
        }
    }
    keep_or_take_lanes(out, m, y, keep, 0);
}

/// [`keep_or_take`] one lane at a time, from lane `from`. Never inlined: built for the
/// baseline CPU, a select is not turned into a masked store.
#[inline(never)]
fn keep_or_take_lanes(out: &mut [f64], m: Option<&[f64]>, y: Arg<'_>, keep: Keep, from: usize) {
    for i in from..out.len() {
        let (o, yi, mi) = (out[i], at(y, i), m.map_or(0.0, |m| m[i]));
        out[i] = if keep.keeps(o, yi, mi) { o } else { yi };
    }
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
unsafe fn keep_or_take_avx2(out: &mut [f64], m: Option<&[f64]>, y: Arg<'_>, keep: Keep) {
    use std::arch::x86_64::*;
    let n = out.len();
    let whole = n - n % 4;
    let zero = _mm256_setzero_pd();
    for i in (0..whole).step_by(4) {
        // SAFETY: lanes `i..i + 4` lie within `out`, and within `m` and `y` (as long).
        // Hidden from the optimiser, which would turn the blend of a loaded value stored
        // back where it came from into a masked store.
        let o = std::hint::black_box(_mm256_loadu_pd(out.as_ptr().add(i)));
        let v = match y {
            Arg::Lanes(s) => _mm256_loadu_pd(s.as_ptr().add(i)),
            Arg::Same(x) => _mm256_set1_pd(x),
        };
        let kept = match keep {
            Keep::Lower => _mm256_or_pd(_mm256_cmp_pd::<_CMP_LT_OQ>(o, v), _mm256_cmp_pd::<_CMP_UNORD_Q>(o, o)),
            Keep::Higher => _mm256_or_pd(_mm256_cmp_pd::<_CMP_GT_OQ>(o, v), _mm256_cmp_pd::<_CMP_UNORD_Q>(o, o)),
            Keep::Unmasked => {
                let m = m.expect("an assignment has a mask");
                _mm256_cmp_pd::<_CMP_EQ_OQ>(_mm256_loadu_pd(m.as_ptr().add(i)), zero)
            }
        };
        _mm256_storeu_pd(out.as_mut_ptr().add(i), _mm256_blendv_pd(v, o, kept));
    }
    keep_or_take_lanes(out, m, y, keep, whole);
}

#[inline(always)]
fn apply2(out: &mut [f64], s: Arg<'_>, f: impl Fn(f64, f64) -> f64) {
    match s {
        Arg::Lanes(s) => {
            for (o, y) in out.iter_mut().zip(s) {
                *o = f(*o, *y);
            }
        }
        Arg::Same(y) => {
            for o in out.iter_mut() {
                *o = f(*o, y);
            }
        }
    }
}

#[inline(always)]
fn kernel(out: &mut [f64], a: Arg<'_>, b: Arg<'_>, f: impl Fn(f64, f64) -> f64) {
    match (a, b) {
        (Arg::Lanes(a), Arg::Lanes(b)) => {
            for ((o, x), y) in out.iter_mut().zip(a).zip(b) {
                *o = f(*x, *y);
            }
        }
        (Arg::Lanes(a), Arg::Same(y)) => {
            for (o, x) in out.iter_mut().zip(a) {
                *o = f(*x, y);
            }
        }
        (Arg::Same(x), Arg::Lanes(b)) => {
            for (o, y) in out.iter_mut().zip(b) {
                *o = f(x, *y);
            }
        }
        (Arg::Same(x), Arg::Same(y)) => out.fill(f(x, y)),
    }
}

/// Whether any lane of the operand is not a number: one pass with no early exit, so it
/// vectorises (a constant operand is checked once).
#[inline]
fn not_a_number(a: Arg<'_>, lanes: usize) -> bool {
    match a {
        Arg::Lanes(s) => s[..lanes].iter().fold(false, |bad, x| bad | x.is_nan()),
        Arg::Same(x) => x.is_nan(),
    }
}

fn flag(b: bool) -> f64 {
    if b {
        1.0
    } else {
        0.0
    }
}

/// `out = a op b` over the lanes; with AVX2 when the CPU has it (four lanes to a
/// register instead of two). Additions, multiplications, divisions, comparisons and
/// selects only, never fused: the same bits either way.
fn binary(op: Bin, out: &mut [f64], a: Arg<'_>, b: Arg<'_>) {
    #[cfg(target_arch = "x86_64")]
    {
        if super::wide_lanes() {
            // SAFETY: the CPU has just been checked for these AVX-512 subsets.
            unsafe { binary_avx512(op, out, a, b) };
            return;
        }
        if std::is_x86_feature_detected!("avx2") {
            // SAFETY: the CPU has just been checked for AVX2.
            unsafe { binary_avx2(op, out, a, b) };
            return;
        }
    }
    binary_generic(op, out, a, b);
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
unsafe fn binary_avx2(op: Bin, out: &mut [f64], a: Arg<'_>, b: Arg<'_>) {
    binary_generic(op, out, a, b);
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f,avx512dq,avx512vl")]
unsafe fn binary_avx512(op: Bin, out: &mut [f64], a: Arg<'_>, b: Arg<'_>) {
    binary_generic(op, out, a, b);
}

#[inline(always)]
fn binary_generic(op: Bin, out: &mut [f64], a: Arg<'_>, b: Arg<'_>) {
    match op {
        Bin::Add => kernel(out, a, b, |x, y| x + y),
        Bin::Sub => kernel(out, a, b, |x, y| x - y),
        Bin::Mul => kernel(out, a, b, |x, y| x * y),
        Bin::Div => kernel(out, a, b, |x, y| x / y),
        Bin::Min => kernel(out, a, b, min_or_nan),
        Bin::Max => kernel(out, a, b, max_or_nan),
        Bin::Rem => kernel(out, a, b, crate::typing::remainder),
        Bin::Lt => kernel(out, a, b, |x, y| flag(x < y)),
        Bin::Le => kernel(out, a, b, |x, y| flag(x <= y)),
        Bin::Gt => kernel(out, a, b, |x, y| flag(x > y)),
        Bin::Ge => kernel(out, a, b, |x, y| flag(x >= y)),
        Bin::Eq => kernel(out, a, b, |x, y| flag(x == y)),
        Bin::Ne => kernel(out, a, b, |x, y| flag(x != y)),
        Bin::And => kernel(out, a, b, |x, y| flag(x != 0.0 && y != 0.0)),
        Bin::Or => kernel(out, a, b, |x, y| flag(x != 0.0 || y != 0.0)),
        Bin::AndNot => kernel(out, a, b, |x, y| flag(x != 0.0 && y == 0.0)),
    }
}

fn unary(op: Un, out: &mut [f64], a: Arg<'_>) {
    let one = Arg::Same(0.0);
    match op {
        Un::Neg => kernel(out, a, one, |x, _| -x),
        Un::Not => kernel(out, a, one, |x, _| flag(x == 0.0)),
        Un::Abs => kernel(out, a, one, |x, _| x.abs()),
        Un::Exp => kernel(out, a, one, |x, _| x.exp()),
        Un::Log => kernel(out, a, one, |x, _| x.ln()),
        Un::Sqrt => kernel(out, a, one, |x, _| x.sqrt()),
        Un::Floor => kernel(out, a, one, |x, _| x.floor()),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::{Rng, SeedableRng};

    /// An awkward number (±0, ±∞, NaN, tiny or huge) three times in ten, else one drawn
    /// within `±range`.
    fn ordinary_or_awkward(rng: &mut rand_pcg::Pcg64, range: f64) -> f64 {
        let odd = [0.0, -0.0, 1.0, -1.0, f64::INFINITY, f64::NEG_INFINITY, f64::NAN, 1e-310, 1e300, 3.5];
        if rng.gen_bool(0.3) {
            odd[rng.gen_range(0..odd.len())]
        } else {
            rng.gen_range(-range..range)
        }
    }

    /// Every operator gives the baseline build's bits with the build for this CPU (and
    /// AVX2's, where that is AVX-512's), on ordinary numbers and on the awkward ones (±0, ±∞, NaN, tiny and huge values), with
    /// either operand one value for all lanes.
    #[test]
    fn operators_give_the_baseline_bits_on_this_cpu() {
        let ops = [
            Bin::Add,
            Bin::Sub,
            Bin::Mul,
            Bin::Div,
            Bin::Min,
            Bin::Max,
            Bin::Rem,
            Bin::Lt,
            Bin::Le,
            Bin::Gt,
            Bin::Ge,
            Bin::Eq,
            Bin::Ne,
            Bin::And,
            Bin::Or,
            Bin::AndNot,
        ];
        let mut rng = rand_pcg::Pcg64::seed_from_u64(3);
        let value = |rng: &mut rand_pcg::Pcg64| ordinary_or_awkward(rng, 200.0);
        let a: Vec<f64> = (0..BLOCK).map(|_| value(&mut rng)).collect();
        let b: Vec<f64> = (0..BLOCK).map(|_| value(&mut rng)).collect();
        let (mut fast, mut plain) = (vec![0.0; BLOCK], vec![0.0; BLOCK]);
        for op in ops {
            for (x, y) in [
                (Arg::Lanes(&a), Arg::Lanes(&b)),
                (Arg::Lanes(&a), Arg::Same(b[7])),
                (Arg::Same(a[3]), Arg::Lanes(&b)),
                (Arg::Same(f64::NAN), Arg::Lanes(&b)),
            ] {
                binary(op, &mut fast, x, y);
                binary_generic(op, &mut plain, x, y);
                assert!(fast.iter().zip(&plain).all(|(f, p)| f.to_bits() == p.to_bits()), "{op:?}");
                // Where the build for this CPU is AVX-512's, AVX2's too.
                #[cfg(target_arch = "x86_64")]
                if std::is_x86_feature_detected!("avx2") {
                    // SAFETY: the CPU has just been checked for AVX2.
                    unsafe { binary_avx2(op, &mut fast, x, y) };
                    assert!(fast.iter().zip(&plain).all(|(f, p)| f.to_bits() == p.to_bits()), "{op:?}, AVX2");
                }
            }
        }
    }

    /// The running minimum and maximum and the masked assignment give the bits of
    /// `min_or_nan`, `max_or_nan` and `if m != 0 { y } else { o }` on every lane, with
    /// the build for this CPU and one lane at a time, on ordinary and awkward numbers,
    /// the operand per lane or one for all, at lengths that are not multiples of four.
    #[test]
    fn keep_or_take_gives_the_bits_of_the_lane_by_lane_rules() {
        let mut rng = rand_pcg::Pcg64::seed_from_u64(5);
        let value = |rng: &mut rand_pcg::Pcg64| ordinary_or_awkward(rng, 3.0);
        for n in [0, 1, 3, 4, 5, 17, 256] {
            let o: Vec<f64> = (0..n).map(|_| value(&mut rng)).collect();
            let y: Vec<f64> = (0..n).map(|_| value(&mut rng)).collect();
            let m: Vec<f64> = (0..n).map(|_| value(&mut rng)).collect();
            let same = value(&mut rng);
            for (keep, rule) in [
                (Keep::Lower, (|o, y, _| min_or_nan(o, y)) as fn(f64, f64, f64) -> f64),
                (Keep::Higher, |o, y, _| max_or_nan(o, y)),
                (Keep::Unmasked, |o, y, m| if m != 0.0 { y } else { o }),
            ] {
                for arg in [Arg::Lanes(&y), Arg::Same(same)] {
                    let want: Vec<u64> = (0..n).map(|i| rule(o[i], at(arg, i), m[i]).to_bits()).collect();
                    let mask = (keep == Keep::Unmasked).then_some(&m[..]);
                    let mut fast = o.clone();
                    keep_or_take(&mut fast, mask, arg, keep);
                    let mut plain = o.clone();
                    keep_or_take_lanes(&mut plain, mask, arg, keep, 0);
                    assert_eq!(fast.iter().map(|v| v.to_bits()).collect::<Vec<_>>(), want, "{keep:?} {n}");
                    assert_eq!(plain.iter().map(|v| v.to_bits()).collect::<Vec<_>>(), want, "{keep:?} {n}");
                }
            }
        }
    }

    /// A demo payoff compiled on the market it names; `None` when it names none.
    fn demo_program(file: &std::path::Path) -> Option<crate::compile::Program> {
        let source = std::fs::read_to_string(file).expect("a demo payoff reads");
        let tree = crate::syntax::parse(&source).expect("a demo payoff parses");
        let product = crate::typing::check(&tree, &[]).expect("a demo payoff checks");
        let (market, _) = product.market.as_ref()?;
        let market = std::path::Path::new("payoffs").join(market);
        let data = crate::market::Market::load(&market).expect("the demo market loads");
        Some(crate::compile::compile(&product, &data, &market).expect("a demo payoff compiles"))
    }

    /// Every demo payoff priced with its conditions' chains and its redemptions (a
    /// payment and the end of the same paths) run in one pass gives the bits of running
    /// their operations one by one: every block result and every path's payoff, in each
    /// sampling mode, for whole and partial blocks.
    #[test]
    fn chains_run_in_one_pass_give_the_bits_of_their_operations() {
        let runs = [
            Settings::default(),
            Settings { antithetic: false, ..Settings::default() },
            Settings { antithetic: false, control_variates: false, ..Settings::default() },
        ];
        let (mut chained, mut redeemed) = (0, 0);
        for entry in std::fs::read_dir("payoffs").expect("the demo library") {
            let file = entry.expect("a demo file").path();
            if file.extension().is_none_or(|e| e != "payoff") {
                continue;
            }
            let Some(p) = &demo_program(&file) else { continue };
            let model = Model::new(p);
            for settings in &runs {
                let controls = Controls::for_run(p, settings);
                let mut ws = Workspace::new(p, &model, &controls);
                if settings.control_variates && ws.conditions.iter().any(Option::is_some) {
                    chained += 1;
                }
                let redeems = p.ops.windows(2).any(|w| {
                    matches!((w[0], w[1]), (Op::Pay { mask, .. }, Op::End { mask: ends, .. }) if mask == ends && mask != ALIVE)
                });
                if settings.control_variates && redeems {
                    redeemed += 1;
                }
                let mut one_by_one = Workspace::new(p, &model, &controls);
                one_by_one.conditions.iter_mut().for_each(|c| *c = None);
                one_by_one.redeems = false;
                for (block, lanes) in [(0, BLOCK), (1, BLOCK), (2, 77)] {
                    let chain = ws.run_block(p, &model, &controls, settings, block, lanes);
                    let ops = one_by_one.run_block(p, &model, &controls, settings, block, lanes);
                    assert_eq!(chain, ops, "{}, block {block}", file.display());
                    let bits = |w: &Workspace| w.payoffs()[..lanes].iter().map(|v| v.to_bits()).collect::<Vec<_>>();
                    assert_eq!(bits(&ws), bits(&one_by_one), "{}, block {block}", file.display());
                }
            }
        }
        assert!(chained >= 5, "demo payoffs with a condition run in one pass: {chained}");
        assert!(redeemed >= 3, "demo payoffs with a redemption: {redeemed}");
    }

    /// A condition's chain is run in one pass only when nothing reads its links
    /// afterwards: not the `min` of the values, not the comparison's outcome before the
    /// `and`.
    #[test]
    fn a_condition_chain_is_taken_only_when_nothing_reads_its_links_later() {
        let mut p = demo_program(std::path::Path::new("payoffs/worst_of_autocall.payoff")).expect("a market");
        p.registers = 12;
        let chain = vec![
            Op::Bin { op: Bin::Add, dst: 5, a: Src::LogLevel(3), b: Src::Const(-4.6) },
            Op::Bin { op: Bin::Add, dst: 6, a: Src::Const(-3.9), b: Src::LogLevel(4) },
            Op::Bin { op: Bin::Min, dst: 7, a: Src::Reg(5), b: Src::Reg(6) },
            Op::Bin { op: Bin::Ge, dst: 8, a: Src::Reg(7), b: Src::Const(0.0) },
            Op::Bin { op: Bin::And, dst: 9, a: Src::Reg(ALIVE), b: Src::Reg(8) },
            Op::Pay { mask: 9, amount: Src::Const(100.0), slot: 0, discount: 1.0, site: 0 },
            Op::End { mask: 9, slot: 0 },
        ];
        let found = |p: &Program| condition::conditions(p, &vec![0; p.ops.len()]);
        p.ops = chain.clone();
        let c = found(&p)[0].clone().expect("a chain");
        assert_eq!((c.len, c.dst, c.mask), (5, 9, Some(Src::Reg(ALIVE))));
        assert_eq!(c.terms, vec![(Src::LogLevel(3), Some(-4.6)), (Src::LogLevel(4), Some(-3.9))]);
        // The worst value is paid as well: the chain from there on is taken (the
        // comparison and the `and`), not the whole one.
        p.ops = chain.clone();
        p.ops.push(Op::Pay { mask: ALIVE, amount: Src::Reg(7), slot: 0, discount: 1.0, site: 1 });
        let found_here = found(&p);
        assert!(found_here[..3].iter().all(Option::is_none), "{found_here:?}");
        let c = found_here[3].clone().expect("the shorter chain");
        assert_eq!((c.len, c.terms), (2, vec![(Src::Reg(7), None)]));
        // The outcome before the `and` is read by an `else`.
        p.ops = chain.clone();
        p.ops.push(Op::Bin { op: Bin::AndNot, dst: 10, a: Src::Reg(ALIVE), b: Src::Reg(8) });
        assert!(found(&p)[0].is_none());
        // Written whole before anything reads it again: dead, and taken.
        p.ops = chain;
        p.ops.push(Op::Bin { op: Bin::Ge, dst: 8, a: Src::LogLevel(5), b: Src::Const(4.0) });
        p.ops.push(Op::Pay { mask: 8, amount: Src::Const(1.0), slot: 0, discount: 1.0, site: 1 });
        assert_eq!(found(&p)[0].as_ref().map(|c| c.len), Some(5));
    }

    /// Every control of the demo autocallables averages over the paths to the mean the
    /// regression is told, within 4 standard errors (fixed seeds, with and without pairs):
    /// the forwards and calls (Black–Scholes, `closed_form`, tested against Hull's and
    /// Haug's worked examples), the puts valued when the product ends (Black's formula on the last
    /// level's forward, the same function), the digitals valued when the product ends
    /// and on earlier dates (normal orthant probabilities, `closed_form`, tested against
    /// Genz's bivariate routine's values and quadrature), the stopped hedges and the
    /// surprises (mean zero: common practice, optional stopping and one-step conditioning). A control whose paths missed its mean by more than
    /// six errors would be left out of the regression with a warning; this holds each to
    /// four, one by one (1,000 blocks: a 60% put of the demo is held to about 1%).
    #[test]
    fn every_control_of_an_autocallable_averages_to_its_closed_form() {
        let demos =
            ["worst_of_autocall.payoff", "seasoned_worst_of_autocall.payoff", "worst_of_autocall_on_curves.payoff"];
        // With pairs every path runs to the last date; without, the paths that end are
        // packed away and no longer stepped.
        let runs = [Settings::default(), Settings { antithetic: false, ..Settings::default() }];
        for (name, settings) in demos.iter().flat_map(|d| runs.iter().map(move |s| (d, s))) {
            let p = demo_program(&std::path::Path::new("payoffs").join(name)).expect("a market");
            let controls = Controls::for_run(&p, settings);
            let names: Vec<String> = (0..controls.len()).map(|j| controls.name(j)).collect();
            let put = |n: &String| n.contains("put at") && n.ends_with("valued when the product ends");
            assert!(names.iter().any(put), "{names:?}");
            let model = Model::new(&p);
            let mut ws = Workspace::new(&p, &model, &controls);
            let mut total = ws.run_block(&p, &model, &controls, settings, 0, BLOCK);
            for block in 1..1000 {
                total.merge(&ws.run_block(&p, &model, &controls, settings, block, BLOCK));
            }
            let m = &total.moments;
            for (j, name) in names.iter().enumerate() {
                let (mean, se) = (m.mean(j + 1), (m.variance(j + 1) / m.count()).sqrt());
                let (want, pairs) = (controls.mean(j), settings.antithetic);
                assert!(
                    (mean - want).abs() <= 4.0 * se,
                    "{name} of {}, pairs {pairs}: {mean} ± {se} vs {want}",
                    p.name
                );
            }
        }
    }

    /// Packing the running paths into the lowest lanes moves paths, never changes one:
    /// with the running lanes stepped alone (never packed, or packed whenever one ends)
    /// the j-th running lane draws the j-th normal of a step either way, so every path's
    /// payoff is the same number, bit for bit, wherever it sits in the block. On every
    /// demo payoff whose paths stop when they end, over blocks full and partial.
    #[test]
    fn packing_the_running_paths_moves_them_without_changing_any() {
        let settings = Settings { antithetic: false, control_variates: false, ..Settings::default() };
        let controls = Controls::none();
        let mut tried = 0;
        for entry in std::fs::read_dir("payoffs").expect("the demo library") {
            let file = entry.expect("a demo file").path();
            if file.extension().is_none_or(|e| e != "payoff") {
                continue;
            }
            let Some(p) = &demo_program(&file) else { continue };
            if !stops_early(p, &controls) {
                continue;
            }
            tried += 1;
            let model = Model::new(p);
            let payoffs = |packs: fn(usize, usize, usize) -> bool, block: u64, lanes: usize| {
                let mut ws = Workspace::new(p, &model, &controls);
                ws.packs = packs;
                ws.paths.step_running_lanes_alone();
                ws.run_block(p, &model, &controls, &settings, block, lanes);
                let mut pv: Vec<u64> = ws.payoffs()[..lanes].iter().map(|v| v.to_bits()).collect();
                pv.sort_unstable();
                (pv, ws.active)
            };
            for (block, lanes) in [(0, BLOCK), (1, BLOCK), (2, 77)] {
                let (never, all) = payoffs(|_, _, _| false, block, lanes);
                let (always, running) = payoffs(|lanes, running, _| running < lanes, block, lanes);
                assert_eq!(all, lanes, "{}: never packed", file.display());
                assert!(running < lanes, "{}: some paths end before the last operation", file.display());
                assert_eq!(never, always, "{}, block {block}", file.display());
            }
        }
        assert!(tried >= 3, "demo payoffs whose paths stop when they end: {tried}");
    }
}
