//! Geometric-average Asian options. Their prices are exact because the log
//! of a geometric mean of lognormals is normal; the engine uses them as the
//! classic control variate for arithmetic Asians.

use super::{black_scholes, norm_cdf, OptionKind};

/// Kemna–Vorst (1990) geometric average-rate option with continuous
/// averaging over `[0, t]`, paid at `t`.
///
/// The continuous geometric average is lognormal with volatility
/// `sigma / sqrt(3)` and carry `(b - sigma^2 / 6) / 2`, so the price is a
/// generalised Black–Scholes price with those inputs.
///
/// Preconditions: `s, k > 0`, `t >= 0`, `sigma >= 0`.
pub fn geometric_asian_continuous(kind: OptionKind, s: f64, k: f64, t: f64, r: f64, b: f64, sigma: f64) -> f64 {
    let sigma_avg = sigma / 3f64.sqrt();
    let b_avg = 0.5 * (b - sigma * sigma / 6.0);
    black_scholes(kind, s, k, t, r, b_avg, sigma_avg)
}

/// Geometric average-rate option on the fixings `S(t_1), ..., S(t_n)`,
/// paid at `t_pay`: the payoff is `(G - k)^+` (call) or `(k - G)^+` (put)
/// with `G = (prod S(t_i))^(1/n)`.
///
/// `ln G = ln s + (b - sigma^2/2) mean(t_i) + sigma mean(W(t_i))`, which is
/// normal with variance `sigma^2 / n^2 * sum_ij min(t_i, t_j)`. The
/// price is the discounted Black formula on that lognormal.
///
/// Preconditions: `s, k > 0`, `sigma >= 0`, `times` non-empty and every
/// fixing time `> 0` (in any order, repeats allowed), `t_pay >= 0`. An
/// empty `times` returns NaN in release.
#[allow(clippy::too_many_arguments)]
pub fn geometric_asian_discrete(
    kind: OptionKind,
    s: f64,
    k: f64,
    times: &[f64],
    t_pay: f64,
    r: f64,
    b: f64,
    sigma: f64,
) -> f64 {
    debug_assert!(s > 0.0 && k > 0.0, "spot and strike must be positive");
    debug_assert!(!times.is_empty(), "need at least one fixing");
    debug_assert!(times.iter().all(|&x| x > 0.0), "fixing times must be positive");
    if times.is_empty() {
        return f64::NAN;
    }
    let (forward, var) = geometric_moments(s, times, b, sigma);
    let disc = (-r * t_pay).exp();
    let phi = kind.sign();
    let sd = var.sqrt();
    if sd <= 0.0 {
        return disc * (phi * (forward - k)).max(0.0);
    }
    let d1 = ((forward / k).ln() + 0.5 * var) / sd;
    let d2 = d1 - sd;
    disc * phi * (forward * norm_cdf(phi * d1) - k * norm_cdf(phi * d2))
}

/// The expectation of the geometric mean of `S` at the fixing `times` (all > 0): the
/// forward of the discrete geometric average, used as a linear control variate.
pub fn geometric_average_forward(s: f64, times: &[f64], b: f64, sigma: f64) -> f64 {
    geometric_moments(s, times, b, sigma).0
}

/// The forward of the geometric mean and the variance of its logarithm: the log of the
/// geometric mean of GBM levels is normal with mean `ln s + (b − σ²/2)·t̄` and variance
/// `σ²/n² · Σᵢⱼ min(tᵢ, tⱼ)`.
fn geometric_moments(s: f64, times: &[f64], b: f64, sigma: f64) -> (f64, f64) {
    let n = times.len() as f64;
    let mean_time = times.iter().sum::<f64>() / n;
    // sum_ij min(t_i, t_j): with the times sorted ascending, the i-th
    // smallest (0-based) is the minimum of 2(n - i) - 1 ordered pairs.
    let mut sorted = times.to_vec();
    sorted.sort_by(f64::total_cmp);
    let pair_sum: f64 = sorted.iter().enumerate().map(|(i, &ti)| ti * (2.0 * (n - i as f64) - 1.0)).sum();
    let var = sigma * sigma * pair_sum / (n * n);
    let mean_log = s.ln() + (b - 0.5 * sigma * sigma) * mean_time;
    ((mean_log + 0.5 * var).exp(), var)
}

