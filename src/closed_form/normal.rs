//! Univariate, bivariate and trivariate standard normal distribution functions, the
//! building blocks of every closed form in this module.

use statrs::function::erf::erfc;
use std::f64::consts::{FRAC_1_SQRT_2, PI};

/// 1/sqrt(2*pi).
const INV_SQRT_2PI: f64 = 0.398_942_280_401_432_7;

/// Standard normal cumulative distribution function.
///
/// Written through `erfc` rather than `erf` so that the lower tail keeps its
/// relative precision (`1 + erf(x)` would cancel for very negative `x`).
///
/// Accuracy: statrs 0.17's `erfc` is not correctly rounded. Measured
/// against the C library's `erfc` on a grid over [-8, 8], the absolute
/// error of this function is up to 2.4e-11 (worst near x = -0.71) and the
/// relative error up to 1e-10. That is far below any Monte Carlo error but
/// sets the floor for the tests here: prices of order 100 agree with
/// independent routes to about 1e-9, not to rounding.
pub fn norm_cdf(x: f64) -> f64 {
    0.5 * erfc(-x * FRAC_1_SQRT_2)
}

/// Standard normal density.
pub fn norm_pdf(x: f64) -> f64 {
    INV_SQRT_2PI * (-0.5 * x * x).exp()
}

/// `(N(y + delta) - N(y)) / delta`, the mean of the normal density over
/// `[y, y + delta]`, without the cancellation of the plain difference when
/// `delta` is small. Tends to `norm_pdf(y)` as `delta -> 0`.
///
/// The lookback formulas need this: they divide a difference of normal
/// probabilities by the cost of carry, which may be zero or tiny.
pub(crate) fn norm_cdf_mean_slope(y: f64, delta: f64) -> f64 {
    if delta.abs() > 1.0 {
        // Wide interval: the difference itself is well conditioned.
        return (norm_cdf(y + delta) - norm_cdf(y)) / delta;
    }
    // 20-point Gauss-Legendre on an interval at most one standard deviation
    // wide: the density is analytic, so this is exact to rounding.
    let half = 0.5 * delta;
    let mid = y + half;
    let mut sum = 0.0;
    for (&x, &w) in GL20_NODES.iter().zip(GL20_WEIGHTS.iter()) {
        sum += w * (norm_pdf(mid - half * x) + norm_pdf(mid + half * x));
    }
    // The weights integrate to 2 over [-1, 1]; the mean over the interval is
    // therefore sum / 2.
    0.5 * sum
}

// Gauss-Legendre nodes (positive half) and weights for 6, 12 and 20 points,
// as tabulated in Genz's bivariate normal routine. They are checked against
// nodes computed from the Legendre recurrence in the tests below.
const GL6_NODES: [f64; 3] = [0.932_469_514_203_152_2, 0.661_209_386_466_264_7, 0.238_619_186_083_197];
const GL6_WEIGHTS: [f64; 3] = [0.171_324_492_379_170_5, 0.360_761_573_048_138_4, 0.467_913_934_572_690_4];
const GL12_NODES: [f64; 6] = [
    0.981_560_634_246_719_1,
    0.904_117_256_370_475,
    0.769_902_674_194_305,
    0.587_317_954_286_617_1,
    0.367_831_498_998_180_2,
    0.125_233_408_511_469_2,
];
const GL12_WEIGHTS: [f64; 6] = [
    0.047_175_336_386_511_77,
    0.106_939_325_995_318_3,
    0.160_078_328_543_346_4,
    0.203_167_426_723_065_9,
    0.233_492_536_538_354_7,
    0.249_147_045_813_402_9,
];
const GL20_NODES: [f64; 10] = [
    0.993_128_599_185_094_9,
    0.963_971_927_277_913_8,
    0.912_234_428_251_326,
    0.839_116_971_822_218_8,
    0.746_331_906_460_150_8,
    0.636_053_680_726_515,
    0.510_867_001_950_827_1,
    0.373_706_088_715_419_6,
    0.227_785_851_141_645_1,
    0.076_526_521_133_497_33,
];
const GL20_WEIGHTS: [f64; 10] = [
    0.017_614_007_139_152_12,
    0.040_601_429_800_386_94,
    0.062_672_048_334_109_06,
    0.083_276_741_576_704_75,
    0.101_930_119_817_240_4,
    0.118_194_531_961_518_4,
    0.131_688_638_449_176_6,
    0.142_096_109_318_382_1,
    0.149_172_986_472_603_7,
    0.152_753_387_130_725_9,
];

