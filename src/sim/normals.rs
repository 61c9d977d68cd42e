//! Standard normals for the paths, by the ziggurat method (Marsaglia and Tsang, 2000; the
//! layers are in [`ziggurat`](super::ziggurat)) on four xoshiro256++ generators side by
//! side (Blackman and Vigna, "Scrambled linear pseudorandom number generators", ACM TOMS
//! 47(4), 2021): with AVX2 one step of the four is a handful of integer instructions on one
//! register, and the ziggurat's fast test runs on the four candidates at once. Normals cost
//! about half of what they did on one PCG-64 stream, and they are most of the work of
//! simulating a path.
//!
//! A block's [`Normals`] is one sequence: normal `4g + i` is lane `i`'s `g`-th normal, the
//! number `rand_distr`'s `StandardNormal` would draw from a xoshiro256++ generator in lane
//! `i`'s state, bit for bit (the same method, layers and use of the stream): a candidate
//! `x = u·X[l]` from one draw (`l` from its low 8 bits, `u` in `[−1, 1)` from its top 52),
//! accepted when `|x| < X[l+1]` (about 99% of draws); for the rest, the wedge test, the
//! tail beyond `r` and fresh candidates draw from that lane alone (`settle`).
//! The lanes' states come from the block's PCG-64 stream, one draw per lane spread over
//! the lane's four words by SplitMix64, as the generator's authors advise.

use rand::RngCore;
use rand_pcg::Pcg64;

use super::ziggurat::{F, X};

/// Generators side by side: the lanes of an AVX2 register.
const LANES: usize = 4;

/// The bits of 1.0: a 52-bit integer put under them gives a double in `[1, 2)`.
const ONE: u64 = 0x3ff0_0000_0000_0000;

/// The normal stream of a block of paths.
#[derive(Clone, Debug)]
pub struct Normals {
    /// Lane `i`'s state word `w` is `s[w][i]`: each word of the four lanes is a register.
    s: [[u64; LANES]; 4],
    /// A group's normals not handed out yet: `pending[next..]`.
    pending: [f64; LANES],
    next: usize,
}

impl Default for Normals {
    fn default() -> Self {
        let mut n = Normals { s: [[0; LANES]; 4], pending: [0.0; LANES], next: LANES };
        n.seed_lanes([1, 2, 3, 4]);
        n
    }
}

impl Normals {
    /// A stream whose lanes are seeded from `rng`'s next four draws.
    pub fn from_rng(rng: &mut Pcg64) -> Self {
        let mut n = Normals::default();
        n.reseed(rng);
        n
    }

    /// Restarts the stream from `rng`'s next four draws, one per lane.
    pub fn reseed(&mut self, rng: &mut Pcg64) {
        let seeds = std::array::from_fn(|_| rng.next_u64());
        self.seed_lanes(seeds);
    }

    /// Each lane's four words from SplitMix64 started at its seed (never all zero: the
    /// mix is a bijection, so four consecutive outputs are distinct).
    fn seed_lanes(&mut self, seeds: [u64; LANES]) {
        for (i, seed) in seeds.into_iter().enumerate() {
            let mut x = seed;
            for w in 0..4 {
                x = x.wrapping_add(0x9e37_79b9_7f4a_7c15);
                let mut z = x;
                z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
                z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
                self.s[w][i] = z ^ (z >> 31);
            }
        }
        self.next = LANES;
    }

    /// Fills `out` with the stream's next normals, in order: how a fill is split does not
    /// change the numbers.
    pub fn fill(&mut self, out: &mut [f64]) {
        let waiting = (LANES - self.next).min(out.len());
        out[..waiting].copy_from_slice(&self.pending[self.next..self.next + waiting]);
        self.next += waiting;
        let out = &mut out[waiting..];
        let whole = out.len() - out.len() % LANES;
        let (groups, tail) = out.split_at_mut(whole);
        self.groups(groups);
        if !tail.is_empty() {
            let mut group = [0.0; LANES];
            self.groups(&mut group);
            tail.copy_from_slice(&group[..tail.len()]);
            self.pending = group;
            self.next = tail.len();
        }
    }

