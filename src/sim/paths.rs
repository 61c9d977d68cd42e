//! Paths: exact log-GBM steps between grid dates, Cholesky-correlated normals, the
//! Brownian-bridge resolution of continuously monitored barriers, and the control
//! variates read off each path.

use rand::Rng;
use rand_distr::{Open01, StandardNormal};
use rand_pcg::Pcg64;

use super::normals::Normals;
use super::orthant;
use super::pack::Packing;
use super::special::{exp_into, exp_one, ln_into, norm_cdf_hart, norm_cdfs_into};
use crate::closed_form::{
    black_scholes, geometric_asian_discrete, geometric_average_forward, normal_orthant, OptionKind,
};
use crate::compile::{Op, PathValue, Program, Src, ALIVE};
use crate::typing::Direction;

/// Per-step constants of the risk-neutral dynamics
/// `ln S(t+Δ) = ln S(t) + (r − q − σ²/2)Δ + σ√Δ·Z`, exact for any step length.
#[derive(Clone, Debug)]
pub struct Model {
    /// `drift[k][a]`: the log drift of asset `a` over the step ending at grid index `k`.
    pub drift: Vec<Vec<f64>>,
    /// `scale[k][a]`: σ√Δ over that step.
    pub scale: Vec<Vec<f64>>,
    pub log_spot: Vec<f64>,
    /// Lower-triangular correlation factor.
    pub cholesky: Vec<Vec<f64>>,
    /// True when the factor is the identity (one asset, or uncorrelated assets): the
    /// normals are then used as drawn, which gives the same bits as multiplying by it.
    pub uncorrelated: bool,
    /// Assets watched by a barrier, whose bridge uniforms are drawn.
    pub watched: Vec<usize>,
    /// `total_drift[k][a]`, `total_variance[k][a]`: the sums of the drifts and of the
    /// squared scales of the steps up to grid index `k`, for one step over several.
    pub total_drift: Vec<Vec<f64>>,
    pub total_variance: Vec<Vec<f64>>,
}

impl Model {
    pub fn new(p: &Program) -> Self {
        let n = p.grid.len();
        let mut drift = vec![vec![0.0; p.assets.len()]; n];
        let mut scale = vec![vec![0.0; p.assets.len()]; n];
        // Steps up to the valuation date (past dates, read from the fixings) stay zero.
        for k in p.past + 1..n {
            let dt = p.grid[k] - p.grid[k - 1];
            for (a, m) in p.assets.iter().enumerate() {
                if let Some(c) = &p.curves {
                    // Exact with time-dependent coefficients: the step's growth and variance.
                    let var = step_variance(p, a, k);
                    drift[k][a] = (c.log_growth[a][k] - c.log_growth[a][k - 1]) - 0.5 * var;
                    scale[k][a] = var.sqrt();
                } else {
                    drift[k][a] = (p.rate - m.dividend_yield - 0.5 * m.volatility * m.volatility) * dt;
                    scale[k][a] = m.volatility * dt.sqrt();
                }
            }
        }
        let mut watched: Vec<usize> = p.monitors.iter().map(|m| m.asset).collect();
        // A running extreme reads the same bridge uniforms as a barrier on its asset, so
        // `highest(perf(X) from a to b) >= H` and `touched(perf(X) >= H from a to b)` agree
        // path by path.
        watched.extend(p.path_values.iter().filter_map(|v| match v {
            PathValue::Extreme { asset, .. } => Some(*asset),
            PathValue::HitDiscount { .. } => None,
        }));
        watched.sort_unstable();
        watched.dedup();
        let cholesky = if p.cholesky.is_empty() { identity(p.assets.len()) } else { p.cholesky.clone() };
        let uncorrelated = cholesky
            .iter()
            .enumerate()
            .all(|(i, row)| row.iter().enumerate().all(|(j, &c)| c == if i == j { 1.0 } else { 0.0 }));
        let mut total_drift = vec![vec![0.0; p.assets.len()]; n];
        let mut total_variance = vec![vec![0.0; p.assets.len()]; n];
        for k in 1..n {
            for a in 0..p.assets.len() {
                total_drift[k][a] = total_drift[k - 1][a] + drift[k][a];
                total_variance[k][a] = total_variance[k - 1][a] + scale[k][a] * scale[k][a];
            }
        }
        Model {
            total_drift,
            total_variance,
            drift,
            scale,
            log_spot: p.assets.iter().map(|a| a.spot.ln()).collect(),
            cholesky,
            uncorrelated,
            watched,
        }
    }
}

/// The variance of asset `a`'s log level over the step ending at grid index `k` (never
/// negative: the market refuses a falling total variance).
fn step_variance(p: &Program, a: usize, k: usize) -> f64 {
    match &p.curves {
        Some(c) => (c.variance[a][k] - c.variance[a][k - 1]).max(0.0),
        None => p.assets[a].volatility * p.assets[a].volatility * (p.grid[k] - p.grid[k - 1]),
    }
}

/// Row `a` of the correlated normals over the first `n` lanes: the drawn row itself when
/// the assets are uncorrelated, else row `a` of the Cholesky factor times the rows
/// `normals[j·block..]`, `j ≤ a`, summed into `w` in ascending `j` from zero, as a matrix
/// product would (the drawn rows are left as they are).
#[inline(always)]
fn correlated<'a>(model: &Model, normals: &'a [f64], w: &'a mut [f64], a: usize, n: usize, block: usize) -> &'a [f64] {
    if model.uncorrelated {
        return &normals[a * block..a * block + n];
    }
    let w = &mut w[..n];
    for (j, &c) in model.cholesky[a].iter().enumerate() {
        let zj = &normals[j * block..j * block + n];
        if j == 0 {
            for (w, z) in w.iter_mut().zip(zj) {
                *w = 0.0 + c * z;
            }
        } else {
            for (w, z) in w.iter_mut().zip(zj) {
                *w += c * z;
            }
        }
    }
    w
}

fn identity(n: usize) -> Vec<Vec<f64>> {
    (0..n).map(|i| (0..=i).map(|j| if i == j { 1.0 } else { 0.0 }).collect()).collect()
}

/// `x / sd` for a standard deviation above zero; with none left (the last date) the
/// outcome is known: `+∞` at or above zero, `−∞` below.
#[inline(always)]
fn standardised(x: f64, sd: f64) -> f64 {
    let known = if x >= 0.0 { f64::INFINITY } else { f64::NEG_INFINITY };
    if sd > 0.0 {
        x / sd
    } else {
        known
    }
}

/// Scratch buffers for one block's paths, laid out `[(grid index · assets + asset) · BLOCK + lane]`.
pub struct PathBuffers {
    pub levels: Vec<f64>,
    /// Log levels, kept only when barriers or geometric controls need them.
    pub logs: Vec<f64>,
    /// Bridge uniforms `[(watched slot · grid + k) · BLOCK + lane]`.
    pub uniforms: Vec<f64>,
    /// One step's normals as drawn, `[asset · BLOCK + lane]`.
    z: Vec<f64>,
    /// One row of the correlation product.
    w: Vec<f64>,
    /// The block's normals, seeded from its stream when it [`Self::start`]s.
    normals: Normals,
    /// The draws of one first-passage time per lane: a normal, then a uniform.
    hit_draws: Vec<f64>,
    /// Current log levels `[asset · BLOCK + lane]`.
    x: Vec<f64>,
    keep_logs: bool,
    /// Per asset, the log spot plus the drifts so far: a path and its mirror are
    /// symmetric about it.
    centre: Vec<f64>,
    /// The last grid index simulated (for some lanes, when stepping lanes still running).
    stepped: usize,
    /// Per lane, the last grid index it was stepped to; and the lanes a step simulates.
    unit_last: Vec<u32>,
    /// Whether `unit_last` is reset at the start of a block (only paths stepped as they
    /// run read it).
    keeps_units: bool,
    running: Vec<u32>,
    /// One step's moves at their lanes, then the running lanes' log levels, packed.
    packed: Vec<f64>,
    /// Per grid index, whether the levels are computed (else only the log levels, for
    /// a date whose levels nothing reads: comparisons made on logs).
    levels_on: Vec<bool>,
    /// Whether a step of the running lanes takes every lane, from how many run and the
    /// lanes ([`mostly_running`]; a test steps the running ones alone whenever it can).
    steps_every_lane: fn(usize, usize) -> bool,
}

/// Stepping only the running lanes costs more than it saves until fewer than a third of
/// them still run: a normal costs little next to placing a move at its lane.
fn mostly_running(running: usize, lanes: usize) -> bool {
    3 * running >= lanes
}

impl PathBuffers {
    pub fn new(p: &Program, model: &Model, keep_logs: bool, block: usize) -> Self {
        let cells = p.grid.len() * p.assets.len() * block;
        PathBuffers {
            levels: vec![0.0; cells],
            logs: if keep_logs { vec![0.0; cells] } else { Vec::new() },
            uniforms: vec![0.0; model.watched.len() * p.grid.len() * block],
            z: vec![0.0; p.assets.len() * block],
            w: vec![0.0; p.assets.len().max(1) * block],
            normals: Normals::default(),
            hit_draws: if p.path_values.is_empty() { Vec::new() } else { vec![0.0; 2 * block] },
            x: vec![0.0; p.assets.len() * block],
            keep_logs,
            centre: vec![0.0; p.assets.len()],
            stepped: 0,
            unit_last: vec![0; block],
            keeps_units: true,
            running: Vec::with_capacity(block),
            packed: vec![0.0; 2 * block],
            levels_on: vec![true; p.grid.len()],
            steps_every_lane: mostly_running,
        }
    }

    /// Computes the levels only on the grid dates where `on` is set (the log levels on
    /// every date, when kept). The levels of the other dates are left as they are.
    pub fn compute_levels_on(&mut self, on: Vec<bool>) {
        self.levels_on = on;
    }

    /// Steps the running lanes alone whenever some lane has ended (for a test).
    #[cfg(test)]
    pub(super) fn step_running_lanes_alone(&mut self) {
        self.steps_every_lane = |running, lanes| running == lanes;
    }

    /// Whether the paths may be stepped only while they run ([`Self::step_running_to`]),
    /// which reads each lane's last stepped date; else that record is not reset at the
    /// start of a block (nothing reads it).
    pub fn steps_running_lanes(&mut self, yes: bool) {
        self.keeps_units = yes;
    }

    /// Simulates `lanes` paths. With `antithetic`, lanes `h..2h` mirror lanes `0..h`
    /// (`h = lanes / 2`) with every normal negated. The normals are the block's
    /// [`Normals`] (seeded from `rng`) unless `given` holds them, laid out
    /// `[((k − 1)·assets + a)·block + lane]` for step `k` and asset `a` (a quasi-random
    /// sampler's).
    #[allow(clippy::too_many_arguments)]
    pub fn generate(
        &mut self,
        p: &Program,
        model: &Model,
        rng: &mut Pcg64,
        lanes: usize,
        antithetic: bool,
        block: usize,
        given: Option<&[f64]>,
    ) {
        self.start(p, model, rng, lanes, block);
        for k in p.past + 1..p.grid.len() {
            self.step(p, model, k, lanes, antithetic, block, given);
        }
        self.draw_uniforms(model, rng, lanes, antithetic, block, p.grid.len());
    }

    /// Puts every lane at the valuation date: past dates hold their fixings, the
    /// valuation date the spot. The block's normals are seeded from `rng`'s next draws.
    pub fn start(&mut self, p: &Program, model: &Model, rng: &mut Pcg64, lanes: usize, block: usize) {
        #[cfg(target_arch = "x86_64")]
        {
            if super::wide_lanes() {
                // SAFETY: the CPU has just been checked for these AVX-512 subsets.
                unsafe { self.start_avx512(p, model, rng, lanes, block) };
                return;
            }
        }
        self.start_generic(p, model, rng, lanes, block);
    }

    /// [`PathBuffers::start`]'s fills with the widest stores.
    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx512f,avx512dq,avx512vl")]
    unsafe fn start_avx512(&mut self, p: &Program, model: &Model, rng: &mut Pcg64, lanes: usize, block: usize) {
        self.start_generic(p, model, rng, lanes, block);
    }

    #[inline(always)]
    fn start_generic(&mut self, p: &Program, model: &Model, rng: &mut Pcg64, lanes: usize, block: usize) {
        self.normals.reseed(rng);
        let na = p.assets.len();
        for a in 0..na {
            self.x[a * block..a * block + lanes].fill(model.log_spot[a]);
            for k in 0..=p.past {
                let cell = (k * na + a) * block;
                let (level, log) = if k == p.past {
                    (p.assets[a].spot, model.log_spot[a])
                } else {
                    (p.past_levels[k][a], p.past_levels[k][a].ln())
                };
                if self.levels_on[k] {
                    self.levels[cell..cell + lanes].fill(level);
                }
                if self.keep_logs {
                    self.logs[cell..cell + lanes].fill(log);
                }
            }
        }
        self.centre.copy_from_slice(&model.log_spot);
        self.stepped = p.past;
        if self.keeps_units {
            self.unit_last.fill(p.past as u32);
        }
    }

    /// Draws the normals of `n` lanes, asset by asset (the lanes in order within an
    /// asset), into `z[a·block + lane]`.
    #[inline(always)]
    fn draw(&mut self, na: usize, n: usize, block: usize) {
        for a in 0..na {
            self.normals.fill(&mut self.z[a * block..a * block + n]);
        }
    }

    /// Steps every lane to grid index `k` (the next one).
    ///
    /// The step works in passes over the block, each a straight loop over lanes: draw
    /// (asset by asset, the lanes in order within an asset: the order is part of what a
    /// seed means), correlate, step the logs of each path and its mirror, exponentiate.
    #[allow(clippy::too_many_arguments)]
    fn step(
        &mut self,
        p: &Program,
        model: &Model,
        k: usize,
        lanes: usize,
        antithetic: bool,
        block: usize,
        given: Option<&[f64]>,
    ) {
        #[cfg(target_arch = "x86_64")]
        {
            if super::wide_lanes() {
                // SAFETY: the CPU has just been checked for these AVX-512 subsets.
                unsafe { self.step_avx512(p, model, k, lanes, antithetic, block, given) };
                return;
            }
            if std::is_x86_feature_detected!("avx2") {
                // SAFETY: the CPU has just been checked for AVX2.
                unsafe { self.step_avx2(p, model, k, lanes, antithetic, block, given) };
                return;
            }
        }
        self.step_generic(p, model, k, lanes, antithetic, block, given);
    }

