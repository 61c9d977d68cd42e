//! Scenario ladders: prices on a grid of market shifts (spot, volatility, rate), one or
//! two axes, every scenario on the same paths (common random numbers) as the unshifted
//! market, so the change from the base and its standard error come from paired
//! differences. Each scenario's samples use its control variates, with coefficients from a
//! pilot ([`crate::sim::joint`]), unless they are turned off.
//!
//! A spot shift is an instant move of today's level: a trade struck today keeps its
//! initial levels (as in [`crate::risk`]).

use std::path::Path;

use crate::market::Market;
use crate::pricing::{self, Failure};
use crate::risk::struck_today;
use crate::sim::joint::simulate_joint;
use crate::sim::Settings;
use crate::typing::Override;

/// The most points on one axis.
pub const MAX_POINTS: usize = 101;

/// What an axis shifts.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Shift {
    /// Spot, relative, in percent.
    Spot,
    /// Volatility, absolute, in points.
    Vol,
    /// Every rate, absolute, in basis points.
    Rate,
}

impl Shift {
    pub fn name(self) -> &'static str {
        match self {
            Shift::Spot => "spot",
            Shift::Vol => "vol",
            Shift::Rate => "rate",
        }
    }

    /// The unit of the axis values.
    pub fn unit(self) -> &'static str {
        match self {
            Shift::Spot => "%",
            Shift::Vol => "vol points",
            Shift::Rate => "bp",
        }
    }
}

/// One axis: what it shifts and the shifts, in the axis unit.
#[derive(Clone, Debug, PartialEq)]
pub struct Axis {
    pub shift: Shift,
    pub values: Vec<f64>,
}

/// Parses `LO..HI/STEP` (`-20%..20%/5%`, `-5..5/1`): the values from LO to HI by STEP.
pub fn parse_range(shift: Shift, text: &str) -> Result<Axis, String> {
    let option = format!("--{}", shift.name());
    let usage = format!("{option} {text}: write LO..HI/STEP, e.g. {option} {}", example(shift));
    let clean = text.replace('%', "");
    let (range, step) = clean.split_once('/').ok_or_else(|| usage.clone())?;
    let (lo, hi) = range.split_once("..").ok_or_else(|| usage.clone())?;
    let num = |s: &str| s.trim().parse::<f64>().ok().filter(|x| x.is_finite());
    let (Some(lo), Some(hi), Some(step)) = (num(lo), num(hi), num(step)) else { return Err(usage) };
    if step <= 0.0 || hi < lo {
        return Err(format!("{option} {text}: LO must not exceed HI and STEP must be positive"));
    }
    let n = ((hi - lo) / step + 1e-9).floor() as usize + 1;
    if n > MAX_POINTS {
        return Err(format!("{option} {text}: {n} points; at most {MAX_POINTS} on one axis: take a larger step"));
    }
    if shift == Shift::Spot && lo <= -100.0 {
        return Err(format!("{option} {text}: a spot shift must stay above -100%"));
    }
    let values = (0..n).map(|i| lo + step * i as f64).map(|x| if x.abs() < 1e-12 { 0.0 } else { x }).collect();
    Ok(Axis { shift, values })
}

fn example(shift: Shift) -> &'static str {
    match shift {
        Shift::Spot => "-20%..20%/5%",
        Shift::Vol => "-5..5/1",
        Shift::Rate => "-100..100/25",
    }
}

/// One scenario's result.
#[derive(Clone, Debug, PartialEq)]
pub struct Point {
    /// The shift on each axis, in the axis unit.
    pub shifts: Vec<f64>,
    pub price: f64,
    pub std_error: f64,
    /// Price minus the unshifted price, on the same paths.
    pub change: f64,
    pub change_std_error: f64,
}

/// A ladder.
#[derive(Clone, Debug, PartialEq)]
pub struct Ladder {
    pub file: String,
    pub product: String,
    pub currency: String,
    pub notional: f64,
    pub axes: Vec<Axis>,
    /// The one underlying shifted, or all.
    pub only: Option<String>,
    pub base_price: f64,
    pub base_std_error: f64,
    /// In row order: the first axis varies slowest.
    pub points: Vec<Point>,
    pub paths: u64,
    pub seed: u64,
    /// Whether every scenario's samples use its control variates.
    pub control_variates: bool,
    pub sampler: crate::sim::Sampler,
}

