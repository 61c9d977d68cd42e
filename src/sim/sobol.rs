//! Randomised quasi-Monte Carlo: Sobol points, a random digital shift per randomisation,
//! and the Brownian-bridge construction of each path's normals.
//!
//! The points are the Sobol sequence with the direction numbers of Joe and Kuo (2008,
//! file new-joe-kuo-6.21201, embedded for [`MAX_DIMS`] dimensions), in Gray-code order
//! (Antonov and Saleev), so the first `2^m` points are the usual net. Each randomisation
//! XORs every coordinate with its own random 32-bit word (a random digital shift): each
//! shifted point is uniform on the unit cube, so each randomisation is an unbiased
//! estimate, and the spread of [`RANDOMISATIONS`] independent ones is the error.
//!
//! A path's normals are laid out by the Brownian bridge: coordinate `j·assets + a` drives
//! asset `a`'s Brownian motion at the `j`-th date of the bridge order (the last date
//! first, then midpoints), so the first coordinates, where Sobol points are most even,
//! carry most of the variance. The increments are handed to the path generator as one
//! standard normal per step and asset, exactly what it would otherwise draw. Coordinates
//! past [`MAX_DIMS`] (very long grids) come from the block's pseudo-random stream.

use rand::{Rng, RngCore};
use rand_distr::StandardNormal;
use rand_pcg::Pcg64;
use statrs::function::erf::erfc_inv;

/// Independent randomisations of a Sobol run; the standard error is their spread.
pub const RANDOMISATIONS: usize = 16;

/// Dimensions with embedded direction numbers.
pub const MAX_DIMS: usize = 4096;

const BITS: usize = 32;

/// The Joe–Kuo table: `d s a m_1 … m_s` per line for dimensions 2 to [`MAX_DIMS`].
const JOE_KUO: &str = include_str!("joe_kuo.txt");

/// Direction numbers `v[dim][bit]`, scaled to 32 bits.
#[derive(Clone, Debug, PartialEq)]
pub struct Sobol {
    v: Vec<[u32; BITS]>,
}

impl Sobol {
    /// The first `dims` dimensions (at most [`MAX_DIMS`]).
    pub fn new(dims: usize) -> Self {
        let dims = dims.min(MAX_DIMS);
        let mut v = Vec::with_capacity(dims);
        if dims > 0 {
            // Dimension 1: van der Corput, m = 1 for every bit.
            let mut first = [0u32; BITS];
            for (i, x) in first.iter_mut().enumerate() {
                *x = 1 << (BITS - 1 - i);
            }
            v.push(first);
        }
        for line in JOE_KUO.lines().filter(|l| !l.starts_with('#')).take(dims.saturating_sub(1)) {
            let nums: Vec<u32> =
                line.split_whitespace().map(|x| x.parse().expect("the embedded table is numbers")).collect();
            let (s, a) = (nums[1] as usize, nums[2]);
            let m = &nums[3..3 + s];
            let mut dir = [0u32; BITS];
            for i in 0..BITS {
                dir[i] = if i < s {
                    m[i] << (BITS - 1 - i)
                } else {
                    // v_i = v_{i−s} ⊕ (v_{i−s} >> s) ⊕ Σ_k a_k·v_{i−k}, the polynomial's
                    // recurrence (Bratley and Fox).
                    let mut x = dir[i - s] ^ (dir[i - s] >> s);
                    for k in 1..s {
                        if (a >> (s - 1 - k)) & 1 == 1 {
                            x ^= dir[i - k];
                        }
                    }
                    x
                };
            }
            v.push(dir);
        }
        Sobol { v }
    }

    pub fn dims(&self) -> usize {
        self.v.len()
    }

    /// Point `index` of the Gray-code order, one 32-bit word per dimension.
    pub fn point(&self, index: u32, out: &mut [u32]) {
        let gray = index ^ (index >> 1);
        for (o, dir) in out.iter_mut().zip(&self.v) {
            let mut x = 0;
            for (bit, d) in dir.iter().enumerate() {
                if (gray >> bit) & 1 == 1 {
                    x ^= d;
                }
            }
            *o = x;
        }
    }

    /// Moves `x`, point `index`, to point `index + 1`.
    fn next(&self, index: u32, x: &mut [u32]) {
        let bit = (index + 1).trailing_zeros() as usize;
        for (o, dir) in x.iter_mut().zip(&self.v) {
            *o ^= dir[bit];
        }
    }
}

