//! Stage 4: simulation.
//!
//! Risk-neutral GBM with exact log steps on the program's grid ([`paths`]), the compiled
//! payoff run over blocks of paths ([`exec`]), antithetic pairs and control variates with
//! the regression coefficient estimated from the run, and streaming statistics
//! ([`stats`]). Paths come in fixed blocks of [`BLOCK`]; block `i` draws from its own PCG
//! stream derived from `(seed, i)`, and block results are merged in block order, so the
//! same seed gives the same bits on any number of threads. Memory is bounded by the
//! blocks in flight, not by the path count.

mod condition;
pub mod digital;
pub mod exec;
pub mod exercise;
pub mod joint;
pub mod normals;
mod orthant;
mod pack;
pub mod partial;
pub mod paths;
pub mod regress;
pub mod rule;
pub mod sobol;
mod special;
pub mod stats;
mod ziggurat;

use std::sync::Mutex;
use std::time::{Duration, Instant};

use rayon::prelude::*;

use crate::compile::Program;
use crate::diagnostic::{Diagnostic, Span};
use exec::Workspace;
use paths::Controls;
use stats::BlockResult;

/// Whether the lane loops run on the AVX-512 subsets they are also built for
/// (foundation, doubleword and quadword, vector length): when the CPU has them, unless
/// the environment sets `PATHFOLD_NO_AVX512` (then AVX2 at most, as on a CPU without
/// them). Twice AVX2's lanes per instruction for the same IEEE additions,
/// multiplications, divisions and selects, never fused: the same bits either way
/// (tested by pricing with and without). Decided once per process.
#[cfg(target_arch = "x86_64")]
#[inline]
pub(crate) fn wide_lanes() -> bool {
    static WIDE: std::sync::OnceLock<bool> = std::sync::OnceLock::new();
    *WIDE.get_or_init(|| {
        std::env::var_os("PATHFOLD_NO_AVX512").is_none()
            && std::is_x86_feature_detected!("avx512f")
            && std::is_x86_feature_detected!("avx512dq")
            && std::is_x86_feature_detected!("avx512vl")
    })
}

/// Paths per block. Part of the definition of a seed's result: changing it changes the
/// numbers every seed gives.
pub const BLOCK: usize = 256;

/// Blocks handed to the thread pool at a time; bounds memory for any path count.
const BLOCKS_IN_FLIGHT: usize = 256;

/// How to run a simulation.
#[derive(Clone, Debug, PartialEq)]
pub struct Settings {
    pub paths: u64,
    pub seed: u64,
    pub antithetic: bool,
    pub control_variates: bool,
    pub sampler: Sampler,
}

impl Default for Settings {
    fn default() -> Self {
        Settings {
            paths: DEFAULT_PATHS,
            seed: DEFAULT_SEED,
            antithetic: true,
            control_variates: true,
            sampler: Sampler::Random,
        }
    }
}

/// Where a path's normals come from.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub enum Sampler {
    /// Pseudo-random numbers: one PCG stream per block.
    #[default]
    Random,
    /// Randomised Sobol points through a Brownian bridge ([`sobol`]): the path count is
    /// split into [`sobol::RANDOMISATIONS`] independent randomisations of whole blocks,
    /// and the standard error is their spread.
    Sobol,
}

impl Sampler {
    /// The name `--sampler` takes.
    pub fn name(self) -> &'static str {
        match self {
            Sampler::Random => "random",
            Sampler::Sobol => "sobol",
        }
    }

    /// The sampler of a [`Sampler::name`].
    pub fn from_name(name: &str) -> Option<Sampler> {
        [Sampler::Random, Sampler::Sobol].into_iter().find(|s| s.name() == name)
    }
}

/// The default number of paths of `pathfold price`.
pub const DEFAULT_PATHS: u64 = 200_000;
/// The fewest paths a run may use: one block, 128 antithetic pairs, enough for a standard
/// error.
pub const MIN_PATHS: u64 = BLOCK as u64;
/// The most paths a run may use (10¹²).
pub const MAX_PATHS: u64 = 1_000_000_000_000;