    /// Additions, multiplications, divisions and selects only, never fused: the same bits
    /// as the baseline build.
    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2")]
    #[allow(clippy::too_many_arguments)]
    unsafe fn step_avx2(
        &mut self,
        p: &Program,
        model: &Model,
        k: usize,
        lanes: usize,
        antithetic: bool,
        block: usize,
        given: Option<&[f64]>,
    ) {
        self.step_generic(p, model, k, lanes, antithetic, block, given);
    }

    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx512f,avx512dq,avx512vl")]
    #[allow(clippy::too_many_arguments)]
    unsafe fn step_avx512(
        &mut self,
        p: &Program,
        model: &Model,
        k: usize,
        lanes: usize,
        antithetic: bool,
        block: usize,
        given: Option<&[f64]>,
    ) {
        self.step_generic(p, model, k, lanes, antithetic, block, given);
    }

    #[inline(always)]
    #[allow(clippy::too_many_arguments)]
    fn step_generic(
        &mut self,
        p: &Program,
        model: &Model,
        k: usize,
        lanes: usize,
        antithetic: bool,
        block: usize,
        given: Option<&[f64]>,
    ) {
        let na = p.assets.len();
        let drawn = if antithetic { lanes / 2 } else { lanes };
        let (drift, scale) = (&model.drift[k], &model.scale[k]);
        if given.is_none() {
            self.draw(na, drawn, block);
        }
        // Asset a's normals, `normals[a·block..][..drawn]`: given, or just drawn.
        let normals = match given {
            Some(given) => &given[(k - 1) * na * block..],
            None => &self.z[..],
        };
        // The lanes each asset's pass writes the log level of, besides stepping it.
        let written = if antithetic { 2 * drawn } else { drawn };
        for a in 0..na {
            let (d, s) = (drift[a], scale[a]);
            let z = correlated(model, normals, &mut self.w, a, drawn, block);
            let cell = (k * na + a) * block;
            let x = &mut self.x[a * block..a * block + written];
            if antithetic {
                let (up, down) = x.split_at_mut(drawn);
                for ((u, v), z) in up.iter_mut().zip(down.iter_mut()).zip(z) {
                    let step = s * z;
                    *u += d + step;
                    *v += d - step;
                }
            } else if self.keep_logs {
                let logs = &mut self.logs[cell..cell + written];
                for ((u, z), l) in x.iter_mut().zip(z).zip(logs) {
                    *u += d + s * z;
                    *l = *u;
                }
            } else {
                for (u, z) in x.iter_mut().zip(z) {
                    *u += d + s * z;
                }
            }
            if antithetic && self.keep_logs {
                self.logs[cell..cell + written].copy_from_slice(x);
            }
        }
        let levels_on = self.levels_on[k];
        for a in 0..na {
            self.centre[a] += drift[a];
            let cell = (k * na + a) * block;
            let x = &self.x[a * block..a * block + lanes];
            let levels = &mut self.levels[cell..cell + lanes];
            if !levels_on {
                // Only logs are read on this date.
            } else if antithetic && drawn > 0 {
                // One exp per pair: a path and its mirror are symmetric about the
                // common centre c (the log spot plus the drifts so far), so the
                // mirror's level is e^{2c} / the path's level, a division for an exp.
                exp_into(&mut levels[..drawn], &x[..drawn]);
                let twice = (2.0 * self.centre[a]).exp();
                let (up, down) = levels.split_at_mut(drawn);
                let mut finite = true;
                for (d, u) in down[..drawn].iter_mut().zip(up.iter()) {
                    *d = twice / u;
                    finite &= d.is_finite() && *d != 0.0;
                }
                if !finite {
                    // Beyond the range of doubles (or of e^{2c}): the mirror's own exp.
                    exp_into(&mut down[..drawn], &x[drawn..2 * drawn]);
                }
                exp_into(&mut levels[2 * drawn..], &x[2 * drawn..]);
            } else {
                exp_into(levels, x);
            }
            if self.keep_logs {
                // Lanes past the pairs, if any: the others' were written as they stepped.
                self.logs[cell + written..cell + lanes].copy_from_slice(&x[written..]);
            }
        }
        self.stepped = k;
        // Read only by the paths stepped as they run (`keeps_units`).
        if self.keeps_units {
            self.unit_last[..drawn].fill(k as u32);
        }
    }

    /// The bridge uniforms of the watched assets, drawn after every normal of the paths.
    fn draw_uniforms(
        &mut self,
        model: &Model,
        rng: &mut Pcg64,
        lanes: usize,
        antithetic: bool,
        block: usize,
        steps: usize,
    ) {
        let drawn = if antithetic { lanes / 2 } else { lanes };
        for slot in 0..model.watched.len() {
            for k in 1..steps {
                let base = (slot * steps + k) * block;
                for lane in 0..drawn {
                    let u: f64 = rng.sample(Open01);
                    self.uniforms[base + lane] = u;
                    if antithetic {
                        self.uniforms[base + lane + drawn] = u;
                    }
                }
            }
        }
    }

    /// The last grid index simulated so far.
    pub fn stepped(&self) -> usize {
        self.stepped
    }

    /// Steps the paths still running to grid index `k`, one grid date at a time, without
    /// antithetic pairs: a path is stepped to a date unless it ended on an earlier one
    /// (`ended_at`, the grid index of its end, infinite while it runs). The others keep
    /// their last level on later dates (nothing reads it: they have ended) and draw nothing.
    /// While at least a third of the lanes run, a step is exactly [`Self::step`], every
    /// lane included (the ended ones drawing and moving on as if they ran).
    #[allow(clippy::too_many_arguments)]
    pub fn step_running_to(
        &mut self,
        p: &Program,
        model: &Model,
        k: usize,
        ended_at: &[f64],
        lanes: usize,
        block: usize,
    ) {
        while self.stepped < k {
            let next = self.stepped + 1;
            let date = next as f64;
            let m = ended_at[..lanes].iter().map(|&e| usize::from(e >= date)).sum::<usize>();
            if (self.steps_every_lane)(m, lanes) {
                self.step(p, model, next, lanes, false, block, None);
                continue;
            }
            // Without a branch per lane (which way it goes is random): write every
            // index, advance past the running ones.
            self.running.resize(lanes, 0);
            let mut m = 0;
            for (lane, e) in ended_at[..lanes].iter().enumerate() {
                self.running[m] = lane as u32;
                m += usize::from(*e >= date);
            }
            self.running.truncate(m);
            self.step_some(p, model, next, lanes, block);
        }
    }

    /// Packs the lanes as `packing` plans: the current log levels, and the levels (and
    /// log levels, when kept) of the simulated dates `k` with `dates[k]` set, of the
    /// running lanes only or, with `whole`, of every lane, and then also the last date
    /// each lane was stepped to (which only a control's one step to the last date reads).
    /// The dates up to the valuation date hold one value for every lane and are left
    /// alone.
    pub fn pack(&mut self, p: &Program, packing: &mut Packing, whole: bool, dates: &[bool], block: usize) {
        let na = p.assets.len();
        let mut pack = |values: &mut [f64]| if whole { packing.all(values) } else { packing.front(values) };
        for a in 0..na {
            pack(&mut self.x[a * block..]);
        }
        for k in (p.past + 1..=self.stepped).filter(|&k| dates[k]) {
            for a in 0..na {
                let cell = (k * na + a) * block;
                if self.levels_on[k] {
                    pack(&mut self.levels[cell..]);
                }
                if self.keep_logs {
                    pack(&mut self.logs[cell..]);
                }
            }
        }
        if whole {
            packing.all_u32(&mut self.unit_last);
        }
    }

    /// Gives lanes `lanes` (ones no longer stepped) the levels of grid index `from` on
    /// every later date up to `to`, as a lane that has ended keeps its last level: what
    /// reads a path's dates after its end (a control's select) reads finite numbers
    /// written in this block.
    pub fn carry(&mut self, p: &Program, from: usize, to: usize, lanes: std::ops::Range<usize>, block: usize) {
        let na = p.assets.len();
        for k in from + 1..=to {
            for a in 0..na {
                let (previous, cell) = (((k - 1) * na + a) * block, (k * na + a) * block);
                let range = previous + lanes.start..previous + lanes.end;
                if self.levels_on[k] {
                    self.levels.copy_within(range.clone(), cell + lanes.start);
                }
                if self.keep_logs {
                    self.logs.copy_within(range, cell + lanes.start);
                }
            }
        }
    }

    /// [`Self::step`] for the lanes in `self.running` only, with the same arithmetic per
    /// lane; every other lane's level is carried over from the previous date.
    fn step_some(&mut self, p: &Program, model: &Model, k: usize, lanes: usize, block: usize) {
        #[cfg(target_arch = "x86_64")]
        {
            if super::wide_lanes() {
                // SAFETY: the CPU has just been checked for these AVX-512 subsets.
                unsafe { self.step_some_avx512(p, model, k, lanes, block) };
                return;
            }
            if std::is_x86_feature_detected!("avx2") {
                // SAFETY: the CPU has just been checked for AVX2.
                unsafe { self.step_some_avx2(p, model, k, lanes, block) };
                return;
            }
        }
        self.step_some_generic(p, model, k, lanes, block);
    }

    /// The same bits as the baseline build, as for [`Self::step`].
    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2")]
    unsafe fn step_some_avx2(&mut self, p: &Program, model: &Model, k: usize, lanes: usize, block: usize) {
        self.step_some_generic(p, model, k, lanes, block);
    }

    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx512f,avx512dq,avx512vl")]
    unsafe fn step_some_avx512(&mut self, p: &Program, model: &Model, k: usize, lanes: usize, block: usize) {
        self.step_some_generic(p, model, k, lanes, block);
    }

    #[inline(always)]
    fn step_some_generic(&mut self, p: &Program, model: &Model, k: usize, lanes: usize, block: usize) {
        let na = p.assets.len();
        let m = self.running.len();
        let (drift, scale) = (&model.drift[k], &model.scale[k]);
        // The normals of the running lanes, asset by asset, `z[a·block + j]` for the j-th
        // running lane, correlated as in a step.
        self.draw(na, m, block);
        // Each running lane's move `d + s·z` is put at its own lane, 0 at the others, and
        // added to every lane's log level in one straight loop: `x + 0` is `x`, so a lane
        // that has ended keeps its last log level, and the others get the arithmetic of a
        // full step. No gather of the log levels, no scatter of them.
        let levels_on = self.levels_on[k];
        for a in 0..na {
            self.centre[a] += drift[a];
            let (d, s) = (drift[a], scale[a]);
            let cell = (k * na + a) * block;
            let (moves, packed) = self.packed.split_at_mut(block);
            let moves = &mut moves[..lanes];
            moves.fill(0.0);
            let z = correlated(model, &self.z, &mut self.w, a, m, block);
            for (&lane, z) in self.running.iter().zip(z) {
                moves[lane as usize] = d + s * z;
            }
            let x = &mut self.x[a * block..a * block + lanes];
            for (x, mv) in x.iter_mut().zip(&*moves) {
                *x += mv;
            }
            if self.keep_logs {
                self.logs[cell..cell + lanes].copy_from_slice(x);
            }
            if !levels_on {
                continue;
            }
            if 2 * m >= lanes {
                // Most lanes run: every lane's exp (an ended lane's is its last level).
                exp_into(&mut self.levels[cell..cell + lanes], x);
            } else {
                // Few run: theirs only, packed; the others keep their previous level.
                let previous = ((k - 1) * na + a) * block;
                let packed = &mut packed[..m];
                for (p, &lane) in packed.iter_mut().zip(&self.running) {
                    *p = x[lane as usize];
                }
                let (exps, _) = moves.split_at_mut(m);
                exp_into(exps, packed);
                self.levels.copy_within(previous..previous + lanes, cell);
                let levels = &mut self.levels[cell..cell + lanes];
                for (&lane, &level) in self.running.iter().zip(&*exps) {
                    levels[lane as usize] = level;
                }
            }
        }
        for &lane in &self.running {
            self.unit_last[lane as usize] = k as u32;
        }
        self.stepped = k;
    }

    /// Puts the last-date level of every lane that stopped running before the last date,
    /// by one exact step from where it stopped: the law of each asset's last level is
    /// then the model's, as controls read at the last date need. Draws the normals lane by
    /// lane (asset by asset within one) after every step's. Across assets the step has
    /// the model's correlation; its covariance is exact when the assets' volatilities keep
    /// their ratios over the step (flat volatilities), and the controls need only each
    /// asset's own law.
    pub fn jump_stopped_to_last(&mut self, p: &Program, model: &Model, lanes: usize, block: usize) {
        let na = p.assets.len();
        let last = p.grid.len() - 1;
        let mut row = vec![0.0; na];
        for lane in 0..lanes {
            let from = self.unit_last[lane] as usize;
            if from >= last {
                continue;
            }
            self.normals.fill(&mut row);
            for a in 0..na {
                let mut z = 0.0;
                for (c, r) in model.cholesky[a].iter().zip(&row) {
                    z += c * r;
                }
                let drift = model.total_drift[last][a] - model.total_drift[from][a];
                let sd = (model.total_variance[last][a] - model.total_variance[from][a]).max(0.0).sqrt();
                let x = &mut self.x[a * block + lane];
                *x += drift + sd * z;
                self.levels[(last * na + a) * block + lane] = exp_one(*x);
                if self.keep_logs {
                    self.logs[(last * na + a) * block + lane] = *x;
                }
            }
            self.unit_last[lane] = last as u32;
        }
    }

