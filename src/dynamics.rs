//! Beside `compile`: the risk-neutral dynamics of each underlying, read off the market's
//! curves, in the payoff's currency.
//!
//! Under the payoff currency's measure each underlying follows lognormal dynamics with
//! deterministic, time-dependent coefficients:
//!
//! `ln S(t) = ln S(0) + G(t) − V(t)/2 + ∫₀ᵗ σ(s) dW(s)`, with
//!
//! - `V(t)` the total implied variance to `t` (piecewise-constant forward variance);
//! - `G(t) = R(t) − Q(t) − ρ·σ_FX·∫₀ᵗ σ(s) ds + Σ ln(1 − δᵢ)` over the ex-dates up to `t`,
//!   where `R` is the integrated zero rate of the underlying's own currency, `Q` its
//!   integrated dividend yield, the third term the quanto adjustment (only when the payoff
//!   pays in another currency; `ρ` the correlation of the underlying with the price of its
//!   currency in the payoff's, `σ_FX` that price's volatility) and `δᵢ` the discrete
//!   dividends as fractions of the level. A cash dividend `D` going ex at `t` is the
//!   fraction `D / F(t⁻)` of the level, `F(t⁻) = S(0)·e^{R(t) − Q(t)}·Π(1 − δⱼ)` the forward
//!   just before it (in the underlying's own currency): the forward drops by exactly `D`
//!   and the level stays lognormal, so every step stays exact and the vanilla controls keep
//!   their closed forms. A cash dividend as large as the forward is refused.
//!
//! So `E[S(t)] = S(0)·e^{G(t)}`, and a step from `t₀` to `t₁` is exact:
//! `ln S(t₁) − ln S(t₀) = G(t₁) − G(t₀) − (V(t₁) − V(t₀))/2 + √(V(t₁) − V(t₀))·Z`.

use std::path::Path;

use crate::curve::{Curve, Integral, Reading};
use crate::diagnostic::{Diagnostic, Span};
use crate::market::{DividendAmount, Market, Underlying};

/// Times closer than this are the same date.
const SAME_TIME: f64 = 1e-12;

/// The quanto terms of an underlying quoted in another currency than the payoff's.
#[derive(Clone, Debug, PartialEq)]
pub struct Quanto {
    /// The underlying's own currency.
    pub currency: String,
    /// The volatility of the price of that currency in the payoff's.
    pub fx_volatility: f64,
    /// The correlation of the underlying with that price.
    pub correlation: f64,
}

/// One underlying's dynamics in the payoff's currency.
#[derive(Clone, Debug, PartialEq)]
pub struct AssetDynamics {
    pub spot: f64,
    /// The currency the underlying is quoted in.
    pub currency: String,
    own_rate: Integral,
    dividend_yield: Integral,
    variance: Integral,
    pub quanto: Option<Quanto>,
    /// Discrete dividends ahead: (time, ln(1 − δ)).
    jumps: Vec<(f64, f64)>,
    /// Whether everything is flat, with no discrete dividend and no quanto: the engine then
    /// keeps its flat-parameter arithmetic (and its bits).
    pub flat: bool,
    /// Times (years from the valuation date) where a coefficient changes: pillars and
    /// ex-dates ahead. They join the simulation grid so that every step has constant
    /// coefficients (the Brownian bridge is then exact) and every dividend falls on a date.
    pub knots: Vec<f64>,
}

impl AssetDynamics {
    /// `G(t)`: the log of the forward over the spot, in the payoff's currency.
    pub fn log_growth(&self, t: f64) -> f64 {
        let mut g = self.own_rate.value(t) - self.dividend_yield.value(t);
        if let Some(q) = &self.quanto {
            g -= q.correlation * q.fx_volatility * self.variance.root_integral(0.0, t);
        }
        g + self.jumps.iter().filter(|(tj, _)| *tj <= t + SAME_TIME).map(|(_, j)| j).sum::<f64>()
    }

    /// `V(t)`: the total variance to `t`.
    pub fn variance(&self, t: f64) -> f64 {
        self.variance.value(t)
    }

    /// The implied volatility to `t` (the flat one for `t ≤ 0`).
    pub fn volatility(&self, t: f64) -> f64 {
        self.variance.average(t).sqrt()
    }