    /// Whole groups of `LANES` normals into `out` (its length a multiple of `LANES`).
    fn groups(&mut self, out: &mut [f64]) {
        #[cfg(target_arch = "x86_64")]
        {
            if std::is_x86_feature_detected!("avx2") {
                // SAFETY: the CPU has just been checked for AVX2.
                unsafe {
                    if gathers_quickly() {
                        self.groups_avx2::<true>(out)
                    } else {
                        self.groups_avx2::<false>(out)
                    }
                };
                return;
            }
        }
        self.groups_generic(out);
    }

    /// One lane at a time: the reference the AVX2 groups match bit for bit.
    fn groups_generic(&mut self, out: &mut [f64]) {
        for group in out.chunks_exact_mut(LANES) {
            for (i, o) in group.iter_mut().enumerate() {
                let mut lane = Lane { s: &mut self.s, i };
                let d = lane.next_u64();
                let (x, layer) = candidate(d);
                *o = if x.abs() < X[layer + 1] { x } else { settle(d, &mut lane) };
            }
        }
    }

    /// The four lanes' steps and fast tests in registers; a group with a miss finishes
    /// its missed lanes one by one, in lane order, each from its own lane. The layers'
    /// edges are gathered (`GATHER`) or loaded lane by lane (both of a lane's edges in one
    /// load): the same numbers either way.
    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2")]
    unsafe fn groups_avx2<const GATHER: bool>(&mut self, out: &mut [f64]) {
        use std::arch::x86_64::*;
        let load = |w: &[u64; LANES]| _mm256_loadu_si256(w.as_ptr().cast());
        let mut s = [load(&self.s[0]), load(&self.s[1]), load(&self.s[2]), load(&self.s[3])];
        let one = _mm256_set1_epi64x(ONE as i64);
        let (two, three) = (_mm256_set1_pd(2.0), _mm256_set1_pd(3.0));
        let magnitude = _mm256_castsi256_pd(_mm256_set1_epi64x(i64::MAX));
        for group in out.chunks_exact_mut(LANES) {
            // xoshiro256++: the output rotl(s0 + s3, 23) + s0, then the state's step.
            let sum = _mm256_add_epi64(s[0], s[3]);
            let rotated = _mm256_or_si256(_mm256_slli_epi64::<23>(sum), _mm256_srli_epi64::<41>(sum));
            let d = _mm256_add_epi64(rotated, s[0]);
            let t = _mm256_slli_epi64::<17>(s[1]);
            s[2] = _mm256_xor_si256(s[2], s[0]);
            s[3] = _mm256_xor_si256(s[3], s[1]);
            s[1] = _mm256_xor_si256(s[1], s[2]);
            s[0] = _mm256_xor_si256(s[0], s[3]);
            s[2] = _mm256_xor_si256(s[2], t);
            s[3] = _mm256_or_si256(_mm256_slli_epi64::<45>(s[3]), _mm256_srli_epi64::<19>(s[3]));
            // The candidates `u·X[l]` and the fast test `|x| < X[l + 1]`, as in `candidate`.
            // The draws in memory: for the loads, and for the lanes that miss.
            let mut draws = [0u64; LANES];
            if !GATHER {
                _mm256_storeu_si256(draws.as_mut_ptr().cast(), d);
            }
            let (edge, inner) = if GATHER {
                let layer = _mm256_and_si256(d, _mm256_set1_epi64x(0xff));
                (_mm256_i64gather_pd::<8>(X.as_ptr(), layer), _mm256_i64gather_pd::<8>(X.as_ptr().add(1), layer))
            } else {
                // One 16-byte load per lane reads both of its edges, `X[l]` and `X[l + 1]`;
                // two interleaves sort them into the four lanes' edges and inner edges.
                let edges = |i: usize| _mm_loadu_pd(X.as_ptr().add((draws[i] & 0xff) as usize));
                let (even, odd) = (_mm256_set_m128d(edges(2), edges(0)), _mm256_set_m128d(edges(3), edges(1)));
                (_mm256_unpacklo_pd(even, odd), _mm256_unpackhi_pd(even, odd))
            };
            let v = _mm256_castsi256_pd(_mm256_or_si256(_mm256_srli_epi64::<12>(d), one));
            let x = _mm256_mul_pd(_mm256_sub_pd(_mm256_mul_pd(two, v), three), edge);
            let fast = _mm256_cmp_pd::<_CMP_LT_OQ>(_mm256_and_pd(x, magnitude), inner);
            _mm256_storeu_pd(group.as_mut_ptr(), x);
            let missed = !_mm256_movemask_pd(fast) & 0xf;
            if missed != 0 {
                if GATHER {
                    _mm256_storeu_si256(draws.as_mut_ptr().cast(), d);
                }
                for (w, reg) in s.iter().enumerate() {
                    _mm256_storeu_si256(self.s[w].as_mut_ptr().cast(), *reg);
                }
                for i in (0..LANES).filter(|i| missed & (1 << i) != 0) {
                    group[i] = settle(draws[i], &mut Lane { s: &mut self.s, i });
                }
                s = [load(&self.s[0]), load(&self.s[1]), load(&self.s[2]), load(&self.s[3])];
            }
        }
        for (w, reg) in s.iter().enumerate() {
            _mm256_storeu_si256(self.s[w].as_mut_ptr().cast(), *reg);
        }
    }
}