    /// Resolves each continuously monitored barrier on each path: touched if a grid level
    /// is at or beyond the barrier, or if the Brownian bridge between two grid levels
    /// crosses it, which happens with probability `exp(−2·ln(S₀/H)·ln(S₁/H) / (σ²Δ))`.
    pub fn monitors(&self, p: &Program, model: &Model, lanes: usize, block: usize, out: &mut [Vec<f64>]) {
        let na = p.assets.len();
        let steps = p.grid.len();
        for (m, flags) in p.monitors.iter().zip(out.iter_mut()) {
            let a = m.asset;
            let slot = model.watched.iter().position(|&w| w == a).expect("watched assets include every monitored one");
            let var = p.assets[a].volatility * p.assets[a].volatility;
            let start = (p.start * na + a) * block;
            let down = m.direction == Direction::Down;
            for lane in 0..lanes {
                let h = if m.relative { (m.level * self.levels[start + lane]).ln() } else { m.level.ln() };
                let beyond = |x: f64| if down { x <= h } else { x >= h };
                let at = |k: usize| self.logs[(k * na + a) * block + lane];
                let mut hit = beyond(at(m.from));
                let mut k = m.from + 1;
                while !hit && k <= m.to {
                    let (x0, x1) = (at(k - 1), at(k));
                    // A dividend going ex on this date drops the level at its end: the
                    // path runs to the level before the drop.
                    let x1_before = match &p.curves {
                        Some(c) => x1 - c.drop[a][k],
                        None => x1,
                    };
                    if beyond(x1) || beyond(x1_before) {
                        hit = true;
                    } else {
                        let step_var =
                            if p.curves.is_some() { step_variance(p, a, k) } else { var * (p.grid[k] - p.grid[k - 1]) };
                        let crossing = (-2.0 * (x0 - h) * (x1_before - h) / step_var).exp();
                        hit = self.uniforms[(slot * steps + k) * block + lane] < crossing;
                    }
                    k += 1;
                }
                flags[lane] = if hit { 1.0 } else { 0.0 };
            }
        }
    }
}

impl PathBuffers {
    /// Computes the values read off the paths between grid dates ([`PathValue`]) into
    /// `out`, one buffer per value. Called after [`PathBuffers::generate`] with the same
    /// RNG. If there are hit times, one normal and one uniform are drawn per drawn lane
    /// (mirror lanes reuse their partner's), after every draw of the paths, so a program
    /// without them draws exactly what it drew before they existed. All hit times of a
    /// path use that pair in the step where their barrier is first crossed: a window cut
    /// into pieces (`from previous(t) to t`) then finds the same time as the whole
    /// window, and each time has its exact law (two barriers crossed within the same step
    /// get times drawn from the same pair, so their joint law within that step is not the
    /// bridge's).
    #[allow(clippy::too_many_arguments)]
    pub fn path_values(
        &mut self,
        p: &Program,
        model: &Model,
        rng: &mut Pcg64,
        lanes: usize,
        antithetic: bool,
        block: usize,
        out: &mut [Vec<f64>],
    ) {
        let na = p.assets.len();
        let steps = p.grid.len();
        let drawn = if antithetic { lanes / 2 } else { lanes };
        if p.path_values.iter().any(|v| matches!(v, PathValue::HitDiscount { .. })) {
            for lane in 0..drawn {
                self.hit_draws[2 * lane] = rng.sample(StandardNormal);
                self.hit_draws[2 * lane + 1] = rng.sample(Open01);
            }
        }
        for (value, out) in p.path_values.iter().zip(out.iter_mut()) {
            match *value {
                PathValue::HitDiscount { monitor } => {
                    let m = &p.monitors[monitor];
                    let a = m.asset;
                    let slot = model.watched.iter().position(|&w| w == a).expect("monitored assets are watched");
                    let start = (p.start * na + a) * block;
                    let down = m.direction == Direction::Down;
                    for lane in 0..lanes {
                        let partner = if lane >= drawn { lane - drawn } else { lane };
                        let (normal, uniform) = (self.hit_draws[2 * partner], self.hit_draws[2 * partner + 1]);
                        // The same decisions as `monitors`, step by step, up to the first crossing.
                        let h = if m.relative { (m.level * self.levels[start + lane]).ln() } else { m.level.ln() };
                        let beyond = |x: f64| if down { x <= h } else { x >= h };
                        let at = |k: usize| self.logs[(k * na + a) * block + lane];
                        let mut time = if beyond(at(m.from)) { Some(p.grid[m.from]) } else { None };
                        let mut k = m.from + 1;
                        while time.is_none() && k <= m.to {
                            let (x0, x1) = (at(k - 1), at(k));
                            let x1_before = before_drop(p, a, k, x1);
                            let dt = p.grid[k] - p.grid[k - 1];
                            let step_var = full_step_variance(p, a, k);
                            if beyond(x1_before) {
                                // Crossed by the bridge to the level before any drop.
                                let scale = step_var.sqrt();
                                let (gap, moved) =
                                    if down { (x0 - h, x0 - x1_before) } else { (h - x0, x1_before - x0) };
                                let fraction = bridge_first_passage(gap / scale, moved / scale, normal, uniform);
                                time = Some(p.grid[k - 1] + dt * fraction);
                            } else if beyond(x1) {
                                // Only the dividend's drop at the step's end crossed it.
                                time = Some(p.grid[k]);
                            } else {
                                let crossing = (-2.0 * (x0 - h) * (x1_before - h) / step_var).exp();
                                if self.uniforms[(slot * steps + k) * block + lane] < crossing {
                                    let scale = step_var.sqrt();
                                    let (gap, moved) =
                                        if down { (x0 - h, x0 - x1_before) } else { (h - x0, x1_before - x0) };
                                    let fraction = bridge_first_passage(gap / scale, moved / scale, normal, uniform);
                                    time = Some(p.grid[k - 1] + dt * fraction);
                                }
                            }
                            k += 1;
                        }
                        out[lane] = time.map_or(0.0, |t| (-p.discounting.value(t)).exp());
                    }
                }
                PathValue::Extreme { asset: a, up, from, to } => {
                    let slot = model.watched.iter().position(|&w| w == a).expect("assets with extremes are watched");
                    for (lane, o) in out[..lanes].iter_mut().enumerate() {
                        let at = |k: usize| self.logs[(k * na + a) * block + lane];
                        let mut extreme = at(from);
                        for k in from + 1..=to {
                            let (x0, x1) = (at(k - 1), at(k));
                            let u = self.uniforms[(slot * steps + k) * block + lane];
                            // The bridge runs to the level before a dividend's drop; the
                            // level after it closes the step.
                            let x1_before = before_drop(p, a, k, x1);
                            let step = bridge_extreme(x0, x1_before, full_step_variance(p, a, k), u, up);
                            let step = if up { step.max(x1) } else { step.min(x1) };
                            extreme = if up { extreme.max(step) } else { extreme.min(step) };
                        }
                        *o = extreme.exp();
                    }
                }
            }
        }
    }
}

/// The log level `x1` at grid index `k` as it was before a dividend going ex on that
/// date dropped it (the same `x1` when none does).
#[inline]
fn before_drop(p: &Program, a: usize, k: usize, x1: f64) -> f64 {
    match &p.curves {
        Some(c) => x1 - c.drop[a][k],
        None => x1,
    }
}

/// The variance of asset `a`'s log level over the step ending at grid index `k`: with
/// curves the step's own, else the flat `σ²Δt` (as the flat paths compute it).
#[inline]
fn full_step_variance(p: &Program, a: usize, k: usize) -> f64 {
    if p.curves.is_some() {
        step_variance(p, a, k)
    } else {
        let vol = p.assets[a].volatility;
        vol * vol * (p.grid[k] - p.grid[k - 1])
    }
}

/// The maximum (`up`) or minimum of a Brownian bridge from `x0` to `x1` with variance
/// `variance` over the step, drawn by inversion from the uniform `u` in (0, 1): the bridge
/// exceeds `m ≥ max(x0, x1)` with probability `exp(−2(m − x0)(m − x1) / variance)`, so
/// `m = (x0 + x1 + √((x1 − x0)² − 2·variance·ln u)) / 2` (reflected for the minimum).
/// With the same `u`, `m ≥ h` exactly when a barrier at `h` is crossed in `monitors`.
pub fn bridge_extreme(x0: f64, x1: f64, variance: f64, u: f64, up: bool) -> f64 {
    let d = x1 - x0;
    let spread = (d * d - 2.0 * variance * u.ln()).sqrt();
    if up {
        0.5 * (x0 + x1 + spread)
    } else {
        0.5 * (x0 + x1 - spread)
    }
}

/// The time of the first passage at a barrier of a Brownian bridge over a step, as a
/// fraction of the step, given that it crosses. In units of the step's standard deviation
/// (σ√Δ): the barrier lies `gap > 0` away from the start and the bridge ends `moved`
/// towards it. Writing the bridge as `X(s) = s·y + (1 − s)·W(s / (1 − s))` on [0, 1], it
/// reaches the barrier when the Brownian motion W reaches the line `gap + (gap − y)·u` at
/// `u = s / (1 − s)`: the first passage of a Brownian motion with drift `y − gap` at `gap`,
/// which (conditioned on happening, for a negative drift) is inverse Gaussian with mean
/// `gap / |gap − y|` and shape `gap²`. It is drawn from one normal and one uniform by
/// Michael, Schucany and Haas (1976), and mapped back by `s = u / (1 + u)`.
pub fn bridge_first_passage(gap: f64, moved: f64, normal: f64, uniform: f64) -> f64 {
    if gap <= 0.0 {
        return 0.0;
    }
    let drift = (gap - moved).abs();
    let shape = gap * gap;
    let w = normal * normal;
    let u = if drift == 0.0 {
        // No drift: the Lévy law, the limit of the inverse Gaussian as its mean grows.
        shape / w
    } else {
        let mean = gap / drift;
        let c = mean * w / (2.0 * shape);
        // The smaller root of Michael–Schucany–Haas, in a form without cancellation.
        let x = mean / (1.0 + c + (c * c + 2.0 * c).sqrt());
        if uniform <= mean / (mean + x) {
            x
        } else {
            mean * mean / x
        }
    };
    1.0 / (1.0 + 1.0 / u)
}

/// What a control variate reads off a path.
#[derive(Clone, Debug, PartialEq)]
enum ControlKind {
    /// The asset's level at the last grid date.
    Terminal { asset: usize },
    /// A call on the asset's last level.
    Call { asset: usize, strike: f64 },
    /// The geometric mean of the asset's levels on averaging fixings.
    Geometric { asset: usize, fixings: Vec<usize> },
    /// A call on that geometric mean.
    GeometricCall { asset: usize, fixings: Vec<usize>, strike: f64 },
    /// A stopped hedge: the gains of holding the asset, financed and with its dividends
    /// passed on, from the valuation date until the product ends ([`Hedge`]).
    Hedge { asset: usize, weight: HedgeWeight },
    /// 1 when every listed asset's last level is at or above its threshold (`above`),
    /// or every one is below it; 0 otherwise ([`super::digital`]).
    Digital { thresholds: Vec<(usize, f64)>, above: bool },
    /// One asset's digital at a threshold, valued on the date the product's end is known:
    /// `P(S(T) ≥ h | S(tₖ))` at that date `tₖ`, the indicator itself for a path that
    /// runs to the last date. A conditional probability is a bounded martingale, so by
    /// optional stopping its mean is `P(S(T) ≥ h)` today (common practice, as for the
    /// stopped hedges). `rest[k]` = (drift, standard deviation) of `ln S` from grid
    /// index `k` to the last.
    StoppedDigital { asset: usize, threshold: f64, log_threshold: f64, rest: Vec<(f64, f64)> },
    /// A put on one asset struck at a threshold, valued on the date the product's end is
    /// known: `E[(K − S(T))⁺ | S(tₖ)]` at that date, by Black's formula on the level then
    /// (the payoff itself on a path that runs to the last date); a bounded martingale
    /// stopped there, so its mean is today's put (common practice, as for the stopped
    /// digitals). `rest[k]` = (drift, standard deviation, `e^{drift + variance/2}`) of
    /// `ln S` from grid index `k` to the last.
    StoppedPut { asset: usize, strike: f64, log_strike: f64, rest: Vec<(f64, f64, f64)> },
    /// A last-date event ([`ControlKind::Digital`]) read on each earlier date the product
    /// can end on, `dates` = (grid index, discount factor): the sum of the discounted
    /// indicators. Its mean is the sum of the discounted normal orthant probabilities of
    /// those dates. It reads every date of every path, so it is made only for runs that
    /// simulate every path to its last date ([`Controls::for_run`]).
    Dated { thresholds: Vec<(usize, f64)>, above: bool, dates: Vec<(usize, f64)> },
    /// An event the payoff compares on some dates (every listed asset at or above its
    /// threshold, `above`, or every one below), read as its surprises step by step: on
    /// each of those dates `tₖ` that a path is alive at (its end not known before `tₖ`),
    /// the discounted sum over the event's assets `c` of the indicator less the chance
    /// of it given the levels at `tₖ₋₁` and the other assets' moves over the step, that
    /// is `1{event} − 1{the others' conditions}·P(c's condition | the others' moves)`.
    /// Given all that was known before `c`'s own move, each term has mean zero, and the
    /// weights (alive, discount) are known at `tₖ₋₁`: the control's mean is exactly zero
    /// (common practice, as for the stopped hedges). `terms` = (asset, log threshold).
    Surprise { terms: Vec<(usize, f64)>, above: bool, steps: Vec<SurpriseStep> },
}

/// One date of a [`ControlKind::Surprise`]: its grid index and discount factor, each
/// term's drift over the step ending there, and per term `c` the law of `c`'s move given
/// the others' (the model's joint normal law of the step): its mean is
/// `drift_c + Σᵢ given[c].0[i]·(moveᵢ − driftᵢ)` and its standard deviation `given[c].1`.
#[derive(Clone, Debug, PartialEq)]
struct SurpriseStep {
    k: usize,
    discount: f64,
    drift: Vec<f64>,
    given: Vec<(Vec<f64>, f64)>,
}

