//! Several programs priced on the same paths (common random numbers), for sensitivities,
//! solving and ladders.
//!
//! Every program runs block `b` from the same stream `block_rng(seed, b)`, so program `k`'s
//! paths are those a plain run of it would draw; the discounted payoffs of all `K`
//! programs are then one vector sample per path (or per antithetic pair), and their means
//! and co-moments are merged in block order like a single run's. The variance of a
//! difference `i − j` is `var_i + var_j − 2 cov_ij`, path by path. The programs must share
//! the number of underlyings and grid points, or their paths would not correspond; the
//! caller compiles them from one product.
//!
//! With control variates, each program's sample is its payoff less its own controls'
//! deviations from their closed-form means, `y − Σ βⱼ (xⱼ − E xⱼ)`, with coefficients
//! fitted beforehand by a pilot of its own ([`PILOT_BLOCKS`] blocks on streams no run
//! uses). Coefficients fixed before the paths are drawn keep every sample's mean the
//! program's price (no bias from fitting on the same paths: common practice), and the
//! samples stay one vector per path, so a difference's error is still read off the paths.
//! The surprises are decided once, by the first program's trial, for all of them.

use rayon::prelude::*;

use super::exec::{self, Workspace};
use super::paths::{Controls, Model};
use super::regress::{self, Known};
use super::sobol::{Qmc, RANDOMISATIONS};
use super::stats::{BlockResult, Moments};
use super::{controls_deciding, Sampler, Settings, BLOCK};
use crate::compile::Program;
use crate::diagnostic::Diagnostic;

/// Blocks handed to the thread pool at a time.
const BLOCKS_IN_FLIGHT: usize = 64;

/// Blocks of the pilot that fits a program's control coefficients (4,096 paths).
const PILOT_BLOCKS: u64 = 16;

/// The block streams of the pilot: none a run (from 0), a Sobol run (from 2⁴⁰) or a trial
/// of the surprises (from 2⁶²) uses.
const PILOT_STREAMS: u64 = 1 << 61;

/// A program's controls and the coefficients its pilot fitted: `(control, β)`.
struct Fitted {
    controls: Controls,
    beta: Vec<(usize, f64)>,
}

impl Fitted {
    /// The sample of each unit of the block `ws` last ran: the payoff less the controls'
    /// deviations from their means.
    fn sample_into(&self, ws: &Workspace, units: usize, out: &mut [f64]) {
        let samples = ws.samples();
        out[..units].copy_from_slice(&samples[0][..units]);
        for &(j, b) in &self.beta {
            let mean = self.controls.mean(j);
            for (o, x) in out[..units].iter_mut().zip(&samples[1 + j][..units]) {
                *o -= b * (x - mean);
            }
        }
    }
}

/// Each program's controls (none without control variates) and their coefficients, from
/// a pilot of [`PILOT_BLOCKS`] blocks per program. The programs' pilots run side by side;
/// each is merged in block order, so the coefficients do not depend on the thread count.
fn fit(programs: &[Program], models: &[Model], settings: &Settings) -> Vec<Fitted> {
    if !settings.control_variates {
        return programs.iter().map(|_| Fitted { controls: Controls::none(), beta: Vec::new() }).collect();
    }
    let (first, kept) = controls_deciding(&programs[0], settings, None);
    let sets: Vec<Controls> = std::iter::once(first)
        .chain(programs[1..].iter().map(|p| controls_deciding(p, settings, Some(kept)).0))
        .collect();
    programs
        .par_iter()
        .zip(models)
        .zip(sets)
        .map(|((p, m), controls)| {
            let mut ws = Workspace::new(p, m, &controls);
            ws.simulate_whole_paths();
            let mut total = BlockResult::new(1 + controls.len(), p.events.len(), p.payments.len());
            let mut one = BlockResult::new(0, 0, 0);
            for b in 0..PILOT_BLOCKS {
                ws.run_block_into(p, m, &controls, settings, PILOT_STREAMS | b, BLOCK, None, &mut one);
                total.merge(&one);
            }
            let known: Vec<Known> =
                (0..controls.len()).map(|j| Known { mean: controls.mean(j), scale: controls.scale(j) }).collect();
            let fitted = regress::regress(&total.moments, &known);
            // A pilot whose controlled estimate failed the guard (or whose coefficients are
            // not finite numbers) leaves the program plain.
            let usable = total.is_finite() && fitted.fell_back.is_none() && fitted.beta.iter().all(|b| b.is_finite());
            let beta = if usable {
                fitted.kept.iter().copied().zip(fitted.beta.iter().copied()).collect()
            } else {
                Vec::new()
            };
            Fitted { controls, beta }
        })
        .collect()
}