impl Settings {
    /// Checks the path count against [`MIN_PATHS`]..=[`MAX_PATHS`]; the message names
    /// the option and the allowed range.
    pub fn validate(&self) -> Result<(), String> {
        path_count("--paths", self.paths)?;
        let most = sobol::RANDOMISATIONS as u64 * (1 << 32);
        if self.sampler == Sampler::Sobol && self.paths > most {
            return Err(format!(
                "--paths {} is too many for --sampler sobol: its points are numbered in 32 bits, so a run uses at most {} paths ({} randomisations of 2^32)",
                thousands(self.paths),
                thousands(most),
                sobol::RANDOMISATIONS
            ));
        }
        Ok(())
    }
}

/// Checks the cap of an error-bounded run (`--max-paths`): within the same range as
/// `--paths`, and not below the `paths` the run starts from.
pub fn validate_max_paths(max_paths: u64, paths: u64) -> Result<(), String> {
    path_count("--max-paths", max_paths)?;
    if max_paths < paths {
        return Err(format!(
            "--max-paths {} is below --paths {}: an error-bounded run starts from --paths and adds paths up to --max-paths; raise --max-paths or lower --paths",
            thousands(max_paths),
            thousands(paths)
        ));
    }
    Ok(())
}

fn path_count(option: &str, n: u64) -> Result<(), String> {
    if (MIN_PATHS..=MAX_PATHS).contains(&n) {
        Ok(())
    } else {
        Err(format!(
            "{option} {} is out of range: a run uses from {} paths (one block) to {} paths",
            thousands(n),
            thousands(MIN_PATHS),
            thousands(MAX_PATHS)
        ))
    }
}

/// `1234567` as `1,234,567`.
fn thousands(n: u64) -> String {
    let digits = n.to_string();
    let mut out = String::new();
    for (i, c) in digits.chars().enumerate() {
        if i > 0 && (digits.len() - i).is_multiple_of(3) {
            out.push(',');
        }
        out.push(c);
    }
    out
}
/// The default seed.
pub const DEFAULT_SEED: u64 = 1;

/// One date of the per-date profile.
#[derive(Clone, Debug, PartialEq)]
pub struct ProfileRow {
    pub label: String,
    pub time: f64,
    /// Probability that the product ends on this date (`None` if nothing can end here).
    pub end_probability: Option<f64>,
    /// Expected present value of what is paid on this date.
    pub expected_pv: f64,
}

/// What a simulation found.
#[derive(Clone, Debug, PartialEq)]
pub struct Estimate {
    pub price: f64,
    pub std_error: f64,
    /// Paths simulated (antithetic partners counted).
    pub paths: u64,
    pub seed: u64,
    pub antithetic: bool,
    /// The control variates the estimate used.
    pub controls: Vec<String>,
    /// Plain Monte Carlo variance over the variance achieved, at the same path count.
    pub variance_reduction: Option<f64>,
    pub profile: Vec<ProfileRow>,
    pub elapsed: Duration,
    /// What the caller should be told about the estimate (controls left out, a fallback
    /// to the plain estimate); warnings, never errors.
    pub warnings: Vec<Diagnostic>,
    /// The early exercise priced by regression (`may end`), if the product has any.
    pub exercise: Option<exercise::Exercise>,
}

/// Prices a compiled program.
pub fn simulate(program: &Program, settings: &Settings) -> Result<Estimate, Diagnostic> {
    simulate_as(program, settings, None, false).map(|(estimate, _)| estimate)
}