/// Acklam's coefficients for the normal quantile (from memory of his published values;
/// checked against `norm_cdf` in the tests): the centre's rational function in `(u − ½)²`,
/// the tails' in `√(−2 ln u)`, and where the centre ends.
pub(super) const ACKLAM_A: [f64; 6] = [
    -3.969_683_028_665_376e1,
    2.209_460_984_245_205e2,
    -2.759_285_104_469_687e2,
    1.383_577_518_672_69e2,
    -3.066_479_806_614_716e1,
    2.506_628_277_459_239,
];
pub(super) const ACKLAM_B: [f64; 5] = [
    -5.447_609_879_822_406e1,
    1.615_858_368_580_409e2,
    -1.556_989_798_598_866e2,
    6.680_131_188_771_972e1,
    -1.328_068_155_288_572e1,
];
pub(super) const ACKLAM_C: [f64; 6] = [
    -7.784_894_002_430_293e-3,
    -3.223_964_580_411_365e-1,
    -2.400_758_277_161_838,
    -2.549_732_539_343_734,
    4.374_664_141_464_968,
    2.938_163_982_698_783,
];
pub(super) const ACKLAM_D: [f64; 4] =
    [7.784_695_709_041_462e-3, 3.224_671_290_700_398e-1, 2.445_134_137_142_996, 3.754_408_661_907_416];
pub(super) const ACKLAM_LOW: f64 = 0.024_25;

/// The standard normal quantile `Φ⁻¹(u)` for `0 < u < 1`: Acklam's rational
/// approximations (relative error below 1.2e-9, from memory of his published
/// coefficients; checked against `norm_cdf` in the tests), with `−√2·erfc⁻¹(2u)` in the
/// far tails, where the approximation is not claimed.
pub fn normal_quantile(u: f64) -> f64 {
    const A: [f64; 6] = ACKLAM_A;
    const B: [f64; 5] = ACKLAM_B;
    const C: [f64; 6] = ACKLAM_C;
    const D: [f64; 4] = ACKLAM_D;
    const LOW: f64 = ACKLAM_LOW;
    if u > LOW && u < 1.0 - LOW {
        let q = u - 0.5;
        let r = q * q;
        q * (((((A[0] * r + A[1]) * r + A[2]) * r + A[3]) * r + A[4]) * r + A[5])
            / (((((B[0] * r + B[1]) * r + B[2]) * r + B[3]) * r + B[4]) * r + 1.0)
    } else if u > 1e-12 && u < 1.0 - 1e-12 {
        let tail = |p: f64| {
            let q = (-2.0 * p.ln()).sqrt();
            (((((C[0] * q + C[1]) * q + C[2]) * q + C[3]) * q + C[4]) * q + C[5])
                / ((((D[0] * q + D[1]) * q + D[2]) * q + D[3]) * q + 1.0)
        };
        if u < 0.5 {
            tail(u)
        } else {
            -tail(1.0 - u)
        }
    } else {
        -std::f64::consts::SQRT_2 * erfc_inv(2.0 * u)
    }
}

/// One step of the Brownian bridge: `W(k) = wl·W(left) + wr·W(right) + sd·Z`.
#[derive(Clone, Debug, PartialEq)]
struct BridgeStep {
    k: usize,
    left: usize,
    right: Option<usize>,
    wl: f64,
    wr: f64,
    sd: f64,
}

/// What a Sobol run shares between its blocks: the points, the bridge, and each
/// randomisation's shifts.
#[derive(Clone, Debug, PartialEq)]
pub struct Qmc {
    sobol: Sobol,
    /// Times `t_0 = 0 … t_K` of the grid.
    times: Vec<f64>,
    bridge: Vec<BridgeStep>,
    assets: usize,
    /// `shifts[r][dim]`: the digital shift of randomisation `r`.
    shifts: Vec<Vec<u32>>,
}

impl Qmc {
    /// The sampler of a grid (`grid[0] = 0`) with `assets` assets, randomised from `seed`.
    pub fn new(grid: &[f64], assets: usize, seed: u64) -> Self {
        let steps = grid.len().saturating_sub(1);
        let dims = steps * assets;
        let sobol = Sobol::new(dims);
        // Each randomisation's shifts come from its own PCG stream, numbered past any
        // block's (blocks use streams below 2⁶⁴).
        let shifts = (0..RANDOMISATIONS as u64)
            .map(|r| {
                let mut rng = Pcg64::new((u128::from(seed) << 64) | 0x853c_49e6_748f_ea9b, (1 << 64) + u128::from(r));
                (0..sobol.dims()).map(|_| rng.next_u32()).collect()
            })
            .collect();
        Qmc { sobol, times: grid.to_vec(), bridge: bridge(grid), assets, shifts }
    }