/// The joint statistics of several programs on common paths.
#[derive(Clone, Debug)]
pub struct Joint {
    /// Means and co-moments of the `K` discounted payoffs per sample unit.
    pub moments: Moments,
    /// Paths simulated (antithetic partners counted).
    pub paths: u64,
    /// A Sobol run's mean of each program over each randomisation (its error is their
    /// spread); `None` for pseudo-random paths.
    pub randomisations: Option<Vec<Vec<f64>>>,
}

impl Joint {
    /// The price of program `k`.
    pub fn price(&self, k: usize) -> f64 {
        self.combination(&[(k, 1.0)]).0
    }

    /// The standard error of program `k`'s price.
    pub fn std_error(&self, k: usize) -> f64 {
        self.combination(&[(k, 1.0)]).1
    }

    /// The estimate of `Σ w_k · price_k` and its standard error: from the paths (the
    /// weighted sum path by path), or for a Sobol run from the spread of the weighted sum
    /// over the randomisations.
    pub fn combination(&self, weights: &[(usize, f64)]) -> (f64, f64) {
        if let Some(means) = &self.randomisations {
            let sums: Vec<f64> = means.iter().map(|m| weights.iter().map(|&(k, w)| w * m[k]).sum()).collect();
            let n = sums.len() as f64;
            let value = sums.iter().sum::<f64>() / n;
            let spread = sums.iter().map(|x| (x - value) * (x - value)).sum::<f64>() / (n - 1.0);
            return (value, (spread / n).sqrt());
        }
        let value = weights.iter().map(|&(k, w)| w * self.moments.mean(k)).sum();
        let mut var = 0.0;
        for &(i, wi) in weights {
            for &(j, wj) in weights {
                var += wi * wj * self.moments.cov(i, j);
            }
        }
        (value, (var.max(0.0) / self.moments.count()).sqrt())
    }
}

/// Prices `programs` on common paths. Same seed, same bits on any thread count.
pub fn simulate_joint(programs: &[Program], settings: &Settings) -> Result<Joint, Diagnostic> {
    settings.validate().map_err(Diagnostic::new)?;
    let first = programs.first().ok_or_else(|| Diagnostic::new("nothing to price"))?;
    if programs.iter().any(|p| p.assets.len() != first.assets.len() || p.grid.len() != first.grid.len()) {
        return Err(Diagnostic::new(
            "the scenarios do not share one simulation grid, so they cannot be priced on common paths",
        ));
    }
    // Each scenario's early exercise is fitted on the same fit paths.
    let fitted: Vec<Program>;
    let programs = if programs.iter().any(|p| !p.choices.is_empty()) {
        fitted = programs.iter().map(|p| super::exercise::prepare(p, settings).into_owned()).collect();
        &fitted[..]
    } else {
        programs
    };
    let k = programs.len();
    let paths = if settings.antithetic { settings.paths.div_ceil(2) * 2 } else { settings.paths };
    let models: Vec<Model> = programs.iter().map(Model::new).collect();
    let fitted = fit(programs, &models, settings);
    if settings.sampler == Sampler::Sobol {
        // Each randomisation of the points on every program, `per` paths each; every
        // program has the points laid over its own grid by its own bridge.
        let qmcs: Vec<Qmc> = programs.iter().map(|p| Qmc::new(&p.grid, p.assets.len(), settings.seed)).collect();
        let count = RANDOMISATIONS as u64;
        let per = settings.paths.div_ceil(count).div_ceil(BLOCK as u64) * BLOCK as u64;
        let mut total = Moments::new(k);
        let mut means = Vec::with_capacity(RANDOMISATIONS);
        for r in 0..RANDOMISATIONS {
            let m = run_blocks(programs, &models, &fitted, settings, per, Some((&qmcs, r)))?;
            means.push((0..k).map(|j| m.mean(j)).collect());
            total.merge(&m);
        }
        return Ok(Joint { moments: total, paths: per * count, randomisations: Some(means) });
    }
    let total = run_blocks(programs, &models, &fitted, settings, paths, None)?;
    Ok(Joint { moments: total, paths, randomisations: None })
}

