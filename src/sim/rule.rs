//! The early-exercise rule of a `may end` date: the regression basis, the decision on a
//! block's paths, and the least-squares fit of the value of going on.
//!
//! The value of going on (the discounted payments still to come if the party does not end
//! the product here) is regressed on a basis of the date's variables `x₁..x_d` (the
//! `using` list; by default every underlying's `perf` and every state), each taken as
//! `z = (x − centre) / scale`: the constant, every `zᵢ`, every product `zᵢ·zⱼ` (`i ≤ j`,
//! squares included) and every cube `zᵢ³` — `1 + 2d + d(d+1)/2` functions, 4 for one
//! variable (a cubic, as in Longstaff and Schwartz's put), 34 for six. The holder ends the
//! product where the stated payment, discounted, is worth more than the fitted value of
//! going on, the issuer where it costs less. The fit uses the holder's in-the-money paths
//! (a positive payment), or every path on which the issuer may call.

use crate::compile::{Choice, Rule};
use crate::syntax::Party;

/// The number of basis functions for `d` variables.
pub fn basis_len(d: usize) -> usize {
    1 + 2 * d + d * (d + 1) / 2
}

/// Writes the basis of the scaled variables `z` into `out` (of [`basis_len`] entries).
fn basis(z: &[f64], out: &mut [f64]) {
    let d = z.len();
    out[0] = 1.0;
    out[1..=d].copy_from_slice(z);
    let mut k = 1 + d;
    for i in 0..d {
        for j in i..d {
            out[k] = z[i] * z[j];
            k += 1;
        }
    }
    for (o, x) in out[k..k + d].iter_mut().zip(z) {
        *o = x * x * x;
    }
}

/// The lanes one `Choose` reads, gathered by the executor, and what the fit keeps.
#[derive(Clone, Debug, Default)]
pub struct Lanes {
    /// One row per variable of the regression: its value on each lane.
    pub vars: Vec<Vec<f64>>,
    /// The stated payment on each lane (not discounted).
    pub amount: Vec<f64>,
    /// Kept by a `Choose` in [`Rule::Record`] (later dates reuse `vars`): the variables,
    /// and 1 on the lanes the fit uses.
    pub kept: Vec<Vec<f64>>,
    pub relevant: Vec<f64>,
    /// What had been paid (discounted) on each lane before the recorded `Choose`.
    pub paid_before: Vec<f64>,
    /// Whether a `Choose` in [`Rule::Record`] ran in the last block.
    pub recorded: bool,
}

impl Lanes {
    /// Buffers for `lanes` paths and up to `vars` variables.
    pub fn new(vars: usize, lanes: usize) -> Self {
        Lanes {
            vars: vec![vec![0.0; lanes]; vars],
            kept: vec![vec![0.0; lanes]; vars],
            amount: vec![0.0; lanes],
            relevant: vec![0.0; lanes],
            paid_before: vec![0.0; lanes],
            recorded: false,
        }
    }
}

/// Whether a lane takes part in the decision: alive, under the statement's mask, and for
/// the holder in the money.
fn relevant(party: Party, mask: f64, alive: f64, amount: f64) -> bool {
    mask != 0.0 && alive != 0.0 && (party == Party::Issuer || amount > 0.0)
}

/// Runs the rule of `choice` on `lanes` paths: `out` becomes 1 where the party ends the
/// product. `paid` is what each lane has been paid so far, kept when recording.
pub fn decide(
    choice: &Choice,
    discount: f64,
    mask: &[f64],
    alive: &[f64],
    paid: &[f64],
    lanes: &mut Lanes,
    out: &mut [f64],
) {
    let n = out.len();
    let d = choice.using.len();
    match &choice.rule {
        Rule::Never => out.fill(0.0),
        Rule::Record => {
            out.fill(0.0);
            for i in 0..n {
                lanes.relevant[i] = f64::from(u8::from(relevant(choice.party, mask[i], alive[i], lanes.amount[i])));
            }
            lanes.paid_before[..n].copy_from_slice(&paid[..n]);
            for (kept, vars) in lanes.kept.iter_mut().zip(&lanes.vars) {
                kept[..n].copy_from_slice(&vars[..n]);
            }
            lanes.recorded = true;
        }
        Rule::Fitted(coef) => {
            let mut z = [0.0; crate::typing::MAX_CHOICE_VARIABLES];
            let mut phi = [0.0; 64];
            let m = basis_len(d);
            for i in 0..n {
                let a = lanes.amount[i];
                if !relevant(choice.party, mask[i], alive[i], a) && !a.is_nan() {
                    out[i] = 0.0;
                    continue;
                }
                if a.is_nan() {
                    // Ended, so that the payment reports the amount that is not a number.
                    out[i] = f64::from(u8::from(mask[i] != 0.0 && alive[i] != 0.0));
                    continue;
                }
                for k in 0..d {
                    z[k] = (lanes.vars[k][i] - choice.centre[k]) / choice.scale[k];
                }
                basis(&z[..d], &mut phi[..m]);
                let going_on: f64 = coef.iter().zip(&phi[..m]).map(|(c, p)| c * p).sum();
                let now = a * discount;
                let ends = match choice.party {
                    Party::Holder => now > going_on,
                    Party::Issuer => now < going_on,
                };
                out[i] = f64::from(u8::from(ends));
            }
        }
    }
}

