//! Hand-written Rust pricers for the three benchmark workloads: the yardstick the compiled
//! payoffs are timed against, and an independent cross-check of the engine's prices.
//!
//! Each is the loop a careful engineer would write for that one payoff: no interpreter,
//! no registers, the payoff inlined. They use the engine's seed scheme so that both forms
//! price the same paths up to rounding: paths in blocks of `BLOCK`, block `i` seeding four
//! xoshiro256++ generators (`rand_xoshiro`, by SplitMix64) from the first four draws of
//! `block_rng(seed, i)` and taking its `j`-th normal from generator `j mod 4`
//! ([`BlockNormals`]), normals drawn step by step and, within a step, asset by asset (the
//! lanes in order within an asset), lanes `h..2h` mirroring lanes `0..h` (`h = lanes / 2`).
//! A sample is the mean of an antithetic pair; no control variates.
//!
//! Shared by `benches/workloads.rs` and, through `#[path]`, `tests/bench_agreement.rs`; it
//! sits in its own folder so that cargo does not take it for a benchmark of its own.

use pathfold::sim::exec::block_rng;
use pathfold::sim::BLOCK;
use rand::{Rng, RngCore, SeedableRng};
use rand_distr::StandardNormal;
use rand_xoshiro::Xoshiro256PlusPlus;

/// A block's normals as the engine draws them, from the libraries alone: normal `j` is
/// `rand_distr`'s `StandardNormal` on the `(j mod 4)`-th of four xoshiro256++ generators,
/// each seeded (by the library's SplitMix64) from one draw of the block's PCG-64 stream.
struct BlockNormals {
    lanes: [Xoshiro256PlusPlus; 4],
    next: usize,
}

impl BlockNormals {
    fn new(seed: u64, block: u64) -> Self {
        let mut rng = block_rng(seed, block);
        BlockNormals { lanes: std::array::from_fn(|_| Xoshiro256PlusPlus::seed_from_u64(rng.next_u64())), next: 0 }
    }

    fn sample(&mut self) -> f64 {
        let z = self.lanes[self.next].sample(StandardNormal);
        self.next = (self.next + 1) % 4;
        z
    }
}

/// Flat short rate of the benchmark market.
pub(crate) const RATE: f64 = 0.03;

/// Mean and standard error of the pair means, accumulated block by block.
#[derive(Default)]
struct Tally {
    n: f64,
    sum: f64,
    sum_sq: f64,
}

impl Tally {
    #[inline(always)]
    fn add(&mut self, x: f64) {
        self.n += 1.0;
        self.sum += x;
        self.sum_sq += x * x;
    }

    fn finish(&self, discount: f64) -> (f64, f64) {
        let mean = self.sum / self.n;
        let var = (self.sum_sq - self.n * mean * mean) / (self.n - 1.0);
        (discount * mean, discount * (var / self.n).sqrt())
    }
}

/// Lanes in block `b` of a run of `paths` paths (the last block may be short).
fn lanes(paths: u64, b: u64) -> usize {
    (paths - b * BLOCK as u64).min(BLOCK as u64) as usize
}

/// W1: European call, S0 = 100, K = 105, T = 1, σ = 20%, q = 1%, one exact step.
/// `paths` must be even. Returns (price, standard error).
pub(crate) fn w1_call(paths: u64, seed: u64) -> (f64, f64) {
    let (s0, k, t, sigma, q) = (100.0_f64, 105.0, 1.0_f64, 0.20, 0.01);
    let drift = s0.ln() + (RATE - q - 0.5 * sigma * sigma) * t;
    let scale = sigma * t.sqrt();
    let mut tally = Tally::default();
    for b in 0..paths.div_ceil(BLOCK as u64) {
        let mut rng = BlockNormals::new(seed, b);
        for _ in 0..lanes(paths, b) / 2 {
            let z: f64 = rng.sample();
            let up = (drift + scale * z).exp();
            let down = (drift - scale * z).exp();
            tally.add(0.5 * ((up - k).max(0.0) + (down - k).max(0.0)));
        }
    }
    tally.finish((-RATE * t).exp())
}