/// [`simulate`] for one of a series of runs of one product on common paths, whose prices
/// must move smoothly with a parameter (a coupon solved for). Every path is simulated
/// whole, as in [`joint`]: a run that packs its running paths hands a path other normals
/// when other paths end, and a parameter that moves an end would move the paths. The
/// surprises are kept or dropped as `surprises` says, instead of by their trial
/// ([`controls_for`]), when it is given; the decision the run took comes back with the
/// estimate, so the series takes its first run's for all the others and a trial near its
/// threshold cannot change the control set from one run to the next.
pub fn simulate_sharing(
    program: &Program,
    settings: &Settings,
    surprises: Option<bool>,
) -> Result<(Estimate, bool), Diagnostic> {
    simulate_as(program, settings, surprises, true)
}

fn simulate_as(
    program: &Program,
    settings: &Settings,
    surprises: Option<bool>,
    whole_paths: bool,
) -> Result<(Estimate, bool), Diagnostic> {
    let started = Instant::now();
    settings.validate().map_err(Diagnostic::new)?;
    let fitted = exercise::prepare(program, settings);
    let (controls, kept) = controls_deciding(&fitted, settings, surprises);
    if settings.sampler == Sampler::Sobol {
        return simulate_sobol(&fitted, settings, controls, whole_paths, started).map(|e| (e, kept));
    }
    let mut run = Run::with_controls(&fitted, settings, controls);
    run.whole_paths = whole_paths;
    let paths = if settings.antithetic { settings.paths.div_ceil(2) * 2 } else { settings.paths };
    run.extend_to(paths);
    run.finish(started).map(|e| (e, kept))
}

/// [`simulate`] with Sobol points: [`sobol::RANDOMISATIONS`] independent randomisations of
/// the same points, each `paths / RANDOMISATIONS` rounded up to whole blocks. The control
/// coefficients are fitted on all of them together; the price is the mean of the
/// randomisations' controlled estimates and the standard error their spread. The controls
/// are decided once for every randomisation (their trial runs once).
fn simulate_sobol(
    program: &Program,
    settings: &Settings,
    controls: Controls,
    whole_paths: bool,
    started: Instant,
) -> Result<Estimate, Diagnostic> {
    let qmc = sobol::Qmc::new(&program.grid, program.assets.len(), settings.seed);
    let count = sobol::RANDOMISATIONS as u64;
    let per = settings.paths.div_ceil(count).div_ceil(BLOCK as u64) * BLOCK as u64;
    let mut runs = Vec::with_capacity(sobol::RANDOMISATIONS);
    for r in 0..sobol::RANDOMISATIONS {
        let mut run = Run::with_controls(program, settings, controls.clone());
        run.points = Some((&qmc, r));
        run.whole_paths = whole_paths;
        run.extend_to(per);
        runs.push(run);
    }
    let mut pooled = Run::with_controls(program, settings, controls);
    for run in &runs {
        pooled.total.merge(&run.total);
    }
    pooled.paths = per * count;
    if !pooled.total.is_finite() {
        return pooled.finish(started);
    }
    let regression = pooled.regression();
    let estimates: Vec<f64> = runs
        .iter()
        .map(|run| {
            let m = &run.total.moments;
            let mut y = m.mean(0);
            for (b, &j) in regression.beta.iter().zip(&regression.kept) {
                y -= b * (m.mean(1 + j) - pooled.controls.mean(j));
            }
            y
        })
        .collect();
    let n = estimates.len() as f64;
    let price = estimates.iter().sum::<f64>() / n;
    let spread = estimates.iter().map(|e| (e - price) * (e - price)).sum::<f64>() / (n - 1.0);
    let std_error = (spread / n).sqrt();
    let raw_var = pooled.total.raw.variance(0) / pooled.paths as f64;
    let mut estimate = pooled.finish(started)?;
    estimate.price = price;
    estimate.std_error = std_error;
    estimate.variance_reduction =
        (std_error > 0.0).then(|| raw_var / (std_error * std_error)).filter(|v| v.is_finite());
    Ok(estimate)
}