/// The normal equations of one date's regression: `Σ φφᵀ` (upper triangle, row by row),
/// `Σ φ·y` and the number of paths, summed lane by lane in lane order.
#[derive(Clone, Debug, PartialEq)]
pub struct Normal {
    m: usize,
    gram: Vec<f64>,
    rhs: Vec<f64>,
    count: f64,
    /// `Σ y`, for the mean when too few paths are in the money to fit the basis.
    sum_y: f64,
}

impl Normal {
    pub fn new(m: usize) -> Self {
        Normal { m, gram: vec![0.0; m * m], rhs: vec![0.0; m], count: 0.0, sum_y: 0.0 }
    }

    /// The equations of one recorded block: lanes `0..n`, `paid_after` the discounted
    /// total paid on each lane by the end of the path.
    pub fn of_block(choice: &Choice, lanes: &Lanes, paid_after: &[f64], n: usize) -> Self {
        let d = choice.using.len();
        let m = basis_len(d);
        let mut eq = Normal::new(m);
        if !lanes.recorded {
            return eq;
        }
        let mut z = [0.0; crate::typing::MAX_CHOICE_VARIABLES];
        let mut phi = [0.0; 64];
        for i in 0..n {
            if lanes.relevant[i] == 0.0 {
                continue;
            }
            let y = paid_after[i] - lanes.paid_before[i];
            for k in 0..d {
                z[k] = (lanes.kept[k][i] - choice.centre[k]) / choice.scale[k];
            }
            basis(&z[..d], &mut phi[..m]);
            // A path whose numbers are not finite tells the fit nothing; the pricing run
            // reports such amounts at their `pay`.
            if !y.is_finite() || !phi[..m].iter().all(|p| p.is_finite()) {
                continue;
            }
            for r in 0..m {
                for c in r..m {
                    eq.gram[r * m + c] += phi[r] * phi[c];
                }
                eq.rhs[r] += phi[r] * y;
            }
            eq.count += 1.0;
            eq.sum_y += y;
        }
        eq
    }

    /// Adds another block's equations (callers add blocks in block order).
    pub fn add(&mut self, other: &Normal) {
        for (a, b) in self.gram.iter_mut().zip(&other.gram) {
            *a += b;
        }
        for (a, b) in self.rhs.iter_mut().zip(&other.rhs) {
            *a += b;
        }
        self.count += other.count;
        self.sum_y += other.sum_y;
    }

    /// Paths the fit used.
    pub fn count(&self) -> f64 {
        self.count
    }

