//! Continuously monitored lookback options: floating strike
//! (Goldman–Sosin–Gatto) and fixed strike (Conze–Viswanathan), in the form
//! given by Haug, The Complete Guide to Option Pricing Formulas (2nd ed.,
//! ch. 4), rewritten so that a zero cost of carry is not a special case.

use super::normal::norm_cdf_mean_slope;
use super::{norm_cdf, OptionKind};

/// Goldman–Sosin–Gatto (1979) floating-strike lookback. The call pays
/// `S_T - min S`, the put `max S - S_T`, the extreme running over the past
/// (`s_extreme`) and the remaining life.
///
/// `s_extreme` is the minimum observed so far for a call, the maximum for a
/// put. The current spot is part of the observed path, so it is folded in
/// (`min(s_extreme, s)` / `max(s_extreme, s)`).
///
/// Preconditions: `s, s_extreme, sigma > 0`, `t >= 0`. Any `b`, including
/// zero, is valid.
pub fn floating_lookback(kind: OptionKind, s: f64, s_extreme: f64, t: f64, r: f64, b: f64, sigma: f64) -> f64 {
    debug_assert!(s > 0.0 && s_extreme > 0.0 && sigma > 0.0);
    debug_assert!(t >= 0.0);
    match kind {
        OptionKind::Call => {
            let m = s_extreme.min(s);
            if t <= 0.0 {
                return s - m;
            }
            let v = sigma * t.sqrt();
            let a1 = ((s / m).ln() + (b + 0.5 * sigma * sigma) * t) / v;
            let a2 = a1 - v;
            s * ((b - r) * t).exp() * norm_cdf(a1) - m * (-r * t).exp() * norm_cdf(a2)
                + s * (-r * t).exp() * reflection_term(1.0, s / m, -a1, t, b, sigma)
        }
        OptionKind::Put => {
            let m = s_extreme.max(s);
            if t <= 0.0 {
                return m - s;
            }
            let v = sigma * t.sqrt();
            let b1 = ((s / m).ln() + (b + 0.5 * sigma * sigma) * t) / v;
            let b2 = b1 - v;
            m * (-r * t).exp() * norm_cdf(-b2)
                - s * ((b - r) * t).exp() * norm_cdf(-b1)
                - s * (-r * t).exp() * reflection_term(-1.0, s / m, -b1, t, b, sigma)
        }
    }
}

/// Conze–Viswanathan (1991) fixed-strike lookback. The call pays
/// `max(max S - k, 0)`, the put `max(k - min S, 0)`, the extreme running
/// over the past (`s_extreme`) and the remaining life.
///
/// `s_extreme` is the maximum observed so far for a call, the minimum for a
/// put; the current spot is folded in as for [`floating_lookback`].
///
/// Preconditions: `s, s_extreme, k, sigma > 0`, `t >= 0`. Any `b`.
#[allow(clippy::too_many_arguments)]
pub fn fixed_lookback(kind: OptionKind, s: f64, s_extreme: f64, k: f64, t: f64, r: f64, b: f64, sigma: f64) -> f64 {
    debug_assert!(s > 0.0 && s_extreme > 0.0 && k > 0.0 && sigma > 0.0);
    debug_assert!(t >= 0.0);
    let disc = (-r * t).exp();
    match kind {
        OptionKind::Call => {
            let m = s_extreme.max(s);
            if t <= 0.0 {
                return (m - k).max(0.0);
            }
            // Above the running maximum the strike is what matters; below
            // it, the part already locked in is paid for sure.
            let l = k.max(m);
            let v = sigma * t.sqrt();
            let d1 = ((s / l).ln() + (b + 0.5 * sigma * sigma) * t) / v;
            let d2 = d1 - v;
            disc * (m - k).max(0.0) + s * ((b - r) * t).exp() * norm_cdf(d1)
                - l * disc * norm_cdf(d2)
                - s * disc * reflection_term(-1.0, s / l, -d1, t, b, sigma)
        }
        OptionKind::Put => {
            let m = s_extreme.min(s);
            if t <= 0.0 {
                return (k - m).max(0.0);
            }
            let l = k.min(m);
            let v = sigma * t.sqrt();
            let d1 = ((s / l).ln() + (b + 0.5 * sigma * sigma) * t) / v;
            let d2 = d1 - v;
            disc * (k - m).max(0.0) + l * disc * norm_cdf(-d2) - s * ((b - r) * t).exp() * norm_cdf(-d1)
                + s * disc * reflection_term(1.0, s / l, -d1, t, b, sigma)
        }
    }
}

