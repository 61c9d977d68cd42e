//! Standard normals for the paths, by the ziggurat method (Marsaglia and Tsang, 2000; the
//! layers are in [`ziggurat`](super::ziggurat)): the same method, layers and use of the
//! stream as `rand_distr`'s `StandardNormal`, so the same numbers, bit for bit.
//!
//! Called once per normal from the large functions that build the paths, the library's
//! sampler was not inlined, and the call was half the cost of a normal. [`fill`] is one
//! tight loop: a draw, its candidate `x = u·X[i]` (`i` from the draw's low 8 bits, `u` in
//! `[−1, 1)` from its top 52) accepted when `|x| < X[i+1]` (about 99% of draws), and the
//! rest of the method (the wedge test, the tail beyond `r`, a fresh candidate) out of line.

use rand::RngCore;
use rand_pcg::Pcg64;

use super::ziggurat::{F, X};

/// The bits of 1.0: a 52-bit integer put under them gives a double in `[1, 2)`.
const ONE: u64 = 0x3ff0_0000_0000_0000;

/// Fills `out` with independent standard normals from `rng`, in order: one draw per
/// normal, and for the few whose candidate misses, the draws the rest of the method needs,
/// straight after it.
pub fn fill(rng: &mut Pcg64, out: &mut [f64]) {
    for o in out {
        let d = rng.next_u64();
        let (x, layer) = candidate(d);
        *o = if x.abs() < X[layer + 1] { x } else { settle(d, rng) };
    }
}

/// A draw's candidate and its layer: `x = u·X[i]`, `i` the low 8 bits, `u = 2v − 3` with
/// `v` in `[1, 2)` from the top 52 bits (exact), so `u` is in `[−1, 1)`.
#[inline(always)]
fn candidate(d: u64) -> (f64, usize) {
    let layer = (d & 0xff) as usize;
    let u = 2.0 * f64::from_bits(ONE | (d >> 12)) - 3.0;
    (u * X[layer], layer)
}

/// A uniform in `[0, 1)`: the top 53 bits of a draw times 2⁻⁵³.
#[inline]
fn unit(rng: &mut Pcg64) -> f64 {
    (rng.next_u64() >> 11) as f64 * (1.0 / (1u64 << 53) as f64)
}

/// A uniform in `(0, 1)`: the top 52 bits of a draw put in `[1, 2)`, less `1 − 2⁻⁵³`.
#[inline]
fn open_unit(rng: &mut Pcg64) -> f64 {
    f64::from_bits(ONE | (rng.next_u64() >> 12)) - (1.0 - f64::EPSILON / 2.0)
}