impl SurpriseStep {
    /// The step ending at grid index `k` for the event's `assets`.
    fn new(model: &Model, assets: &[usize], k: usize, discount: f64) -> Self {
        let t = assets.len();
        let rho =
            |a: usize, b: usize| -> f64 { model.cholesky[a].iter().zip(&model.cholesky[b]).map(|(x, y)| x * y).sum() };
        let cov = |a: usize, b: usize| rho(a, b) * model.scale[k][a] * model.scale[k][b];
        let given = (0..t)
            .map(|c| {
                // The others first, `c` last: with the lower factor `L` of their covariance,
                // the others' moves give their normals by forward substitution, and `c`'s
                // move is `L[c]·Z`, its own normal's part `L[c][c]·Z_c` left random. Run on
                // each unit move, the substitution gives the coefficients of the mean.
                let order: Vec<usize> = (0..t).filter(|&i| i != c).chain([c]).collect();
                let sub: Vec<f64> = (0..t * t).map(|ij| cov(assets[order[ij / t]], assets[order[ij % t]])).collect();
                let l = semidefinite_cholesky(&sub, t);
                let mut beta = vec![0.0; t];
                for (u, &unit) in order[..t - 1].iter().enumerate() {
                    let mut z = vec![0.0; t - 1];
                    for i in 0..t - 1 {
                        let moved = if i == u { 1.0 } else { 0.0 };
                        let known: f64 = (0..i).map(|j| l[i * t + j] * z[j]).sum();
                        let pivot = l[i * t + i];
                        z[i] = if pivot > 0.0 { (moved - known) / pivot } else { 0.0 };
                    }
                    beta[unit] = (0..t - 1).map(|j| l[(t - 1) * t + j] * z[j]).sum();
                }
                (beta, l[t * t - 1])
            })
            .collect();
        SurpriseStep { k, discount, drift: assets.iter().map(|&a| model.drift[k][a]).collect(), given }
    }
}

/// The most stopped digitals one program gets: each costs a normal probability on every
/// path that ends early. The first events' (lowest thresholds first) are taken.
const MOST_STOPPED: usize = 3;

/// How many units of the asset the stopped hedge holds over each step, known at the
/// step's start.
#[derive(Clone, Copy, Debug, PartialEq)]
enum HedgeWeight {
    /// One unit while the product is alive.
    Alive,
    /// One unit while alive and the asset has the lowest performance of all.
    Worst,
    /// While alive and the asset is the worst, as many units as its performance less one.
    WorstScaled,
}

#[derive(Clone, Debug, PartialEq)]
struct Control {
    name: String,
    kind: ControlKind,
    discount: f64,
    /// The control's expectation, from a closed form.
    mean: f64,
    /// The size of the quantity the control is built on (its discounted forward): a
    /// standard deviation below a tiny fraction of it is rounding, not randomness.
    scale: f64,
}

/// The control variates of a program: discounted quantities whose expectations we know in
/// closed form, regressed against the payoff.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Controls {
    list: Vec<Control>,
    hedge: Option<Hedge>,
    /// How the digitals of a product that can end early are valued on the paths that end
    /// before the last date ([`Inner`]).
    inner: Option<Inner>,
}

/// The digitals of a product that can end early, valued on the date its end is known.
///
/// On a path that ends early the last date's digital reads levels the payoff never sees,
/// noise the regression cannot remove. Valued instead on the date the product's end is
/// known, the digital is `P(event at T | levels then)`, a bounded martingale stopped at a
/// stopping time, so its mean is still today's probability (optional stopping, common
/// practice as for the stopped hedges). That conditional probability is a normal orthant
/// probability per path, of the remaining log returns under the exact joint law the paths
/// step by; it is estimated without bias (up to the normal quantile's 1.2e-9, see
/// [`super::orthant`]) by separation of variables, one antithetic pair of uniforms per
/// path: the mean of the estimates is the conditional probability, so the control's mean
/// stays the closed-form one.
#[derive(Clone, Debug, PartialEq)]
struct Inner {
    /// The assets the digitals read (at most three).
    assets: Vec<usize>,
    /// The drift of each of those assets' log level from `tₖ` to the last date, at
    /// `k·assets + i` for grid index `k` and asset `i`.
    drift: Vec<f64>,
    digitals: Vec<InnerDigital>,
}

/// One digital [`Inner`] values: its column, its thresholds as (position in
/// `Inner::assets`, log threshold), its side, its discount factor, and for each grid index
/// `k` (from `k·terms²` on) the lower Cholesky factor (row by row) of the covariance of
/// its terms' log returns from `tₖ` to the last date: `ρₐᵦ·Σⱼ₍ₖ,last₎ sⱼₐ·sⱼᵦ` over the
/// model's steps.
#[derive(Clone, Debug, PartialEq)]
struct InnerDigital {
    column: usize,
    terms: Vec<(usize, f64)>,
    above: bool,
    discount: f64,
    factor: Vec<f64>,
    /// Whether `factor` is the previous digital's (the same underlyings in the same order).
    factor_as_before: bool,
}

/// The most assets [`Inner`] values digitals on, and the most terms one of them may have.
const INNER_ASSETS: usize = orthant::MOST_TERMS;

/// The most digitals [`Inner`] values (the digitals themselves are at most four).
const INNER_MOST: usize = 8;

/// What the stopped-hedge controls need: when each `end` is known, and each asset's
/// martingale scaling.
///
/// A product that can end early (an autocallable) pays a step function of the date it
/// ends and of the levels then: the controls above, all read at the last date, barely
/// see it. A stopped hedge does: with `M(t) = S(t)·e^{−(r−q)t}/S(0)` (the asset's
/// discounted value with its dividends reinvested, a martingale under the pricing
/// measure), the gain `Σₖ wₖ·(M(tₖ₊₁) − M(tₖ))` of any holding `wₖ` fixed at `tₖ` has
/// expectation exactly zero (optional stopping; common practice for delta-hedge control
/// variates). Holding while the product is alive, and more while an asset is the worst,
/// mimics the product's own delta; the regression picks the amounts.
#[derive(Clone, Debug, PartialEq)]
struct Hedge {
    /// Per operation: for an `End`, the grid index from which its outcome is known (the
    /// latest date read by it or any operation before it, and its own date); else unused.
    known_from: Vec<f64>,
    /// `factor[k·assets + a]`: `M(tₖ)/S(tₖ)` for asset `a`, built from the model's own
    /// steps so that `E[M(tₖ₊₁) | tₖ] = M(tₖ)` holds exactly for its drift.
    factor: Vec<f64>,
}

impl Hedge {
    /// The hedge of a program that can end before its last date; `None` for one that
    /// cannot (a fixed maturity is what the other controls fit).
    fn of(p: &Program, model: &Model) -> Option<Hedge> {
        let early = p.ops.iter().any(|op| matches!(op, Op::End { mask, .. } if *mask != ALIVE));
        if !early || p.grid.len() < 2 {
            return None;
        }
        let na = p.assets.len().max(1);
        let grid_of = |t: f64| p.grid.iter().position(|&g| (g - t).abs() < 1e-12);
        let mut read = 0usize;
        let mut known_from = Vec::with_capacity(p.ops.len());
        for op in &p.ops {
            // An exercise decision also reads the variables its rule regresses on.
            let rule_reads: &[Src] = match op {
                Op::Choose { site, .. } => &p.choices[*site as usize].using,
                _ => &[],
            };
            for src in op.sources().chain(rule_reads.iter().copied()) {
                match src {
                    Src::Level(k) | Src::LogLevel(k) => read = read.max(k as usize / na),
                    Src::Monitor(m) => read = read.max(p.monitors[m as usize].to),
                    Src::Path(v) => {
                        let to = match p.path_values[v as usize] {
                            PathValue::HitDiscount { monitor } => p.monitors[monitor].to,
                            PathValue::Extreme { to, .. } => to,
                        };
                        read = read.max(to);
                    }
                    Src::Reg(_) | Src::Const(_) => {}
                }
            }
            let from = match op {
                Op::End { slot, .. } => {
                    // A date that is not on the grid: known only at the last date.
                    let own = grid_of(p.events[*slot as usize].time).unwrap_or(p.grid.len() - 1);
                    own.max(read)
                }
                _ => p.grid.len() - 1,
            };
            known_from.push(from as f64);
        }
        let mut factor = vec![0.0; p.grid.len() * p.assets.len()];
        for (a, m) in p.assets.iter().enumerate() {
            let mut f = 1.0 / m.spot;
            factor[a] = f;
            for k in 1..p.grid.len() {
                let (d, s) = (model.drift[k][a], model.scale[k][a]);
                f *= (-(d + 0.5 * s * s)).exp();
                factor[k * p.assets.len() + a] = f;
            }
        }
        Some(Hedge { known_from, factor })
    }
}

/// The discount factor of the last grid date.
fn discount_to_last(p: &Program) -> f64 {
    discount_to(p, p.grid.len() - 1)
}

/// The discount factor of grid date `k`.
fn discount_to(p: &Program, k: usize) -> f64 {
    match &p.curves {
        Some(c) => c.discount[k],
        None => (-p.rate * p.grid[k]).exp(),
    }
}

/// The probability under the model that every listed asset's level on grid date `k` is
/// at or above its threshold (`above`), or every one below: the log levels are jointly
/// normal with the model's step drifts and variances summed and covariances
/// `ρₐᵦ·Σⱼ sⱼₐ·sⱼᵦ` from the per-step scales, so it is a normal orthant probability.
/// `None` where there is no closed form here (an asset without variance, a degenerate
/// correlation).
fn event_chance(model: &Model, thresholds: &[(usize, f64)], above: bool, k: usize) -> Option<f64> {
    let na = model.log_spot.len();
    let rho = |a: usize, b: usize| -> f64 {
        let (ra, rb) = (&model.cholesky[a], &model.cholesky[b]);
        ra.iter().zip(rb).map(|(x, y)| x * y).sum()
    };
    let mut bounds = Vec::with_capacity(thresholds.len());
    let mut sd = Vec::with_capacity(thresholds.len());
    for &(a, h) in thresholds {
        if a >= na {
            return None;
        }
        let mean = model.log_spot[a] + model.total_drift[k][a];
        let v = model.total_variance[k][a];
        if !(v > 0.0 && h > 0.0) {
            return None;
        }
        let z = (h.ln() - mean) / v.sqrt();
        bounds.push(if above { -z } else { z });
        sd.push(v.sqrt());
    }
    let corr: Vec<Vec<f64>> = thresholds
        .iter()
        .enumerate()
        .map(|(i, &(a, _))| {
            thresholds
                .iter()
                .enumerate()
                .map(|(j, &(b, _))| {
                    if i == j {
                        return 1.0;
                    }
                    let cov: f64 = (1..=k).map(|s| model.scale[s][a] * model.scale[s][b]).sum::<f64>() * rho(a, b);
                    (cov / (sd[i] * sd[j])).clamp(-1.0, 1.0)
                })
                .collect()
        })
        .collect();
    normal_orthant(&bounds, &corr)
}

/// A digital's name: the assets, the side and the thresholds in percent of spot.
fn event_name(p: &Program, thresholds: &[(usize, f64)], above: bool) -> String {
    let names: Vec<&str> = thresholds.iter().map(|&(a, _)| p.assets[a].name.as_str()).collect();
    let side = if above { "at or above" } else { "below" };
    let level = |&(a, h): &(usize, f64)| 100.0 * h / p.assets[a].spot;
    let same = thresholds.iter().all(|t| (level(t) - level(&thresholds[0])).abs() < 1e-9);
    match (names.len(), same) {
        (1, _) => format!("{} {side} {}% of spot", names[0], round_percent(level(&thresholds[0]))),
        (_, true) => format!("{} all {side} {}% of spot", names.join(", "), round_percent(level(&thresholds[0]))),
        (_, false) => format!(
            "{} all {side} {}% of spot",
            names.join(", "),
            thresholds.iter().map(|t| round_percent(level(t))).collect::<Vec<_>>().join(" / ")
        ),
    }
}