/// Prices a compiled program, adding whole blocks of paths until the standard error is at
/// or below `target_se` or `max_paths` is reached. Starts from `settings.paths` rounded up
/// to whole blocks. Returns the estimate and whether the target was met.
///
/// Every stage only appends blocks and merges them in block order, and the path count is
/// always a whole number of blocks, so the result is bit for bit the result of
/// [`simulate`] with `settings.paths` set to the final path count.
pub fn simulate_to_target(
    program: &Program,
    settings: &Settings,
    target_se: f64,
    max_paths: u64,
) -> Result<(Estimate, bool), Diagnostic> {
    let started = Instant::now();
    settings.validate().and_then(|()| validate_max_paths(max_paths, settings.paths)).map_err(Diagnostic::new)?;
    if settings.sampler == Sampler::Sobol {
        return Err(Diagnostic::new("an error-bounded run needs the pseudo-random sampler: a Sobol run's error comes from randomisations of a point set fixed in advance"));
    }
    let block = BLOCK as u64;
    let whole = |n: u64| n.div_ceil(block) * block;
    let max_paths = whole(max_paths);
    let fitted = exercise::prepare(program, settings);
    let mut run = Run::new(&fitted, settings);
    let mut paths = whole(settings.paths).min(max_paths);
    loop {
        run.extend_to(paths);
        if !run.total.is_finite() {
            break;
        }
        let se = run.regression().std_error;
        if se <= target_se || paths >= max_paths {
            break;
        }
        // The error falls as 1/√n: aim 10% past the count the current error predicts, but
        // at most quadruple, since the estimate of the error is itself noisy early on.
        let needed = if se.is_finite() && target_se > 0.0 {
            (paths as f64 * (se / target_se).powi(2) * 1.1).min(4.0 * paths as f64) as u64
        } else {
            4 * paths
        };
        paths = whole(needed.max(paths + block)).min(max_paths);
    }
    let estimate = run.finish(started)?;
    let met = estimate.std_error <= target_se;
    Ok((estimate, met))
}

/// A simulation in progress: the merged statistics of blocks `0..blocks`.
struct Run<'a> {
    program: &'a Program,
    settings: &'a Settings,
    model: paths::Model,
    controls: Controls,
    total: BlockResult,
    paths: u64,
    /// For a Sobol run: the sampler and this run's randomisation.
    points: Option<(&'a sobol::Qmc, usize)>,
    /// The results of the blocks in flight, overwritten chunk after chunk.
    slots: Vec<BlockResult>,
    /// The last chunk's block results, waiting to be merged.
    done: Vec<BlockResult>,
    /// Workers' buffers between chunks, so a long run sets them up only once.
    spare: Mutex<Vec<Workspace>>,
    /// Whether every path is simulated whole ([`simulate_sharing`]).
    whole_paths: bool,
}

/// A workspace taken from a run's spares (or new when there is none), handed back when
/// the worker is done with it.
struct Lease<'s> {
    spare: &'s Mutex<Vec<Workspace>>,
    ws: Option<Workspace>,
}

impl<'s> Lease<'s> {
    fn take(spare: &'s Mutex<Vec<Workspace>>, new: impl FnOnce() -> Workspace) -> Self {
        let ws = spare.lock().ok().and_then(|mut v| v.pop()).unwrap_or_else(new);
        Lease { spare, ws: Some(ws) }
    }

    fn get(&mut self) -> &mut Workspace {
        self.ws.as_mut().expect("a lease holds its workspace until dropped")
    }
}

impl Drop for Lease<'_> {
    fn drop(&mut self) {
        if let (Some(ws), Ok(mut spare)) = (self.ws.take(), self.spare.lock()) {
            spare.push(ws);
        }
    }
}

/// Blocks of the trial that decides whether the surprises pay for their time, at most:
/// 16 (4,096 paths), fewer on a long schedule, so that the trial simulates at most
/// [`TRIAL_BLOCK_DATES`] block-dates (one block on a schedule of 64 dates or more: a run
/// of the fewest paths allowed, one block, then costs at most twice its own time).
const TRIAL_BLOCKS: u64 = 16;