    /// Fills `z[((k − 1)·assets + a)·block + lane]` with the standard normal increment of
    /// asset `a` over step `k` on lanes `0..lanes`, from points `first..first + lanes` of
    /// randomisation `r`. Coordinates past the table come from `rng`. `scratch` is any
    /// buffer, reused between blocks.
    #[allow(clippy::too_many_arguments)]
    pub fn fill(
        &self,
        r: usize,
        first: u32,
        lanes: usize,
        block: usize,
        rng: &mut Pcg64,
        z: &mut [f64],
        scratch: &mut Vec<f64>,
    ) {
        let (na, steps) = (self.assets, self.times.len().saturating_sub(1));
        let dims = steps * na;
        let have = self.sobol.dims();
        // Coordinate `d` of lane `i` at `normals[d·lanes + i]`; `W` of asset `a` at grid
        // index `k` at `w[(k·na + a)·lanes + i]`.
        let need = (dims + (steps + 1) * na) * lanes;
        if scratch.len() < need {
            scratch.resize(need, 0.0);
        }
        let (normals, w) = scratch[..need].split_at_mut(dims * lanes);
        let shift = &self.shifts[r];
        let mut x = vec![0u32; have];
        self.sobol.point(first, &mut x);
        for lane in 0..lanes {
            if lane > 0 {
                self.sobol.next(first + lane as u32 - 1, &mut x);
            }
            for (d, (&xd, &sd)) in x.iter().zip(shift).enumerate() {
                normals[d * lanes + lane] = f64::from(xd ^ sd);
            }
            for d in have..dims {
                normals[d * lanes + lane] = rng.sample(StandardNormal);
            }
        }
        for u in &mut normals[..have.min(dims) * lanes] {
            *u = normal_quantile((*u + 0.5) * (1.0 / 4_294_967_296.0));
        }
        // The bridge, a lane-wide row at a time: W at each date in bridge order (W = 0 at
        // grid index 0).
        w[..na * lanes].fill(0.0);
        let mut row = vec![0.0; lanes];
        for (j, b) in self.bridge.iter().enumerate() {
            for a in 0..na {
                let at = |k: usize| (k * na + a) * lanes;
                let n = &normals[(j * na + a) * lanes..][..lanes];
                let left = &w[at(b.left)..][..lanes];
                match b.right {
                    Some(right) => {
                        let right = &w[at(right)..][..lanes];
                        for (((o, l), r), n) in row.iter_mut().zip(left).zip(right).zip(n) {
                            *o = b.wl * l + b.wr * r + b.sd * n;
                        }
                    }
                    None => {
                        for ((o, l), n) in row.iter_mut().zip(left).zip(n) {
                            *o = b.wl * l + b.sd * n;
                        }
                    }
                }
                w[at(b.k)..][..lanes].copy_from_slice(&row);
            }
        }
        for k in 1..=steps {
            let dt = self.times[k] - self.times[k - 1];
            let scale = if dt > 0.0 { 1.0 / dt.sqrt() } else { 0.0 };
            for a in 0..na {
                let (before, now) = (&w[((k - 1) * na + a) * lanes..][..lanes], &w[(k * na + a) * lanes..][..lanes]);
                let out = &mut z[((k - 1) * na + a) * block..][..lanes];
                for ((o, x0), x1) in out.iter_mut().zip(before).zip(now) {
                    *o = (x1 - x0) * scale;
                }
            }
        }
    }
}