fn shifted(market: &Market, names: &[String], axes: &[Axis], shifts: &[f64]) -> Result<Market, String> {
    let mut m = market.clone();
    for (axis, &x) in axes.iter().zip(shifts) {
        m = match axis.shift {
            Shift::Spot => names.iter().try_fold(m, |m, n| m.with_spot_scaled(n, 1.0 + x / 100.0))?,
            Shift::Vol => names
                .iter()
                .try_fold(m, |m, n| m.with_volatility_shifted(n, x / 100.0))
                .map_err(|e| format!("volatility shift {x}: {e}"))?,
            Shift::Rate => m.with_rates_shifted(x / 10_000.0),
        };
    }
    Ok(m)
}

/// Prices the ladder of one payoff file.
pub fn ladder_file(
    file: &Path,
    market: Option<&Path>,
    overrides: &[Override],
    settings: &Settings,
    axes: Vec<Axis>,
    only: Option<&str>,
) -> Result<Ladder, Failure> {
    let loaded = pricing::load(file, market, overrides)?;
    let all: Vec<String> = loaded.product.underlyings.iter().map(|u| u.text.clone()).collect();
    let names = match only {
        Some(n) if all.iter().any(|a| a == n) => vec![n.to_string()],
        Some(n) => {
            return Err(Failure {
                diagnostics: vec![crate::diagnostic::Diagnostic::new(format!(
                    "{}: `--only {n}`: the payoff has no underlying `{n}`",
                    file.display()
                ))
                .with_fix(format!("name one of: {}", all.join(", ")))],
                source: None,
                internal: false,
            })
        }
        None => all,
    };
    let struck = struck_today(&loaded);
    let mut grid: Vec<Vec<f64>> = vec![vec![]];
    for axis in &axes {
        grid = grid.iter().flat_map(|g| axis.values.iter().map(move |&x| [g.clone(), vec![x]].concat())).collect();
    }
    let mut programs = vec![loaded.compile(&loaded.market, &struck)?];
    for shifts in &grid {
        let m = shifted(&loaded.market, &names, &axes, shifts).map_err(|e| Failure {
            diagnostics: vec![crate::diagnostic::Diagnostic::new(format!("{}: {e}", file.display()))
                .with_fix("narrow the ladder so every shifted volatility stays above 0")],
            source: None,
            internal: false,
        })?;
        programs.push(loaded.compile(&m, &struck)?);
    }
    let joint = simulate_joint(&programs, settings).map_err(|d| loaded.failure(d))?;
    let points = grid
        .into_iter()
        .enumerate()
        .map(|(i, shifts)| {
            let (change, change_std_error) = joint.combination(&[(i + 1, 1.0), (0, -1.0)]);
            Point { shifts, price: joint.price(i + 1), std_error: joint.std_error(i + 1), change, change_std_error }
        })
        .collect();
    Ok(Ladder {
        file: file.display().to_string(),
        product: loaded.product.name.clone(),
        currency: loaded.product.currency.clone(),
        notional: loaded.product.notional,
        axes,
        only: only.map(str::to_string),
        base_price: joint.price(0),
        base_std_error: joint.std_error(0),
        points,
        paths: joint.paths,
        seed: settings.seed,
        control_variates: settings.control_variates,
        sampler: settings.sampler,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn parses_ranges() {
        let a = parse_range(Shift::Spot, "-20%..20%/10%").unwrap();
        assert_eq!(a.values, vec![-20.0, -10.0, 0.0, 10.0, 20.0]);
        let a = parse_range(Shift::Vol, "-0.3..0.3/0.1").unwrap();
        assert_eq!(a.values.len(), 7);
        assert_eq!(a.values[3], 0.0);
        assert!(parse_range(Shift::Spot, "-20..20").is_err());
        assert!(parse_range(Shift::Spot, "20..-20/5").is_err());
        assert!(parse_range(Shift::Spot, "-100..0/10").is_err());
        assert!(parse_range(Shift::Rate, "0..1000/1").is_err());
    }
}