#[cfg(test)]
mod tests {
    use super::*;
    use OptionKind::{Call, Put};

    #[test]
    fn geometric_forward_is_the_deep_in_the_money_call_undiscounted() {
        // Call with a tiny strike = discounted forward minus the discounted strike.
        let times = [0.25, 0.5, 0.75, 1.0];
        let f = geometric_average_forward(100.0, &times, 0.02, 0.3);
        let c = geometric_asian_discrete(Call, 100.0, 1e-9, &times, 1.0, 0.0, 0.02, 0.3);
        assert!((f - c).abs() < 1e-8, "{f} vs {c}");
        // One fixing: the forward of S itself.
        assert!((geometric_average_forward(100.0, &[2.0], 0.02, 0.3) - 100.0 * 0.04f64.exp()).abs() < 1e-9);
    }

    #[test]
    fn haug_geometric_average_example() {
        // Haug, The Complete Guide to Option Pricing Formulas, 2nd ed.,
        // ch. 4, Kemna–Vorst geometric average-rate option (from memory):
        // S=80, K=85, T=0.25, r=5%, b=8%, sigma=20% -> put 4.6922.
        let p = geometric_asian_continuous(Put, 80.0, 85.0, 0.25, 0.05, 0.08, 0.2);
        assert!((p - 4.6922).abs() <= 0.5e-4, "put {p}");
    }

    #[test]
    fn discrete_tends_to_continuous() {
        let (s, t, r, b, sigma) = (100.0, 1.0, 0.05, 0.02, 0.3);
        let n = 10_000;
        let times: Vec<f64> = (1..=n).map(|i| t * i as f64 / n as f64).collect();
        for kind in [Call, Put] {
            for k in [80.0, 100.0, 120.0] {
                let disc = geometric_asian_discrete(kind, s, k, &times, t, r, b, sigma);
                let cont = geometric_asian_continuous(kind, s, k, t, r, b, sigma);
                assert!((disc - cont).abs() < 1e-3, "{kind:?} K={k}: {disc} vs {cont}");
                // And the error is of order 1/n, not merely small: with 10
                // fixings the gap is visibly larger.
                let few: Vec<f64> = (1..=10).map(|i| t * i as f64 / 10.0).collect();
                let coarse = geometric_asian_discrete(kind, s, k, &few, t, r, b, sigma);
                assert!((coarse - cont).abs() > 10.0 * (disc - cont).abs());
            }
        }
    }

    #[test]
    fn single_fixing_is_black_scholes() {
        let (s, r, b, sigma) = (100.0, 0.05, 0.02, 0.3);
        for kind in [Call, Put] {
            for (k, t) in [(90.0, 0.5), (100.0, 1.0), (130.0, 2.0)] {
                let g = geometric_asian_discrete(kind, s, k, &[t], t, r, b, sigma);
                let bs = black_scholes(kind, s, k, t, r, b, sigma);
                assert!((g - bs).abs() < 1e-12, "{kind:?}: {g} vs {bs}");
                // Paid later than fixed: discounted further, nothing else.
                let late = geometric_asian_discrete(kind, s, k, &[t], t + 1.0, r, b, sigma);
                assert!((late - bs * (-r).exp()).abs() < 1e-12);
            }
        }
    }

    #[test]
    fn fixing_order_does_not_matter_and_repeats_weigh() {
        let (s, k, r, b, sigma) = (100.0, 95.0, 0.03, 0.01, 0.2);
        let a = geometric_asian_discrete(Call, s, k, &[0.25, 0.5, 1.0], 1.0, r, b, sigma);
        let z = geometric_asian_discrete(Call, s, k, &[1.0, 0.25, 0.5], 1.0, r, b, sigma);
        assert_eq!(a, z);
        // Two identical fixings are the same as one.
        let one = geometric_asian_discrete(Call, s, k, &[0.7], 1.0, r, b, sigma);
        let two = geometric_asian_discrete(Call, s, k, &[0.7, 0.7], 1.0, r, b, sigma);
        assert!((one - two).abs() < 1e-13);
    }
}