/// The most block-dates (blocks times grid dates) a trial simulates.
const TRIAL_BLOCK_DATES: u64 = 1024;

/// The block streams of that trial: none a run's own blocks use (a pseudo-random run's
/// from 0, a Sobol run's from 2⁴⁰), nor a joint run's pilot ([`joint`], from 2⁶¹).
const TRIAL_STREAMS: u64 = 1 << 62;

/// What one normal probability of a surprise (with its gathers) costs against one step of
/// one asset of a run with controls: 0.8 on the yardstick's W3 (5.7 ns against 7 ns),
/// 0.5 on the demo autocallables (5.5 ns against 11 ns); the larger taken.
const SURPRISE_COST: f64 = 0.8;

/// The controls of a run: [`Controls::for_run`]'s, the surprises
/// ([`paths::Controls::surprises`]) kept only when they pay for their time.
///
/// They cut the variance of an autocallable whose end is its main risk (W3: a cut of
/// 35× becomes 64×) but cost a normal probability per asset on each date a path is alive
/// at, which on a product with many dated events costs more than it saves (the demo
/// autocallables: 87× becomes 95× for twice the time). So a trial of up to 4,096 paths
/// ([`TRIAL_BLOCKS`]), on streams of its own and the same for any thread count, regresses
/// the payoff with and without them; they stay when the variance ratio beats `1 + cost`,
/// the cost their normal probabilities per path (from the trial's own ends) against the
/// run's asset-steps, at [`SURPRISE_COST`]. The decision does not depend on the path
/// count, so a run grown to a target error gets the controls of a run of its final size.
/// Products with early exercise (whose fitted rule would need the trial first) go
/// without them.
pub(crate) fn controls_for(program: &Program, settings: &Settings) -> Controls {
    controls_deciding(program, settings, None).0
}

/// [`controls_for`], the trial replaced by `surprises` when it is given; with whether the
/// surprises were kept (false for a product that has none).
pub(crate) fn controls_deciding(program: &Program, settings: &Settings, surprises: Option<bool>) -> (Controls, bool) {
    let controls = Controls::for_run(program, settings);
    if controls.surprises().is_empty() {
        return (controls, false);
    }
    match surprises {
        Some(true) => (controls, true),
        Some(false) => (controls.without_surprises(), false),
        None if trial_keeps_surprises(program, settings, &controls) => (controls, true),
        None => (controls.without_surprises(), false),
    }
}

/// The trial of [`controls_for`]: whether `controls`' surprises pay for their time.
fn trial_keeps_surprises(program: &Program, settings: &Settings, controls: &Controls) -> bool {
    if !program.choices.is_empty() {
        return false;
    }
    let blocks = (TRIAL_BLOCK_DATES / program.grid.len().max(1) as u64).clamp(1, TRIAL_BLOCKS);
    let trial_paths = blocks * BLOCK as u64;
    let model = paths::Model::new(program);
    let mut ws = Workspace::new(program, &model, controls);
    let mut total = BlockResult::new(1 + controls.len(), program.events.len(), program.payments.len());
    let mut one = BlockResult::new(0, 0, 0);
    for b in 0..blocks {
        ws.run_block_into(program, &model, controls, settings, TRIAL_STREAMS | b, BLOCK, None, &mut one);
        total.merge(&one);
    }
    let known = |j: usize| regress::Known { mean: controls.mean(j), scale: controls.scale(j) };
    let with = regress::regress(&total.moments, &(0..controls.len()).map(known).collect::<Vec<_>>()).std_error;
    let surprises = controls.surprises();
    let others: Vec<usize> = (0..controls.len()).filter(|j| !surprises.contains(j)).collect();
    let (n, mean, m2) = total.moments.parts();
    let d = 1 + controls.len();
    let rows: Vec<usize> = std::iter::once(0).chain(others.iter().map(|&j| 1 + j)).collect();
    let sub_mean = rows.iter().map(|&i| mean[i]).collect();
    let sub_m2 = rows.iter().flat_map(|&i| rows.iter().map(move |&j| m2[i * d + j])).collect();
    let without = stats::Moments::from_parts(n, sub_mean, sub_m2)
        .map(|m| regress::regress(&m, &others.iter().map(|&j| known(j)).collect::<Vec<_>>()).std_error);
    // The fraction of paths alive at each grid date, from the trial's ends.
    let mut alive = vec![1.0; program.grid.len()];
    for (slot, e) in program.events.iter().enumerate() {
        let gone = total.ended[slot] / trial_paths as f64;
        for (a, &t) in alive.iter_mut().zip(&program.grid) {
            if e.time < t - 1e-12 {
                *a -= gone;
            }
        }
    }
    let steps = program.grid.len().saturating_sub(1 + program.past) * program.assets.len();
    let cost = SURPRISE_COST * controls.surprise_work(&alive) / steps.max(1) as f64;
    matches!(without, Some(without) if with > 0.0 && (without / with).powi(2) >= 1.0 + cost)
}