/// Whether AVX2's gather of the layers' edges beats loading them one by one: on Intel's
/// CPUs it does (about 10% of a run without pairs on W3, measured on a Xeon); on an EPYC
/// the fifth round found the gather slow. Either way the numbers are the same.
#[cfg(target_arch = "x86_64")]
fn gathers_quickly() -> bool {
    static QUICK: std::sync::OnceLock<bool> = std::sync::OnceLock::new();
    *QUICK.get_or_init(|| {
        // The vendor string of leaf 0, "GenuineIntel", in the order EBX, EDX, ECX.
        #[allow(unused_unsafe)]
        // SAFETY: leaf 0 of `cpuid` exists on every x86-64 CPU.
        let r = unsafe { std::arch::x86_64::__cpuid(0) };
        (r.ebx, r.edx, r.ecx) == (0x756e_6547, 0x4965_6e69, 0x6c65_746e)
    })
}

/// One lane of a [`Normals`], as a generator of its own: xoshiro256++ on its four words.
struct Lane<'a> {
    s: &'a mut [[u64; LANES]; 4],
    i: usize,
}

impl RngCore for Lane<'_> {
    #[inline(always)]
    fn next_u64(&mut self) -> u64 {
        let i = self.i;
        let s = &mut *self.s;
        let out = s[0][i].wrapping_add(s[3][i]).rotate_left(23).wrapping_add(s[0][i]);
        let t = s[1][i] << 17;
        s[2][i] ^= s[0][i];
        s[3][i] ^= s[1][i];
        s[1][i] ^= s[2][i];
        s[0][i] ^= s[3][i];
        s[2][i] ^= t;
        s[3][i] = s[3][i].rotate_left(45);
        out
    }

    fn next_u32(&mut self) -> u32 {
        (self.next_u64() >> 32) as u32
    }

    fn fill_bytes(&mut self, dest: &mut [u8]) {
        for chunk in dest.chunks_mut(8) {
            let bytes = self.next_u64().to_le_bytes();
            chunk.copy_from_slice(&bytes[..chunk.len()]);
        }
    }

    fn try_fill_bytes(&mut self, dest: &mut [u8]) -> Result<(), rand::Error> {
        self.fill_bytes(dest);
        Ok(())
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
fn unit<R: RngCore>(rng: &mut R) -> f64 {
    (rng.next_u64() >> 11) as f64 * (1.0 / (1u64 << 53) as f64)
}

/// A uniform in `(0, 1)`: the top 52 bits of a draw put in `[1, 2)`, less `1 − 2⁻⁵³`.
#[inline]
fn open_unit<R: RngCore>(rng: &mut R) -> f64 {
    f64::from_bits(ONE | (rng.next_u64() >> 12)) - (1.0 - f64::EPSILON / 2.0)
}

/// The rest of the ziggurat for a draw whose first candidate missed the fast test.
#[cold]
fn settle<R: RngCore>(first: u64, rng: &mut R) -> f64 {
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
        let height = F[layer + 1] + (F[layer] - F[layer + 1]) * unit(rng);
        let under = wedges()[layer].under(x.abs(), height).unwrap_or_else(|| height < (-0.5 * x * x).exp());
        if under {
            return x;
        }
        d = rng.next_u64();
    }
}