/// Standard bivariate normal cumulative distribution function
/// `P(X <= a, Y <= b)` for standard normals with correlation `rho`.
///
/// Method: Genz (2004), "Numerical computation of rectangular bivariate and
/// trivariate normal and t probabilities", Statistics and Computing 14 —
/// Drezner–Wesolowsky's integral over the correlation with 6/12/20-point
/// Gauss–Legendre for |rho| < 0.925, and an expansion around |rho| = 1
/// otherwise. The method is accurate to about 1e-15; the result inherits
/// the error of [`norm_cdf`] (a few 1e-11).
///
/// Precondition: `-1 <= rho <= 1` (values outside are clamped in release).
/// Infinite `a` or `b` are handled.
pub fn bivariate_norm_cdf(a: f64, b: f64, rho: f64) -> f64 {
    debug_assert!((-1.0..=1.0).contains(&rho), "correlation must be in [-1, 1], got {rho}");
    // Genz's routine computes the upper orthant P(X > h, Y > k).
    upper_orthant(-a, -b, rho.clamp(-1.0, 1.0))
}

/// P(X > h, Y > k) after Genz's BVNU.
fn upper_orthant(h: f64, k: f64, r: f64) -> f64 {
    if h == f64::INFINITY || k == f64::INFINITY {
        return 0.0;
    }
    if h == f64::NEG_INFINITY {
        return if k == f64::NEG_INFINITY { 1.0 } else { norm_cdf(-k) };
    }
    if k == f64::NEG_INFINITY {
        return norm_cdf(-h);
    }

    let (nodes, weights): (&[f64], &[f64]) = if r.abs() < 0.3 {
        (&GL6_NODES, &GL6_WEIGHTS)
    } else if r.abs() < 0.75 {
        (&GL12_NODES, &GL12_WEIGHTS)
    } else {
        (&GL20_NODES, &GL20_WEIGHTS)
    };

    let mut k = k;
    let mut hk = h * k;
    let mut bvn = 0.0;
    if r.abs() < 0.925 {
        // Integrate the density's derivative in rho along the arcsine
        // substitution; the integrand is smooth here.
        let hs = 0.5 * (h * h + k * k);
        let asr = r.asin();
        for (&x, &w) in nodes.iter().zip(weights.iter()) {
            for sn in [(asr * (1.0 - x) / 2.0).sin(), (asr * (1.0 + x) / 2.0).sin()] {
                bvn += w * ((sn * hk - hs) / (1.0 - sn * sn)).exp();
            }
        }
        bvn = bvn * asr / (4.0 * PI);
        bvn += norm_cdf(-h) * norm_cdf(-k);
    } else {
        // Near |rho| = 1 the arcsine integrand is singular; integrate from
        // the perfectly correlated case instead.
        if r < 0.0 {
            k = -k;
            hk = -hk;
        }
        if r.abs() < 1.0 {
            let as_ = (1.0 - r) * (1.0 + r);
            let mut a = as_.sqrt();
            let bs = (h - k) * (h - k);
            let c = (4.0 - hk) / 8.0;
            let d = (12.0 - hk) / 16.0;
            let asr = -(bs / as_ + hk) / 2.0;
            if asr > -100.0 {
                bvn = a * asr.exp() * (1.0 - c * (bs - as_) * (1.0 - d * bs / 5.0) / 3.0 + c * d * as_ * as_ / 5.0);
            }
            if hk > -100.0 {
                let b = bs.sqrt();
                let sp = (2.0 * PI).sqrt() * norm_cdf(-b / a);
                bvn -= (-hk / 2.0).exp() * sp * b * (1.0 - c * bs * (1.0 - d * bs / 5.0) / 3.0);
            }
            a /= 2.0;
            for (&x, &w) in nodes.iter().zip(weights.iter()) {
                for is in [-1.0, 1.0] {
                    let xs = (a * (is * x + 1.0)).powi(2);
                    let rs = (1.0 - xs).sqrt();
                    let asr = -(bs / xs + hk) / 2.0;
                    if asr > -100.0 {
                        let sp = 1.0 + c * xs * (1.0 + d * xs);
                        let ep = (-hk * (1.0 - rs) / (2.0 * (1.0 + rs))).exp() / rs;
                        bvn += a * w * asr.exp() * (ep - sp);
                    }
                }
            }
            bvn = -bvn / (2.0 * PI);
        }
        if r > 0.0 {
            bvn += norm_cdf(-h.max(k));
        } else if h >= k {
            bvn = -bvn;
        } else {
            let l = if h < 0.0 { norm_cdf(k) - norm_cdf(h) } else { norm_cdf(-h) - norm_cdf(-k) };
            bvn = l - bvn;
        }
    }
    bvn.clamp(0.0, 1.0)
}