/// The rest of the ziggurat for a draw whose first candidate missed the fast test.
#[cold]
fn settle(first: u64, rng: &mut Pcg64) -> f64 {
    let mut d = first;
    loop {
        let (x, layer) = candidate(d);
        if x.abs() < X[layer + 1] {
            return x;
        }
        if layer == 0 {
            // The base layer's part beyond r: Marsaglia's tail method.
            let r = X[1];
            loop {
                let t = -open_unit(rng).ln() / r;
                let y = -open_unit(rng).ln();
                if 2.0 * y >= t * t {
                    return if x < 0.0 { -(r + t) } else { r + t };
                }
            }
        }
        // The wedge between the layer's rectangle and the density.
        if F[layer + 1] + (F[layer] - F[layer + 1]) * unit(rng) < (-0.5 * x * x).exp() {
            return x;
        }
        d = rng.next_u64();
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;
    use statrs::distribution::{ContinuousCDF, Normal};

    #[test]
    fn the_layers_follow_their_recursion() {
        let v = 0.00492867323399;
        let f = |x: f64| (-0.5 * x * x).exp();
        assert_eq!(X[1], 3.654152885361009);
        assert!((X[0] - v / f(X[1])).abs() < 1e-14);
        for i in 1..255 {
            let next = (-2.0 * (v / X[i] + f(X[i])).ln()).sqrt();
            assert!((X[i + 1] - next).abs() < 1e-13 * X[i + 1], "layer {i}");
            assert!(X[i + 1] < X[i]);
        }
        assert_eq!(X[256], 0.0);
        // Every layer has area v: the top one closes the recursion.
        assert!((X[255] * (1.0 - f(X[255])) - v).abs() < 1e-10);
        for i in 0..257 {
            assert!((F[i] - f(X[i])).abs() < 1e-15, "density at layer {i}");
        }
    }

    /// The method, its layers and its use of the stream are those of `rand_distr`'s
    /// `StandardNormal` (the same ziggurat), so the numbers are the same, bit for bit.
    #[test]
    fn the_fill_gives_the_numbers_of_the_library_sampler() {
        use rand::Rng;
        for seed in [1, 2, 3] {
            let n = 3_000_000;
            let mut ours = vec![0.0; n];
            fill(&mut Pcg64::seed_from_u64(seed), &mut ours);
            let mut rng = Pcg64::seed_from_u64(seed);
            for (i, z) in ours.iter().enumerate() {
                let theirs: f64 = rng.sample(rand_distr::StandardNormal);
                assert_eq!(z.to_bits(), theirs.to_bits(), "seed {seed}, normal {i}: {z} vs {theirs}");
            }
        }
    }

    #[test]
    fn the_fill_reads_the_stream_in_order_whatever_the_split() {
        let run = |sizes: &[usize]| {
            let mut rng = Pcg64::seed_from_u64(9);
            let mut out = Vec::new();
            for &n in sizes {
                let mut part = vec![0.0; n];
                fill(&mut rng, &mut part);
                out.extend(part);
            }
            out
        };
        assert_eq!(run(&[1024]), run(&[128, 256, 1, 639]));
        assert_eq!(run(&[333]), run(&[333]));
    }

    /// The sample's moments, histogram and tails against N(0, 1), over 4 million normals.
    #[test]
    fn the_normals_have_the_standard_normal_law() {
        let n = 4_000_000;
        let mut out = vec![0.0; n];
        fill(&mut Pcg64::seed_from_u64(11), &mut out);
        let nf = n as f64;
        let moment = |p: i32| out.iter().map(|z| z.powi(p)).sum::<f64>() / nf;
        // Sample moments against E Z^p = 0, 1, 0, 3, with standard errors
        // √(E Z^2p − (E Z^p)²)/√n = √1, √2, √15, √96 over √n; within 4 of them.
        for (p, mean, sd) in [(1, 0.0, 1.0), (2, 1.0, 2f64.sqrt()), (3, 0.0, 15f64.sqrt()), (4, 3.0, 96f64.sqrt())] {
            let m = moment(p);
            assert!((m - mean).abs() < 4.0 * sd / nf.sqrt(), "moment {p}: {m}");
        }
        // Chi-square over 64 bins of equal probability: 63 degrees of freedom, whose
        // 99.99% quantile is about 114.
        let law = Normal::new(0.0, 1.0).unwrap();
        let bins = 64;
        let mut counts = vec![0usize; bins];
        for z in &out {
            counts[((law.cdf(*z) * bins as f64) as usize).min(bins - 1)] += 1;
        }
        let expected = nf / bins as f64;
        let chi2: f64 = counts.iter().map(|&c| (c as f64 - expected).powi(2) / expected).sum();
        assert!(chi2 < 114.0, "chi-square {chi2}");
        // The tails, through the wedges near r and the tail method beyond it:
        // P(|Z| > c) = 2Φ(−c), within 4 binomial standard deviations.
        for c in [3.0, 3.654152885361009, 4.0, 4.5] {
            let p = 2.0 * law.cdf(-c);
            let beyond = out.iter().filter(|z| z.abs() > c).count() as f64;
            assert!((beyond - p * nf).abs() < 4.0 * (p * nf).sqrt() + 1.0, "{beyond} beyond {c}, expected {}", p * nf);
        }
    }
}