/// The Brownian-bridge order of grid indices `1..=K`: the last date, then the midpoint
/// of each interval filled so far, coarse to fine.
fn bridge(times: &[f64]) -> Vec<BridgeStep> {
    let steps = times.len().saturating_sub(1);
    let mut out = Vec::with_capacity(steps);
    if steps == 0 {
        return out;
    }
    out.push(BridgeStep {
        k: steps,
        left: 0,
        right: None,
        wl: 0.0,
        wr: 0.0,
        sd: (times[steps] - times[0]).max(0.0).sqrt(),
    });
    // Intervals (left, right) of known points, split breadth-first.
    let mut queue = std::collections::VecDeque::from([(0usize, steps)]);
    while let Some((l, r)) = queue.pop_front() {
        if r - l < 2 {
            continue;
        }
        let k = (l + r) / 2;
        let (tl, tk, tr) = (times[l], times[k], times[r]);
        let span = tr - tl;
        let (wl, wr, sd) = if span > 0.0 {
            ((tr - tk) / span, (tk - tl) / span, ((tk - tl) * (tr - tk) / span).max(0.0).sqrt())
        } else {
            (1.0, 0.0, 0.0)
        };
        out.push(BridgeStep { k, left: l, right: Some(r), wl, wr, sd });
        queue.push_back((l, k));
        queue.push_back((k, r));
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_first_points_are_the_published_sequence() {
        // The first eight points in four dimensions, as scipy.stats.qmc.Sobol (unscrambled,
        // the same Joe–Kuo numbers) gives them: 0, ½, ¾ ¼, … in dimension 1 (van der Corput).
        let expected = [
            [0.0, 0.0, 0.0, 0.0],
            [0.5, 0.5, 0.5, 0.5],
            [0.75, 0.25, 0.25, 0.25],
            [0.25, 0.75, 0.75, 0.75],
            [0.375, 0.375, 0.625, 0.875],
            [0.875, 0.875, 0.125, 0.375],
            [0.625, 0.125, 0.875, 0.625],
            [0.125, 0.625, 0.375, 0.125],
        ];
        let s = Sobol::new(4);
        let mut x = [0u32; 4];
        for (i, row) in expected.iter().enumerate() {
            s.point(i as u32, &mut x);
            let got: Vec<f64> = x.iter().map(|&v| f64::from(v) / 4_294_967_296.0).collect();
            assert_eq!(got, row, "point {i}");
        }
    }

    #[test]
    fn each_dimension_is_a_net_and_stepping_matches_direct_points() {
        // A (0, m, 1)-net: the first 2^m points of each coordinate fill the 2^m intervals
        // of width 2^-m once each (common practice: the defining property of a Sobol
        // sequence), checked in the last embedded dimension too.
        let s = Sobol::new(MAX_DIMS);
        let m = 10;
        for dim in [0, 1, 2, 100, 1000, MAX_DIMS - 1] {
            let mut seen = vec![false; 1 << m];
            let mut x = vec![0u32; MAX_DIMS];
            for i in 0..1u32 << m {
                s.point(i, &mut x);
                let cell = (x[dim] >> (32 - m)) as usize;
                assert!(!seen[cell], "dimension {dim}: point {i} repeats a cell");
                seen[cell] = true;
            }
        }
        let (mut a, mut b) = (vec![0u32; 50], vec![0u32; 50]);
        let small = Sobol::new(50);
        small.point(1000, &mut a);
        for i in 1000..1100 {
            small.next(i, &mut a);
            small.point(i + 1, &mut b);
            assert_eq!(a, b, "point {}", i + 1);
        }
    }

    #[test]
    fn the_bridge_gives_brownian_increments_of_the_right_variance() {
        // With unit normals in every coordinate, W(t_K) = √t_K and each midpoint is the
        // average of its neighbours plus its own spread: check against a direct sum.
        let times = [0.0, 0.25, 0.5, 1.0, 1.5];
        let b = bridge(&times);
        assert_eq!(b.iter().map(|s| s.k).collect::<Vec<_>>(), vec![4, 2, 1, 3]);
        // Variance of W(t_k): the bridge's conditional variances add up to t_k.
        let mut var = [0.0; 5];
        let mut cov_basis = [[0.0; 4]; 5];
        for (j, s) in b.iter().enumerate() {
            let mut row = [0.0; 4];
            for c in 0..4 {
                row[c] = s.wl * cov_basis[s.left][c] + s.right.map_or(0.0, |r| s.wr * cov_basis[r][c]);
            }
            row[j] += s.sd;
            cov_basis[s.k] = row;
        }
        for k in 0..5 {
            var[k] = cov_basis[k].iter().map(|x| x * x).sum();
            assert!((var[k] - times[k]).abs() < 1e-12, "Var W({}) = {}", times[k], var[k]);
        }
        // Cov(W(s), W(t)) = min(s, t).
        let cov: f64 = cov_basis[1].iter().zip(&cov_basis[3]).map(|(x, y)| x * y).sum();
        assert!((cov - 0.25).abs() < 1e-12);
    }

    #[test]
    fn the_quantile_inverts_the_normal_distribution() {
        use crate::closed_form::norm_cdf;
        // Every region: the tails, both sides of each switch, the centre.
        for &u in &[1e-13, 1e-9, 0.001, 0.024, 0.025, 0.3, 0.5, 0.77, 0.975, 0.976, 0.999_999, 1.0 - 1e-13] {
            let z = normal_quantile(u);
            // Compare tail probabilities, which keep their digits near 1. A relative error
            // of 1.2e-9 in z is about z² times that in the tail probability.
            let (p, tail) = if u < 0.5 { (norm_cdf(z), u) } else { (norm_cdf(-z), 1.0 - u) };
            assert!((p - tail).abs() < 1e-7 * tail, "u = {u}: tail {p} for {tail}");
        }
        // Odd about ½, up to the rounding of 1 − u.
        for &u in &[0.01, 0.2, 0.4] {
            assert!((normal_quantile(u) + normal_quantile(1.0 - u)).abs() < 1e-9, "u = {u}");
        }
        assert_eq!(normal_quantile(0.5), 0.0);
    }
}
