//! Special functions written for loops over lanes: plain IEEE arithmetic with selects,
//! never a call or a branch on the data, so the compiler vectorises the loop, and never a
//! fused multiply-add, so the AVX2 build and the baseline build give the same bits.
//! `exp` and `ln` by range reduction and a polynomial, the normal distribution function
//! by Hart's algorithm, its quantile by Acklam's.

use super::sobol::{ACKLAM_A, ACKLAM_B, ACKLAM_C, ACKLAM_D, ACKLAM_LOW};

/// `out[i] = exp(x[i])` over a block's lanes.
///
/// Exponentiating every level is a large share of the simulation, and the library `exp` is
/// a call per value that the compiler cannot vectorise. This one is plain arithmetic
/// (exact range reduction by `k·ln 2` in two parts, a degree-13 Taylor polynomial on
/// `|r| ≤ ln2/2` evaluated by Estrin's scheme, `2^k` put into the exponent bits), within a couple of units in the last
/// place of the library's value, and the loop vectorises. It uses only IEEE additions
/// and multiplications, never fused, so the AVX2 build (picked at run time) and the
/// baseline build give the same bits on every machine. Arguments beyond ±708 (far
/// outside any simulated log level) and NaN go to the library `exp`.
pub(super) fn exp_into(out: &mut [f64], x: &[f64]) {
    #[cfg(target_arch = "x86_64")]
    {
        if super::wide_lanes() {
            // SAFETY: the CPU has just been checked for these AVX-512 subsets.
            unsafe { exp_into_avx512(out, x) };
            return;
        }
        if std::is_x86_feature_detected!("avx2") {
            // SAFETY: the CPU has just been checked for AVX2.
            unsafe { exp_into_avx2(out, x) };
            return;
        }
    }
    exp_into_generic(out, x);
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
unsafe fn exp_into_avx2(out: &mut [f64], x: &[f64]) {
    exp_into_generic(out, x);
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f,avx512dq,avx512vl")]
unsafe fn exp_into_avx512(out: &mut [f64], x: &[f64]) {
    exp_into_generic(out, x);
}

#[inline(always)]
fn exp_into_generic(out: &mut [f64], x: &[f64]) {
    let mut in_range = true;
    for (o, &x) in out.iter_mut().zip(x) {
        in_range &= x.abs() <= EXP_RANGE;
        *o = exp_poly(x);
    }
    if !in_range {
        for (o, &x) in out.iter_mut().zip(x) {
            if x.is_nan() || x.abs() > EXP_RANGE {
                *o = x.exp();
            }
        }
    }
}

/// `exp(x)` for one value, with the same bits as [`exp_into`].
#[inline]
pub(super) fn exp_one(x: f64) -> f64 {
    if x.abs() <= EXP_RANGE {
        exp_poly(x)
    } else {
        x.exp()
    }
}

/// The standard normal distribution function by Hart's double-precision algorithm 5666
/// (Hart, "Computer Approximations" (1968), as given by West, "Better approximations to
/// cumulative normal functions" (2005); coefficients from memory, checked against
/// [`crate::closed_form::norm_cdf`] in the tests): a rational function times
/// `exp(−x²/2)`, a continued fraction beyond |x| = 5√2 (summed into one quotient). Accurate to about 1e-14, and a
/// few times cheaper than the library's `erfc` with its `exp`: the stopped digitals
/// evaluate it on every path that ends early.
pub(super) fn norm_cdf_hart(x: f64) -> f64 {
    let z = x.abs();
    let tail = if z > 37.0 {
        0.0
    } else {
        let (top, bottom) = if z < HART_SPLIT { hart_near(z) } else { hart_far(z) };
        exp_one(-0.5 * z * z) * top / bottom
    };
    if x > 0.0 {
        1.0 - tail
    } else {
        tail
    }
}

/// Where Hart's rational function gives way to the continued fraction: 5√2.
const HART_SPLIT: f64 = 7.071_067_811_865_47;

/// Hart's rational function of `z = |x|`, as (numerator, denominator): the tail is
/// `exp(−z²/2)·numerator/denominator`.
#[inline(always)]
fn hart_near(z: f64) -> (f64, f64) {
    let mut num = 3.526_249_659_989_11e-2 * z + 0.700_383_064_443_688;
    num = num * z + 6.373_962_203_531_65;
    num = num * z + 33.912_866_078_383;
    num = num * z + 112.079_291_497_871;
    num = num * z + 221.213_596_169_931;
    num = num * z + 220.206_867_912_376;
    let mut den = 8.838_834_764_831_84e-2 * z + 1.755_667_163_182_64;
    den = den * z + 16.064_177_579_207;
    den = den * z + 86.780_732_202_946_1;
    den = den * z + 296.564_248_779_674;
    den = den * z + 637.333_633_378_831;
    den = den * z + 793.826_512_519_948;
    den = den * z + 440.413_735_824_752;
    (num, den)
}

/// The continued fraction `1/(√(2π)·(z + 1/(z + 2/(z + 3/(z + 4/(z + 0.65))))))` as one
/// quotient (numerator, denominator): each level `z + k/(p/q)` is `(z·p + k·q)/p`.
#[inline(always)]
fn hart_far(z: f64) -> (f64, f64) {
    let (mut p, mut q) = (z + 0.65, 1.0);
    for k in [4.0, 3.0, 2.0, 1.0] {
        (p, q) = (z * p + k * q, p);
    }
    (q, p * 2.506_628_274_631)
}

/// [`norm_cdf_hart`] with both of its ways computed and one selected (one division in
/// all): the same bits for every argument that is not NaN, and a loop over lanes
/// vectorises.
#[inline(always)]
pub(super) fn norm_cdf_hart_select(x: f64) -> f64 {
    let z = x.abs().min(37.5);
    let e = exp_poly(-0.5 * z * z);
    let (near, far) = (hart_near(z), hart_far(z));
    let (top, bottom) = if z < HART_SPLIT { near } else { far };
    let tail = e * top / bottom;
    let tail = if z > 37.0 { 0.0 } else { tail };
    if x > 0.0 {
        1.0 - tail
    } else {
        tail
    }
}

/// Lanes per group in [`norm_cdfs_into`] and [`quantiles_into`]: one AVX-512 vector of
/// doubles (two AVX2 ones).
const GROUP: usize = 8;

/// [`norm_cdf_hart_select`] of each value of `x`, into `out`, eight lanes at a time: a
/// group whose values all lie within Hart's rational function's range (below 5√2 in size,
/// nearly always) skips the continued fraction. The same bits: the select would have
/// picked the rational function on each of those lanes.
#[inline(always)]
pub(super) fn norm_cdfs_into(out: &mut [f64], x: &[f64]) {
    let n = out.len().min(x.len());
    let (out, x) = (&mut out[..n], &x[..n]);
    let mut groups = out.chunks_exact_mut(GROUP);
    let mut xs = x.chunks_exact(GROUP);
    for (o, x) in (&mut groups).zip(&mut xs) {
        let near = x.iter().fold(true, |all, &x| all & (x.abs() < HART_SPLIT));
        if near {
            for (o, &x) in o.iter_mut().zip(x) {
                let z = x.abs();
                let (top, bottom) = hart_near(z);
                let tail = exp_poly(-0.5 * z * z) * top / bottom;
                *o = if x > 0.0 { 1.0 - tail } else { tail };
            }
        } else {
            for (o, &x) in o.iter_mut().zip(x) {
                *o = norm_cdf_hart_select(x);
            }
        }
    }
    for (o, &x) in groups.into_remainder().iter_mut().zip(xs.remainder()) {
        *o = norm_cdf_hart_select(x);
    }
}

/// [`quantile_select`] of each value of `u`, into `out`, eight lanes at a time: a group
/// whose values all lie in the central region skips the tails' logarithm and square root.
/// The same bits: the select would have picked the central rational function.
#[inline(always)]
pub(super) fn quantiles_into(out: &mut [f64], u: &[f64]) {
    let n = out.len().min(u.len());
    let (out, u) = (&mut out[..n], &u[..n]);
    let mut groups = out.chunks_exact_mut(GROUP);
    let mut us = u.chunks_exact(GROUP);
    for (o, u) in (&mut groups).zip(&mut us) {
        let central = u.iter().fold(true, |all, &u| all & (u > ACKLAM_LOW && u < 1.0 - ACKLAM_LOW));
        if central {
            for (o, &u) in o.iter_mut().zip(u) {
                let (top, bottom) = quantile_centre(u);
                *o = top / bottom;
            }
        } else {
            for (o, &u) in o.iter_mut().zip(u) {
                *o = quantile_select(u);
            }
        }
    }
    for (o, &u) in groups.into_remainder().iter_mut().zip(us.remainder()) {
        *o = quantile_select(u);
    }
}

/// Where `exp_poly` is exact to a couple of ulps and its result a normal number.
const EXP_RANGE: f64 = 708.0;

#[inline(always)]
pub(super) fn exp_poly(x: f64) -> f64 {
    // 1.5·2⁵²: adding it rounds to an integer held in the low bits of the mantissa.
    const SHIFT: f64 = 6_755_399_441_055_744.0;
    // ln 2 split so that k·LN2_HI is exact for |k| < 2²⁰.
    const LN2_HI: f64 = 6.931_471_803_691_238e-1;
    const LN2_LO: f64 = 1.908_214_929_270_587_7e-10;
    const C: [f64; 14] = [
        1.0,
        1.0,
        1.0 / 2.0,
        1.0 / 6.0,
        1.0 / 24.0,
        1.0 / 120.0,
        1.0 / 720.0,
        1.0 / 5_040.0,
        1.0 / 40_320.0,
        1.0 / 362_880.0,
        1.0 / 3_628_800.0,
        1.0 / 39_916_800.0,
        1.0 / 479_001_600.0,
        1.0 / 6_227_020_800.0,
    ];
    let t = x * std::f64::consts::LOG2_E + SHIFT;
    let kf = t - SHIFT;
    let r = (x - kf * LN2_HI) - kf * LN2_LO;
    // Estrin's scheme: the same polynomial as Horner's rule, in a shallow tree of
    // independent products rather than one chain of thirteen dependent steps.
    let r2 = r * r;
    let r4 = r2 * r2;
    let r8 = r4 * r4;
    let q = |i: usize| C[i] + C[i + 1] * r;
    let s0 = q(0) + q(2) * r2;
    let s1 = q(4) + q(6) * r2;
    let s2 = q(8) + q(10) * r2;
    let s3 = q(12);
    let p = (s0 + s1 * r4) + (s2 + s3 * r4) * r8;
    // k itself, from the bits of t (same exponent as SHIFT, so one unit per integer).
    let k = t.to_bits().wrapping_sub(SHIFT.to_bits());
    f64::from_bits(p.to_bits().wrapping_add(k << 52))
}

/// The standard normal quantile `Φ⁻¹(u)` for `0 < u < 1` by Acklam's approximation, as
/// [`super::sobol::normal_quantile`] but with both regions computed and one selected,
/// and the logarithm by [`ln_poly`], so a loop over lanes vectorises. Below `1e-12` (the
/// far tails, where the approximation is not claimed) it stays finite and monotone.
#[inline(always)]
pub(super) fn quantile_select(u: f64) -> f64 {
    let (c, d) = (ACKLAM_C, ACKLAM_D);
    let centre = quantile_centre(u);
    let low = u < 0.5;
    let p = if low { u } else { 1.0 - u };
    let s = (-2.0 * ln_poly(p)).sqrt();
    let top = ((((c[0] * s + c[1]) * s + c[2]) * s + c[3]) * s + c[4]) * s + c[5];
    // `-(t / b)` is `(-t) / b` exactly: one division for both regions.
    let tail = (if low { top } else { -top }, (((d[0] * s + d[1]) * s + d[2]) * s + d[3]) * s + 1.0);
    let (top, bottom) = if u > ACKLAM_LOW && u < 1.0 - ACKLAM_LOW { centre } else { tail };
    top / bottom
}

/// Acklam's central rational function at `u`, as (numerator, denominator).
#[inline(always)]
fn quantile_centre(u: f64) -> (f64, f64) {
    let (a, b) = (ACKLAM_A, ACKLAM_B);
    let q = u - 0.5;
    let r = q * q;
    (
        q * (((((a[0] * r + a[1]) * r + a[2]) * r + a[3]) * r + a[4]) * r + a[5]),
        (((((b[0] * r + b[1]) * r + b[2]) * r + b[3]) * r + b[4]) * r + 1.0),
    )
}

/// `ln x` for each value of `x`, into `out`: [`ln_poly`] over all of them (the loop
/// vectorises), then the library's logarithm where a value is not a positive normal
/// finite number (zero, subnormal, infinite, negative or NaN), so those get the
/// library's answers.
#[inline(always)]
pub(super) fn ln_into(out: &mut [f64], x: &[f64]) {
    let mut normal = true;
    for (o, &x) in out.iter_mut().zip(x) {
        normal &= (f64::MIN_POSITIVE..=f64::MAX).contains(&x);
        *o = ln_poly(x);
    }
    if !normal {
        for (o, &x) in out.iter_mut().zip(x) {
            if !(f64::MIN_POSITIVE..=f64::MAX).contains(&x) {
                *o = x.ln();
            }
        }
    }
}

/// `ln x` for a positive normal number `x`, in plain arithmetic that vectorises:
/// `x = 2ᵉ·m` with `m` in `[√½, √2)` from the bits, then `ln m = 2·atanh(s)`,
/// `s = (m − 1)/(m + 1)`, by its series to `s²¹` (|s| ≤ 0.172: the next term is below
/// 1e-18 of the sum), and `e·ln 2` added in two parts. Within a few units in the last
/// place of the library's value (tested).
#[inline(always)]
pub(super) fn ln_poly(x: f64) -> f64 {
    // 2⁵²: an integer below it put under its exponent bits is that integer plus 2⁵².
    const TWO_52: f64 = 4_503_599_627_370_496.0;
    const LN2_HI: f64 = 6.931_471_803_691_238e-1;
    const LN2_LO: f64 = 1.908_214_929_270_587_7e-10;
    let bits = x.to_bits();
    let biased = f64::from_bits(TWO_52.to_bits() | (bits >> 52)) - TWO_52;
    let m = f64::from_bits((bits & 0x000f_ffff_ffff_ffff) | 0x3ff0_0000_0000_0000);
    let big = m > std::f64::consts::SQRT_2;
    let m = if big { 0.5 * m } else { m };
    let e = biased - if big { 1022.0 } else { 1023.0 };
    let s = (m - 1.0) / (m + 1.0);
    let s2 = s * s;
    let mut series = 1.0 / 21.0;
    for k in (0..10).rev() {
        series = series * s2 + 1.0 / (2 * k + 1) as f64;
    }
    e * LN2_HI + (2.0 * s * series + e * LN2_LO)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::closed_form::norm_cdf;
    use crate::sim::sobol::normal_quantile;
    use rand::{Rng, SeedableRng};
    use rand_pcg::Pcg64;

    fn ulps(a: f64, b: f64) -> u64 {
        a.to_bits().abs_diff(b.to_bits())
    }

    #[test]
    fn harts_normal_distribution_matches_the_erfc_one() {
        // `closed_form::norm_cdf` (through statrs' erfc) is within 2.4e-11 of the C
        // library's; a wrong digit in any of Hart's coefficients would show far above that.
        let mut worst: f64 = 0.0;
        for i in -40_000..=40_000 {
            let x = f64::from(i) * 0.000_975 + 1e-7;
            let (a, b) = (norm_cdf_hart(x), crate::closed_form::norm_cdf(x));
            worst = worst.max((a - b).abs());
            if (-7.0..-3.0).contains(&x) {
                // Relative accuracy in the lower tail.
                assert!((a / b - 1.0).abs() < 1e-8, "{x}: {a} vs {b}");
            }
        }
        assert!(worst < 3e-11, "worst absolute error {worst}");
        // Tighter, against 1/2 + ∫₀ˣ φ by composite Gauss–Legendre (20 points on panels of
        // 1/8: exact to rounding for this entire function), on [−8, 8].
        let nodes = crate::closed_form::legendre_20();
        let phi = |t: f64| (-0.5 * t * t).exp() / (2.0 * std::f64::consts::PI).sqrt();
        let mut worst: f64 = 0.0;
        for i in -64i32..=64 {
            let x = f64::from(i) * 0.125;
            let mut integral = 0.0;
            for p in 0..i.unsigned_abs() {
                let (lo, hi) = (f64::from(p) * 0.125 * x.signum(), f64::from(p + 1) * 0.125 * x.signum());
                let (mid, half) = (0.5 * (lo + hi), 0.5 * (hi - lo));
                integral +=
                    half * nodes.iter().map(|&(t, w)| w * (phi(mid - half * t) + phi(mid + half * t))).sum::<f64>();
            }
            worst = worst.max((norm_cdf_hart(x) - (0.5 + integral)).abs());
        }
        assert!(worst < 2e-15, "worst absolute error against the quadrature {worst}");
        // The lane-wise form gives the same bits, infinities included.
        for i in -50_000..=50_000 {
            let x = f64::from(i) * 0.000_93;
            assert_eq!(norm_cdf_hart_select(x).to_bits(), norm_cdf_hart(x).to_bits(), "{x}");
        }
        for x in [f64::INFINITY, f64::NEG_INFINITY, 37.0, -37.0, 37.2, 7.071_067_811_865_47] {
            assert_eq!(norm_cdf_hart_select(x).to_bits(), norm_cdf_hart(x).to_bits(), "{x}");
        }
        assert_eq!(norm_cdf_hart(0.0), 0.5);
        assert_eq!(norm_cdf_hart(-40.0), 0.0);
        assert_eq!(norm_cdf_hart(40.0), 1.0);
    }
    #[test]
    fn block_exp_is_within_two_ulps_of_the_library_exp() {
        // The library exp is correctly rounded to within an ulp (common practice for glibc),
        // so two ulps from it bounds our error at three.
        let xs: Vec<f64> = (-20_000..=20_000).map(|i| f64::from(i) * 0.0351 + 0.000_123).collect();
        let mut out = vec![0.0; xs.len()];
        exp_into(&mut out, &xs);
        let worst = xs.iter().zip(&out).map(|(x, y)| ulps(x.exp(), *y)).max().unwrap();
        assert!(worst <= 2, "worst error {worst} ulps");
        let mut scalar = vec![0.0; xs.len()];
        exp_into_generic(&mut scalar, &xs);
        assert!(out.iter().zip(&scalar).all(|(a, b)| a.to_bits() == b.to_bits()), "vector and scalar builds differ");
    }
    #[test]
    fn block_exp_hands_extremes_and_nan_to_the_library() {
        let xs = [-800.0, -745.5, -708.5, 709.7, 710.0, f64::INFINITY, f64::NEG_INFINITY, f64::NAN, 0.0, -0.0];
        let mut out = [0.0; 10];
        exp_into(&mut out, &xs);
        for (x, y) in xs.iter().zip(&out) {
            let e = x.exp();
            assert!(e.to_bits() == y.to_bits() || ulps(e, *y) <= 2, "exp({x}) = {y}, library {e}");
        }
        assert!(out[7].is_nan());
        assert_eq!(out[8], 1.0);
    }
    #[test]
    fn the_logarithm_matches_the_library() {
        let mut rng = Pcg64::seed_from_u64(1);
        let mut xs: Vec<f64> = vec![f64::MIN_POSITIVE, 1e-300, 1e-12, 0.5, 1.0, 1.0 + 1e-15, 2.0, 1e300];
        // Both sides of the fold at √2 and √½.
        for r in [std::f64::consts::SQRT_2, std::f64::consts::FRAC_1_SQRT_2] {
            xs.extend([r, r * (1.0 + 1e-15), r * (1.0 - 1e-15)]);
        }
        xs.extend((0..10_000).map(|_| 10f64.powf(rng.gen_range(-300.0..300.0))));
        for x in xs {
            let (got, want) = (ln_poly(x), x.ln());
            assert!(
                (got - want).abs() <= 4.0 * f64::EPSILON * want.abs().max(1e-300) || got == want,
                "ln {x}: {got} for {want}"
            );
        }
        assert_eq!(ln_poly(1.0), 0.0);
    }

    #[test]
    fn the_grouped_normal_functions_give_the_bits_of_the_selected_ones() {
        // Groups of eight wholly inside the fast region, straddling its edge, or holding
        // a NaN or an infinity, and lengths that leave a remainder: each lane the bits of
        // `norm_cdf_hart_select` / `quantile_select` (a group sent down the fast way with
        // a value outside it would show as a different bit pattern here).
        let mut rng = Pcg64::seed_from_u64(9);
        let split = HART_SPLIT;
        let odd = [split, -split, split * (1.0 - 1e-16), 8.0, -40.0, f64::INFINITY, f64::NAN, 0.0, -0.0];
        let low = ACKLAM_LOW;
        let odd_u = [low, 1.0 - low, low * (1.0 + 1e-15), 1e-12, 0.5, 1.0 - 1e-9, f64::MIN_POSITIVE, f64::NAN];
        for n in [0, 1, 7, 8, 9, 23, 64] {
            for mix in [0.0, 0.05, 0.5] {
                let x: Vec<f64> = (0..n)
                    .map(
                        |_| if rng.gen_bool(mix) { odd[rng.gen_range(0..odd.len())] } else { rng.gen_range(-6.0..6.0) },
                    )
                    .collect();
                let mut out = vec![0.0; n];
                norm_cdfs_into(&mut out, &x);
                for (o, &x) in out.iter().zip(&x) {
                    assert_eq!(o.to_bits(), norm_cdf_hart_select(x).to_bits(), "Φ({x})");
                }
                let u: Vec<f64> = (0..n)
                    .map(|_| {
                        if rng.gen_bool(mix) {
                            odd_u[rng.gen_range(0..odd_u.len())]
                        } else {
                            rng.gen_range(0.03..0.97)
                        }
                    })
                    .collect();
                quantiles_into(&mut out, &u);
                for (o, &u) in out.iter().zip(&u) {
                    assert_eq!(o.to_bits(), quantile_select(u).to_bits(), "quantile of {u}");
                }
            }
        }
    }

    #[test]
    fn the_lanes_logarithm_is_the_librarys_on_every_kind_of_value() {
        // Positive normal numbers within the polynomial's few units in the last place; the
        // others (zero, subnormal, infinite, negative, NaN) exactly the library's answers.
        let x = [0.0, -0.0, 1e-310, f64::MIN_POSITIVE, 0.7, 1.0, 123.4, f64::MAX, f64::INFINITY, -2.0, f64::NAN];
        let mut out = [0.0; 11];
        ln_into(&mut out, &x);
        for (&x, &got) in x.iter().zip(&out) {
            let want = x.ln();
            if (f64::MIN_POSITIVE..=f64::MAX).contains(&x) {
                assert!((got - want).abs() <= 4.0 * f64::EPSILON * want.abs() || got == want, "ln {x}: {got}");
            } else {
                assert!(got.to_bits() == want.to_bits() || (got.is_nan() && want.is_nan()), "ln {x}: {got} for {want}");
            }
        }
        // All positive normal: the polynomial's own bits.
        let x = [0.25, 3.0, 1e-200, 7.5e250];
        let mut out = [0.0; 4];
        ln_into(&mut out, &x);
        assert!(x.iter().zip(&out).all(|(&x, &got)| got.to_bits() == ln_poly(x).to_bits()));
    }

    #[test]
    fn the_selected_quantile_is_the_branchy_one() {
        // The same approximation: equal up to the logarithm's last bits, in every region.
        for &u in &[2e-12, 1e-9, 0.001, 0.024, 0.02425, 0.025, 0.3, 0.5, 0.77, 0.975, 0.976, 0.999_999, 1.0 - 2e-12] {
            let (got, want) = (quantile_select(u), normal_quantile(u));
            assert!((got - want).abs() <= 1e-14 * want.abs().max(1.0), "u = {u}: {got} for {want}");
        }
        // The far tails stay finite and in order.
        let far: Vec<f64> =
            [f64::MIN_POSITIVE, 1e-300, 1e-100, 1e-20, 1e-13].iter().map(|&u| quantile_select(u)).collect();
        assert!(far.iter().all(|z| z.is_finite()) && far.windows(2).all(|w| w[0] < w[1]), "{far:?}");
        assert!((norm_cdf(quantile_select(1e-20)) / 1e-20 - 1.0).abs() < 1e-3);
    }
}
