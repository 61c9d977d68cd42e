//! An input beside the stages: term structures as the market file gives them, and what the
//! engine reads off them.
//!
//! A [`Curve`] is one number (flat) or values at pillar dates. Two readings:
//!
//! - **rates and dividend yields** (continuously compounded zero rates `z(T)`): the
//!   integral `∫₀ᵗ r = z(t)·t` (minus the log of the discount factor) is linear between
//!   pillars, so forwards are flat between them; before the first pillar the first zero
//!   rate holds, after the last the last forward continues;
//! - **volatilities** (implied, lognormal, by maturity): the total variance `σ(T)²·T` is
//!   linear between pillars (piecewise-constant forward variance); before the first pillar
//!   the first volatility holds, after the last the last forward variance continues.
//!
//! Times are ACT/365 years from the valuation date, as everywhere else.

use crate::date::Date;
use crate::diagnostic::Span;

/// A pillar: the value that holds at a date, and where the file gave it.
#[derive(Clone, Debug, PartialEq)]
pub struct Pillar {
    pub date: Date,
    /// How the file wrote the pillar (`1y`, `2027-06-01`), for messages and reports.
    pub label: String,
    pub value: f64,
    pub span: Option<Span>,
}

/// One number, or values at pillar dates in increasing order.
#[derive(Clone, Debug, PartialEq)]
pub enum Curve {
    Flat(f64),
    Pillars(Vec<Pillar>),
}

/// How a curve's values integrate over time.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Reading {
    /// Zero rates and yields: the integral at a pillar is `value · T`.
    Rate,
    /// Implied volatilities: the integral (total variance) at a pillar is `value² · T`.
    Volatility,
}

impl Curve {
    /// The flat value, if the curve is one number.
    pub fn flat(&self) -> Option<f64> {
        match self {
            Curve::Flat(x) => Some(*x),
            Curve::Pillars(_) => None,
        }
    }

    /// Every value moved by `shift` (a parallel shift of the quoted rates or volatilities).
    #[must_use]
    pub fn shifted(&self, shift: f64) -> Curve {
        match self {
            Curve::Flat(x) => Curve::Flat(x + shift),
            Curve::Pillars(p) => {
                Curve::Pillars(p.iter().map(|q| Pillar { value: q.value + shift, ..q.clone() }).collect())
            }
        }
    }

    /// The values of the curve, for range checks.
    pub fn values(&self) -> Vec<f64> {
        match self {
            Curve::Flat(x) => vec![*x],
            Curve::Pillars(p) => p.iter().map(|q| q.value).collect(),
        }
    }

    /// The pillar dates strictly after `valuation`.
    pub fn dates_after(&self, valuation: Date) -> Vec<Date> {
        match self {
            Curve::Flat(_) => Vec::new(),
            Curve::Pillars(p) => p.iter().map(|q| q.date).filter(|d| *d > valuation).collect(),
        }
    }

    /// The curve as a function of time from `valuation`.
    pub fn at(&self, valuation: Date, reading: Reading) -> Integral {
        let integral = |t: f64, v: f64| match reading {
            Reading::Rate => v * t,
            Reading::Volatility => v * v * t,
        };
        match self {
            Curve::Flat(x) => {
                Integral { nodes: Vec::new(), first_slope: integral(1.0, *x), last_slope: integral(1.0, *x) }
            }
            Curve::Pillars(p) => {
                // Pillars on or before the valuation date no longer lie ahead: the nearest
                // value ahead is read from the first later one.
                let ahead: Vec<&Pillar> = p.iter().filter(|q| q.date > valuation).collect();
                let Some(first) = ahead.first() else {
                    let last = p.last().map_or(0.0, |q| q.value);
                    let slope = integral(1.0, last);
                    return Integral { nodes: Vec::new(), first_slope: slope, last_slope: slope };
                };
                let nodes: Vec<(f64, f64)> = ahead
                    .iter()
                    .map(|q| {
                        let t = valuation.years_until(q.date);
                        (t, integral(t, q.value))
                    })
                    .collect();
                let first_slope = integral(1.0, first.value);
                let last_slope = match nodes.len() {
                    1 => first_slope,
                    n => (nodes[n - 1].1 - nodes[n - 2].1) / (nodes[n - 1].0 - nodes[n - 2].0),
                };
                Integral { nodes, first_slope, last_slope }
            }
        }
    }
}

/// A curve's running integral `I(t)` from the valuation date: `∫₀ᵗ r` for a rate curve,
/// the total variance for a volatility curve. Piecewise linear in `t`.
#[derive(Clone, Debug, PartialEq)]
pub struct Integral {
    /// `(t, I(t))` at the pillars ahead, in increasing `t`.
    nodes: Vec<(f64, f64)>,
    /// The slope before the first pillar (and everywhere for a flat curve).
    first_slope: f64,
    /// The slope after the last pillar.
    last_slope: f64,
}