impl<'a> Run<'a> {
    fn new(program: &'a Program, settings: &'a Settings) -> Self {
        Run::with_controls(program, settings, controls_for(program, settings))
    }

    fn with_controls(program: &'a Program, settings: &'a Settings, controls: Controls) -> Self {
        let model = paths::Model::new(program);
        let dims = 1 + controls.len();
        let total = BlockResult::new(dims, program.events.len(), program.payments.len());
        Run {
            program,
            settings,
            model,
            controls,
            total,
            paths: 0,
            points: None,
            slots: Vec::new(),
            done: Vec::new(),
            spare: Mutex::new(Vec::new()),
            whole_paths: false,
        }
    }

    /// Simulates the blocks that take the run from its current path count to `paths`.
    /// The current count must be a whole number of blocks.
    fn extend_to(&mut self, paths: u64) {
        debug_assert!(self.paths.is_multiple_of(BLOCK as u64), "a run can only grow from whole blocks");
        let (program, settings, model, controls) = (self.program, self.settings, &self.model, &self.controls);
        let points = self.points;
        // A Sobol run's blocks draw the rest of their numbers from streams no
        // pseudo-random run's blocks use; its points run on from block to block.
        let stream = |b: u64| points.map_or(b, |(_, r)| ((r as u64 + 1) << 40) | b);
        let drawn = if settings.antithetic { BLOCK / 2 } else { BLOCK } as u64;
        let blocks = paths.div_ceil(BLOCK as u64);
        let mut next = self.paths / BLOCK as u64;
        let (spare, whole_paths) = (&self.spare, self.whole_paths);
        // Chunk by chunk; a chunk's results are merged (in block order, on one thread)
        // while the next chunk is simulated, so the merge does not leave a core idle.
        let mut waiting = 0;
        while next < blocks || waiting > 0 {
            let end = (next + BLOCKS_IN_FLIGHT as u64).min(blocks);
            let count = (end - next) as usize;
            if self.slots.len() < count {
                self.slots.resize_with(count, || BlockResult::new(0, 0, 0));
            }
            let first = next;
            let (slots, done, total) = (&mut self.slots, &self.done, &mut self.total);
            rayon::join(
                || {
                    slots[..count].par_iter_mut().enumerate().for_each_init(
                        || {
                            Lease::take(spare, || {
                                let mut ws = Workspace::new(program, model, controls);
                                if whole_paths {
                                    ws.simulate_whole_paths();
                                }
                                ws
                            })
                        },
                        |lease, (i, slot)| {
                            let b = first + i as u64;
                            let lanes = (paths - b * BLOCK as u64).min(BLOCK as u64) as usize;
                            let at = points.map(|(qmc, r)| exec::Points { qmc, r, first: (b * drawn) as u32 });
                            lease.get().run_block_into(program, model, controls, settings, stream(b), lanes, at, slot);
                        },
                    )
                },
                || {
                    for r in &done[..waiting] {
                        total.merge(r);
                    }
                },
            );
            std::mem::swap(&mut self.slots, &mut self.done);
            waiting = count;
            next = end;
        }
        self.paths = self.paths.max(paths);
    }

