//! The control-variate regression, made safe for degenerate inputs.
//!
//! The controlled estimate is the plain mean of the payoff corrected by `β·(x̄ − E[x])`,
//! with `β` the least-squares coefficient of the payoff on the controls, estimated from the
//! same run. That correction is only as good as three things, each checked here:
//!
//! - **each control is really random and finite.** A control whose sample values, mean or
//!   closed-form mean is not finite (an overflow) is left out, and so is one whose
//!   standard deviation is rounding rather than randomness (below [`NEGLIGIBLE_SPREAD`]
//!   of the size of the quantity it is built on, e.g. a volatility of 1e-20): dividing by
//!   such a spread turns rounding noise into an arbitrarily large `β`. (If such a control's
//!   mean is not its closed-form mean either, it falls under the next point.)
//! - **the run samples each control's distribution.** A control's sample mean is within
//!   a few of its own standard errors of its closed-form mean, except with a tiny
//!   probability: further than [`MEAN_Z_LIMIT`] means the paths do not represent it (a
//!   lognormal with a volatility of 500%, or a horizon of thousands of years, has its mean
//!   carried by paths too rare to be drawn), and the correction would carry that error
//!   into the price. Such a control is left out.
//! - **the controls are not collinear**: they are kept one by one while the correlation
//!   matrix of those kept stays well conditioned (a Cholesky factor whose next pivot,
//!   `1 − R²` of the new control on those before it, is at least [`COLLINEAR`]).
//!
//! Finally a guard: with `R` the multiple correlation of the payoff with the kept
//! controls, the correction `β·(x̄ − E[x])` has a standard deviation of `R` plain standard
//! errors (at most one), so a controlled estimate more than [`GUARD_SES`] plain standard
//! errors from the plain one (about a 2e-9 chance for a sound run) means the regression
//! cannot be trusted: the plain estimate is returned, and the caller warns.

use super::stats::Moments;

/// A control whose standard deviation is at most this fraction of its scale is constant
/// up to rounding.
pub const NEGLIGIBLE_SPREAD: f64 = 1e-8;

/// The largest distance, in the control's own standard errors, between a control's sample
/// mean and its closed-form mean for the control to be used.
pub const MEAN_Z_LIMIT: f64 = 6.0;

/// The largest distance, in plain standard errors, between the controlled and the plain
/// estimate before the plain one is reported instead.
pub const GUARD_SES: f64 = 6.0;

/// The smallest `1 − R²` of a control on the controls kept before it.
pub const COLLINEAR: f64 = 1e-9;

/// What is known of a control in closed form.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Known {
    /// Its expectation.
    pub mean: f64,
    /// The size of the quantity it is built on, for telling randomness from rounding.
    pub scale: f64,
}

/// Why a control was not used.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum LeftOut {
    /// Its values, their moments or its closed-form mean are not finite numbers.
    NotFinite,
    /// Its spread is rounding, not randomness, and its mean its closed-form mean.
    Constant,
    /// Its sample mean is `z` of its standard errors from its closed-form mean (or its
    /// spread is rounding and its mean is not the closed-form one: `z` may be infinite).
    Unsampled { z: f64 },
    /// It adds nothing the controls kept before it do not already say.
    Collinear,
}

/// The outcome of the regression.
#[derive(Clone, Debug, PartialEq)]
pub struct Regression {
    pub price: f64,
    pub std_error: f64,
    /// Indices of the controls used.
    pub kept: Vec<usize>,
    /// The coefficient of each control used, in the order of `kept`: the estimate is the
    /// payoff's mean less `Σ beta·(mean − expectation)`.
    pub beta: Vec<f64>,
    /// The controls left out, and why.
    pub left_out: Vec<(usize, LeftOut)>,
    /// When the controlled estimate failed the guard: that estimate and its distance from
    /// the plain one in plain standard errors (the price reported is the plain one).
    pub fell_back: Option<(f64, f64)>,
}