/// The 20-point Gauss–Legendre rule as (positive node, weight) pairs, for quadratures
/// elsewhere (each node stands for itself and its mirror).
pub fn legendre_20() -> Vec<(f64, f64)> {
    GL20_NODES.iter().copied().zip(GL20_WEIGHTS.iter().copied()).collect()
}

/// Standard trivariate normal cumulative distribution function
/// `P(X₁ <= a₁, X₂ <= a₂, X₃ <= a₃)` for standard normals with correlations
/// `r12`, `r13`, `r23` (a valid correlation matrix).
///
/// Method: condition on one variable and integrate the bivariate function of
/// the other two, `∫ φ(x)·M((a₂ − ρ₁₂x)/√(1 − ρ₁₂²), (a₃ − ρ₁₃x)/√(1 − ρ₁₃²); ρ₂₃|₁) dx`
/// over `x <= a₁` (the reduction Genz (2004) starts from), with composite 20-point
/// Gauss–Legendre on panels narrow enough for the steepest conditional argument and for
/// the bivariate function's own steepness where the partial correlation `ρ₂₃|₁` is
/// near ±1 (a nearly singular matrix). The
/// variable conditioned on is the one least correlated with the others. `None` when
/// every choice has a correlation within 5·10⁻⁵ of ±1 (the integrand is then a step
/// that no fixed rule resolves). Accurate to a few 1e-11, the error of [`norm_cdf`]
/// and of [`bivariate_norm_cdf`] summed over the rule.
pub fn trivariate_norm_cdf(a: [f64; 3], r12: f64, r13: f64, r23: f64) -> Option<f64> {
    trivariate_on_panels(a, r12, r13, r23, 1.5)
}

/// [`trivariate_norm_cdf`] on panels `width` times the scale of the integrand's steepest
/// feature wide.
fn trivariate_on_panels(a: [f64; 3], r12: f64, r13: f64, r23: f64, width: f64) -> Option<f64> {
    let r = [[1.0, r12, r13], [r12, 1.0, r23], [r13, r23, 1.0]];
    // The conditioning variable: the one whose largest correlation with the others is smallest.
    let first = (0..3)
        .min_by(|&i, &j| {
            let worst = |i: usize| (0..3).filter(|&k| k != i).map(|k| r[i][k].abs()).fold(0.0, f64::max);
            worst(i).total_cmp(&worst(j))
        })
        .unwrap_or(0);
    let (j, k) = match first {
        0 => (1, 2),
        1 => (0, 2),
        _ => (0, 1),
    };
    let (rj, rk) = (r[first][j], r[first][k]);
    let (sj, sk) = ((1.0 - rj * rj).max(0.0).sqrt(), (1.0 - rk * rk).max(0.0).sqrt());
    if sj < 0.01 || sk < 0.01 {
        return None;
    }
    let partial = ((r[j][k] - rj * rk) / (sj * sk)).clamp(-1.0, 1.0);
    let (aj, ak) = (a[j], a[k]);
    // Below −9 the density carries less than 1e-18 of probability.
    let (lo, hi) = (-9.0, a[first].min(9.0));
    if hi <= lo {
        return Some(0.0);
    }
    let width = width * sj.min(sk) * (1.0 - partial * partial).sqrt().max(0.02);
    let panels = ((hi - lo) / width).ceil().max(1.0) as usize;
    let h = (hi - lo) / panels as f64;
    let f = |x: f64| norm_pdf(x) * bivariate_norm_cdf((aj - rj * x) / sj, (ak - rk * x) / sk, partial);
    let mut sum = 0.0;
    for p in 0..panels {
        let mid = lo + (p as f64 + 0.5) * h;
        let mut panel = 0.0;
        for (&x, &w) in GL20_NODES.iter().zip(GL20_WEIGHTS.iter()) {
            panel += w * (f(mid - 0.5 * h * x) + f(mid + 0.5 * h * x));
        }
        sum += 0.5 * h * panel;
    }
    Some(sum.clamp(0.0, 1.0))
}