    /// The control-variate regression of the blocks so far.
    fn regression(&self) -> regress::Regression {
        let known: Vec<regress::Known> = (0..self.controls.len())
            .map(|j| regress::Known { mean: self.controls.mean(j), scale: self.controls.scale(j) })
            .collect();
        regress::regress(&self.total.moments, &known)
    }

    fn finish(self, started: Instant) -> Result<Estimate, Diagnostic> {
        let (program, settings, controls, total, paths) =
            (self.program, self.settings, &self.controls, &self.total, self.paths);
        if !total.is_finite() {
            return Err(not_finite(program, total, paths));
        }
        let regression = self.regression();
        let (price, std_error) = (regression.price, regression.std_error);
        let warnings = control_warnings(&regression, controls);
        let raw_var = total.raw.variance(0) / paths as f64;
        let variance_reduction = (std_error > 0.0).then(|| raw_var / (std_error * std_error)).filter(|v| v.is_finite());
        let n = paths as f64;
        let mut profile: Vec<ProfileRow> = Vec::new();
        for (slot, e) in program.events.iter().enumerate() {
            profile.push(ProfileRow {
                label: e.label(),
                time: e.time,
                end_probability: Some(total.ended[slot] / n),
                expected_pv: 0.0,
            });
        }
        for (slot, p) in program.payments.iter().enumerate() {
            let pv = total.paid[slot] / n;
            match profile.iter_mut().find(|r| (r.time - p.time).abs() < 1e-9) {
                Some(row) => row.expected_pv += pv,
                None => {
                    profile.push(ProfileRow { label: p.label(), time: p.time, end_probability: None, expected_pv: pv })
                }
            }
        }
        profile.sort_by(|a, b| a.time.total_cmp(&b.time));
        Ok(Estimate {
            price,
            std_error,
            paths,
            seed: settings.seed,
            antithetic: settings.antithetic,
            controls: regression.kept.iter().map(|&i| controls.name(i)).collect(),
            variance_reduction,
            profile,
            elapsed: started.elapsed(),
            warnings,
            exercise: exercise::Exercise::of(program),
        })
    }
}

/// How many source places other than `first` have a site with a bad path.
fn other_places(sites: &[Span], counts: &[u64], first: Span) -> usize {
    let mut places: Vec<Span> =
        sites.iter().zip(counts).filter(|&(&s, &c)| c > 0 && s != first).map(|(&s, _)| s).collect();
    places.sort_by_key(|s| (s.start, s.end));
    places.dedup();
    places.len()
}

/// The error for a run whose payments are not all finite numbers, or whose statistics
/// overflow: it names the `pay` and, for amounts that are not numbers, how many paths.
fn not_finite(program: &Program, total: &BlockResult, paths: u64) -> Diagnostic {
    let place = |site: usize| program.pay_sites.get(site).copied().unwrap_or_default();
    let conditions = total.bad_paths.get(program.pay_sites.len()..).unwrap_or_default();
    if let Some(site) = conditions.iter().position(|&c| c > 0) {
        let count = conditions[site];
        let place = program.condition_sites.get(site).copied().unwrap_or_default();
        // A condition in a loop is one site per date: count other places, not dates.
        let others = other_places(&program.condition_sites, conditions, place);
        let also = match others {
            0 => String::new(),
            1 => " (1 other condition is not a number either)".to_string(),
            k => format!(" ({k} other conditions are not numbers either)"),
        };
        return Diagnostic::at(
            place,
            format!("this condition compares a value that is not a number on {count} of {paths} paths{also}"),
        )
        .with_fix(crate::typing::NOT_A_NUMBER_FIX);
    }
    let payments = &total.bad_paths[..total.bad_paths.len().min(program.pay_sites.len())];
    if let Some(site) = payments.iter().position(|&c| c > 0) {
        let count = payments[site];
        let others = other_places(&program.pay_sites, payments, place(site));
        let also = match others {
            0 => String::new(),
            1 => " (1 other payment is not finite either)".to_string(),
            k => format!(" ({k} other payments are not finite either)"),
        };
        return Diagnostic::at(
            place(site),
            format!("this payment is not a finite number on {count} of {paths} paths{also}"),
        )
        .with_fix("look in the amount for a division by zero, the log or square root of a negative number, or an `exp` of more than 709 (numbers go up to about 1.8e308)");
    }
    let what = if total.paid.iter().all(|x| x.is_finite()) && total.moments.mean(0).is_finite() {
        "their variance"
    } else {
        "their sum over the paths"
    };
    Diagnostic::at(
        place(total.largest.1 as usize),
        format!("the amounts paid here are too large to add up: {what} overflows (numbers go up to about 1.8e308)"),
    )
    .with_fix("pay in a larger unit, for example a notional of 1 with the price read as a fraction of it, or look for a runaway `exp`")
}