/// Appends the digitals of the comparisons the product makes on its last date
/// ([`super::digital`]), each with its exact expectation: the log levels at the last date
/// are jointly normal with the model's step drifts and variances summed, and covariances
/// `ρₐᵦ·Σₖ sₖₐ·sₖᵦ` from the per-step scales, so the event's probability is a normal
/// orthant probability. An event whose probability has no closed form here (a degenerate
/// correlation, an asset without variance) gets no control. For a product that can end
/// early, the digitals are valued when it ends ([`Inner`], returned) when they read at
/// most three assets in all.
fn add_digitals(p: &Program, discount: f64, list: &mut Vec<Control>) -> Option<Inner> {
    let events = super::digital::last_date_events(p);
    if events.is_empty() {
        return None;
    }
    let model = Model::new(p);
    let last = p.grid.len() - 1;
    let mut stopped: Vec<(usize, f64)> = Vec::new();
    for e in events {
        let Some(probability) = event_chance(&model, &e.thresholds, e.above, last) else { continue };
        let name = event_name(p, &e.thresholds, e.above);
        list.push(Control {
            name,
            kind: ControlKind::Digital { thresholds: e.thresholds.clone(), above: e.above },
            discount,
            mean: discount * probability,
            scale: discount,
        });
        stopped.extend(e.thresholds);
    }
    // A product that can end early: each asset's own digital at each of those
    // thresholds, valued when the product ends. On a path redeemed early the last date's
    // digitals read levels the payoff never sees; these read the levels it ends on.
    Hedge::of(p, &model)?;
    let inner = Inner::of(p, &model, list);
    // Where a digital on several underlyings valued when the product ends reads an
    // underlying at a threshold, that underlying's own digital there adds next to
    // nothing (W3: a cut of 29.7× against 29.3× without, for 6–8% of the time; the demo
    // autocallables, 0.1–0.3% of their cut): only the others are added.
    let covered: Vec<(usize, f64)> = inner
        .iter()
        .flat_map(|i| &i.digitals)
        .filter_map(|d| match &list[d.column].kind {
            ControlKind::Digital { thresholds, .. } => Some(thresholds.iter().copied()),
            _ => None,
        })
        .flatten()
        .collect();
    // Each asset's lowest threshold, for its put valued when the product ends.
    let mut lowest: Vec<(usize, f64)> = Vec::new();
    for &(a, h) in &stopped {
        match lowest.iter_mut().find(|t| t.0 == a) {
            Some(t) => t.1 = t.1.min(h),
            None => lowest.push((a, h)),
        }
    }
    lowest.sort_by_key(|t| t.0);
    stopped.retain(|t| !covered.contains(t));
    stopped.dedup_by(|x, y| x.0 == y.0 && x.1 == y.1);
    for (a, h) in stopped.into_iter().take(MOST_STOPPED) {
        let (total_drift, total_var) = (model.total_drift[last][a], model.total_variance[last][a]);
        let rest = to_last(&model, a).map(|(drift, var)| (drift, var.sqrt())).collect();
        let log_threshold = h.ln();
        let chance = norm_cdf_hart((model.log_spot[a] + total_drift - log_threshold) / total_var.sqrt());
        list.push(Control {
            name: format!(
                "{} at or above {}% of spot, valued when the product ends",
                p.assets[a].name,
                round_percent(100.0 * h / p.assets[a].spot)
            ),
            kind: ControlKind::StoppedDigital { asset: a, threshold: h, log_threshold, rest },
            discount,
            mean: discount * chance,
            scale: discount,
        });
    }
    // A product that can end early: each asset's put struck at its lowest threshold on
    // the last date, valued when the product ends. Below that threshold a worst-of pays
    // the worst performance: the digitals follow the jump there, the puts the slope
    // beyond it, read on the levels the product ends on (the yardstick's W3: a variance
    // cut of 29.2× → 34.8×; the demo autocallables 59–71× → 82–98×). A digital alone or
    // the asset-or-nothing leg alone adds next to nothing; puts at the higher thresholds
    // too, 2.6% more cut for three more columns.
    for (a, k) in lowest.into_iter().take(MOST_STOPPED) {
        let (total_drift, total_var) = (model.total_drift[last][a], model.total_variance[last][a]);
        if !(total_var > 0.0 && k > 0.0) {
            continue;
        }
        let rest = to_last(&model, a).map(|(drift, var)| (drift, var.sqrt(), (drift + 0.5 * var).exp())).collect();
        // Black's formula on the last level's forward and total variance (unit time, no
        // rate: the discount factor is applied apart).
        let forward = (model.log_spot[a] + total_drift + 0.5 * total_var).exp();
        let put = black_scholes(OptionKind::Put, forward, k, 1.0, 0.0, 0.0, total_var.sqrt());
        list.push(Control {
            name: format!(
                "{} put at {}% of spot, valued when the product ends",
                p.assets[a].name,
                round_percent(100.0 * k / p.assets[a].spot)
            ),
            kind: ControlKind::StoppedPut { asset: a, strike: k, log_strike: k.ln(), rest },
            discount,
            mean: discount * put,
            scale: discount * forward,
        });
    }
    inner
}

/// Per grid index `k`, the drift and the variance of asset `a`'s log level from `tₖ` to
/// the last date.
fn to_last(model: &Model, a: usize) -> impl Iterator<Item = (f64, f64)> + '_ {
    let last = model.total_drift.len() - 1;
    let (total_drift, total_var) = (model.total_drift[last][a], model.total_variance[last][a]);
    (0..=last).map(move |k| (total_drift - model.total_drift[k][a], (total_var - model.total_variance[k][a]).max(0.0)))
}

impl Inner {
    /// The draws for the digitals of two or more assets in `list` (whose names then say
    /// they are valued when the product ends), as many as read at most [`INNER_ASSETS`]
    /// assets in all; `None` when there are none.
    fn of(p: &Program, model: &Model, list: &mut [Control]) -> Option<Inner> {
        // The digitals of two to three terms on two or more assets, in the list's order,
        // while the assets they read number at most three in all; the others keep their
        // last-date values.
        let mut assets: Vec<usize> = Vec::new();
        let mut chosen = vec![false; list.len()];
        for (j, c) in list.iter().enumerate() {
            let ControlKind::Digital { thresholds, .. } = &c.kind else { continue };
            if thresholds.len() < 2 || thresholds.len() > INNER_ASSETS {
                continue;
            }
            let mut with: Vec<usize> = assets.iter().copied().chain(thresholds.iter().map(|t| t.0)).collect();
            with.sort_unstable();
            with.dedup();
            if with.len() <= INNER_ASSETS && chosen.iter().filter(|&&c| c).count() < INNER_MOST {
                assets = with;
                chosen[j] = true;
            }
        }
        if assets.is_empty() {
            return None;
        }
        let n = assets.len();
        let last = p.grid.len() - 1;
        let rho = |a: usize, b: usize| -> f64 {
            let (ra, rb) = (&model.cholesky[a], &model.cholesky[b]);
            ra.iter().zip(rb).map(|(x, y)| x * y).sum()
        };
        // Per grid index, each asset's drift to the last date and the covariance of the
        // log returns from there (`cov[k][i·n + j]`).
        let mut drift = Vec::with_capacity((last + 1) * n);
        let mut cov = Vec::with_capacity(last + 1);
        for k in 0..=last {
            drift.extend(assets.iter().map(|&a| model.total_drift[last][a] - model.total_drift[k][a]));
            let mut c = vec![0.0; n * n];
            for (i, &a) in assets.iter().enumerate() {
                for (j, &b) in assets.iter().enumerate() {
                    let shared: f64 = (k + 1..=last).map(|s| model.scale[s][a] * model.scale[s][b]).sum();
                    c[i * n + j] = if i == j { shared } else { rho(a, b) * shared };
                }
            }
            cov.push(c);
        }
        let mut digitals = Vec::new();
        for (column, c) in list.iter_mut().enumerate() {
            // One asset's digital is valued when the product ends exactly, by its own
            // stopped digital: it keeps the last date's level.
            if let ControlKind::Digital { thresholds, above } = &c.kind {
                if !chosen[column] {
                    continue;
                }
                let position = |a: usize| assets.iter().position(|&b| b == a).unwrap_or(0);
                let mut terms: Vec<(usize, f64)> = thresholds.iter().map(|&(a, h)| (position(a), h.ln())).collect();
                // The underlying whose log level varies most to the last date first, the
                // least last (integrated in closed form): on the demo autocallables the
                // estimate's noise then costs the control a sixth less of its variance
                // cut than in the order written (W3: 29.0× → 29.7×).
                let variance = |t: &(usize, f64)| model.total_variance[last][assets[t.0]];
                terms.sort_by(|x, y| variance(y).total_cmp(&variance(x)));
                let t = terms.len();
                let factor = cov
                    .iter()
                    .flat_map(|c| {
                        let sub: Vec<f64> = (0..t * t).map(|ij| c[terms[ij / t].0 * n + terms[ij % t].0]).collect();
                        semidefinite_cholesky(&sub, t)
                    })
                    .collect();
                let factor_as_before = digitals.last().is_some_and(|d: &InnerDigital| d.factor == factor);
                digitals.push(InnerDigital {
                    column,
                    terms,
                    above: *above,
                    discount: c.discount,
                    factor,
                    factor_as_before,
                });
                c.name.push_str(", valued when the product ends");
            }
        }
        Some(Inner { assets, drift, digitals })
    }

    /// Overwrites each digital's value on a chunk's lanes that ended before the last date
    /// (`early`, packed) with the estimate of its probability given the levels the end is
    /// known at ([`orthant::chunk`]); `logs[a][e]` is asset `a`'s log level on the date
    /// packed lane `e` ended. The uniforms are drawn after everything else the block
    /// draws: lane by lane, one per term but the last of the digital with the most.
    #[allow(clippy::too_many_arguments)]
    #[inline(always)]
    fn chunk(
        &self,
        early: &[usize],
        ended: &[usize],
        logs: &[[f64; orthant::CHUNK]],
        rng: &mut Pcg64,
        scratch: &mut InnerScratch,
        columns: &mut [Vec<f64>],
    ) {
        let digitals = &self.digitals[..self.digitals.len().min(INNER_MOST)];
        let uniforms = digitals.iter().map(|d| d.terms.len() - 1).max().unwrap_or(0);
        let InnerScratch { x, u, factor, estimate } = scratch;
        let m = early.len();
        for e in 0..m {
            for u in &mut u[..uniforms] {
                u[e] = open_unit(rng);
            }
        }
        let n = self.assets.len();
        for (i, &a) in self.assets.iter().enumerate() {
            for ((x, &log), &k) in x[i][..m].iter_mut().zip(&logs[a][..m]).zip(&ended[..m]) {
                *x = log + self.drift[k * n + i];
            }
        }
        for (j, d) in digitals.iter().enumerate() {
            // Digitals on the same underlyings in the same order share their factors.
            if j == 0 || !d.factor_as_before {
                let cells = d.terms.len() * d.terms.len();
                for (t, factor) in factor[..cells].iter_mut().enumerate() {
                    for (f, &k) in factor[..m].iter_mut().zip(&ended[..m]) {
                        *f = d.factor[k * cells + t];
                    }
                }
            }
            orthant::chunk(&d.terms, d.above, x, factor, u, whole_vectors(m), estimate);
            for (e, &lane) in early.iter().enumerate() {
                columns[d.column][lane] = d.discount * estimate[e];
            }
        }
    }
}

/// [`Inner::chunk`]'s packed lanes: each asset's log level at the end plus its drift to
/// the last date, the uniforms, one digital's factor entries and its estimates. Kept from
/// chunk to chunk, so the lanes past a chunk's count hold finite values left there.
struct InnerScratch {
    x: [[f64; orthant::CHUNK]; orthant::MOST_TERMS],
    u: [[f64; orthant::CHUNK]; orthant::MOST_TERMS],
    factor: [[f64; orthant::CHUNK]; orthant::MOST_TERMS * orthant::MOST_TERMS],
    estimate: [f64; orthant::CHUNK],
}

impl InnerScratch {
    fn new() -> Box<Self> {
        const ZERO: [f64; orthant::CHUNK] = [0.0; orthant::CHUNK];
        Box::new(InnerScratch {
            x: [ZERO; orthant::MOST_TERMS],
            u: [ZERO; orthant::MOST_TERMS],
            factor: [ZERO; orthant::MOST_TERMS * orthant::MOST_TERMS],
            estimate: ZERO,
        })
    }
}

/// The lanes of `range` that ended before grid index `last` (`stop[lane] < last`), in
/// order, into the front of `early`; their count. Without a branch on each lane.
#[inline(always)]
fn ended_early(stop: &[f64], range: std::ops::Range<usize>, last: usize, early: &mut [usize]) -> usize {
    let mut m = 0;
    for lane in range {
        early[m] = lane;
        m += usize::from(stop[lane] < last as f64);
    }
    m
}

/// `m` lanes of a chunk rounded up to whole vectors of eight: the lane-by-lane loops over
/// a chunk's packed lanes run over that many, so none is left to a scalar remainder loop
/// (eight times the cost per lane). The lanes past `m` hold what earlier lanes left there
/// and their results are never read: each lane's arithmetic is its own, so the lanes
/// that count get the same bits.
#[inline(always)]
fn whole_vectors(m: usize) -> usize {
    ((m + 7) & !7).min(orthant::CHUNK)
}

/// A uniform in `(0, 1)`, symmetric about ½: the top 53 bits of a draw, plus ½, times 2⁻⁵³.
#[inline(always)]
fn open_unit(rng: &mut Pcg64) -> f64 {
    use rand::RngCore;
    ((rng.next_u64() >> 11) as f64 + 0.5) * (1.0 / (1u64 << 53) as f64)
}

/// The lower Cholesky factor of a covariance matrix (`n × n`, row by row) that may be only
/// semidefinite: a pivot at or below a tiny fraction of the largest variance (no variance
/// left in that direction) gives a zero column. Then `L·Lᵀ` is the matrix, up to rounding.
fn semidefinite_cholesky(cov: &[f64], n: usize) -> Vec<f64> {
    let mut l = vec![0.0; n * n];
    let largest = (0..n).map(|i| cov[i * n + i]).fold(0.0, f64::max);
    for j in 0..n {
        let pivot = cov[j * n + j] - (0..j).map(|k| l[j * n + k] * l[j * n + k]).sum::<f64>();
        // Also a NaN pivot: no variance to draw in that direction.
        if pivot.partial_cmp(&(1e-14 * largest)) != Some(std::cmp::Ordering::Greater) {
            continue;
        }
        let d = pivot.sqrt();
        l[j * n + j] = d;
        for i in j + 1..n {
            let off = cov[i * n + j] - (0..j).map(|k| l[i * n + k] * l[j * n + k]).sum::<f64>();
            l[i * n + j] = off / d;
        }
    }
    l
}

/// A percentage for a control's name: at most four decimals, without trailing zeros.
fn round_percent(x: f64) -> String {
    let s = format!("{x:.4}");
    let s = s.trim_end_matches('0').trim_end_matches('.');
    s.to_string()
}

/// Appends the stopped hedges of a product that can end early ([`Hedge`]) to `list`:
/// their gains have mean zero under any lognormal step the model makes (flat or on curves).
fn add_hedges(p: &Program, list: &mut Vec<Control>) -> Option<Hedge> {
    let hedge = Hedge::of(p, &Model::new(p));
    if hedge.is_some() {
        let weights = if p.assets.len() > 1 {
            &[HedgeWeight::Alive, HedgeWeight::Worst, HedgeWeight::WorstScaled][..]
        } else {
            // One asset is always the worst.
            &[HedgeWeight::Alive, HedgeWeight::WorstScaled][..]
        };
        for (a, m) in p.assets.iter().enumerate() {
            for &weight in weights {
                let what = match weight {
                    HedgeWeight::Alive => "hedge while alive",
                    HedgeWeight::Worst => "hedge while worst",
                    HedgeWeight::WorstScaled => "hedge scaled by the worst",
                };
                list.push(Control {
                    name: format!("{} {what}", m.name),
                    kind: ControlKind::Hedge { asset: a, weight },
                    discount: 1.0,
                    mean: 0.0,
                    scale: 1.0,
                });
            }
        }
    }
    hedge
}

impl Controls {
    pub fn none() -> Self {
        Controls::default()
    }