/// `paths` paths of every program on common paths, block `b` from its own stream (for a
/// Sobol run, randomisation `r` of each program's points: the streams and points of
/// [`super::simulate`]'s run), their samples' moments merged in block order.
fn run_blocks(
    programs: &[Program],
    models: &[Model],
    fitted: &[Fitted],
    settings: &Settings,
    paths: u64,
    sobol: Option<(&[Qmc], usize)>,
) -> Result<Moments, Diagnostic> {
    let blocks = paths.div_ceil(BLOCK as u64);
    let drawn = if settings.antithetic { BLOCK / 2 } else { BLOCK } as u64;
    let stream = |b: u64| sobol.map_or(b, |(_, r)| ((r as u64 + 1) << 40) | b);
    let k = programs.len();
    let mut total = Moments::new(k);
    let mut next = 0;
    while next < blocks {
        let end = (next + BLOCKS_IN_FLIGHT as u64).min(blocks);
        let results: Vec<Result<Moments, usize>> = (next..end)
            .into_par_iter()
            .map_init(
                || {
                    let spaces: Vec<Workspace> = programs
                        .iter()
                        .zip(models)
                        .zip(fitted)
                        .map(|((p, m), f)| {
                            let mut ws = Workspace::new(p, m, &f.controls);
                            ws.simulate_whole_paths();
                            ws
                        })
                        .collect();
                    (spaces, vec![vec![0.0; BLOCK]; k], BlockResult::new(0, 0, 0))
                },
                |(spaces, columns, r), b| {
                    let lanes = (paths - b * BLOCK as u64).min(BLOCK as u64) as usize;
                    let units = if settings.antithetic { lanes / 2 } else { lanes };
                    for (j, (((p, m), ws), f)) in
                        programs.iter().zip(models).zip(spaces.iter_mut()).zip(fitted).enumerate()
                    {
                        let own = sobol.map(|(qmcs, r)| exec::Points { qmc: &qmcs[j], r, first: (b * drawn) as u32 });
                        ws.run_block_into(p, m, &f.controls, settings, stream(b), lanes, own, r);
                        if !r.is_finite() {
                            return Err(j);
                        }
                        f.sample_into(ws, units, &mut columns[j]);
                    }
                    let cols: Vec<&[f64]> = columns.iter().map(|c| &c[..units]).collect();
                    Ok(Moments::of_columns(&cols))
                },
            )
            .collect();
        for r in results {
            match r {
                Ok(m) => total.merge(&m),
                Err(j) => {
                    return Err(Diagnostic::new(format!(
                    "scenario {} of {k} pays amounts that are not finite numbers; price the payoff alone to see where",
                    j + 1
                )))
                }
            }
        }
        next = end;
    }
    if (0..k).any(|j| !(total.mean(j).is_finite() && total.variance(j).is_finite())) {
        return Err(Diagnostic::new("the scenario prices overflow: pay in a larger unit"));
    }
    Ok(total)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn combination_of_one_program_with_itself_has_no_error() {
        let mut m = Moments::of_columns(&[&[1.0, 2.0, 4.0], &[1.0, 2.0, 4.0]]);
        m.merge(&Moments::new(2));
        let j = Joint { moments: m, paths: 3, randomisations: None };
        let (v, se) = j.combination(&[(0, 1.0), (1, -1.0)]);
        assert_eq!(v, 0.0);
        assert!(se.abs() < 1e-12);
        assert!(j.std_error(0) > 0.0);
    }
}