/// The warnings a regression gives: controls whose paths miss their closed-form mean or
/// overflow, and a fallback to the plain estimate.
fn control_warnings(r: &regress::Regression, controls: &Controls) -> Vec<Diagnostic> {
    let mut out = Vec::new();
    for &(j, why) in &r.left_out {
        let message = match why {
            regress::LeftOut::Unsampled { z } => format!(
                "the control variate `{}` was left out: its average over the paths is {} its closed-form value, so the paths do not sample it (a very high volatility or a very long horizon)",
                controls.name(j),
                if z.is_finite() { format!("{} standard errors from", how_many(z.abs())) } else { "far from".into() },
            ),
            regress::LeftOut::NotFinite => {
                format!("the control variate `{}` was left out: its values overflow", controls.name(j))
            }
            regress::LeftOut::Constant | regress::LeftOut::Collinear => continue,
        };
        out.push(
            Diagnostic::new(message)
                .with_fix("check the volatilities and dates; the price uses the other controls, or none")
                .as_warning(),
        );
    }
    if let Some((controlled, distance)) = r.fell_back {
        out.push(
            Diagnostic::new(format!(
                "the control-variate estimate ({}) is {} standard errors from the plain Monte Carlo estimate (more than {}), so the plain estimate is reported",
                how_many(controlled),
                how_many(distance),
                regress::GUARD_SES
            ))
            .with_fix("check the market data for extreme volatilities and the payoff for dates far from the valuation date; `--no-control` prices without controls")
            .as_warning(),
        );
    }
    out
}

/// A number for a message: plain when moderate, in scientific notation when huge or tiny.
fn how_many(x: f64) -> String {
    if x.is_finite() && (x == 0.0 || (1e-3..1e9).contains(&x.abs())) {
        let digits = if x.abs() >= 100.0 { 0 } else { 1 };
        format!("{x:.digits$}")
    } else {
        format!("{x:.2e}")
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn path_counts_have_documented_bounds() {
        let at = |paths| Settings { paths, ..Settings::default() }.validate();
        assert!(at(MIN_PATHS).is_ok() && at(MAX_PATHS).is_ok() && at(DEFAULT_PATHS).is_ok());
        assert!(at(MIN_PATHS - 1).is_err() && at(MAX_PATHS + 1).is_err() && at(0).is_err() && at(u64::MAX).is_err());
        assert!(validate_max_paths(MIN_PATHS, MIN_PATHS).is_ok());
        assert!(validate_max_paths(MIN_PATHS, MIN_PATHS + 1).is_err());
        assert!(validate_max_paths(0, MIN_PATHS).is_err());
        assert_eq!(thousands(0), "0");
        assert_eq!(thousands(999), "999");
        assert_eq!(thousands(1_000), "1,000");
        assert_eq!(thousands(18_446_744_073_709_551_615), "18,446,744,073,709,551,615");
    }
}