/// Regresses column 0 of `m` (the payoff) on columns `1..` (the controls, whose
/// closed-form facts are `known`).
pub fn regress(m: &Moments, known: &[Known]) -> Regression {
    let n = m.count();
    let mean_y = m.mean(0);
    let var_y = m.variance(0);
    let plain_se = if n < 2.0 { f64::NAN } else { (var_y / n).sqrt() };
    let mut out = Regression {
        price: mean_y,
        std_error: plain_se,
        kept: Vec::new(),
        beta: Vec::new(),
        left_out: Vec::new(),
        fell_back: None,
    };
    if n < 2.0 || known.is_empty() {
        return out;
    }
    // Screen each control on its own.
    let mut candidates: Vec<(usize, f64)> = Vec::new();
    for (j, k) in known.iter().enumerate() {
        let (mean, var, cov) = (m.mean(1 + j), m.variance(1 + j), m.cov(0, 1 + j));
        if ![mean, var, cov, k.mean, k.scale].iter().all(|x| x.is_finite()) {
            out.left_out.push((j, LeftOut::NotFinite));
            continue;
        }
        // Everything is finite from here on.
        let sd = var.sqrt();
        let rounding = NEGLIGIBLE_SPREAD * k.scale.abs();
        let off = mean - k.mean;
        if sd <= rounding {
            // Constant and at its expectation: nothing to learn from it. Constant and
            // elsewhere: its distribution is not what the paths drew.
            let why = if off.abs() <= rounding {
                LeftOut::Constant
            } else {
                LeftOut::Unsampled { z: if sd > 0.0 { off / (sd / n.sqrt()) } else { off.signum() * f64::INFINITY } }
            };
            out.left_out.push((j, why));
            continue;
        }
        let z = off / (sd / n.sqrt());
        if z.abs() > MEAN_Z_LIMIT {
            out.left_out.push((j, LeftOut::Unsampled { z }));
            continue;
        }
        candidates.push((j, sd));
    }
    // Keep controls one by one while the correlation matrix stays well conditioned:
    // row `a` of its Cholesky factor `L` is built against the rows kept before it.
    let mut kept: Vec<(usize, f64)> = Vec::new();
    let mut l: Vec<Vec<f64>> = Vec::new();
    for &(j, sd_j) in &candidates {
        let mut row: Vec<f64> = Vec::with_capacity(kept.len() + 1);
        for (a, &(i, sd_i)) in kept.iter().enumerate() {
            let c = m.cov(1 + j, 1 + i) / sd_j / sd_i;
            let s: f64 = (0..a).map(|b| row[b] * l[a][b]).sum();
            row.push((c - s) / l[a][a]);
        }
        let pivot = 1.0 - row.iter().map(|x| x * x).sum::<f64>();
        if pivot < COLLINEAR {
            out.left_out.push((j, LeftOut::Collinear));
            continue;
        }
        row.push(pivot.sqrt());
        l.push(row);
        kept.push((j, sd_j));
    }
    if kept.is_empty() {
        return out;
    }
    let q = kept.len();
    // Solve (D R D) β = c, with R = L Lᵀ and D the controls' standard deviations:
    // L z = D⁻¹c, Lᵀ w = z, β = D⁻¹ w. The variance explained is cᵀ(DRD)⁻¹c = |z|².
    let rhs: Vec<f64> = kept.iter().map(|&(j, sd)| m.cov(0, 1 + j) / sd).collect();
    let mut z = vec![0.0; q];
    for a in 0..q {
        let s: f64 = (0..a).map(|b| l[a][b] * z[b]).sum();
        z[a] = (rhs[a] - s) / l[a][a];
    }
    let mut w = vec![0.0; q];
    for a in (0..q).rev() {
        let s: f64 = (a + 1..q).map(|b| l[b][a] * w[b]).sum();
        w[a] = (z[a] - s) / l[a][a];
    }
    let mut price = mean_y;
    for (a, &(j, sd)) in kept.iter().enumerate() {
        price -= w[a] / sd * (m.mean(1 + j) - known[j].mean);
    }
    let explained: f64 = z.iter().map(|x| x * x).sum();
    let dof = (n - 1.0 - q as f64).max(1.0);
    let residual = ((var_y - explained) * (n - 1.0) / dof).max(0.0);
    let std_error = (residual / n).sqrt();
    let distance = (price - mean_y).abs() / plain_se;
    let trusted = price.is_finite() && std_error.is_finite() && (price - mean_y).abs() <= GUARD_SES * plain_se;
    if !trusted {
        out.fell_back = Some((price, distance));
        return out;
    }
    out.price = price;
    out.std_error = std_error;
    out.beta = kept.iter().enumerate().map(|(a, &(_, sd))| w[a] / sd).collect();
    out.kept = kept.into_iter().map(|(j, _)| j).collect();
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Standard normals from a fixed seed.
    fn normals(n: usize, seed: u64) -> Vec<f64> {
        use rand::{Rng, SeedableRng};
        let mut rng = rand_pcg::Pcg64::seed_from_u64(seed);
        (0..n).map(|_| rng.sample(rand_distr::StandardNormal)).collect()
    }

    fn known(mean: f64, scale: f64) -> Known {
        Known { mean, scale }
    }

    #[test]
    fn an_exact_linear_control_gives_its_closed_form() {
        // y = 2 + 3x with E[x] = 0 exactly: the controlled estimate is 2 (common practice:
        // a payoff that is a linear function of a control is priced by its closed form).
        let x = normals(4000, 1);
        let y: Vec<f64> = x.iter().map(|x| 2.0 + 3.0 * x + 1e-3 * x.sin()).collect();
        let r = regress(&Moments::of_columns(&[&y, &x]), &[known(0.0, 1.0)]);
        assert_eq!(r.kept, vec![0]);
        assert!((r.price - 2.0).abs() < 1e-3, "{r:?}");
        assert!(r.fell_back.is_none());
    }

    #[test]
    fn a_control_that_is_rounding_noise_is_left_out() {
        // A level with volatility 1e-20: its values differ only by rounding.
        let x: Vec<f64> = (0..1000).map(|i| 38.4 * (1.0 + f64::from(i % 3) * f64::EPSILON)).collect();
        let y = normals(1000, 2);
        let r = regress(&Moments::of_columns(&[&y, &x]), &[known(38.4 * (1.0 + 4.0 * f64::EPSILON), 38.4)]);
        assert_eq!(r.left_out, vec![(0, LeftOut::Constant)]);
        assert_eq!(r.price, Moments::of_columns(&[&y]).mean(0));
    }

    #[test]
    fn a_control_whose_mean_the_paths_miss_is_left_out() {
        // A lognormal with σ = 11: its mean is carried by paths too rare to draw.
        let z = normals(2000, 3);
        let x: Vec<f64> = z.iter().map(|z| (-60.5 + 11.0 * z).exp()).collect();
        let y: Vec<f64> = z.iter().map(|z| z.max(0.0)).collect();
        let r = regress(&Moments::of_columns(&[&y, &x]), &[known(1.0, 1.0)]);
        assert!(matches!(r.left_out[..], [(0, LeftOut::Unsampled { .. })]), "{r:?}");
        assert!(r.kept.is_empty());
        // With a milder tail (σ = 5) the spread is not rounding, but the mean is missed.
        let x: Vec<f64> = z.iter().map(|z| (-12.5 + 5.0 * z).exp()).collect();
        let r = regress(&Moments::of_columns(&[&y, &x]), &[known(1.0, 1.0)]);
        assert!(matches!(r.left_out[..], [(0, LeftOut::Unsampled { z })] if z.is_finite() && z < -6.0), "{r:?}");
    }

    #[test]
    fn non_finite_and_collinear_controls_are_left_out() {
        let x = normals(1000, 4);
        let twice: Vec<f64> = x.iter().map(|x| 2.0 * x).collect();
        let huge: Vec<f64> = x.iter().map(|x| if *x > 2.0 { f64::INFINITY } else { *x }).collect();
        let y: Vec<f64> = x.iter().map(|x| x + 0.5 * (3.0 * x).cos()).collect();
        let m = Moments::of_columns(&[&y, &x, &twice, &huge]);
        let r = regress(&m, &[known(0.0, 1.0), known(0.0, 2.0), known(0.0, 1.0)]);
        assert_eq!(r.kept, vec![0]);
        assert_eq!(r.left_out, vec![(2, LeftOut::NotFinite), (1, LeftOut::Collinear)]);
        let r = regress(&m, &[known(f64::INFINITY, 1.0), known(0.0, 2.0), known(0.0, 1.0)]);
        assert_eq!(r.kept, vec![1]);
    }

    #[test]
    fn a_controlled_estimate_far_from_the_plain_one_falls_back_to_it() {
        // Two independent controls whose closed-form means are each off by 5 of their
        // standard errors (each passes the screen), with y = a + b: together they move
        // the estimate by 10/√2 ≈ 7.1 plain standard errors, past the guard.
        let a = normals(3000, 5);
        let b = normals(3000, 6);
        let y: Vec<f64> = a.iter().zip(&b).map(|(a, b)| a + b + 1e-3 * (a * 7.0).sin()).collect();
        let m = Moments::of_columns(&[&y, &a, &b]);
        let se = |i: usize| (m.variance(i) / m.count()).sqrt();
        let off = [known(m.mean(1) - 5.0 * se(1), 1.0), known(m.mean(2) - 5.0 * se(2), 1.0)];
        let r = regress(&m, &off);
        let plain = m.mean(0);
        let Some((controlled, distance)) = r.fell_back else { panic!("the guard did not fire: {r:?}") };
        assert!(distance > GUARD_SES && distance < 7.5, "{r:?}");
        assert!((controlled - plain + 10.0 * se(1)).abs() < 0.5 * se(1), "{r:?}");
        assert_eq!(r.price, plain);
        assert!(r.kept.is_empty());
        // Off by 3 standard errors each, the estimate moves about 4.2: it is kept.
        let near = [known(m.mean(1) - 3.0 * se(1), 1.0), known(m.mean(2) - 3.0 * se(2), 1.0)];
        let r = regress(&m, &near);
        assert!(r.fell_back.is_none() && r.kept == vec![0, 1], "{r:?}");
    }
}
