//! `pathfold check`: the validation set.
//!
//! Each case is a payoff file under `payoffs/validation/` and a closed form, with its
//! inputs written out in `references.toml` beside the files. The engine prices the file
//! exactly as `pathfold price` does; the closed form (from [`crate::closed_form`], each
//! tested against published tables) gives the reference; the case passes when the
//! difference is within [`MAX_Z`] standard errors. For discretely monitored products the
//! reference is the continuous formula with the Broadie–Glasserman–Kou correction, an
//! approximation: its stated relative error budget is added in quadrature to the
//! Monte Carlo error.

use std::fs;
use std::path::{Path, PathBuf};

use serde::Deserialize;

use crate::closed_form::{
    self as cf, asset_or_nothing, bermudan_binomial, bgk_shifted_barrier, black_scholes, cash_or_nothing,
    fixed_lookback, floating_lookback, forward_start, geometric_asian_discrete, lookback_discrete_shift, margrabe,
    standard_barrier_with_rebate, two_asset_extreme, RebateTiming,
};
use crate::diagnostic::Diagnostic;
use crate::pricing::{price_file, Failure, Priced};
use crate::sim::Settings;

/// A case passes when |Monte Carlo − closed form| is at most this many standard errors.
pub const MAX_Z: f64 = 4.0;

#[derive(Clone, Copy, Debug, Deserialize, PartialEq, Eq)]
#[serde(rename_all = "snake_case")]
pub enum Kind {
    Call,
    Put,
}

impl From<Kind> for cf::OptionKind {
    fn from(k: Kind) -> Self {
        match k {
            Kind::Call => cf::OptionKind::Call,
            Kind::Put => cf::OptionKind::Put,
        }
    }
}

#[derive(Clone, Copy, Debug, Deserialize, PartialEq, Eq)]
#[serde(rename_all = "snake_case")]
pub enum Barrier {
    DownAndIn,
    UpAndIn,
    DownAndOut,
    UpAndOut,
}

#[derive(Clone, Copy, Debug, Deserialize, PartialEq, Eq)]
#[serde(rename_all = "snake_case")]
pub enum Extreme {
    Min,
    Max,
}

/// A closed form and its inputs. Rates continuously compounded; `carry` is r − q.
#[derive(Clone, Debug, Deserialize, PartialEq)]
#[serde(tag = "formula", rename_all = "snake_case", deny_unknown_fields)]
pub enum Reference {
    BlackScholes {
        kind: Kind,
        spot: f64,
        strike: f64,
        years: f64,
        rate: f64,
        carry: f64,
        volatility: f64,
    },
    CashOrNothing {
        kind: Kind,
        spot: f64,
        strike: f64,
        cash: f64,
        years: f64,
        rate: f64,
        carry: f64,
        volatility: f64,
    },
    AssetOrNothing {
        kind: Kind,
        spot: f64,
        strike: f64,
        years: f64,
        rate: f64,
        carry: f64,
        volatility: f64,
    },
    /// Reiner–Rubinstein, rebate paid at expiry (with `rebate_at_hit`, a knock-out's
    /// rebate is paid at the moment of the touch, Haug's convention); with `fixings`,
    /// monitored on that many equally spaced dates and priced at the BGK-shifted barrier.
    Barrier {
        kind: Kind,
        barrier: Barrier,
        spot: f64,
        strike: f64,
        level: f64,
        rebate: f64,
        #[serde(default)]
        rebate_at_hit: bool,
        years: f64,
        rate: f64,
        carry: f64,
        volatility: f64,
        fixings: Option<u32>,
    },
    /// Geometric average of `fixings` equally spaced levels (t = 0 excluded), paid at `years`.
    GeometricAsian {
        kind: Kind,
        spot: f64,
        strike: f64,
        fixings: u32,
        years: f64,
        rate: f64,
        carry: f64,
        volatility: f64,
    },
    /// Goldman–Sosin–Gatto; the initial level counts as a fixing.
    FloatingLookback {
        kind: Kind,
        spot: f64,
        years: f64,
        rate: f64,
        carry: f64,
        volatility: f64,
        fixings: Option<u32>,
    },
    /// Conze–Viswanathan; the initial level counts as a fixing.
    FixedLookback {
        kind: Kind,
        spot: f64,
        strike: f64,
        years: f64,
        rate: f64,
        carry: f64,
        volatility: f64,
        fixings: Option<u32>,
    },
    /// Margrabe: max(S1 − S2, 0).
    Exchange {
        spot1: f64,
        spot2: f64,
        years: f64,
        rate: f64,
        carry1: f64,
        carry2: f64,
        volatility1: f64,
        volatility2: f64,
        correlation: f64,
    },
    /// Stulz: option on the min or max of two assets.
    TwoAssetExtreme {
        kind: Kind,
        extreme: Extreme,
        spot1: f64,
        spot2: f64,
        strike: f64,
        years: f64,
        rate: f64,
        carry1: f64,
        carry2: f64,
        volatility1: f64,
        volatility2: f64,
        correlation: f64,
    },
    /// Exercisable on `dates` equally spaced dates (the last at `years`): the CRR tree with
    /// 80 steps between dates (its error there is below 0.0005 on a 36/40 put).
    Bermudan {
        kind: Kind,
        spot: f64,
        strike: f64,
        years: f64,
        rate: f64,
        carry: f64,
        volatility: f64,
        dates: u32,
    },
    /// Rubinstein: strike set at `moneyness` × the level at `reset_years`, expiring at `years`.
    ForwardStart {
        kind: Kind,
        spot: f64,
        moneyness: f64,
        reset_years: f64,
        years: f64,
        rate: f64,
        carry: f64,
        volatility: f64,
    },
}