impl Integral {
    /// `I(t)`; `t ≤ 0` gives 0.
    pub fn value(&self, t: f64) -> f64 {
        if t <= 0.0 {
            return 0.0;
        }
        let Some(&(t0, i0)) = self.nodes.first() else { return self.first_slope * t };
        if t <= t0 {
            return self.first_slope * t;
        }
        let i = self.nodes.partition_point(|&(ti, _)| ti < t);
        if i >= self.nodes.len() {
            let (tn, i_n) = self.nodes[self.nodes.len() - 1];
            return i_n + self.last_slope * (t - tn);
        }
        let (ta, ia) = if i == 0 { (t0, i0) } else { self.nodes[i - 1] };
        let (tb, ib) = self.nodes[i];
        ia + (ib - ia) * (t - ta) / (tb - ta)
    }

    /// `∫ₐᵇ √I'(s) ds`: for a volatility curve, the integral of the forward volatility.
    pub fn root_integral(&self, a: f64, b: f64) -> f64 {
        let (a, b) = (a.max(0.0), b.max(0.0));
        if b <= a {
            return 0.0;
        }
        let mut cuts = vec![a];
        cuts.extend(self.nodes.iter().map(|&(t, _)| t).filter(|&t| t > a && t < b));
        cuts.push(b);
        cuts.windows(2)
            .map(|w| {
                let slope = (self.value(w[1]) - self.value(w[0])) / (w[1] - w[0]);
                slope.max(0.0).sqrt() * (w[1] - w[0])
            })
            .sum()
    }

    /// The average over `[0, t]`: the zero rate for a rate curve (`I(t)/t`); for `t ≤ 0`
    /// the first slope.
    pub fn average(&self, t: f64) -> f64 {
        if t <= 0.0 {
            self.first_slope
        } else {
            self.value(t) / t
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn d(s: &str) -> Date {
        Date::parse(s).unwrap()
    }

    fn pillars(values: &[(&str, f64)]) -> Curve {
        Curve::Pillars(
            values
                .iter()
                .map(|&(date, value)| Pillar { date: d(date), label: date.into(), value, span: None })
                .collect(),
        )
    }

    #[test]
    fn a_flat_curve_integrates_to_rate_times_time() {
        let c = Curve::Flat(0.038).at(d("2026-12-01"), Reading::Rate);
        assert_eq!(c.value(2.0), 0.038 * 2.0);
        assert_eq!(c.average(0.7), 0.038 * 0.7 / 0.7);
        let v = Curve::Flat(0.2).at(d("2026-12-01"), Reading::Volatility);
        assert!((v.value(3.0) - 0.12).abs() < 1e-15);
        assert!((v.root_integral(0.5, 2.0) - 0.3).abs() < 1e-15);
    }

    #[test]
    fn zero_rates_interpolate_linearly_in_log_discount_factor() {
        // 2027-12-01 is 365 days on (t = 1), 2028-12-01 366 days on.
        let c = pillars(&[("2027-12-01", 0.03), ("2028-12-01", 0.04)]).at(d("2026-12-01"), Reading::Rate);
        let (t1, t2) = (1.0, 731.0 / 365.0);
        assert!((c.value(t1) - 0.03).abs() < 1e-15);
        assert!((c.value(t2) - 0.04 * t2).abs() < 1e-15);
        // Before the first pillar, the first zero rate; between, the log DF is linear.
        assert!((c.value(0.5) - 0.015).abs() < 1e-15);
        let mid = 0.5 * (t1 + t2);
        assert!((c.value(mid) - 0.5 * (0.03 + 0.04 * t2)).abs() < 1e-15);
        // After the last, the last forward continues.
        let fwd = (0.04 * t2 - 0.03) / (t2 - t1);
        assert!((c.value(t2 + 1.0) - (0.04 * t2 + fwd)).abs() < 1e-14);
        // Pillars reproduce their zero rates.
        assert!((c.average(t2) - 0.04).abs() < 1e-15);
    }

    #[test]
    fn volatilities_give_piecewise_constant_forward_variance() {
        let v = pillars(&[("2027-12-01", 0.20), ("2028-12-01", 0.25)]).at(d("2026-12-01"), Reading::Volatility);
        let t2 = 731.0 / 365.0;
        assert!((v.value(1.0) - 0.04).abs() < 1e-15);
        assert!((v.value(t2) - 0.0625 * t2).abs() < 1e-15);
        let forward = (0.0625 * t2 - 0.04) / (t2 - 1.0);
        // ∫σ_f over [0.5, t2]: 0.2 on [0.5, 1], √forward on [1, t2].
        let expect = 0.2 * 0.5 + forward.sqrt() * (t2 - 1.0);
        assert!((v.root_integral(0.5, t2) - expect).abs() < 1e-14);
    }

    #[test]
    fn pillars_already_past_are_dropped() {
        let c = pillars(&[("2026-06-01", 0.01), ("2027-12-01", 0.03)]).at(d("2026-12-01"), Reading::Rate);
        assert!((c.value(0.5) - 0.015).abs() < 1e-15);
        let c = pillars(&[("2026-06-01", 0.01)]).at(d("2026-12-01"), Reading::Rate);
        assert!((c.value(2.0) - 0.02).abs() < 1e-15);
    }
}
