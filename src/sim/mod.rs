//! Stage 4: simulation.
//!
//! Risk-neutral GBM with exact log steps on the program's grid ([`paths`]), the compiled
//! payoff run over blocks of paths ([`exec`]), antithetic pairs and control variates with
//! the regression coefficient estimated from the run, and streaming statistics
//! ([`stats`]). Paths come in fixed blocks of [`BLOCK`]; block `i` draws from its own PCG
//! stream derived from `(seed, i)`, and block results are merged in block order, so the
//! same seed gives the same bits on any number of threads. Memory is bounded by the
//! blocks in flight, not by the path count.

pub mod exec;
pub mod market;
pub mod paths;
pub mod stats;

use std::time::{Duration, Instant};

use rayon::prelude::*;

use crate::compile::Program;
use crate::diagnostic::Diagnostic;
use exec::Workspace;
use paths::Controls;
use stats::{BlockResult, Moments};

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
}

impl Default for Settings {
    fn default() -> Self {
        Settings { paths: DEFAULT_PATHS, seed: DEFAULT_SEED, antithetic: true, control_variates: true }
    }
}

/// The default number of paths of `pathfold price`.
pub const DEFAULT_PATHS: u64 = 200_000;
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
}

/// Prices a compiled program.
pub fn simulate(program: &Program, settings: &Settings) -> Result<Estimate, Diagnostic> {
    let started = Instant::now();
    let mut run = Run::new(program, settings);
    let paths = if settings.antithetic { settings.paths.max(2).div_ceil(2) * 2 } else { settings.paths.max(2) };
    run.extend_to(paths);
    run.finish(started)
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
    let block = BLOCK as u64;
    let whole = |n: u64| n.max(2).div_ceil(block) * block;
    let max_paths = whole(max_paths);
    let mut run = Run::new(program, settings);
    let mut paths = whole(settings.paths).min(max_paths);
    loop {
        run.extend_to(paths);
        if run.total.bad_site.is_some() {
            break;
        }
        let (_, se, _) = regress(&run.total.moments, &run.controls);
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
}

impl<'a> Run<'a> {
    fn new(program: &'a Program, settings: &'a Settings) -> Self {
        let model = paths::Model::new(program);
        let controls = if settings.control_variates { Controls::new(program) } else { Controls::none() };
        let dims = 1 + controls.len();
        let total = BlockResult::new(dims, program.events.len(), program.payments.len());
        Run { program, settings, model, controls, total, paths: 0 }
    }

    /// Simulates the blocks that take the run from its current path count to `paths`.
    /// The current count must be a whole number of blocks.
    fn extend_to(&mut self, paths: u64) {
        debug_assert!(self.paths % BLOCK as u64 == 0, "a run can only grow from whole blocks");
        let (program, settings, model, controls) = (self.program, self.settings, &self.model, &self.controls);
        let blocks = paths.div_ceil(BLOCK as u64);
        let mut next = self.paths / BLOCK as u64;
        while next < blocks {
            let end = (next + BLOCKS_IN_FLIGHT as u64).min(blocks);
            let results: Vec<BlockResult> = (next..end)
                .into_par_iter()
                .map_init(
                    || Workspace::new(program, model, controls),
                    |ws, b| {
                        let lanes = (paths - b * BLOCK as u64).min(BLOCK as u64) as usize;
                        ws.run_block(program, model, controls, settings, b, lanes)
                    },
                )
                .collect();
            for r in &results {
                self.total.merge(r);
            }
            next = end;
        }
        self.paths = self.paths.max(paths);
    }

    fn finish(self, started: Instant) -> Result<Estimate, Diagnostic> {
        let (program, settings, controls, total, paths) =
            (self.program, self.settings, &self.controls, &self.total, self.paths);
        if let Some(site) = total.bad_site {
            let span = program.pay_sites[site as usize];
            return Err(Diagnostic::at(span, "this payment is not a finite number on some paths")
                .with_fix("look for a division by zero or the log or square root of a negative number in the amount"));
        }
        let (price, std_error, used) = regress(&total.moments, controls);
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
            controls: used.into_iter().map(|i| controls.name(i)).collect(),
            variance_reduction,
            profile,
            elapsed: started.elapsed(),
        })
    }
}

/// The control-variate estimate: the mean of `y` corrected by `β·(x̄ − E[x])` with β the
/// least-squares coefficient estimated from the same run. Controls whose sample
/// covariance adds no information (constant, or collinear with others) are dropped.
/// Returns the estimate, its standard error and the controls kept.
fn regress(m: &Moments, controls: &Controls) -> (f64, f64, Vec<usize>) {
    let n = m.count();
    let k = controls.len();
    let mean_y = m.mean(0);
    if n < 2.0 {
        return (mean_y, f64::NAN, Vec::new());
    }
    // Keep controls one by one while the covariance matrix stays well conditioned
    // (Cholesky on the correlation scale).
    let mut kept: Vec<usize> = Vec::new();
    let mut l: Vec<Vec<f64>> = Vec::new();
    for j in 0..k {
        let vj = m.cov(1 + j, 1 + j);
        if vj.is_nan() || vj <= 0.0 {
            continue;
        }
        let mut row: Vec<f64> = Vec::with_capacity(kept.len() + 1);
        for (a, &i) in kept.iter().enumerate() {
            let c = m.cov(1 + j, 1 + i) / (vj * m.cov(1 + i, 1 + i)).sqrt();
            let s: f64 = (0..a).map(|b| row[b] * l[a][b]).sum();
            row.push((c - s) / l[a][a]);
        }
        let d = 1.0 - row.iter().map(|x| x * x).sum::<f64>();
        if d < 1e-9 {
            continue;
        }
        row.push(d.sqrt());
        l.push(row);
        kept.push(j);
    }
    let q = kept.len();
    // Solve (D R D) β = c, with R = L Lᵀ the correlation matrix of kept controls.
    let sd: Vec<f64> = kept.iter().map(|&j| m.cov(1 + j, 1 + j).sqrt()).collect();
    let rhs: Vec<f64> = kept.iter().zip(&sd).map(|(&j, s)| m.cov(0, 1 + j) / s).collect();
    let mut z = vec![0.0; q];
    for a in 0..q {
        let s: f64 = (0..a).map(|b| l[a][b] * z[b]).sum();
        z[a] = (rhs[a] - s) / l[a][a];
    }
    let mut w = vec![0.0; q];
    for a in (0..q).rev() {
        let s: f64 = (a + 1..q).map(|b| l[b][a] * w[b]).sum();
        w[a] = (z[a] - s) / l[a][a];
    }
    let beta: Vec<f64> = w.iter().zip(&sd).map(|(w, s)| w / s).collect();
    let mut price = mean_y;
    let mut explained = 0.0;
    for (a, &j) in kept.iter().enumerate() {
        price -= beta[a] * (m.mean(1 + j) - controls.mean(j));
        explained += beta[a] * m.cov(0, 1 + j);
    }
    let dof = (n - 1.0 - q as f64).max(1.0);
    let residual = ((m.cov(0, 0) - explained) * (n - 1.0) / dof).max(0.0);
    (price, (residual / n).sqrt(), kept)
}