    /// The dividend yield averaged to `t`.
    pub fn dividend_yield(&self, t: f64) -> f64 {
        self.dividend_yield.average(t)
    }

    /// The zero rate of the underlying's own currency to `t`.
    pub fn own_rate(&self, t: f64) -> f64 {
        self.own_rate.average(t)
    }

    /// The discrete dividends ahead up to `t`, as the product of `(1 − δᵢ)`.
    pub fn dividends_kept(&self, t: f64) -> f64 {
        self.jumps.iter().filter(|(tj, _)| *tj <= t + SAME_TIME).map(|(_, j)| j).sum::<f64>().exp()
    }

    /// `Σ ln(1 − δᵢ)` of the dividends going ex after `t0` and up to `t1`.
    pub fn drop_between(&self, t0: f64, t1: f64) -> f64 {
        self.jumps.iter().filter(|(tj, _)| *tj > t0 + SAME_TIME && *tj <= t1 + SAME_TIME).map(|(_, j)| j).sum()
    }

    /// How many discrete dividends go ex after the valuation date and up to `t`.
    pub fn dividend_count_to(&self, t: f64) -> usize {
        self.jumps.iter().filter(|(tj, _)| *tj <= t + SAME_TIME).count()
    }
}

/// The dynamics of `u` (named `name`, written at `span` in the payoff) for a payoff in
/// `payoff_currency`; an error if the market lacks what a quanto needs or a cash dividend
/// is as large as the forward.
pub fn asset(
    market: &Market,
    name: &str,
    u: &Underlying,
    payoff_currency: &str,
    span: Span,
    market_file: &Path,
) -> Result<AssetDynamics, Diagnostic> {
    let valuation = market.valuation_date;
    let market_name = market_file.display();
    let quanto = if payoff_currency.is_empty() || u.currency == payoff_currency {
        None
    } else {
        let fx_volatility = market.fx_volatility(&u.currency, payoff_currency).ok_or_else(|| {
            Diagnostic::at(
                span,
                format!(
                    "`{name}` is quoted in {} but this payoff pays in {payoff_currency}: pricing it as a quanto needs the volatility of {}_{payoff_currency}, which the market file {market_name} does not give",
                    u.currency, u.currency
                ),
            )
            .with_fix(format!(
                "add `{}_{payoff_currency} = 0.08` (for example) under [fx_volatilities] in {market_name}, or write `currency {}` in the payoff",
                u.currency, u.currency
            ))
        })?;
        let correlation = u.fx_correlations.get(payoff_currency).copied().ok_or_else(|| {
            Diagnostic::at(
                span,
                format!(
                    "`{name}` is quoted in {} but this payoff pays in {payoff_currency}: pricing it as a quanto needs the correlation of {name} with {}_{payoff_currency}, which the market file {market_name} does not give",
                    u.currency, u.currency
                ),
            )
            .with_fix(format!(
                "add `fx_correlation = {{ {payoff_currency} = -0.2 }}` (for example) under [underlyings.{name}] in {market_name}"
            ))
        })?;
        Some(Quanto { currency: u.currency.clone(), fx_volatility, correlation })
    };
    // Paid in its own currency, a missing rate is the payoff's, reported once by `compile`.
    let no_rate = Curve::Flat(0.0);
    let own_curve = match market.rate(&u.currency) {
        None if u.currency == payoff_currency => Some(&no_rate),
        found => found,
    };
    let own_curve = own_curve.ok_or_else(|| {
        Diagnostic::at(
            span,
            format!(
                "`{name}` is quoted in {} and the market file {market_name} has no rate for {}: its forward cannot be found",
                u.currency, u.currency
            ),
        )
        .with_fix(format!("add `{} = 0.03` (for example) under [rates] in {market_name}", u.currency))
    })?;
    let own_rate = own_curve.at(valuation, Reading::Rate);
    let dividend_yield = u.dividend_yield.at(valuation, Reading::Rate);
    let variance = u.volatility.at(valuation, Reading::Volatility);
    let mut jumps: Vec<(f64, f64)> = Vec::new();
    for d in u.dividends.iter().filter(|d| d.date > valuation) {
        let t = valuation.years_until(d.date);
        let fraction = match d.amount {
            DividendAmount::Fraction(x) => x,
            DividendAmount::Cash(cash) => {
                let kept: f64 = jumps.iter().map(|(_, j)| j).sum::<f64>().exp();
                let forward = u.spot * (own_rate.value(t) - dividend_yield.value(t)).exp() * kept;
                if cash >= forward {
                    let mut diagnostic = Diagnostic::new(format!(
                        "the cash dividend of {cash} on {} of `{name}` is not below its forward there ({forward:.6}): the level would go to zero",
                        d.date
                    ))
                    .with_fix(format!("check cash_dividends under [underlyings.{name}]: the amounts are in {} per unit", u.currency))
                    .in_file(market_file);
                    diagnostic.span = d.span;
                    return Err(diagnostic);
                }
                cash / forward
            }
        };
        jumps.push((t, (-fraction).ln_1p()));
    }
    let payoff_flat = match market.rate(payoff_currency) {
        Some(c) => c.flat().is_some(),
        None => true,
    };
    let flat = quanto.is_none()
        && jumps.is_empty()
        && payoff_flat
        && own_curve.flat().is_some()
        && u.volatility.flat().is_some()
        && u.dividend_yield.flat().is_some();
    let mut knots: Vec<f64> = [own_curve, &u.dividend_yield, &u.volatility]
        .iter()
        .flat_map(|c| c.dates_after(valuation))
        .chain(market.rate(payoff_currency).map(|c| c.dates_after(valuation)).unwrap_or_default())
        .map(|d| valuation.years_until(d))
        .chain(jumps.iter().map(|(t, _)| *t))
        .collect();
    knots.sort_by(f64::total_cmp);
    knots.dedup();
    Ok(AssetDynamics {
        spot: u.spot,
        currency: u.currency.clone(),
        own_rate,
        dividend_yield,
        variance,
        quanto,
        jumps,
        flat,
        knots,
    })
}