impl Reference {
    /// The name of the formula, for reports.
    pub fn name(&self) -> &'static str {
        match self {
            Reference::BlackScholes { .. } => "Black–Scholes",
            Reference::CashOrNothing { .. } => "cash-or-nothing",
            Reference::AssetOrNothing { .. } => "asset-or-nothing",
            Reference::Barrier { fixings: None, rebate_at_hit: true, .. } => "Reiner–Rubinstein, rebate at the touch",
            Reference::Barrier { fixings: None, .. } => "Reiner–Rubinstein",
            Reference::Barrier { .. } => "Reiner–Rubinstein + BGK",
            Reference::GeometricAsian { .. } => "discrete geometric Asian",
            Reference::FloatingLookback { fixings: None, .. } => "Goldman–Sosin–Gatto",
            Reference::FloatingLookback { .. } => "Goldman–Sosin–Gatto + BGK",
            Reference::FixedLookback { fixings: None, .. } => "Conze–Viswanathan",
            Reference::FixedLookback { .. } => "Conze–Viswanathan + BGK",
            Reference::Exchange { .. } => "Margrabe",
            Reference::TwoAssetExtreme { .. } => "Stulz",
            Reference::ForwardStart { .. } => "Rubinstein forward start",
            Reference::Bermudan { .. } => "CRR tree, Bermudan",
        }
    }

    /// The closed-form value.
    pub fn value(&self) -> f64 {
        match *self {
            Reference::BlackScholes { kind, spot, strike, years, rate, carry, volatility } => {
                black_scholes(kind.into(), spot, strike, years, rate, carry, volatility)
            }
            Reference::CashOrNothing { kind, spot, strike, cash, years, rate, carry, volatility } => {
                cash_or_nothing(kind.into(), spot, strike, cash, years, rate, carry, volatility)
            }
            Reference::AssetOrNothing { kind, spot, strike, years, rate, carry, volatility } => {
                asset_or_nothing(kind.into(), spot, strike, years, rate, carry, volatility)
            }
            Reference::Barrier {
                kind,
                barrier,
                spot,
                strike,
                level,
                rebate,
                rebate_at_hit,
                years,
                rate,
                carry,
                volatility,
                fixings,
            } => {
                let up = matches!(barrier, Barrier::UpAndIn | Barrier::UpAndOut);
                let level = match fixings {
                    Some(n) => bgk_shifted_barrier(level, volatility, years / f64::from(n), up),
                    None => level,
                };
                let barrier = match barrier {
                    Barrier::DownAndIn => cf::BarrierKind::DownAndIn,
                    Barrier::UpAndIn => cf::BarrierKind::UpAndIn,
                    Barrier::DownAndOut => cf::BarrierKind::DownAndOut,
                    Barrier::UpAndOut => cf::BarrierKind::UpAndOut,
                };
                standard_barrier_with_rebate(
                    kind.into(),
                    barrier,
                    spot,
                    strike,
                    level,
                    rebate,
                    if rebate_at_hit { RebateTiming::AtHit } else { RebateTiming::AtExpiry },
                    years,
                    rate,
                    carry,
                    volatility,
                )
            }
            Reference::GeometricAsian { kind, spot, strike, fixings, years, rate, carry, volatility } => {
                let times: Vec<f64> = (1..=fixings).map(|i| years * f64::from(i) / f64::from(fixings)).collect();
                geometric_asian_discrete(kind.into(), spot, strike, &times, years, rate, carry, volatility)
            }
            Reference::FloatingLookback { kind, spot, years, rate, carry, volatility, fixings } => {
                let f = fixings.map_or(1.0, |n| lookback_discrete_shift(volatility, years / f64::from(n)));
                // The payoff is linear in the extreme: S_T − min (call) or max − S_T (put).
                // Discrete extremes map to continuous ones through f (min_d ≈ min_c·f,
                // max_d ≈ max_c / f), and the continuous formula gives E[min_c] or E[max_c].
                let forward = spot * ((carry - rate) * years).exp();
                match kind {
                    Kind::Call => {
                        let v = floating_lookback(cf::OptionKind::Call, spot, spot / f, years, rate, carry, volatility);
                        forward - f * (forward - v)
                    }
                    Kind::Put => {
                        let v = floating_lookback(cf::OptionKind::Put, spot, spot * f, years, rate, carry, volatility);
                        (v + forward) / f - forward
                    }
                }
            }
            Reference::FixedLookback { kind, spot, strike, years, rate, carry, volatility, fixings } => {
                let f = fixings.map_or(1.0, |n| lookback_discrete_shift(volatility, years / f64::from(n)));
                match kind {
                    // (max_d − K)+ ≈ (max_c − K·f)+ / f
                    Kind::Call => {
                        fixed_lookback(cf::OptionKind::Call, spot, spot * f, strike * f, years, rate, carry, volatility)
                            / f
                    }
                    // (K − min_d)+ ≈ f·(K/f − min_c)+
                    Kind::Put => {
                        f * fixed_lookback(
                            cf::OptionKind::Put,
                            spot,
                            spot / f,
                            strike / f,
                            years,
                            rate,
                            carry,
                            volatility,
                        )
                    }
                }
            }
            Reference::Exchange {
                spot1,
                spot2,
                years,
                rate,
                carry1,
                carry2,
                volatility1,
                volatility2,
                correlation,
            } => margrabe(spot1, spot2, years, rate, carry1, carry2, volatility1, volatility2, correlation),
            Reference::TwoAssetExtreme {
                kind,
                extreme,
                spot1,
                spot2,
                strike,
                years,
                rate,
                carry1,
                carry2,
                volatility1,
                volatility2,
                correlation,
            } => {
                let extreme = match extreme {
                    Extreme::Min => cf::Extreme::Min,
                    Extreme::Max => cf::Extreme::Max,
                };
                two_asset_extreme(
                    kind.into(),
                    extreme,
                    spot1,
                    spot2,
                    strike,
                    years,
                    rate,
                    carry1,
                    carry2,
                    volatility1,
                    volatility2,
                    correlation,
                )
            }
            Reference::ForwardStart { kind, spot, moneyness, reset_years, years, rate, carry, volatility } => {
                forward_start(kind.into(), spot, moneyness, reset_years, years, rate, carry, volatility)
            }
            Reference::Bermudan { kind, spot, strike, years, rate, carry, volatility, dates } => {
                bermudan_binomial(kind.into(), spot, strike, years, rate, carry, volatility, dates as usize, 80)
            }
        }
    }
}