    /// The controls of a run with `settings`: none without control variates. With
    /// antithetic pairs or quasi-random points every path is simulated to its last date
    /// (a path and its mirror seldom both end early), so a product that can end early
    /// also gets its last date's digitals read on each earlier date it can end on
    /// ([`ControlKind::Dated`]).
    pub fn for_run(p: &Program, settings: &super::Settings) -> Self {
        if !settings.control_variates {
            return Controls::none();
        }
        let mut controls = Controls::new(p);
        if settings.antithetic || settings.sampler == super::Sampler::Sobol {
            controls.add_dated(p);
        }
        controls
    }

    /// Appends, for each last-date digital of a product that can end early, the sum of
    /// its discounted indicators on the earlier dates the product can end on (after the
    /// valuation date), when every one of those dates has its probability in closed form.
    fn add_dated(&mut self, p: &Program) {
        let Some(hedge) = &self.hedge else { return };
        let last = p.grid.len() - 1;
        let mut dates: Vec<usize> = p
            .ops
            .iter()
            .zip(&hedge.known_from)
            .filter(|(op, _)| matches!(op, Op::End { mask, .. } if *mask != ALIVE))
            .map(|(_, &k)| k as usize)
            .filter(|&k| k > p.past && k < last)
            .collect();
        dates.sort_unstable();
        dates.dedup();
        if dates.is_empty() {
            return;
        }
        let model = Model::new(p);
        let mut dated = Vec::new();
        for c in &self.list {
            let ControlKind::Digital { thresholds, above } = &c.kind else { continue };
            let chances: Option<Vec<f64>> =
                dates.iter().map(|&k| event_chance(&model, thresholds, *above, k)).collect();
            let Some(chances) = chances else { continue };
            let discounted: Vec<(usize, f64)> = dates.iter().map(|&k| (k, discount_to(p, k))).collect();
            let mean = discounted.iter().zip(&chances).map(|(&(_, d), q)| d * q).sum();
            dated.push(Control {
                name: format!(
                    "{}, summed over {} earlier date{}",
                    event_name(p, thresholds, *above),
                    dates.len(),
                    if dates.len() == 1 { "" } else { "s" }
                ),
                kind: ControlKind::Dated { thresholds: thresholds.clone(), above: *above, dates: discounted },
                discount: 1.0,
                mean,
                scale: 1.0,
            });
        }
        for (event, on) in super::digital::dated_events(p) {
            let assets: Vec<usize> = event.thresholds.iter().map(|t| t.0).collect();
            let steps: Vec<SurpriseStep> = on
                .iter()
                .filter(|&&k| k > p.past)
                .map(|&k| SurpriseStep::new(&model, &assets, k, discount_to(p, k)))
                .collect();
            if steps.is_empty() {
                continue;
            }
            dated.push(Control {
                name: format!(
                    "{}, surprises on {} date{} while alive",
                    event_name(p, &event.thresholds, event.above),
                    steps.len(),
                    if steps.len() == 1 { "" } else { "s" }
                ),
                kind: ControlKind::Surprise {
                    terms: event.thresholds.iter().map(|&(a, h)| (a, h.ln())).collect(),
                    above: event.above,
                    steps,
                },
                discount: 1.0,
                mean: 0.0,
                scale: 1.0,
            });
        }
        self.list.extend(dated);
    }

    /// The columns of the surprises ([`ControlKind::Surprise`]), the last in the list.
    pub fn surprises(&self) -> Vec<usize> {
        (0..self.list.len()).filter(|&j| matches!(self.list[j].kind, ControlKind::Surprise { .. })).collect()
    }

    /// The controls without the surprises: the others keep their columns.
    pub fn without_surprises(mut self) -> Self {
        self.list.retain(|c| !matches!(c.kind, ControlKind::Surprise { .. }));
        self
    }

    /// The normal probabilities the surprises take per path, when `alive[k]` is the
    /// fraction of paths alive at grid date `k`: one per asset of the event on each of
    /// its dates a path is alive at.
    pub fn surprise_work(&self, alive: &[f64]) -> f64 {
        self.list
            .iter()
            .map(|c| match &c.kind {
                ControlKind::Surprise { terms, steps, .. } => {
                    steps.iter().map(|s| alive.get(s.k).copied().unwrap_or(1.0)).sum::<f64>() * terms.len() as f64
                }
                _ => 0.0,
            })
            .sum()
    }

    /// Whether a control reads the levels of every date of every path, also after the
    /// path has ended ([`ControlKind::Dated`]).
    pub fn reads_every_date(&self) -> bool {
        self.list.iter().any(|c| matches!(c.kind, ControlKind::Dated { .. } | ControlKind::Surprise { .. }))
    }

    /// For each underlying: its discounted last level (expectation `S₀e^{−qT}`) and the
    /// at-the-money-forward call on it (Black–Scholes). For each averaging of an
    /// underlying's levels: the geometric mean over the same fixings and the call on it
    /// struck at the spot (closed form for discrete geometric averages).
    pub fn new(p: &Program) -> Self {
        let mut list = Vec::new();
        let last = p.grid.len() - 1;
        let t = p.grid[last];
        if t <= 0.0 {
            return Controls { list, hedge: None, inner: None };
        }
        if let Some(c) = &p.curves {
            let mut list = curve_controls(p, c);
            let inner = add_digitals(p, discount_to_last(p), &mut list);
            let hedge = add_hedges(p, &mut list);
            return Controls { list, hedge, inner };
        }
        let discount = (-p.rate * t).exp();
        for (a, m) in p.assets.iter().enumerate() {
            let b = p.rate - m.dividend_yield;
            let forward = m.spot * (b * t).exp();
            list.push(Control {
                name: format!("{} forward", m.name),
                kind: ControlKind::Terminal { asset: a },
                discount,
                mean: m.spot * (-m.dividend_yield * t).exp(),
                scale: discount * forward,
            });
            list.push(Control {
                name: format!("{} call", m.name),
                kind: ControlKind::Call { asset: a, strike: forward },
                discount,
                mean: black_scholes(OptionKind::Call, m.spot, forward, t, p.rate, b, m.volatility),
                scale: discount * forward,
            });
        }
        for (a, fixings) in &p.averages {
            let m = &p.assets[*a];
            let b = p.rate - m.dividend_yield;
            // A fixing on the valuation date is known, not random: no closed form needed there.
            if fixings.iter().any(|&k| k <= p.past) {
                continue;
            }
            let times: Vec<f64> = fixings.iter().map(|&k| p.grid[k]).collect();
            let t_pay = *times.last().unwrap_or(&t);
            let discount = (-p.rate * t_pay).exp();
            let geometric_forward = discount * geometric_average_forward(m.spot, &times, b, m.volatility);
            list.push(Control {
                name: format!("{} geometric average", m.name),
                kind: ControlKind::Geometric { asset: *a, fixings: fixings.clone() },
                discount,
                mean: geometric_forward,
                scale: geometric_forward,
            });
            list.push(Control {
                name: format!("{} geometric-average call", m.name),
                kind: ControlKind::GeometricCall { asset: *a, fixings: fixings.clone(), strike: m.spot },
                discount,
                mean: geometric_asian_discrete(
                    OptionKind::Call,
                    m.spot,
                    m.spot,
                    &times,
                    t_pay,
                    p.rate,
                    b,
                    m.volatility,
                ),
                scale: geometric_forward,
            });
        }
        let inner = add_digitals(p, discount_to_last(p), &mut list);
        let hedge = add_hedges(p, &mut list);
        Controls { list, hedge, inner }
    }

    /// For the `End` at operation `op`, the grid index from which its outcome is known,
    /// when the controls need to know where each path ends.
    pub fn end_known_from(&self, op: usize) -> Option<f64> {
        self.hedge.as_ref().map(|h| h.known_from[op])
    }

    /// Whether the controls need to know where each path ends ([`Controls::end_known_from`]).
    pub fn tracks_ends(&self) -> bool {
        self.hedge.is_some()
    }

    /// Writes every control's discounted value on each path into `columns[j]`; `stop`
    /// holds, per lane, the grid index from which the path is known to have ended (read
    /// only when [`Controls::tracks_ends`]).
    #[allow(clippy::too_many_arguments)]
    pub fn fill(
        &self,
        p: &Program,
        paths: &PathBuffers,
        stop: &[f64],
        rng: &mut Pcg64,
        lanes: usize,
        block: usize,
        columns: &mut [Vec<f64>],
    ) {
        #[cfg(target_arch = "x86_64")]
        {
            if super::wide_lanes() {
                // SAFETY: the CPU has just been checked for these AVX-512 subsets.
                unsafe { self.fill_avx512(p, paths, stop, rng, lanes, block, columns) };
                return;
            }
            if std::is_x86_feature_detected!("avx2") {
                // SAFETY: the CPU has just been checked for AVX2.
                unsafe { self.fill_avx2(p, paths, stop, rng, lanes, block, columns) };
                return;
            }
        }
        self.fill_generic(p, paths, stop, rng, lanes, block, columns);
    }

    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx512f,avx512dq,avx512vl")]
    #[allow(clippy::too_many_arguments)]
    unsafe fn fill_avx512(
        &self,
        p: &Program,
        paths: &PathBuffers,
        stop: &[f64],
        rng: &mut Pcg64,
        lanes: usize,
        block: usize,
        columns: &mut [Vec<f64>],
    ) {
        self.fill_generic(p, paths, stop, rng, lanes, block, columns);
    }

    /// Additions, multiplications, selects and `min` only, never fused: the same bits as
    /// the baseline build.
    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2")]
    #[allow(clippy::too_many_arguments)]
    unsafe fn fill_avx2(
        &self,
        p: &Program,
        paths: &PathBuffers,
        stop: &[f64],
        rng: &mut Pcg64,
        lanes: usize,
        block: usize,
        columns: &mut [Vec<f64>],
    ) {
        self.fill_generic(p, paths, stop, rng, lanes, block, columns);
    }

    #[allow(clippy::too_many_arguments)]
    #[inline(always)]
    fn fill_generic(
        &self,
        p: &Program,
        paths: &PathBuffers,
        stop: &[f64],
        rng: &mut Pcg64,
        lanes: usize,
        block: usize,
        columns: &mut [Vec<f64>],
    ) {
        for (j, col) in columns.iter_mut().enumerate().take(self.list.len()) {
            self.values(j, p, paths, lanes, block, col);
        }
        if let Some(h) = &self.hedge {
            self.stopped_values(p, paths, stop, lanes, block, columns);
            self.hedge_values(h, p, paths, stop, lanes, block, columns);
            self.early_values(p, paths, stop, rng, lanes, block, columns);
            self.surprise_values(p, paths, stop, lanes, block, columns);
        }
    }

    /// The stopped digitals ([`ControlKind::StoppedDigital`]): a normal probability on the
    /// lanes that ended before the last date, the indicator on the others.
    ///
    /// Whether a lane ended early is random, so with the log levels kept every lane takes
    /// the same way (a gather at its own date, then one normal probability over the
    /// lanes, where the indicator is the probability of ±∞): no branch to mispredict, and
    /// the second loop vectorises.
    #[inline(always)]
    fn stopped_values(
        &self,
        p: &Program,
        paths: &PathBuffers,
        stop: &[f64],
        lanes: usize,
        block: usize,
        columns: &mut [Vec<f64>],
    ) {
        const CHUNK: usize = 64;
        let na = p.assets.len();
        let last = p.grid.len() - 1;
        let mut z = [0.0f64; CHUNK];
        for (c, col) in self.list.iter().zip(columns.iter_mut()) {
            let ControlKind::StoppedDigital { asset, log_threshold, threshold, rest } = &c.kind else { continue };
            if paths.logs.is_empty() {
                // Only the levels: the log of a level is taken where the lane ended early.
                let at_last = &paths.levels[(last * na + asset) * block..][..lanes];
                for (lane, (o, &s)) in col[..lanes].iter_mut().zip(at_last).enumerate() {
                    let k = stop[lane] as usize;
                    *o = if k >= last {
                        if s >= *threshold {
                            c.discount
                        } else {
                            0.0
                        }
                    } else {
                        let (drift, sd) = rest[k];
                        let x = paths.levels[(k * na + asset) * block + lane].ln() - log_threshold + drift;
                        c.discount * norm_cdf_hart(standardised(x, sd))
                    };
                }
                continue;
            }
            for start in (0..lanes).step_by(CHUNK) {
                let n = CHUNK.min(lanes - start);
                for (i, z) in z[..n].iter_mut().enumerate() {
                    let lane = start + i;
                    let k = (stop[lane] as usize).min(last);
                    let (drift, sd) = rest[k];
                    let x = paths.logs[(k * na + asset) * block + lane] - log_threshold + drift;
                    *z = standardised(x, sd);
                }
                let mut chance = [0.0f64; CHUNK];
                norm_cdfs_into(&mut chance[..n], &z[..n]);
                for (o, &q) in col[start..start + n].iter_mut().zip(&chance[..n]) {
                    *o = c.discount * q;
                }
            }
        }
    }