/// The term `sigma^2/(2b) [x^(-2b/sigma^2) N(sg (y + delta)) - e^(bt) N(sg y)]`
/// with `delta = 2 b sqrt(t) / sigma` and `sg = ±1`, common to all lookback
/// formulas. Haug writes it with the explicit `1/b`, which is singular at
/// `b = 0` and loses digits near it. Splitting the bracket as
/// `[x^(..) - e^(bt)] N(sg (y + delta)) + e^(bt) [N(sg (y + delta)) - N(sg y)]`
/// leaves two differences that are each an exact multiple of `b`:
/// `x^(..) - e^(bt) = e^(bt) expm1(-b c)` with `c = 2 ln x / sigma^2 + t`,
/// and the normal difference is `sg delta` times the mean density over the
/// interval. Dividing out `b` analytically gives a form valid for all `b`.
fn reflection_term(sg: f64, x: f64, y: f64, t: f64, b: f64, sigma: f64) -> f64 {
    let sqrt_t = t.sqrt();
    let delta = 2.0 * b * sqrt_t / sigma;
    let c = 2.0 * x.ln() / (sigma * sigma) + t;
    let growth = (b * t).exp();
    0.5 * sigma
        * sigma
        * growth
        * (-c * exprel(-b * c) * norm_cdf(sg * (y + delta))
            + sg * (2.0 * sqrt_t / sigma) * norm_cdf_mean_slope(y, delta))
}