    /// The fitted rule: least squares by a Cholesky factorisation of the Jacobi-scaled
    /// Gram matrix, leaving out a basis function whose pivot falls below 10⁻¹⁰ of its
    /// scale (it adds nothing the earlier ones do not already span: a constant state, a
    /// flag's square). With no path in the money the party never ends the product here;
    /// with fewer paths than twice the basis, the value of going on is their mean.
    pub fn solve(&self) -> Rule {
        let m = self.m;
        if self.count == 0.0 {
            return Rule::Never;
        }
        let mut coef = vec![0.0; m];
        if self.count < 2.0 * m as f64 {
            coef[0] = self.sum_y / self.count;
            return Rule::Fitted(coef);
        }
        let g = |r: usize, c: usize| if r <= c { self.gram[r * m + c] } else { self.gram[c * m + r] };
        let scale: Vec<f64> = (0..m).map(|k| g(k, k).sqrt()).collect();
        // Lower factor of the scaled matrix, column by column; dropped columns stay 0.
        let mut l = vec![0.0; m * m];
        let mut kept = vec![false; m];
        for k in 0..m {
            if !(scale[k] > 0.0 && scale[k].is_finite()) {
                continue;
            }
            let mut pivot: f64 = 1.0;
            for j in 0..k {
                pivot -= l[k * m + j] * l[k * m + j];
            }
            // A NaN pivot (from overflowing sums) is left out too.
            if pivot.is_nan() || pivot <= 1e-10 {
                continue;
            }
            let root = pivot.sqrt();
            l[k * m + k] = root;
            kept[k] = true;
            for i in k + 1..m {
                if !(scale[i] > 0.0 && scale[i].is_finite()) {
                    continue;
                }
                let mut v = g(i, k) / (scale[i] * scale[k]);
                for j in 0..k {
                    v -= l[i * m + j] * l[k * m + j];
                }
                l[i * m + k] = v / root;
            }
        }
        // L y = D⁻¹ b, then Lᵀ c' = y, then c = D⁻¹ c'.
        let mut y = vec![0.0; m];
        for k in (0..m).filter(|&k| kept[k]) {
            let mut v = self.rhs[k] / scale[k];
            for j in 0..k {
                v -= l[k * m + j] * y[j];
            }
            y[k] = v / l[k * m + k];
        }
        for k in (0..m).rev().filter(|&k| kept[k]) {
            let mut v = y[k];
            for i in k + 1..m {
                v -= l[i * m + k] * coef[i];
            }
            coef[k] = v / l[k * m + k];
        }
        for k in 0..m {
            coef[k] = if kept[k] { coef[k] / scale[k] } else { 0.0 };
        }
        Rule::Fitted(coef)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::compile::Src;
    use crate::diagnostic::Span;

    fn choice(d: usize, party: Party) -> Choice {
        Choice {
            party,
            using: (0..d).map(|k| Src::Reg(k as u32)).collect(),
            centre: vec![0.0; d],
            scale: vec![1.0; d],
            span: Span::default(),
            time: 1.0,
            rule: Rule::Record,
        }
    }

    #[test]
    fn the_basis_is_constant_linear_quadratic_and_cubic() {
        assert_eq!([0, 1, 2, 3, 6].map(basis_len), [1, 4, 8, 13, 34]);
        let mut out = [0.0; 8];
        basis(&[2.0, 3.0], &mut out);
        assert_eq!(out, [1.0, 2.0, 3.0, 4.0, 6.0, 9.0, 8.0, 27.0]);
    }

    /// A cubic in one variable is recovered exactly from noiseless values, and a second
    /// variable that repeats the first is left out rather than breaking the fit.
    #[test]
    fn least_squares_recovers_a_cubic_and_drops_a_repeated_variable() {
        let n = 64;
        let xs: Vec<f64> = (0..n).map(|i| -1.0 + 2.0 * i as f64 / (n - 1) as f64).collect();
        let f = |x: f64| 0.5 - 2.0 * x + 0.25 * x * x + 3.0 * x * x * x;
        let c = choice(1, Party::Issuer);
        let mut lanes = Lanes::new(1, n);
        lanes.kept[0].clone_from(&xs);
        lanes.relevant.fill(1.0);
        lanes.recorded = true;
        let after: Vec<f64> = xs.iter().map(|&x| f(x)).collect();
        let Rule::Fitted(coef) = Normal::of_block(&c, &lanes, &after, n).solve() else { panic!() };
        for (got, want) in coef.iter().zip([0.5, -2.0, 0.25, 3.0]) {
            assert!((got - want).abs() < 1e-9, "{coef:?}");
        }
        let c2 = choice(2, Party::Issuer);
        let mut lanes2 = Lanes::new(2, n);
        lanes2.kept[0].clone_from(&xs);
        lanes2.kept[1].clone_from(&xs);
        lanes2.relevant.fill(1.0);
        lanes2.recorded = true;
        let Rule::Fitted(coef2) = Normal::of_block(&c2, &lanes2, &after, n).solve() else { panic!() };
        let mut phi = [0.0; 8];
        for &x in &xs {
            basis(&[x, x], &mut phi);
            let fit: f64 = coef2.iter().zip(&phi).map(|(a, b)| a * b).sum();
            assert!((fit - f(x)).abs() < 1e-8, "{x}: {fit} against {}", f(x));
        }
    }

    #[test]
    fn the_holder_ends_where_the_payment_beats_going_on_and_the_issuer_where_it_costs_less() {
        let mut c = choice(1, Party::Holder);
        // Going on is worth x.
        c.rule = Rule::Fitted(vec![0.0, 1.0, 0.0, 0.0]);
        let mut lanes = Lanes::new(1, 4);
        lanes.vars[0] = vec![1.0, 1.0, 1.0, 1.0];
        lanes.amount = vec![2.0, 0.5, 0.0, 2.0];
        let (mask, alive, paid) = ([1.0, 1.0, 1.0, 0.0], [1.0; 4], [0.0; 4]);
        let mut out = [9.0; 4];
        decide(&c, 1.0, &mask, &alive, &paid, &mut lanes, &mut out);
        assert_eq!(out, [1.0, 0.0, 0.0, 0.0]);
        c.party = Party::Issuer;
        decide(&c, 1.0, &mask, &alive, &paid, &mut lanes, &mut out);
        // The issuer may call where the payment is 0 (out of the money is a holder's word).
        assert_eq!(out, [0.0, 1.0, 1.0, 0.0]);
        // Too few paths for the basis: going on is worth their mean.
        let mut eq = Normal::new(4);
        eq.count = 3.0;
        eq.sum_y = 6.0;
        assert_eq!(eq.solve(), Rule::Fitted(vec![2.0, 0.0, 0.0, 0.0]));
        assert_eq!(Normal::new(4).solve(), Rule::Never);
    }
}