/// W2: arithmetic-average call, S0 = K = 100, T = 1, 252 equal steps each a fixing,
/// σ = 30%, q = 0. `paths` must be even.
pub(crate) fn w2_asian(paths: u64, seed: u64) -> (f64, f64) {
    const STEPS: usize = 252;
    let (s0, k, t, sigma) = (100.0_f64, 100.0, 1.0_f64, 0.30);
    let dt = t / STEPS as f64;
    let drift = (RATE - 0.5 * sigma * sigma) * dt;
    let scale = sigma * dt.sqrt();
    let mut x = [0.0_f64; BLOCK];
    let mut sum = [0.0_f64; BLOCK];
    let mut tally = Tally::default();
    for b in 0..paths.div_ceil(BLOCK as u64) {
        let mut rng = BlockNormals::new(seed, b);
        let h = lanes(paths, b) / 2;
        x[..2 * h].fill(s0.ln());
        sum[..2 * h].fill(0.0);
        for _ in 0..STEPS {
            for l in 0..h {
                let z: f64 = rng.sample();
                let step = scale * z;
                x[l] += drift + step;
                x[l + h] += drift - step;
                sum[l] += x[l].exp();
                sum[l + h] += x[l + h].exp();
            }
        }
        for l in 0..h {
            let inv = 1.0 / STEPS as f64;
            let up = (sum[l] * inv - k).max(0.0);
            let down = (sum[l + h] * inv - k).max(0.0);
            tally.add(0.5 * (up + down));
        }
    }
    tally.finish((-RATE * t).exp())
}

/// W3: worst-of autocallable on three assets (S0 = 100, σ = 20/25/30%, q = 2/1/0%,
/// pairwise correlation 0.5), 12 quarterly observations over 3 years: at observation `i`
/// it pays `100 + 2i` and ends if the worst performance is at least 1; at maturity it pays
/// 100 if the worst is at least 0.6, else `100 × worst`. `paths` must be even.
pub(crate) fn w3_autocall(paths: u64, seed: u64) -> (f64, f64) {
    const STEPS: usize = 12;
    const N: usize = 3;
    let t = 3.0_f64;
    let dt = t / STEPS as f64;
    let sigma = [0.20_f64, 0.25, 0.30];
    let q = [0.02_f64, 0.01, 0.0];
    let rho = 0.5_f64;
    // Cholesky factor of the equicorrelation matrix, by hand.
    let l10 = rho;
    let l11 = (1.0 - rho * rho).sqrt();
    let l20 = rho;
    let l21 = (rho - l20 * l10) / l11;
    let l22 = (1.0 - l20 * l20 - l21 * l21).sqrt();
    let mut drift = [0.0; N];
    let mut scale = [0.0; N];
    for a in 0..N {
        drift[a] = (RATE - q[a] - 0.5 * sigma[a] * sigma[a]) * dt;
        scale[a] = sigma[a] * dt.sqrt();
    }
    let discount: Vec<f64> = (1..=STEPS).map(|i| (-RATE * dt * i as f64).exp()).collect();
    // Log performances ln(S/S0), asset-major, and each lane's discounted payoff.
    let mut x = [[0.0_f64; BLOCK]; N];
    let mut z = [[0.0_f64; BLOCK / 2]; N];
    let mut alive = [true; BLOCK];
    let mut pv = [0.0_f64; BLOCK];
    let mut tally = Tally::default();
    for b in 0..paths.div_ceil(BLOCK as u64) {
        let mut rng = BlockNormals::new(seed, b);
        let lanes = lanes(paths, b);
        let h = lanes / 2;
        for xa in &mut x {
            xa[..lanes].fill(0.0);
        }
        alive[..lanes].fill(true);
        pv[..lanes].fill(0.0);
        for i in 1..=STEPS {
            // A step's normals asset by asset, the lanes in order within an asset.
            for za in &mut z {
                for zl in &mut za[..h] {
                    *zl = rng.sample();
                }
            }
            for l in 0..h {
                let (z0, z1, z2) = (z[0][l], z[1][l], z[2][l]);
                let w = [z0, l10 * z0 + l11 * z1, l20 * z0 + l21 * z1 + l22 * z2];
                for a in 0..N {
                    let step = scale[a] * w[a];
                    x[a][l] += drift[a] + step;
                    x[a][l + h] += drift[a] - step;
                }
            }
            for l in 0..lanes {
                if !alive[l] {
                    continue;
                }
                let worst = x[0][l].exp().min(x[1][l].exp()).min(x[2][l].exp());
                if worst >= 1.0 {
                    pv[l] = (100.0 + 2.0 * i as f64) * discount[i - 1];
                    alive[l] = false;
                } else if i == STEPS {
                    pv[l] = if worst >= 0.6 { 100.0 } else { 100.0 * worst } * discount[i - 1];
                }
            }
        }
        for l in 0..h {
            tally.add(0.5 * (pv[l] + pv[l + h]));
        }
    }
    tally.finish(1.0)
}