/// `(e^x - 1) / x`, equal to 1 at `x = 0`, without cancellation.
fn exprel(x: f64) -> f64 {
    if x == 0.0 {
        1.0
    } else {
        x.exp_m1() / x
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::closed_form::barrier_hit_probability;
    use crate::closed_form::test_support::simpson;
    use OptionKind::{Call, Put};

    // Haug, The Complete Guide to Option Pricing Formulas, 2nd ed., ch. 4,
    // Goldman–Sosin–Gatto floating-strike lookback example (from memory):
    // S=120, S_min=100, T=0.5, r=10%, sigma=30% -> call 25.3533. Not
    // reproduced, so not asserted. With b=10% (as first remembered) the
    // formula gives 28.213256. With b=4% (r=10% and a 6% dividend yield,
    // on re-derivation the likelier reading of the example) it gives
    // 25.353355, which rounds to 25.3534, one unit off the printed value.
    // The running-extreme integrals below check the formula independently.

    #[test]
    fn haug_fixed_strike_table() {
        // Haug, Complete Guide, 2nd ed., ch. 4, table of Conze–Viswanathan
        // fixed-strike lookback calls (from memory): S=S_max=100, T=0.5,
        // r=10%, b=10%. (strike, sigma, value)
        //
        // Two remembered cells do not reproduce and are left out:
        // K=95 sigma=30%: remembered 24.9857, computed 24.985760 (24.9858);
        // K=105 sigma=30%: remembered 15.4878, computed 15.851199. The
        // value 8.9247 once suggested for K=105, sigma=30% does not match
        // either (computed 15.851199).
        let cells = [
            (95.0, 0.1, 13.2687),
            (100.0, 0.1, 8.5126),
            (105.0, 0.1, 4.3908),
            (95.0, 0.2, 18.9263),
            (100.0, 0.2, 14.1702),
            (105.0, 0.2, 9.8905),
            (100.0, 0.3, 20.2296),
        ];
        for (k, sigma, expected) in cells {
            let c = fixed_lookback(Call, 100.0, 100.0, k, 0.5, 0.1, 0.1, sigma);
            assert!((c - expected).abs() <= 0.5e-4, "K={k} sigma={sigma}: {c} vs {expected}");
        }
    }

    /// Independent route for all four lookbacks: the expected maximum and
    /// minimum from the law of the running extreme,
    /// `E[(M - L)^+] = integral over x > L of P(M_T > x) dx` and
    /// `E[(L - m)^+] = integral over x < L of P(m_T < x) dx`, where the
    /// touching probabilities come from the reflection principle
    /// (`barrier_hit_probability`, itself checked against the first-passage
    /// density in the barrier tests).
    fn expected_excess_max(s: f64, l: f64, t: f64, b: f64, sigma: f64) -> f64 {
        // x = s e^u, dx = s e^u du.
        let lo = (l / s).ln();
        let hi = lo.max(0.0) + 14.0 * sigma * t.sqrt() + b.abs() * t;
        simpson(|u| s * u.exp() * barrier_hit_probability(s, s * u.exp(), t, b, sigma), lo, hi, 20_000)
    }

    fn expected_shortfall_min(s: f64, l: f64, t: f64, b: f64, sigma: f64) -> f64 {
        // x = s e^-u.
        let lo = (s / l).ln();
        let hi = lo.max(0.0) + 14.0 * sigma * t.sqrt() + b.abs() * t;
        simpson(|u| s * (-u).exp() * barrier_hit_probability(s, s * (-u).exp(), t, b, sigma), lo, hi, 20_000)
    }

    #[test]
    fn lookbacks_match_running_extreme_integrals() {
        let s = 100.0;
        for &(t, r, b, sigma) in
            &[(0.5, 0.1, 0.1, 0.3), (1.0, 0.05, 0.0, 0.2), (2.0, 0.03, -0.04, 0.4), (0.25, 0.08, 1e-9, 0.25)]
        {
            let disc = f64::exp(-r * t);
            let carry = f64::exp((b - r) * t);
            for &(mx, mn) in &[(100.0, 100.0), (115.0, 90.0)] {
                // Floating put: E[max(mx, M_T)] - S_T.
                let put = disc * (mx + expected_excess_max(s, mx, t, b, sigma)) - s * carry;
                let closed = floating_lookback(Put, s, mx, t, r, b, sigma);
                assert!((put - closed).abs() < 1e-8, "float put b={b}: {put} vs {closed}");
                // Floating call: S_T - E[min(mn, m_T)].
                let call = s * carry - disc * (mn - expected_shortfall_min(s, mn, t, b, sigma));
                let closed = floating_lookback(Call, s, mn, t, r, b, sigma);
                assert!((call - closed).abs() < 1e-8, "float call b={b}: {call} vs {closed}");
                for k in [80.0, 100.0, 105.0, 130.0] {
                    let l = f64::max(k, mx);
                    let call = disc * ((mx - k).max(0.0) + expected_excess_max(s, l, t, b, sigma));
                    let closed = fixed_lookback(Call, s, mx, k, t, r, b, sigma);
                    assert!((call - closed).abs() < 1e-8, "fixed call K={k} b={b}: {call} vs {closed}");
                    let l = f64::min(k, mn);
                    let put = disc * ((k - mn).max(0.0) + expected_shortfall_min(s, l, t, b, sigma));
                    let closed = fixed_lookback(Put, s, mn, k, t, r, b, sigma);
                    assert!((put - closed).abs() < 1e-8, "fixed put K={k} b={b}: {put} vs {closed}");
                }
            }
        }
    }

    #[test]
    fn fixed_below_running_extreme_is_floating_plus_forward() {
        // max(M, M_T) - K = (max(M, M_T) - S_T) + (S_T - K): for K <= M the
        // fixed call is the floating put plus a forward struck at K; in the
        // same way, for K >= m the fixed put is the floating call plus a
        // forward sold at K.
        let s = 100.0;
        for &(t, r, b, sigma) in &[(0.5, 0.1, 0.1, 0.3), (1.5, 0.02, 0.0, 0.2), (1.0, 0.05, -0.02, 0.5)] {
            let fwd = |k: f64| s * f64::exp((b - r) * t) - k * f64::exp(-r * t);
            for (mx, k) in [(100.0, 100.0), (120.0, 95.0), (120.0, 120.0)] {
                let fixed = fixed_lookback(Call, s, mx, k, t, r, b, sigma);
                let float = floating_lookback(Put, s, mx, t, r, b, sigma);
                assert!((fixed - float - fwd(k)).abs() < 1e-11, "{fixed} vs {float}");
            }
            for (mn, k) in [(100.0, 100.0), (85.0, 99.0), (85.0, 85.0)] {
                let fixed = fixed_lookback(Put, s, mn, k, t, r, b, sigma);
                let float = floating_lookback(Call, s, mn, t, r, b, sigma);
                assert!((fixed - float + fwd(k)).abs() < 1e-11, "{fixed} vs {float}");
            }
        }
    }

    #[test]
    fn zero_carry_is_continuous() {
        // b = 0 uses the same code path; check it joins its neighbours
        // smoothly (Haug's 1/b form would divide by zero here).
        let (s, t, r, sigma) = (100.0, 1.0, 0.05, 0.25);
        let at = |b: f64| {
            [
                floating_lookback(Call, s, 90.0, t, r, b, sigma),
                floating_lookback(Put, s, 110.0, t, r, b, sigma),
                fixed_lookback(Call, s, 100.0, 105.0, t, r, b, sigma),
                fixed_lookback(Put, s, 100.0, 95.0, t, r, b, sigma),
            ]
        };
        let (lo, mid, hi) = (at(-1e-7), at(0.0), at(1e-7));
        for i in 0..4 {
            assert!(mid[i].is_finite());
            // Central difference: the midpoint of the neighbours is within
            // O(b^2) of the value at zero.
            assert!((0.5 * (lo[i] + hi[i]) - mid[i]).abs() < 1e-9, "{i}: {lo:?} {mid:?} {hi:?}");
        }
    }

    #[test]
    fn expiry_pays_intrinsic() {
        assert_eq!(floating_lookback(Call, 120.0, 100.0, 0.0, 0.1, 0.1, 0.3), 20.0);
        assert_eq!(floating_lookback(Put, 120.0, 130.0, 0.0, 0.1, 0.1, 0.3), 10.0);
        assert_eq!(fixed_lookback(Call, 120.0, 130.0, 100.0, 0.0, 0.1, 0.1, 0.3), 30.0);
        assert_eq!(fixed_lookback(Put, 120.0, 90.0, 100.0, 0.0, 0.1, 0.1, 0.3), 10.0);
    }
}