/// How far from a bounding line a height must be for the line to decide the wedge test:
/// far above the rounding of the lines (about 1e-15) and of `exp` (under 1e-16).
const SQUEEZE: f64 = 1e-12;

/// Lines below and above the density `e^{−x²/2}` across one layer's wedge,
/// `X[l + 1] ≤ |x| ≤ X[l]`: where the density is convex (`|x| ≥ 1`) the chord lies above it
/// and the tangent at the middle below; where it is concave, the other way round. A height
/// more than [`SQUEEZE`] below the lower line is under the density and one as far above
/// the upper line is not, whatever `exp` rounds to, so the test gives the bits it gives
/// with `exp` and calls it only for the few heights between the lines (a squeeze,
/// Marsaglia and Tsang's own suggestion for the wedges). The layer across `|x| = 1` has
/// no lines.
#[derive(Clone, Copy, Debug)]
struct Wedge {
    /// `(intercept, slope)` of the lower and the upper line in `|x|`.
    lower: (f64, f64),
    upper: (f64, f64),
    bounded: bool,
}

impl Wedge {
    fn new(layer: usize) -> Self {
        let (a, b) = (X[layer + 1], X[layer]);
        let chord_slope = (F[layer] - F[layer + 1]) / (b - a);
        let chord = (F[layer + 1] - chord_slope * a, chord_slope);
        let m = 0.5 * (a + b);
        let fm = (-0.5 * m * m).exp();
        let tangent = (fm + m * fm * m, -m * fm);
        if a >= 1.0 {
            Wedge { lower: tangent, upper: chord, bounded: true }
        } else if b <= 1.0 {
            Wedge { lower: chord, upper: tangent, bounded: true }
        } else {
            Wedge { lower: (0.0, 0.0), upper: (0.0, 0.0), bounded: false }
        }
    }

    /// Whether `height` is under the density at `t = |x|`, when the lines decide it.
    #[inline]
    fn under(&self, t: f64, height: f64) -> Option<bool> {
        if !self.bounded {
            return None;
        }
        if height < self.lower.0 + self.lower.1 * t - SQUEEZE {
            Some(true)
        } else if height > self.upper.0 + self.upper.1 * t + SQUEEZE {
            Some(false)
        } else {
            None
        }
    }
}

