//! Options with early exercise on a Cox–Ross–Rubinstein binomial tree: the reference of
//! the least-squares (Longstaff–Schwartz) pricing of `may end`.
//!
//! Not a closed form but a lattice that converges to the value as the steps grow (error of
//! order 1/steps, oscillating); the Bermudan variant exercises only on equally spaced
//! dates that fall on tree steps, as a Monte Carlo product written with a schedule of
//! `N steps` does.

use super::OptionKind;

/// The value of a vanilla option on a CRR tree of `steps` steps over `t` years, which may
/// be exercised on every `every`-th step (steps `every, 2·every, …, steps`; `every = 1` is
/// the American option on the tree, `every = steps` the European). Cost of carry `b`.
/// `steps` must be a positive multiple of `every`.
#[allow(clippy::too_many_arguments)]
pub fn binomial(
    kind: OptionKind,
    s: f64,
    k: f64,
    t: f64,
    r: f64,
    b: f64,
    sigma: f64,
    steps: usize,
    every: usize,
) -> f64 {
    debug_assert!(steps > 0 && every > 0 && steps.is_multiple_of(every), "exercise dates must fall on tree steps");
    let dt = t / steps as f64;
    let up = (sigma * dt.sqrt()).exp();
    let down = 1.0 / up;
    let p = ((b * dt).exp() - down) / (up - down);
    let disc = (-r * dt).exp();
    let phi = kind.sign();
    let intrinsic = |level: f64| (phi * (level - k)).max(0.0);
    // Values at expiry, node j having j up-moves.
    let mut v: Vec<f64> =
        (0..=steps).map(|j| intrinsic(s * up.powi(j as i32) * down.powi((steps - j) as i32))).collect();
    for i in (0..steps).rev() {
        let exercisable = i > 0 && i % every == 0;
        for j in 0..=i {
            let going_on = disc * (p * v[j + 1] + (1.0 - p) * v[j]);
            v[j] = if exercisable {
                going_on.max(intrinsic(s * up.powi(j as i32) * down.powi((i - j) as i32)))
            } else {
                going_on
            };
        }
    }
    v[0]
}

/// A Bermudan option exercisable on `dates` equally spaced dates (`t/dates, …, t`), on a
/// tree of `steps_per_date` steps between dates.
#[allow(clippy::too_many_arguments)]
pub fn bermudan_binomial(
    kind: OptionKind,
    s: f64,
    k: f64,
    t: f64,
    r: f64,
    b: f64,
    sigma: f64,
    dates: usize,
    steps_per_date: usize,
) -> f64 {
    binomial(kind, s, k, t, r, b, sigma, dates * steps_per_date, steps_per_date)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::closed_form::black_scholes;
    use OptionKind::{Call, Put};

    #[test]
    fn hull_american_put_on_a_five_step_tree() {
        // Hull, Options, Futures and Other Derivatives, the binomial-tree chapter's
        // American put (from memory): S = 50, K = 50, r = 10%, σ = 40%, T = 5 months,
        // five steps of one month → 4.49; the tree converges to about 4.28 as the steps
        // grow (the book quotes 4.283 at 500 steps).
        let (s, k, r, sigma, t) = (50.0, 50.0, 0.10, 0.40, 5.0 / 12.0);
        let five = binomial(Put, s, k, t, r, r, sigma, 5, 1);
        assert!((five - 4.49).abs() <= 0.005, "five steps: {five}");
        let fine = binomial(Put, s, k, t, r, r, sigma, 500, 1);
        assert!((fine - 4.283).abs() <= 0.0015, "500 steps: {fine}");
    }

    #[test]
    fn longstaff_schwartz_table_1_finite_difference_value() {
        // Longstaff and Schwartz (2001), Table 1, first row (from memory): S = 36, K = 40,
        // σ = 20%, r = 6%, T = 1, exercise 50 times a year: finite-difference value 4.478,
        // European value 3.844. Our tree gives 4.4779 with 50 exercise dates (80 steps
        // between dates) and 4.4867 with exercise on every one of 4,000 steps: the printed
        // 4.478 is the value for the table's 50 dates, which the tree reproduces to its
        // printed decimals.
        let bermudan = bermudan_binomial(Put, 36.0, 40.0, 1.0, 0.06, 0.06, 0.2, 50, 80);
        assert!((bermudan - 4.478).abs() <= 0.0005, "{bermudan}");
        let finer = bermudan_binomial(Put, 36.0, 40.0, 1.0, 0.06, 0.06, 0.2, 50, 160);
        assert!((finer - bermudan).abs() <= 0.0005, "{finer} against {bermudan}");
        // Exercise at any time is worth a little more; the European put (Black–Scholes
        // 3.844) is worth less.
        let american = binomial(Put, 36.0, 40.0, 1.0, 0.06, 0.06, 0.2, 4000, 1);
        let european = black_scholes(Put, 36.0, 40.0, 1.0, 0.06, 0.06, 0.2);
        assert!((european - 3.844).abs() <= 0.0005, "{european}");
        assert!(american > bermudan && american < bermudan + 0.02, "{american}");
        assert!(bermudan > european);
    }

    #[test]
    fn one_exercise_date_is_the_european_option_and_calls_without_dividends_are_never_exercised() {
        for (kind, k) in [(Put, 95.0), (Call, 105.0)] {
            let tree = binomial(kind, 100.0, k, 0.75, 0.05, 0.02, 0.3, 2000, 2000);
            let bs = black_scholes(kind, 100.0, k, 0.75, 0.05, 0.02, 0.3);
            assert!((tree - bs).abs() < 2e-3, "{kind:?}: {tree} against {bs}");
        }
        // With no dividend (b = r > 0) an American call is worth the European one.
        let american = binomial(Call, 100.0, 100.0, 1.0, 0.05, 0.05, 0.25, 1000, 1);
        let european = binomial(Call, 100.0, 100.0, 1.0, 0.05, 0.05, 0.25, 1000, 1000);
        assert!((american - european).abs() < 1e-12, "{american} {european}");
    }
}