/// The payoff currency's discounting: `∫₀ᵗ r`, so the discount factor is `e^{−I(t)}`.
pub fn discounting(market: &Market, payoff_currency: &str) -> Integral {
    market.rate(payoff_currency).unwrap_or(&Curve::Flat(0.0)).at(market.valuation_date, Reading::Rate)
}

/// The dynamics the engine simulates, read at every grid time (kept only when some
/// input is not flat).
#[derive(Clone, Debug, PartialEq)]
pub struct GridCurves {
    /// The payoff currency's discount factor at each grid time.
    pub discount: Vec<f64>,
    /// `G(tₖ)` per asset, per grid index.
    pub log_growth: Vec<Vec<f64>>,
    /// `V(tₖ)` per asset, per grid index.
    pub variance: Vec<Vec<f64>>,
    /// Per asset, per grid index: `Σ ln(1 − δᵢ)` of the dividends going ex in the step
    /// ending there (on its last date, since ex-dates are grid dates). The path runs
    /// without them up to that date and drops at it: a barrier's bridge ends before the drop.
    pub drop: Vec<Vec<f64>>,
}

impl GridCurves {
    pub fn new(grid: &[f64], discount: &Integral, assets: &[AssetDynamics]) -> GridCurves {
        GridCurves {
            discount: grid.iter().map(|&t| (-discount.value(t)).exp()).collect(),
            log_growth: assets.iter().map(|a| grid.iter().map(|&t| a.log_growth(t)).collect()).collect(),
            variance: assets.iter().map(|a| grid.iter().map(|&t| a.variance(t)).collect()).collect(),
            drop: assets
                .iter()
                .map(|a| {
                    (0..grid.len()).map(|k| if k == 0 { 0.0 } else { a.drop_between(grid[k - 1], grid[k]) }).collect()
                })
                .collect(),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::date::Date;

    const MARKET: &str =
        "valuation_date = 2026-12-01\n[rates]\nUSD = 0.03\nEUR = 0.02\n[fx_volatilities]\nEUR_USD = 0.1\n\
        [underlyings.A]\ncurrency = \"USD\"\nspot = 100\nvolatility = 0.2\ndividend_yield = 0.01\n\
        proportional_dividends = { 2027-06-01 = 0.02, 2027-09-01 = 0.03 }\n\
        [underlyings.B]\ncurrency = \"EUR\"\nspot = 50\nvolatility = 0.25\nfx_correlation = { USD = 0.4 }\n\
        cash_dividends = { 2027-03-01 = 1.0 }\n";

    fn market(text: &str) -> Market {
        Market::from_toml(text, Path::new("m.toml")).unwrap()
    }

    fn dynamics(m: &Market, name: &str, ccy: &str) -> Result<AssetDynamics, Diagnostic> {
        asset(m, name, m.underlying(name).unwrap(), ccy, Span::new(0, 0), Path::new("m.toml"))
    }

    #[test]
    fn proportional_dividends_multiply_the_forward_exactly() {
        let m = market(MARKET);
        let a = dynamics(&m, "A", "USD").unwrap();
        assert!(!a.flat);
        let t: f64 = 1.0;
        // F/S₀ = e^{(r−q)T}·(1 − 0.02)(1 − 0.03) (common practice).
        let expect = (0.03 - 0.01) * t + (0.98f64).ln() + (0.97f64).ln();
        assert!((a.log_growth(t) - expect).abs() < 1e-15, "{} against {expect}", a.log_growth(t));
        // Before the first ex-date no dividend is taken off; on it, it is.
        let t1 = Date::parse("2026-12-01").unwrap().years_until(Date::parse("2027-06-01").unwrap());
        assert!((a.log_growth(t1 - 1e-6) - 0.02 * (t1 - 1e-6)).abs() < 1e-15);
        assert!((a.log_growth(t1) - (0.02 * t1 + (0.98f64).ln())).abs() < 1e-15);
        assert_eq!(a.knots.len(), 2, "both ex-dates join the grid");
    }

    #[test]
    fn a_cash_dividend_takes_its_amount_off_the_forward_and_the_quanto_its_drift() {
        let m = market(MARKET);
        let b = dynamics(&m, "B", "USD").unwrap();
        let t1 = Date::parse("2026-12-01").unwrap().years_until(Date::parse("2027-03-01").unwrap());
        let quanto = |t: f64| 0.4 * 0.1 * 0.25 * t;
        // In EUR terms the forward after the ex-date is S₀e^{rT} − D·e^{r(T − t₁)}.
        let t: f64 = 1.0;
        let own = 50.0 * (0.02 * t).exp() - 1.0 * (0.02 * (t - t1)).exp();
        let expect = (own / 50.0).ln() - quanto(t);
        assert!((b.log_growth(t) - expect).abs() < 1e-14, "{} against {expect}", b.log_growth(t));
        // Paid in its own currency: no quanto term.
        let b_eur = dynamics(&m, "B", "EUR").unwrap();
        assert!((b_eur.log_growth(t) - (own / 50.0).ln()).abs() < 1e-14);
    }

    #[test]
    fn refuses_a_cash_dividend_as_large_as_the_forward_and_a_quanto_without_its_inputs() {
        let m = market(&MARKET.replace("2027-03-01 = 1.0", "2027-03-01 = 60.0"));
        let e = dynamics(&m, "B", "EUR").unwrap_err();
        assert!(
            e.message.starts_with("the cash dividend of 60 on 2027-03-01 of `B` is not below its forward"),
            "{}",
            e.message
        );
        assert!(e.span.is_some() && e.file.is_some());

        let m = market(&MARKET.replace("EUR_USD = 0.1", "GBP_USD = 0.1"));
        let e = dynamics(&m, "B", "USD").unwrap_err();
        assert!(e.message.contains("needs the volatility of EUR_USD"), "{}", e.message);
        assert_eq!(e.fix.as_deref().map(|f| f.starts_with("add `EUR_USD = 0.08`")), Some(true));

        let m = market(&MARKET.replace("fx_correlation = { USD = 0.4 }\n", ""));
        let e = dynamics(&m, "B", "USD").unwrap_err();
        assert!(e.message.contains("needs the correlation of B with EUR_USD"), "{}", e.message);

        let m = market(&MARKET.replace("EUR = 0.02\n", ""));
        let e = dynamics(&m, "B", "USD").unwrap_err();
        assert!(e.message.contains("has no rate for EUR"), "{}", e.message);
    }
}