/// The squeeze of every layer (the base layer's tail never reaches it).
fn wedges() -> &'static [Wedge; 256] {
    static WEDGES: std::sync::OnceLock<[Wedge; 256]> = std::sync::OnceLock::new();
    WEDGES.get_or_init(|| std::array::from_fn(Wedge::new))
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

    /// Each lane's normals are those of `rand_distr`'s `StandardNormal` (the same
    /// ziggurat) on `rand_xoshiro`'s xoshiro256++ seeded by the library (SplitMix64) from
    /// the lane's draw of the block's stream, bit for bit: the seeding, the generator, the
    /// method, its layers and its use of the stream all agree with the libraries'. Both
    /// builds (AVX2 and one lane at a time) are checked.
    #[test]
    fn each_lane_gives_the_numbers_of_the_library_sampler_on_the_library_generator() {
        use rand::Rng;
        use rand_xoshiro::Xoshiro256PlusPlus;
        for seed in [1, 2, 3] {
            let start = Normals::from_rng(&mut Pcg64::seed_from_u64(seed));
            let n = 1_000_000;
            let mut ours = vec![0.0; n];
            start.clone().fill(&mut ours);
            let mut generic = vec![0.0; n];
            start.clone().groups_generic(&mut generic);
            for (i, (a, b)) in ours.iter().zip(&generic).enumerate() {
                assert_eq!(a.to_bits(), b.to_bits(), "seed {seed}, normal {i}: {a} vs {b} one lane at a time");
            }
            #[cfg(target_arch = "x86_64")]
            if std::is_x86_feature_detected!("avx2") {
                // Both ways of reading the layers' edges, whichever this CPU uses.
                let (mut gathered, mut loaded) = (vec![0.0; n], vec![0.0; n]);
                // SAFETY: the CPU has just been checked for AVX2.
                unsafe {
                    start.clone().groups_avx2::<true>(&mut gathered);
                    start.clone().groups_avx2::<false>(&mut loaded);
                }
                for (i, ((a, b), c)) in generic.iter().zip(&gathered).zip(&loaded).enumerate() {
                    assert_eq!(a.to_bits(), b.to_bits(), "seed {seed}, normal {i}: {a} vs {b} gathered");
                    assert_eq!(a.to_bits(), c.to_bits(), "seed {seed}, normal {i}: {a} vs {c} loaded");
                }
            }
            let mut stream = Pcg64::seed_from_u64(seed);
            for lane in 0..LANES {
                let mut theirs = Xoshiro256PlusPlus::seed_from_u64(stream.next_u64());
                for (g, z) in ours.iter().skip(lane).step_by(LANES).enumerate() {
                    let t: f64 = theirs.sample(rand_distr::StandardNormal);
                    assert_eq!(z.to_bits(), t.to_bits(), "seed {seed}, lane {lane}, normal {g}: {z} vs {t}");
                }
            }
        }
    }

    #[test]
    fn the_wedges_squeeze_decides_as_exp_does_and_most_of_the_time() {
        // Every layer's wedge, heights drawn over its whole range: where the lines decide,
        // they decide as the test with `exp`; they leave `exp` a small part of the heights
        // (the layer across |x| = 1 all of them).
        let mut rng = Pcg64::seed_from_u64(11);
        let (mut decided, mut all) = (0u32, 0u32);
        for layer in 1..256 {
            let w = wedges()[layer];
            for _ in 0..2_000 {
                let t = X[layer + 1] + (X[layer] - X[layer + 1]) * unit(&mut rng);
                let height = F[layer + 1] + (F[layer] - F[layer + 1]) * unit(&mut rng);
                let by_exp = height < (-0.5 * t * t).exp();
                if let Some(by_lines) = w.under(t, height) {
                    assert_eq!(by_lines, by_exp, "layer {layer}, |x| {t}, height {height}");
                    decided += 1;
                }
                all += 1;
            }
        }
        assert!(decided as f64 > 0.95 * all as f64, "the lines decide {decided} of {all}");
    }

    #[test]
    fn the_fill_reads_the_stream_in_order_whatever_the_split() {
        let run = |sizes: &[usize]| {
            let mut normals = Normals::from_rng(&mut Pcg64::seed_from_u64(9));
            let mut out = Vec::new();
            for &n in sizes {
                let mut part = vec![0.0; n];
                normals.fill(&mut part);
                out.extend(part);
            }
            out
        };
        let whole = run(&[1024]);
        assert_eq!(whole, run(&[128, 256, 1, 639]));
        assert_eq!(whole, run(&[1, 2, 3, 5, 7, 6, 1000]));
        assert_eq!(whole, run(&[0, 3, 0, 1021]));
        assert_eq!(run(&[333]), run(&[333]));
    }

    #[test]
    fn lanes_and_blocks_get_different_states() {
        let mut states = std::collections::HashSet::new();
        for block in 0..64u128 {
            let n = Normals::from_rng(&mut Pcg64::new(0xcafe_f00d, block));
            for lane in 0..LANES {
                assert!(states.insert([n.s[0][lane], n.s[1][lane], n.s[2][lane], n.s[3][lane]]));
            }
        }
    }

    /// The sample's moments, histogram and tails against N(0, 1), over 4 million normals.
    #[test]
    fn the_normals_have_the_standard_normal_law() {
        let n = 4_000_000;
        let mut out = vec![0.0; n];
        Normals::from_rng(&mut Pcg64::seed_from_u64(11)).fill(&mut out);
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
