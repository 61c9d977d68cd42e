//! Several programs priced on the same paths (common random numbers), for sensitivities,
//! solving and ladders.
//!
//! Every program runs block `b` from the same stream `block_rng(seed, b)`, so program `k`'s
//! paths are those a plain run of it would draw; the discounted payoffs of all `K`
//! programs are then one vector sample per path (or per antithetic pair), and their means
//! and co-moments are merged in block order like a single run's. The variance of a
//! difference `i − j` is `var_i + var_j − 2 cov_ij`, path by path. The estimates are plain
//! Monte Carlo (antithetic pairs if asked, no control variates). The programs must share
//! the number of underlyings and grid points, or their paths would not correspond; the
//! caller compiles them from one product.

use rayon::prelude::*;

use super::exec::Workspace;
use super::paths::{Controls, Model};
use super::stats::{BlockResult, Moments};
use super::{Settings, BLOCK};
use crate::compile::Program;
use crate::diagnostic::Diagnostic;

/// Blocks handed to the thread pool at a time.
const BLOCKS_IN_FLIGHT: usize = 64;

/// The joint statistics of several programs on common paths.
#[derive(Clone, Debug)]
pub struct Joint {
    /// Means and co-moments of the `K` discounted payoffs per sample unit.
    pub moments: Moments,
    /// Paths simulated (antithetic partners counted).
    pub paths: u64,
}

impl Joint {
    /// The price of program `k`.
    pub fn price(&self, k: usize) -> f64 {
        self.moments.mean(k)
    }

    /// The standard error of program `k`'s price.
    pub fn std_error(&self, k: usize) -> f64 {
        (self.moments.variance(k) / self.moments.count()).sqrt()
    }

    /// The estimate of `Σ w_k · price_k` and its standard error from the paths (the
    /// weighted sum path by path).
    pub fn combination(&self, weights: &[(usize, f64)]) -> (f64, f64) {
        let value = weights.iter().map(|&(k, w)| w * self.price(k)).sum();
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
    let none = Controls::none();
    let plain = Settings { control_variates: false, ..settings.clone() };
    let blocks = paths.div_ceil(BLOCK as u64);
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
                        .zip(&models)
                        .map(|(p, m)| {
                            let mut ws = Workspace::new(p, m, &none);
                            ws.simulate_whole_paths();
                            ws
                        })
                        .collect();
                    (spaces, vec![vec![0.0; BLOCK]; k], BlockResult::new(0, 0, 0))
                },
                |(spaces, columns, r), b| {
                    let lanes = (paths - b * BLOCK as u64).min(BLOCK as u64) as usize;
                    for (j, ((p, m), ws)) in programs.iter().zip(&models).zip(spaces.iter_mut()).enumerate() {
                        ws.run_block_into(p, m, &none, &plain, b, lanes, None, r);
                        if !r.is_finite() {
                            return Err(j);
                        }
                        columns[j][..lanes].copy_from_slice(&ws.payoffs()[..lanes]);
                    }
                    let units = if plain.antithetic { lanes / 2 } else { lanes };
                    if plain.antithetic {
                        for col in columns.iter_mut() {
                            let (first, mirror) = col[..2 * units].split_at_mut(units);
                            for (x, y) in first.iter_mut().zip(&*mirror) {
                                *x = 0.5 * (*x + y);
                            }
                        }
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
    Ok(Joint { moments: total, paths })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn combination_of_one_program_with_itself_has_no_error() {
        let mut m = Moments::of_columns(&[&[1.0, 2.0, 4.0], &[1.0, 2.0, 4.0]]);
        m.merge(&Moments::new(2));
        let j = Joint { moments: m, paths: 3 };
        let (v, se) = j.combination(&[(0, 1.0), (1, -1.0)]);
        assert_eq!(v, 0.0);
        assert!(se.abs() < 1e-12);
        assert!(j.std_error(0) > 0.0);
    }
}