/// One case of `references.toml`.
#[derive(Clone, Debug, Deserialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct Case {
    /// The payoff file, relative to the folder.
    pub file: String,
    pub reference: Reference,
    /// Relative error budget of an approximate reference (0 for exact closed forms).
    #[serde(default)]
    pub approximation: f64,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct References {
    case: Vec<Case>,
}

/// The outcome of one case.
#[derive(Debug)]
pub struct Outcome {
    pub case: Case,
    pub reference_value: f64,
    pub result: Result<Priced, Failure>,
}

impl Outcome {
    /// The error the comparison allows for: the Monte Carlo standard error and, for an
    /// approximate reference, its error budget, in quadrature.
    /// Never below the rounding of a sum over the paths ([`ROUNDING`] of the reference):
    /// a control that is the payoff itself leaves a standard error of exactly 0.
    pub fn combined_error(&self) -> Option<f64> {
        let p = self.result.as_ref().ok()?;
        let budget = self.case.approximation * self.reference_value.abs();
        Some(p.estimate.std_error.hypot(budget).max(ROUNDING * self.reference_value.abs()))
    }

    /// (Monte Carlo − closed form) / combined error.
    pub fn z(&self) -> Option<f64> {
        let p = self.result.as_ref().ok()?;
        let e = self.combined_error()?;
        let d = p.estimate.price - self.reference_value;
        Some(if e > 0.0 {
            d / e
        } else if d == 0.0 {
            0.0
        } else {
            f64::INFINITY
        })
    }

    pub fn passed(&self) -> bool {
        self.z().is_some_and(|z| z.abs() <= MAX_Z)
    }
}

/// The relative rounding allowed between a Monte Carlo price and its closed form when
/// the standard error is below it: sums of 10⁵ to 10⁷ doubles, each rounded to about
/// 1.1e-16, drift by at most about 1e-9 of their size.
pub const ROUNDING: f64 = 1e-9;

/// Reads the validation set of `folder` (its `references.toml`).
pub fn load(folder: &Path) -> Result<Vec<Case>, Diagnostic> {
    let path = folder.join("references.toml");
    let text = fs::read_to_string(&path)
        .map_err(|e| Diagnostic::new(format!("cannot read the validation set: {e}")).in_file(&path))?;
    let refs: References = toml::from_str(&text).map_err(|e| {
        let d = match e.span() {
            Some(s) => Diagnostic::at(crate::diagnostic::Span::new(s.start, s.end), e.message().to_string()),
            None => Diagnostic::new(e.message().to_string()),
        };
        d.with_fix("each [[case]] has `file`, `reference = { formula = ..., ... }` and optionally `approximation`")
            .in_file(&path)
    })?;
    Ok(refs.case)
}

/// Prices every case of the validation set in `folder`.
pub fn run(folder: &Path, settings: &Settings) -> Result<Vec<Outcome>, Diagnostic> {
    let cases = load(folder)?;
    Ok(cases
        .into_iter()
        .map(|case| {
            let file: PathBuf = folder.join(&case.file);
            let result = price_file(&file, None, &[], settings);
            Outcome { reference_value: case.reference.value(), case, result }
        })
        .collect())
}