    /// The stopped puts ([`ControlKind::StoppedPut`]) and [`Inner`]'s digitals: on the
    /// lanes that run to the last date, the puts' payoff (the digitals keep their
    /// indicator); on the others, a chunk of lanes at a time and packed, Black's formula
    /// and the digitals' estimates on the levels the product ended on. Each asset those
    /// read has its level and log level on that date gathered once per chunk for all of
    /// them, the logarithms in one pass, so that they and the normal probabilities run
    /// over the packed lanes alone and vectorise.
    #[allow(clippy::too_many_arguments)]
    #[inline(always)]
    fn early_values(
        &self,
        p: &Program,
        paths: &PathBuffers,
        stop: &[f64],
        rng: &mut Pcg64,
        lanes: usize,
        block: usize,
        columns: &mut [Vec<f64>],
    ) {
        use orthant::CHUNK;
        let na = p.assets.len();
        let last = p.grid.len() - 1;
        let puts: Vec<_> = self
            .list
            .iter()
            .enumerate()
            .filter_map(|(j, c)| match &c.kind {
                ControlKind::StoppedPut { asset, strike, log_strike, rest } => {
                    Some((j, c.discount, *asset, *strike, *log_strike, rest))
                }
                _ => None,
            })
            .collect();
        if puts.is_empty() && self.inner.is_none() {
            return;
        }
        for &(j, discount, asset, strike, ..) in &puts {
            let at_last = &paths.levels[(last * na + asset) * block..][..lanes];
            for (o, &s) in columns[j][..lanes].iter_mut().zip(at_last) {
                *o = discount * (strike - s).max(0.0);
            }
        }
        let mut read = vec![false; na];
        for &(_, _, asset, ..) in &puts {
            read[asset] = true;
        }
        for &a in self.inner.iter().flat_map(|i| &i.assets) {
            read[a] = true;
        }
        // Per asset read and packed lane: the level and the log level on the lane's end
        // date (ones and zeros to start with, so the lanes past a chunk's count stay finite).
        let mut level = vec![[1.0f64; CHUNK]; na];
        let mut log = vec![[0.0f64; CHUNK]; na];
        let mut early = [0usize; CHUNK];
        // Per packed lane: the grid index it ended at.
        let mut ended = [0usize; CHUNK];
        // Per packed lane: the standardised log-moneyness of a put's strike leg and of its
        // share leg, and the level grown to the last date.
        let (mut near, mut far, mut grown) = ([0.0f64; CHUNK], [0.0f64; CHUNK], [0.0f64; CHUNK]);
        let mut scratch = self.inner.as_ref().map(|_| InnerScratch::new());
        for start in (0..lanes).step_by(CHUNK) {
            let m = ended_early(stop, start..(start + CHUNK).min(lanes), last, &mut early);
            let (early, w) = (&early[..m], whole_vectors(m));
            for (k, &lane) in ended.iter_mut().zip(early) {
                *k = stop[lane] as usize;
            }
            let ended = &ended[..m];
            for a in (0..na).filter(|&a| read[a]) {
                for (e, (&lane, &k)) in early.iter().zip(ended).enumerate() {
                    let cell = (k * na + a) * block + lane;
                    level[a][e] = paths.levels[cell];
                    if !paths.logs.is_empty() {
                        log[a][e] = paths.logs[cell];
                    }
                }
                if paths.logs.is_empty() {
                    ln_into(&mut log[a][..w], &level[a][..w]);
                }
            }
            for &(j, discount, asset, strike, log_strike, rest) in &puts {
                for (e, &k) in ended.iter().enumerate() {
                    let (drift, sd, growth) = rest[k];
                    let x = log[asset][e] - log_strike + drift;
                    near[e] = -standardised(x, sd);
                    far[e] = -standardised(x + sd * sd, sd);
                    grown[e] = level[asset][e] * growth;
                }
                let (mut n2, mut n1) = ([0.0f64; CHUNK], [0.0f64; CHUNK]);
                norm_cdfs_into(&mut n2[..w], &near[..w]);
                norm_cdfs_into(&mut n1[..w], &far[..w]);
                for ((v, n2), (n1, f)) in near[..w].iter_mut().zip(&n2[..w]).zip(n1[..w].iter().zip(&grown[..w])) {
                    *v = discount * (strike * n2 - f * n1);
                }
                for (&lane, &v) in early.iter().zip(&near[..m]) {
                    columns[j][lane] = v;
                }
            }
            if let (Some(inner), Some(scratch)) = (&self.inner, &mut scratch) {
                inner.chunk(early, ended, &log, rng, scratch, columns);
            }
        }
    }

    /// The surprises ([`ControlKind::Surprise`]): date by date, a chunk of the lanes alive
    /// at it at a time, packed, the event's log levels at the date and the one before
    /// gathered, then the chances of each asset's condition given the others' moves, all
    /// in straight loops over the packed lanes.
    #[inline(always)]
    fn surprise_values(
        &self,
        p: &Program,
        paths: &PathBuffers,
        stop: &[f64],
        lanes: usize,
        block: usize,
        columns: &mut [Vec<f64>],
    ) {
        use orthant::{CHUNK, MOST_TERMS};
        let na = p.assets.len();
        let mut alive = [0usize; CHUNK];
        // Per term and packed lane: the log level before the step and after it (ones to
        // start with: the lanes past a chunk's count stay finite), the move less its
        // drift, whether the term's condition is met, and its chance given the others'
        // moves; per lane, the value.
        let mut before = [[1.0f64; CHUNK]; MOST_TERMS];
        let mut after = [[1.0f64; CHUNK]; MOST_TERMS];
        let mut chance = [[0.0f64; CHUNK]; MOST_TERMS];
        let (mut moved, mut met) = ([[0.0f64; CHUNK]; MOST_TERMS], [[0.0f64; CHUNK]; MOST_TERMS]);
        let mut value = [0.0f64; CHUNK];
        for (j, c) in self.list.iter().enumerate() {
            let ControlKind::Surprise { terms, above, steps } = &c.kind else { continue };
            let above = *above;
            let t = terms.len();
            columns[j][..lanes].fill(0.0);
            for step in steps {
                let k = step.k;
                for start in (0..lanes).step_by(CHUNK) {
                    let mut m = 0;
                    for lane in start..(start + CHUNK).min(lanes) {
                        alive[m] = lane;
                        m += usize::from(stop[lane] >= k as f64);
                    }
                    if m == 0 {
                        continue;
                    }
                    let w = whole_vectors(m);
                    for (i, &(a, _)) in terms.iter().enumerate() {
                        for (date, out) in [(k - 1, &mut before[i]), (k, &mut after[i])] {
                            let cell = (date * na + a) * block;
                            if paths.logs.is_empty() {
                                let mut level = [1.0f64; CHUNK];
                                for (l, &lane) in level.iter_mut().zip(&alive[..m]) {
                                    *l = paths.levels[cell + lane];
                                }
                                ln_into(&mut out[..w], &level[..w]);
                            } else {
                                for (o, &lane) in out.iter_mut().zip(&alive[..m]) {
                                    *o = paths.logs[cell + lane];
                                }
                            }
                        }
                    }
                    // Each term's move less its drift, and whether its condition is met.
                    for i in 0..t {
                        let (lh, drift) = (terms[i].1, step.drift[i]);
                        for (((mv, hit), &a), &b) in
                            moved[i][..w].iter_mut().zip(&mut met[i][..w]).zip(&after[i][..w]).zip(&before[i][..w])
                        {
                            *mv = (a - b) - drift;
                            *hit = f64::from(u8::from(if above { a >= lh } else { a < lh }));
                        }
                    }
                    for (c, (beta, sd)) in step.given.iter().enumerate() {
                        let mut z = [0.0f64; CHUNK];
                        for (z, &b) in z[..w].iter_mut().zip(&before[c][..w]) {
                            *z = b + step.drift[c];
                        }
                        for (i, &beta) in beta.iter().enumerate().filter(|&(i, _)| i != c) {
                            for (z, &mv) in z[..w].iter_mut().zip(&moved[i][..w]) {
                                *z += beta * mv;
                            }
                        }
                        let lh = terms[c].1;
                        for z in &mut z[..w] {
                            let gap = *z - lh;
                            *z = standardised(if above { gap } else { -gap }, *sd);
                        }
                        norm_cdfs_into(&mut chance[c][..w], &z[..w]);
                    }
                    // Σ_c (1{all} − 1{all but c}·chance_c), discounted.
                    let mut all = [1.0f64; CHUNK];
                    for met in &met[..t] {
                        for (a, &h) in all[..w].iter_mut().zip(&met[..w]) {
                            *a *= h;
                        }
                    }
                    value[..w].fill(0.0);
                    for (c, chance) in chance[..t].iter().enumerate() {
                        let mut others = [1.0f64; CHUNK];
                        for met in met[..t].iter().enumerate().filter(|&(i, _)| i != c).map(|(_, m)| m) {
                            for (o, &h) in others[..w].iter_mut().zip(&met[..w]) {
                                *o *= h;
                            }
                        }
                        for (((v, &a), &o), &q) in
                            value[..w].iter_mut().zip(&all[..w]).zip(&others[..w]).zip(&chance[..w])
                        {
                            *v += a - o * q;
                        }
                    }
                    for v in &mut value[..w] {
                        *v *= step.discount;
                    }
                    for (&lane, &v) in alive[..m].iter().zip(&value[..m]) {
                        columns[j][lane] += v;
                    }
                }
            }
        }
    }

    /// The stopped-hedge controls, all in one pass over the steps.
    #[allow(clippy::too_many_arguments)]
    #[inline(always)]
    fn hedge_values(
        &self,
        h: &Hedge,
        p: &Program,
        paths: &PathBuffers,
        stop: &[f64],
        lanes: usize,
        block: usize,
        columns: &mut [Vec<f64>],
    ) {
        let na = p.assets.len();
        let first =
            self.list.iter().position(|c| matches!(c.kind, ControlKind::Hedge { .. })).unwrap_or(self.list.len());
        let hedges = self.list.iter().filter(|c| matches!(c.kind, ControlKind::Hedge { .. })).count();
        let per_asset = hedges / na.max(1);
        for col in &mut columns[first..first + hedges] {
            col[..lanes].fill(0.0);
        }
        if per_asset == 0 {
            return;
        }
        let inv_spot: Vec<f64> = p.assets.iter().map(|m| 1.0 / m.spot).collect();
        // A group of lanes at a time through every step, the gains added up in the
        // columns, whose group stays in the first-level cache. Per lane the same additions
        // in the same order as step by step over the block: the same bits.
        const GROUP: usize = 64;
        for start in (0..lanes).step_by(GROUP) {
            let end = (start + GROUP).min(lanes);
            let level = |k: usize, a: usize| &paths.levels[(k * na + a) * block..][start..end];
            let ends = &stop[start..end];
            // From the valuation date: the steps before it are fixings, known on every
            // path (their gains would be a constant, not a zero-mean control).
            for k in p.past..p.grid.len() - 1 {
                let mut worst = [f64::INFINITY; GROUP];
                let worst = &mut worst[..end - start];
                for (a, inv) in inv_spot.iter().enumerate() {
                    for (w, s) in worst.iter_mut().zip(level(k, a)) {
                        *w = w.min(s * inv);
                    }
                }
                let now = k as f64;
                for (a, &inv) in inv_spot.iter().enumerate() {
                    let (f0, f1) = (h.factor[k * na + a], h.factor[(k + 1) * na + a]);
                    let (s0, s1) = (level(k, a), level(k + 1, a));
                    let cols = &mut columns[first + a * per_asset..first + (a + 1) * per_asset];
                    // Held while the path is alive at the step's start: its end is known
                    // from `stop` on, so `k < stop` is known at tₖ. Selects, not branches,
                    // so the loops vectorise.
                    if let [alive, low, scaled] = cols {
                        let (alive, low, scaled) =
                            (&mut alive[start..end], &mut low[start..end], &mut scaled[start..end]);
                        for i in 0..alive.len() {
                            let step = s1[i] * f1 - s0[i] * f0;
                            let d = if now < ends[i] { step } else { 0.0 };
                            let w = if s0[i] * inv == worst[i] { d } else { 0.0 };
                            alive[i] += d;
                            low[i] += w;
                            scaled[i] += (worst[i] - 1.0) * w;
                        }
                    } else if let [alive, scaled] = cols {
                        let (alive, scaled) = (&mut alive[start..end], &mut scaled[start..end]);
                        for i in 0..alive.len() {
                            let step = s1[i] * f1 - s0[i] * f0;
                            let d = if now < ends[i] { step } else { 0.0 };
                            alive[i] += d;
                            scaled[i] += (worst[i] - 1.0) * d;
                        }
                    }
                }
            }
        }
    }

    pub fn len(&self) -> usize {
        self.list.len()
    }

    pub fn is_empty(&self) -> bool {
        self.list.is_empty()
    }

    pub fn name(&self, j: usize) -> String {
        self.list[j].name.clone()
    }

    pub fn mean(&self, j: usize) -> f64 {
        self.list[j].mean
    }

    /// The size of what control `j` is built on (its discounted forward), for telling
    /// randomness from rounding.
    pub fn scale(&self, j: usize) -> f64 {
        self.list[j].scale
    }

    /// Whether any control reads the levels of the last date (which a path that stopped
    /// early must then be given, [`PathBuffers::jump_stopped_to_last`]).
    pub fn reads_last_date(&self) -> bool {
        self.list.iter().any(|c| {
            matches!(c.kind, ControlKind::Terminal { .. } | ControlKind::Call { .. } | ControlKind::Digital { .. })
        })
    }

    /// Whether any control needs log levels.
    pub fn needs_logs(&self) -> bool {
        self.list.iter().any(|c| matches!(c.kind, ControlKind::Geometric { .. } | ControlKind::GeometricCall { .. }))
    }

    /// Writes control `j`'s discounted value on each path into `out`.
    #[inline(always)]
    fn values(&self, j: usize, p: &Program, paths: &PathBuffers, lanes: usize, block: usize, out: &mut [f64]) {
        let c = &self.list[j];
        let na = p.assets.len();
        let last = p.grid.len() - 1;
        let cell = |k: usize, a: usize| (k * na + a) * block;
        match &c.kind {
            ControlKind::Terminal { asset } => {
                let s = &paths.levels[cell(last, *asset)..][..lanes];
                for (o, s) in out.iter_mut().zip(s) {
                    *o = c.discount * s;
                }
            }
            ControlKind::Call { asset, strike } => {
                let s = &paths.levels[cell(last, *asset)..][..lanes];
                for (o, s) in out.iter_mut().zip(s) {
                    *o = c.discount * (s - strike).max(0.0);
                }
            }
            // Filled for all assets at once by `hedge_values`; by `stopped_values`.
            ControlKind::Hedge { .. }
            | ControlKind::StoppedDigital { .. }
            | ControlKind::StoppedPut { .. }
            | ControlKind::Surprise { .. } => {}
            ControlKind::Dated { thresholds, above, dates } => {
                let out = &mut out[..lanes];
                out.fill(0.0);
                for &(k, discount) in dates {
                    event_value::<true>(out, discount, thresholds, *above, |a| &paths.levels[cell(k, a)..]);
                }
            }
            ControlKind::Digital { thresholds, above } => {
                let levels = |a| &paths.levels[cell(last, a)..];
                event_value::<false>(&mut out[..lanes], c.discount, thresholds, *above, levels);
            }
            ControlKind::Geometric { asset, fixings } | ControlKind::GeometricCall { asset, fixings, .. } => {
                let strike = match &c.kind {
                    ControlKind::GeometricCall { strike, .. } => Some(*strike),
                    _ => None,
                };
                out[..lanes].fill(0.0);
                for &k in fixings {
                    let logs = &paths.logs[cell(k, *asset)..][..lanes];
                    for (o, x) in out.iter_mut().zip(logs) {
                        *o += x;
                    }
                }
                let inv = 1.0 / fixings.len() as f64;
                for o in &mut out[..lanes] {
                    let g = (*o * inv).exp();
                    *o = c.discount * strike.map_or(g, |k| (g - k).max(0.0));
                }
            }
        }
    }
}