/// `P(X₁ <= a₁, …, Xₙ <= aₙ)` for standard normals with correlation matrix `corr`, for
/// one to three variables ([`norm_cdf`], [`bivariate_norm_cdf`], [`trivariate_norm_cdf`]);
/// `None` for more, or for a degenerate trivariate case.
pub fn normal_orthant(a: &[f64], corr: &[Vec<f64>]) -> Option<f64> {
    match a {
        [x] => Some(norm_cdf(*x)),
        [x, y] => Some(bivariate_norm_cdf(*x, *y, corr[0][1].clamp(-1.0, 1.0))),
        [x, y, z] => trivariate_norm_cdf([*x, *y, *z], corr[0][1], corr[0][2], corr[1][2]),
        _ => None,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::closed_form::test_support::simpson;

    /// Positive Gauss-Legendre nodes and weights computed from the
    /// three-term Legendre recurrence by Newton's method, to check the
    /// tabulated constants (a typo there would silently degrade accuracy).
    fn legendre_nodes(n: usize) -> Vec<(f64, f64)> {
        let mut out = Vec::new();
        for i in 1..=n / 2 {
            let mut x = (PI * (i as f64 - 0.25) / (n as f64 + 0.5)).cos();
            let mut dp = 0.0;
            for _ in 0..100 {
                let (mut p0, mut p1) = (1.0, x);
                for j in 2..=n {
                    let jf = j as f64;
                    let p2 = ((2.0 * jf - 1.0) * x * p1 - (jf - 1.0) * p0) / jf;
                    p0 = p1;
                    p1 = p2;
                }
                dp = n as f64 * (x * p1 - p0) / (x * x - 1.0);
                let step = p1 / dp;
                x -= step;
                if step.abs() < 1e-16 {
                    break;
                }
            }
            out.push((x, 2.0 / ((1.0 - x * x) * dp * dp)));
        }
        out
    }

    #[test]
    fn gauss_legendre_tables_match_recurrence() {
        for (n, nodes, weights) in [
            (6, &GL6_NODES[..], &GL6_WEIGHTS[..]),
            (12, &GL12_NODES[..], &GL12_WEIGHTS[..]),
            (20, &GL20_NODES[..], &GL20_WEIGHTS[..]),
        ] {
            let computed = legendre_nodes(n);
            assert_eq!(computed.len(), nodes.len());
            for ((x, w), (&xt, &wt)) in computed.iter().zip(nodes.iter().zip(weights.iter())) {
                assert!((x - xt).abs() < 1e-14, "n={n}: node {x} vs table {xt}");
                assert!((w - wt).abs() < 1e-14, "n={n}: weight {w} vs table {wt}");
            }
        }
    }

    #[test]
    fn norm_cdf_known_values() {
        assert_eq!(norm_cdf(0.0), 0.5);
        // Reference values from the C library's erfc, 0.5 erfc(-x/sqrt 2),
        // which is accurate to an ulp or so. The tolerance is statrs's
        // measured accuracy (see norm_cdf), with a little room.
        for (x, reference) in [
            (-5.0, 2.866_515_718_791_946e-7),
            (-3.0, 0.001_349_898_031_630_095_7),
            (-0.712, 0.238_232_388_010_569_9),
            (0.25, 0.598_706_325_682_923_7),
            (1.0, 0.841_344_746_068_542_9),
            (2.5, 0.993_790_334_674_223_8),
        ] {
            let err = (norm_cdf(x) - reference).abs();
            assert!(err < 5e-11, "N({x}): error {err:e}");
            assert!(err / reference < 2e-10, "N({x}): relative error {err:e}");
        }
        // Lower tail keeps relative precision: N(-10) = 7.6198530241605e-24.
        assert!((norm_cdf(-10.0) / 7.619_853_024_160_5e-24 - 1.0).abs() < 1e-9);
        // Symmetry, which erfc-based code gets from two different branches.
        for &x in &[0.3, 1.1, 2.7, 6.0] {
            assert!((norm_cdf(x) + norm_cdf(-x) - 1.0).abs() < 1e-15);
        }
    }

    #[test]
    fn mean_slope_matches_quadrature_and_density() {
        // Against Simpson on the density itself (no erfc involved), and
        // against the plain difference where the interval is wide.
        for &y in &[-3.0, -0.4, 0.0, 1.3] {
            for &d in &[-0.9, -0.1, 0.3, 0.99] {
                let numeric = simpson(norm_pdf, y, y + d, 2000) / d;
                assert!((norm_cdf_mean_slope(y, d) - numeric).abs() < 1e-13, "{y} {d}");
            }
            for &d in &[1.5, -2.0, 3.0] {
                let direct = (norm_cdf(y + d) - norm_cdf(y)) / d;
                assert_eq!(norm_cdf_mean_slope(y, d), direct);
            }
            // The limit is the density, with no cancellation: over a tiny
            // interval the mean is the density at the midpoint.
            assert!((norm_cdf_mean_slope(y, 1e-14) - norm_pdf(y + 0.5e-14)).abs() < 1e-15);
            assert!((norm_cdf_mean_slope(y, 0.0) - norm_pdf(y)).abs() < 1e-16);
        }
    }

    /// Independent route: P(X <= a, Y <= b) = integral over x <= a of
    /// phi(x) N((b - rho x) / sqrt(1 - rho^2)), by composite Simpson.
    fn bivariate_by_quadrature(a: f64, b: f64, rho: f64) -> f64 {
        let s = (1.0 - rho * rho).sqrt();
        let lo = -12.0;
        if a <= lo {
            return 0.0;
        }
        simpson(|x| norm_pdf(x) * norm_cdf((b - rho * x) / s), lo, a, 40_000)
    }

    #[test]
    fn bivariate_matches_quadrature() {
        let points = [-2.7, -1.1, -0.3, 0.0, 0.45, 1.6];
        let rhos = [-0.95, -0.8, -0.5, -0.2, 0.0, 0.1, 0.35, 0.7, 0.8, 0.93, 0.97];
        let mut worst: f64 = 0.0;
        for &a in &points {
            for &b in &points {
                for &rho in &rhos {
                    let err = (bivariate_norm_cdf(a, b, rho) - bivariate_by_quadrature(a, b, rho)).abs();
                    worst = worst.max(err);
                }
            }
        }
        assert!(worst < 1e-11, "worst error {worst}");
    }

    #[test]
    fn bivariate_closed_special_cases() {
        // Orthant at the origin: P(X<=0, Y<=0) = 1/4 + asin(rho)/(2 pi)
        // (Sheppard's formula).
        for &rho in &[-0.99, -0.6, -0.1, 0.0, 0.25, 0.8, 0.95, 0.999] {
            let exact = 0.25 + f64::asin(rho) / (2.0 * PI);
            assert!((bivariate_norm_cdf(0.0, 0.0, rho) - exact).abs() < 1e-14, "rho={rho}");
        }
        for &(a, b) in &[(-1.0, 0.5), (0.3, 0.3), (2.0, -0.7)] {
            // Independence.
            let ind = norm_cdf(a) * norm_cdf(b);
            assert!((bivariate_norm_cdf(a, b, 0.0) - ind).abs() < 1e-15);
            // Perfect correlation and anticorrelation.
            let up = norm_cdf(f64::min(a, b));
            assert!((bivariate_norm_cdf(a, b, 1.0) - up).abs() < 1e-15);
            let down = (norm_cdf(a) + norm_cdf(b) - 1.0).max(0.0);
            assert!((bivariate_norm_cdf(a, b, -1.0) - down).abs() < 1e-15);
            // Infinite limits give the margins.
            assert!((bivariate_norm_cdf(a, f64::INFINITY, 0.4) - norm_cdf(a)).abs() < 1e-15);
            assert_eq!(bivariate_norm_cdf(f64::NEG_INFINITY, b, 0.4), 0.0);
        }
    }

    #[test]
    fn bivariate_symmetries() {
        for &a in &[-2.0, -0.5, 0.2, 1.7] {
            for &b in &[-1.3, 0.0, 0.9] {
                for &rho in &[-0.97, -0.5, 0.0, 0.4, 0.9, 0.99] {
                    let m = bivariate_norm_cdf(a, b, rho);
                    assert!((m - bivariate_norm_cdf(b, a, rho)).abs() < 1e-15);
                    // P(X<=a, Y<=b) + P(X<=a, Y>b) = N(a), and
                    // P(X<=a, Y>b) = P(X<=a, -Y<-b) with corr(X,-Y) = -rho.
                    let complement = bivariate_norm_cdf(a, -b, -rho);
                    assert!((m + complement - norm_cdf(a)).abs() < 1e-14, "{a} {b} {rho}");
                }
            }
        }
    }

    /// Independent route for the trivariate function: a plain Monte Carlo estimate is too
    /// coarse, so integrate the bivariate function over the first variable by Simpson's
    /// rule (a different rule, and always conditioning on the first variable).
    fn trivariate_by_simpson(a: [f64; 3], r12: f64, r13: f64, r23: f64) -> f64 {
        let (s2, s3) = ((1.0 - r12 * r12).sqrt(), (1.0 - r13 * r13).sqrt());
        let partial = (r23 - r12 * r13) / (s2 * s3);
        let hi = a[0].min(12.0);
        simpson(
            |x| norm_pdf(x) * bivariate_norm_cdf((a[1] - r12 * x) / s2, (a[2] - r13 * x) / s3, partial),
            -12.0,
            hi,
            40_000,
        )
    }

    #[test]
    fn trivariate_orthant_at_the_origin_is_sheppards() {
        // P(X₁<=0, X₂<=0, X₃<=0) = 1/8 + (asin ρ₁₂ + asin ρ₁₃ + asin ρ₂₃)/(4π): the
        // classical orthant formula (Tong, "The Multivariate Normal Distribution" (1990),
        // from memory; it follows from Sheppard's bivariate formula by inclusion–exclusion).
        for &(r12, r13, r23) in
            &[(0.5, 0.5, 0.5), (0.0, 0.0, 0.0), (-0.3, 0.2, 0.6), (0.9, 0.8, 0.75), (-0.45, -0.45, -0.05)]
        {
            let exact = 0.125 + (f64::asin(r12) + f64::asin(r13) + f64::asin(r23)) / (4.0 * PI);
            let got = trivariate_norm_cdf([0.0; 3], r12, r13, r23).unwrap();
            assert!((got - exact).abs() < 1e-10, "{r12} {r13} {r23}: {got} vs {exact}");
        }
    }

    #[test]
    fn trivariate_reduces_to_lower_dimensions() {
        for &a in &[[-1.2, 0.4, 2.0], [0.3, -0.8, -0.1], [1.5, 1.1, 0.6]] {
            // Independent: the product of the margins.
            let ind = norm_cdf(a[0]) * norm_cdf(a[1]) * norm_cdf(a[2]);
            assert!((trivariate_norm_cdf(a, 0.0, 0.0, 0.0).unwrap() - ind).abs() < 1e-10);
            // The third independent of the first two: the bivariate times the margin.
            let two = bivariate_norm_cdf(a[0], a[1], 0.6) * norm_cdf(a[2]);
            assert!((trivariate_norm_cdf(a, 0.6, 0.0, 0.0).unwrap() - two).abs() < 1e-10);
            // An infinite limit drops its variable.
            let drop = bivariate_norm_cdf(a[0], a[2], -0.4);
            assert!((trivariate_norm_cdf([a[0], f64::INFINITY, a[2]], 0.3, -0.4, 0.5).unwrap() - drop).abs() < 1e-10);
        }
    }

    #[test]
    fn trivariate_matches_simpson_and_is_symmetric() {
        let mut worst: f64 = 0.0;
        for &a in &[[-1.2, 0.4, 2.0], [0.3, -0.8, -0.1], [1.5, 1.1, 0.6], [-2.5, -2.0, -1.0]] {
            for &(r12, r13, r23) in &[(0.5, 0.5, 0.5), (-0.3, 0.2, 0.6), (0.9, 0.8, 0.75), (0.95, -0.2, -0.3)] {
                let got = trivariate_norm_cdf(a, r12, r13, r23).unwrap();
                worst = worst.max((got - trivariate_by_simpson(a, r12, r13, r23)).abs());
                // Relabelling the variables changes nothing.
                let swapped = trivariate_norm_cdf([a[2], a[0], a[1]], r13, r23, r12).unwrap();
                assert!((got - swapped).abs() < 1e-10, "{a:?} {r12} {r13} {r23}");
            }
        }
        assert!(worst < 1e-10, "worst error {worst}");
    }

    #[test]
    fn trivariate_panels_are_fine_enough_for_nearly_singular_matrices() {
        // Panels a twelfth as wide give the same value, to 1e-12, on random correlation
        // matrices down to a determinant of 1e-6, and on one of determinant 7e-7. With
        // panels sized by the conditional arguments alone (an earlier width), halving
        // them moved nearly singular cases by up to 1e-6 (that one by 1.6e-8). Panels
        // of 1.5 times the scale (a third of the work of 0.5, which the controls' set-up
        // pays two dozen times for a dated digital): 3.5e-13 at worst on 3,000 such
        // matrices, against 1.3e-13 for 0.5 and 5.6e-13 for 2.
        use rand::{Rng, SeedableRng};
        let mut rng = rand_pcg::Pcg64::seed_from_u64(5);
        let mut worst: f64 = 0.0;
        let mut checked = 0;
        while checked < 600 {
            // The Gram matrix of three random unit vectors.
            let v: Vec<[f64; 3]> = (0..3)
                .map(|_| {
                    let r: [f64; 3] = std::array::from_fn(|_| rng.gen_range(-1.0..1.0));
                    let n = r.iter().map(|x| x * x).sum::<f64>().sqrt();
                    r.map(|x| x / n)
                })
                .collect();
            let d = |i: usize, j: usize| (0..3).map(|k| v[i][k] * v[j][k]).sum::<f64>();
            let (r12, r13, r23) = (d(0, 1), d(0, 2), d(1, 2));
            let det = 1.0 + 2.0 * r12 * r13 * r23 - r12 * r12 - r13 * r13 - r23 * r23;
            let a: [f64; 3] = std::array::from_fn(|_| rng.gen_range(-6.0..6.0));
            if det < 1e-6 {
                continue;
            }
            let Some(got) = trivariate_norm_cdf(a, r12, r13, r23) else { continue };
            let fine = trivariate_on_panels(a, r12, r13, r23, 0.125).unwrap();
            worst = worst.max((got - fine).abs());
            checked += 1;
        }
        assert!(worst < 1e-12, "worst change {worst}");
        let (a, r) = (
            [-1.748_072_623_485_542, 5.825_959_786_585_798, 1.045_236_923_098_964_4],
            (0.245_733_314_019_915_97, -0.801_232_813_715_435_9, 0.383_115_511_647_894_04),
        );
        let got = trivariate_norm_cdf(a, r.0, r.1, r.2).unwrap();
        let fine = trivariate_on_panels(a, r.0, r.1, r.2, 0.125).unwrap();
        assert!((got - fine).abs() < 1e-12, "{got} vs {fine}");
    }

    #[test]
    fn trivariate_refuses_a_degenerate_matrix() {
        assert_eq!(trivariate_norm_cdf([0.0; 3], 0.99999, 0.99999, 0.99999), None);
        assert_eq!(normal_orthant(&[0.0; 4], &vec![vec![1.0; 4]; 4]), None);
    }
}