/// `discount` times the indicator that every listed asset's level (`levels(asset)`, from
/// the first lane) is at or above its threshold (`above`), or every one below, per lane:
/// written into `out`, or added to it (`ADD`). One pass over the lanes, vectorised for
/// up to three underlyings (an event has at most three, [`super::digital`]): the
/// comparisons' masks combined, then `discount` or 0 selected as a value and stored
/// whole (a select of what is kept in `out` would become a masked store, slow on some
/// CPUs).
#[inline(always)]
fn event_value<'a, const ADD: bool>(
    out: &mut [f64],
    discount: f64,
    thresholds: &[(usize, f64)],
    above: bool,
    levels: impl Fn(usize) -> &'a [f64],
) {
    let hit = |s: f64, h: f64| if above { s >= h } else { s < h };
    let put = |o: &mut f64, all: bool| {
        let v = if all { discount } else { 0.0 };
        *o = if ADD { *o + v } else { v };
    };
    let n = out.len();
    let at = |(a, h): (usize, f64)| (levels(a), h);
    match *thresholds {
        [t0] => {
            let (s0, h0) = at(t0);
            for (o, &s0) in out.iter_mut().zip(&s0[..n]) {
                put(o, hit(s0, h0));
            }
        }
        [t0, t1] => {
            let ((s0, h0), (s1, h1)) = (at(t0), at(t1));
            for ((o, &s0), &s1) in out.iter_mut().zip(&s0[..n]).zip(&s1[..n]) {
                put(o, hit(s0, h0) & hit(s1, h1));
            }
        }
        [t0, t1, t2] => {
            let ((s0, h0), (s1, h1), (s2, h2)) = (at(t0), at(t1), at(t2));
            for (((o, &s0), &s1), &s2) in out.iter_mut().zip(&s0[..n]).zip(&s1[..n]).zip(&s2[..n]) {
                put(o, hit(s0, h0) & hit(s1, h1) & hit(s2, h2));
            }
        }
        _ => {
            for (i, o) in out.iter_mut().enumerate() {
                put(o, thresholds.iter().all(|&(a, h)| hit(levels(a)[i], h)));
            }
        }
    }
}

/// The controls of [`Controls::new`] when the dynamics have curves: every expectation from
/// the lognormal moments of the levels (forward `S₀e^{G(t)}`, total variance `V(t)`), so
/// each stays exact. The call on the last level is Black's formula on its forward with the
/// total variance; the geometric average `G` of fixings `t₁ < … < tₙ` is lognormal, with
/// `E[ln G] = ln S₀ + mean(G(tᵢ) − V(tᵢ)/2)` and `Var[ln G] = Σᵢⱼ V(min(tᵢ, tⱼ)) / n²`.
fn curve_controls(p: &Program, c: &crate::dynamics::GridCurves) -> Vec<Control> {
    let mut list = Vec::new();
    let last = p.grid.len() - 1;
    let discount = c.discount[last];
    // Black's formula with unit time: `discount · (F·N(d₁) − K·N(d₂))`, `d₁ = (ln F/K + v/2)/√v`.
    let black = |forward: f64, strike: f64, variance: f64, discount: f64| {
        black_scholes(OptionKind::Call, forward, strike, 1.0, -discount.ln(), 0.0, variance.max(0.0).sqrt())
    };
    for (a, m) in p.assets.iter().enumerate() {
        let forward = m.spot * c.log_growth[a][last].exp();
        list.push(Control {
            name: format!("{} forward", m.name),
            kind: ControlKind::Terminal { asset: a },
            discount,
            mean: discount * forward,
            scale: discount * forward,
        });
        list.push(Control {
            name: format!("{} call", m.name),
            kind: ControlKind::Call { asset: a, strike: forward },
            discount,
            mean: black(forward, forward, c.variance[a][last], discount),
            scale: discount * forward,
        });
    }
    for (a, fixings) in &p.averages {
        let m = &p.assets[*a];
        if fixings.iter().any(|&k| k <= p.past) {
            continue;
        }
        let n = fixings.len() as f64;
        let k_pay = *fixings.last().unwrap_or(&last);
        let discount = c.discount[k_pay];
        let mean_log =
            m.spot.ln() + fixings.iter().map(|&k| c.log_growth[*a][k] - 0.5 * c.variance[*a][k]).sum::<f64>() / n;
        // Fixings are in increasing order: V(tᵢ) is the smaller of the pair for the
        // 2(n − i) − 1 ordered pairs whose earlier index is i (0-based).
        let var_log =
            fixings.iter().enumerate().map(|(i, &k)| (2.0 * (n - i as f64) - 1.0) * c.variance[*a][k]).sum::<f64>()
                / (n * n);
        let forward = (mean_log + 0.5 * var_log).exp();
        list.push(Control {
            name: format!("{} geometric average", m.name),
            kind: ControlKind::Geometric { asset: *a, fixings: fixings.clone() },
            discount,
            mean: discount * forward,
            scale: discount * forward,
        });
        list.push(Control {
            name: format!("{} geometric-average call", m.name),
            kind: ControlKind::GeometricCall { asset: *a, fixings: fixings.clone(), strike: m.spot },
            discount,
            mean: black(forward, m.spot, var_log, discount),
            scale: discount * forward,
        });
    }
    list
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A model of one step with the given scales and correlation factor.
    fn one_step(scale: Vec<f64>, cholesky: Vec<Vec<f64>>) -> Model {
        let n = scale.len();
        Model {
            drift: vec![vec![0.0; n], vec![0.01; n]],
            scale: vec![vec![0.0; n], scale.clone()],
            log_spot: vec![0.0; n],
            cholesky,
            uncorrelated: false,
            watched: Vec::new(),
            total_drift: vec![vec![0.0; n], vec![0.01; n]],
            total_variance: vec![vec![0.0; n], scale.iter().map(|s| s * s).collect()],
        }
    }

    #[test]
    fn a_surprise_step_has_the_law_of_one_move_given_the_others() {
        // Against the textbook conditional normal law (common practice): the mean of X_c
        // given the others X_o is Σ_co Σ_oo⁻¹ (x_o − μ_o) and its variance
        // Σ_cc − Σ_co Σ_oo⁻¹ Σ_oc, the 2×2 inverse written out.
        let rho = [[1.0, 0.5, -0.3], [0.5, 1.0, 0.6], [-0.3, 0.6, 1.0]];
        let l = semidefinite_cholesky(&rho.concat(), 3);
        let chol: Vec<Vec<f64>> = (0..3).map(|i| l[i * 3..i * 3 + 3].to_vec()).collect();
        let sd = vec![0.1, 0.15, 0.2];
        let model = one_step(sd.clone(), chol);
        let step = SurpriseStep::new(&model, &[0, 1, 2], 1, 1.0);
        let cov = |i: usize, j: usize| rho[i][j] * sd[i] * sd[j];
        for c in 0..3 {
            let o: Vec<usize> = (0..3).filter(|&i| i != c).collect();
            let (a, b, d) = (cov(o[0], o[0]), cov(o[0], o[1]), cov(o[1], o[1]));
            let det = a * d - b * b;
            let inv = [[d / det, -b / det], [-b / det, a / det]];
            let beta: Vec<f64> = (0..2).map(|j| (0..2).map(|i| cov(c, o[i]) * inv[i][j]).sum()).collect();
            let var = cov(c, c) - (0..2).map(|j| beta[j] * cov(o[j], c)).sum::<f64>();
            let (got_beta, got_sd) = &step.given[c];
            assert_eq!(got_beta[c], 0.0);
            for (j, &i) in o.iter().enumerate() {
                assert!((got_beta[i] - beta[j]).abs() < 1e-12, "c {c}: β {got_beta:?} for {beta:?}");
            }
            assert!((got_sd - var.sqrt()).abs() < 1e-12, "c {c}: sd {got_sd} for {}", var.sqrt());
        }
        // Two perfectly correlated assets: each is its partner's move scaled, none left random.
        let model = one_step(vec![0.1, 0.3], vec![vec![1.0, 0.0], vec![1.0, 0.0]]);
        let step = SurpriseStep::new(&model, &[0, 1], 1, 1.0);
        assert!((step.given[0].0[1] - 1.0 / 3.0).abs() < 1e-12 && step.given[0].1.abs() < 1e-9, "{:?}", step.given);
        assert!((step.given[1].0[0] - 3.0).abs() < 1e-12 && step.given[1].1.abs() < 1e-9, "{:?}", step.given);
    }

    #[test]
    fn the_semidefinite_factor_reproduces_its_matrix() {
        // Positive definite; with an asset of no variance left; with two perfectly
        // correlated assets (rank 2): L·Lᵀ is the matrix in each case.
        let cases: [[f64; 9]; 3] = [
            [0.04, 0.015, 0.012, 0.015, 0.0625, 0.0375, 0.012, 0.0375, 0.09],
            [0.04, 0.0, 0.012, 0.0, 0.0, 0.0, 0.012, 0.0, 0.09],
            [0.04, 0.06, 0.012, 0.06, 0.09, 0.018, 0.012, 0.018, 0.09],
        ];
        for cov in cases {
            let l = semidefinite_cholesky(&cov, 3);
            for i in 0..3 {
                for j in 0..3 {
                    assert!(j <= i || l[i * 3 + j] == 0.0, "lower triangular");
                    let back: f64 = (0..3).map(|k| l[i * 3 + k] * l[j * 3 + k]).sum();
                    assert!((back - cov[i * 3 + j]).abs() < 1e-12, "{cov:?}: ({i}, {j}) {back}");
                }
            }
        }
    }

    /// The inverse Gaussian CDF with mean `m` and shape `l` (Chhikara and Folks, 1989).
    fn inverse_gaussian_cdf(x: f64, m: f64, l: f64) -> f64 {
        use crate::closed_form::norm_cdf;
        let r = (l / x).sqrt();
        norm_cdf(r * (x / m - 1.0)) + (2.0 * l / m).exp() * norm_cdf(-r * (x / m + 1.0))
    }

    #[test]
    fn first_passage_fractions_follow_the_inverse_gaussian_law_they_map() {
        // For each case, the fraction s of the step is at most f exactly when the
        // inverse-Gaussian time u = s / (1 − s) is at most f / (1 − f): the empirical
        // distribution of 40,000 draws against that CDF (Kolmogorov distance; its 99.9%
        // quantile for 40,000 draws is about 1.95 / √40,000 ≈ 0.0098).
        let mut rng = Pcg64::new(0xcafe, 0xf00d);
        for (gap, moved) in [(0.3, -0.5), (1.2, 0.4), (0.5, 0.9), (0.8, 0.8)] {
            let n = 40_000;
            let mut fractions: Vec<f64> = (0..n)
                .map(|_| {
                    let z: f64 = rng.sample(StandardNormal);
                    let u: f64 = rng.sample(Open01);
                    bridge_first_passage(gap, moved, z, u)
                })
                .collect();
            fractions.sort_by(f64::total_cmp);
            let (drift, shape) = (f64::abs(gap - moved), gap * gap);
            let mut worst: f64 = 0.0;
            for (i, f) in fractions.iter().enumerate().step_by(97) {
                assert!((0.0..=1.0).contains(f), "a fraction of the step: {f}");
                let x = f / (1.0 - f);
                let cdf = if drift == 0.0 {
                    // Lévy: P(shape / Z² ≤ x) = 2(1 − Φ(√(shape / x))).
                    2.0 * (1.0 - crate::closed_form::norm_cdf((shape / x).sqrt()))
                } else {
                    inverse_gaussian_cdf(x, gap / drift, shape)
                };
                worst = worst.max((cdf - (i as f64 + 0.5) / f64::from(n)).abs());
            }
            assert!(worst < 0.0098, "gap {gap}, moved {moved}: Kolmogorov distance {worst}");
        }
    }

    #[test]
    fn the_bridge_crossing_probability_is_the_chance_the_drifted_motion_reaches_its_line() {
        // The first-passage law above rests on writing the bridge as a Brownian motion
        // reaching a line; that motion reaches it with probability exp(2·drift·gap), which
        // must be the bridge crossing probability exp(−2·gap·(gap − moved)) used by
        // `monitors` (in units of σ√Δ).
        for (gap, moved) in [(0.3_f64, -0.5_f64), (1.2, 0.4), (2.0, 1.9)] {
            let drift = moved - gap;
            let motion = (2.0 * drift * gap).exp();
            let (x0, x1, h): (f64, f64, f64) = (0.0, moved, gap);
            let bridge = (-2.0 * (x0 - h) * (x1 - h)).exp();
            assert!((motion - bridge).abs() < 1e-14, "{motion} vs {bridge}");
        }
        // And the step's maximum is at or above a level exactly when that crossing happens
        // for the same uniform.
        for u in [0.01_f64, 0.3, 0.7, 0.99] {
            let m = bridge_extreme(0.0, 0.2, 1.0, u, true);
            let crossing = (-2.0 * (0.0 - m) * (0.2 - m)).exp();
            assert!((crossing - u).abs() < 1e-12, "u {u}: maximum {m} is crossed with probability {crossing}");
            let low = bridge_extreme(0.0, 0.2, 1.0, u, false);
            assert!((-2.0 * (0.0 - low) * (0.2 - low)).exp() - u < 1e-12);
        }
    }
}
