//! Sensitivities by central finite differences on common random numbers: the base and
//! every bumped market are compiled from one product and priced on the same paths
//! ([`crate::sim::joint`]), so each difference and its standard error come from the
//! paired differences path by path. Each scenario's samples use its own control
//! variates, their coefficients fitted on a pilot beforehand, unless they are turned off.
//!
//! A trade whose start is the valuation date counts as struck at today's spots: every
//! scenario keeps those initial levels ([`crate::compile::Struck`]), so a spot bump moves
//! today's level and not the level `perf` divides by.

use std::path::Path;

use crate::compile::{Program, Struck};
use crate::diagnostic::Diagnostic;
use crate::market::Market;
use crate::pricing::{self, Failure, Loaded};
use crate::sim::joint::{simulate_joint, Joint};
use crate::sim::Settings;
use crate::typing::Override;

/// Bump sizes: the defaults, or what `--bump NAME=SIZE` set.
#[derive(Clone, Debug, PartialEq)]
pub struct Bumps {
    /// Relative spot bump (0.01 for 1%).
    pub spot: f64,
    /// Volatility bump, absolute (0.01 for one point).
    pub vol: f64,
    /// Dividend-yield bump, absolute (0.001 for 10 basis points).
    pub dividend: f64,
    /// Rate bump, absolute (0.001 for 10 basis points).
    pub rate: f64,
    /// Correlation bump, absolute (0.01 for one point).
    pub correlation: f64,
    /// Calendar days of theta.
    pub days: i64,
}

impl Default for Bumps {
    fn default() -> Self {
        Bumps { spot: 0.01, vol: 0.01, dividend: 0.001, rate: 0.001, correlation: 0.01, days: 1 }
    }
}

impl Bumps {
    /// Applies `NAME=SIZE`: `spot=2%` (relative), `vol=0.5` (volatility points),
    /// `dividend=10` and `rate=10` (basis points), `correlation=1` (points), `theta=1`
    /// (calendar days).
    pub fn set(&mut self, text: &str) -> Result<(), String> {
        let usage = "give NAME=SIZE with NAME one of spot (percent, e.g. spot=2%), vol (points, vol=0.5), dividend or rate (basis points, rate=10), correlation (points, correlation=1), theta (days, theta=1)";
        let (name, size) = text.split_once('=').ok_or_else(|| format!("--bump {text}: {usage}"))?;
        let size_text = size.trim().trim_end_matches('%');
        let x: f64 = size_text.parse().map_err(|_| format!("--bump {text}: `{size}` is not a number; {usage}"))?;
        if !(x.is_finite() && x > 0.0) {
            return Err(format!("--bump {text}: the size must be positive; {usage}"));
        }
        match name.trim() {
            "spot" if x < 50.0 => self.spot = x / 100.0,
            "vol" | "volatility" if x < 50.0 => self.vol = x / 100.0,
            "dividend" => self.dividend = x / 10_000.0,
            "rate" => self.rate = x / 10_000.0,
            "correlation" if x <= 100.0 => self.correlation = x / 100.0,
            "theta" if x.fract() == 0.0 && x <= 3650.0 => self.days = x as i64,
            "spot" | "vol" | "volatility" | "correlation" | "theta" => {
                return Err(format!("--bump {text}: the size is too large for a finite difference; {usage}"))
            }
            other => return Err(format!("--bump {text}: unknown bump `{other}`; {usage}")),
        }
        Ok(())
    }
}

/// What a sensitivity is of.
#[derive(Clone, Debug, PartialEq)]
pub enum Subject {
    Whole,
    Underlying(String),
    Pair(String, String),
}

/// One sensitivity.
#[derive(Clone, Debug, PartialEq)]
pub struct Sensitivity {
    /// `delta`, `delta_units`, `gamma`, `vega`, `dividend`, `rho`, `correlation`, `theta`.
    pub measure: &'static str,
    pub subject: Subject,
    pub value: f64,
    /// From the paired differences, path by path.
    pub std_error: f64,
    /// The bump used, e.g. `±1% spot`.
    pub bump: String,
    /// What the value is in, e.g. `USD per 1% spot move`.
    pub unit: String,
}

/// The sensitivities of one payoff file.
#[derive(Clone, Debug, PartialEq)]
pub struct Risk {
    pub file: String,
    pub market_file: String,
    pub product: String,
    pub currency: String,
    pub notional: f64,
    /// The base price on the same paths.
    pub price: f64,
    pub price_std_error: f64,
    pub paths: u64,
    pub seed: u64,
    /// Whether every scenario's samples use its control variates ([`crate::sim::joint`]).
    pub control_variates: bool,
    pub sampler: crate::sim::Sampler,
    pub sensitivities: Vec<Sensitivity>,
    /// Sensitivities that could not be computed, and why.
    pub notes: Vec<String>,
}

/// The struck levels: today's spots of the product's underlyings.
pub fn struck_today(loaded: &Loaded) -> Struck {
    let levels = loaded
        .product
        .underlyings
        .iter()
        .map(|u| loaded.market.underlying(&u.text).map_or(f64::NAN, |m| m.spot))
        .collect();
    Struck { initial_levels: Some(levels), aged_days: 0 }
}

/// Computes the sensitivities of one payoff file.
pub fn risk_file(
    file: &Path,
    market: Option<&Path>,
    overrides: &[Override],
    settings: &Settings,
    bumps: &Bumps,
) -> Result<Risk, Failure> {
    let loaded = pricing::load(file, market, overrides)?;
    risk_of(&loaded, settings, bumps)
}

/// A bumped scenario: its program's index, or why it could not be built.
type Slot = Result<usize, String>;

/// Computes the sensitivities of a loaded payoff.
pub fn risk_of(loaded: &Loaded, settings: &Settings, bumps: &Bumps) -> Result<Risk, Failure> {
    let struck = struck_today(loaded);
    let base = &loaded.market;
    let mut programs: Vec<Program> = vec![loaded.compile(base, &struck)?];
    let add = |m: Result<Market, String>, programs: &mut Vec<Program>| -> Slot {
        let m = m?;
        let p = loaded.compile(&m, &struck).map_err(|f| pricing::one_line(&f))?;
        programs.push(p);
        Ok(programs.len() - 1)
    };
    let names: Vec<String> = loaded.product.underlyings.iter().map(|u| u.text.clone()).collect();
    let name_refs: Vec<&str> = names.iter().map(String::as_str).collect();
    let ccy = loaded.product.currency.clone();
    // Per underlying: spot up/down, vol up/down, dividend up/down.
    let mut per_name = Vec::new();
    for n in &names {
        let s = [
            add(base.with_spot_scaled(n, 1.0 + bumps.spot), &mut programs),
            add(base.with_spot_scaled(n, 1.0 - bumps.spot), &mut programs),
            add(base.with_volatility_shifted(n, bumps.vol), &mut programs),
            add(base.with_volatility_shifted(n, -bumps.vol), &mut programs),
            add(base.with_dividend_shifted(n, bumps.dividend), &mut programs),
            add(base.with_dividend_shifted(n, -bumps.dividend), &mut programs),
        ];
        per_name.push(s);
    }
    let rate = [
        add(Ok(base.with_rates_shifted(bumps.rate)), &mut programs),
        add(Ok(base.with_rates_shifted(-bumps.rate)), &mut programs),
    ];
    let mut pairs = Vec::new();
    for i in 0..names.len() {
        for j in i + 1..names.len() {
            let (a, b) = (&names[i], &names[j]);
            let up = add(base.with_correlation_shifted(a, b, bumps.correlation, &name_refs), &mut programs);
            let down = add(base.with_correlation_shifted(a, b, -bumps.correlation, &name_refs), &mut programs);
            pairs.push((a.clone(), b.clone(), up, down));
        }
    }
    let joint = simulate_joint(&programs, settings).map_err(|d| loaded.failure(d))?;
    let mut out = Vec::new();
    let mut notes = Vec::new();
    let central = |up: &Slot, down: &Slot, scale: f64| -> Result<(f64, f64), String> {
        match (up, down) {
            (Ok(u), Ok(d)) => {
                let (v, se) = joint.combination(&[(*u, 1.0), (*d, -1.0)]);
                Ok((v * scale, se * scale.abs()))
            }
            (Err(e), _) | (_, Err(e)) => Err(e.clone()),
        }
    };
    let pct = |x: f64| trim(x * 100.0);
    for (n, s) in names.iter().zip(&per_name) {
        let spot = base.underlying(n).map_or(f64::NAN, |u| u.spot);
        let h = bumps.spot;
        let subject = Subject::Underlying(n.clone());
        let bump = format!("±{}% spot", pct(h));
        match central(&s[0], &s[1], 0.01 / (2.0 * h)) {
            Ok((v, se)) => {
                out.push(sens("delta", &subject, v, se, &bump, format!("{ccy} per 1% spot move")));
                out.push(sens(
                    "delta_units",
                    &subject,
                    v / (0.01 * spot),
                    se / (0.01 * spot),
                    &bump,
                    format!("units of {n}"),
                ));
            }
            Err(e) => notes.push(format!("delta of {n}: {e}")),
        }
        if let (Ok(u), Ok(d)) = (&s[0], &s[1]) {
            let k = (0.01 / h).powi(2);
            let (v, se) = joint.combination(&[(*u, k), (0, -2.0 * k), (*d, k)]);
            out.push(sens("gamma", &subject, v, se, &bump, format!("{ccy} change of the 1% delta per 1% spot move")));
        }
        match central(&s[2], &s[3], 0.01 / (2.0 * bumps.vol)) {
            Ok((v, se)) => out.push(sens(
                "vega",
                &subject,
                v,
                se,
                &format!("±{} volatility points", pct(bumps.vol)),
                format!("{ccy} per volatility point"),
            )),
            Err(e) => notes.push(format!("vega of {n}: {e}")),
        }
        match central(&s[4], &s[5], 0.0001 / (2.0 * bumps.dividend)) {
            Ok((v, se)) => out.push(sens(
                "dividend",
                &subject,
                v,
                se,
                &format!("±{} bp dividend yield", trim(bumps.dividend * 1e4)),
                format!("{ccy} per 1 bp of dividend yield"),
            )),
            Err(e) => notes.push(format!("dividend sensitivity of {n}: {e}")),
        }
    }
    match central(&rate[0], &rate[1], 0.0001 / (2.0 * bumps.rate)) {
        Ok((v, se)) => out.push(sens(
            "rho",
            &Subject::Whole,
            v,
            se,
            &format!("±{} bp on every rate", trim(bumps.rate * 1e4)),
            format!("{ccy} per 1 bp of rate"),
        )),
        Err(e) => notes.push(format!("rho: {e}")),
    }
    for (a, b, up, down) in &pairs {
        let subject = Subject::Pair(a.clone(), b.clone());
        let unit = format!("{ccy} per correlation point");
        let h = bumps.correlation;
        // Central when both sides keep the matrix positive definite, else one-sided.
        let found = match (up, down) {
            (Ok(_), Ok(_)) => {
                central(up, down, 0.01 / (2.0 * h)).map(|(v, se)| (v, se, format!("±{} correlation points", pct(h))))
            }
            (Ok(u), Err(e)) => {
                let (v, se) = joint.combination(&[(*u, 0.01 / h), (0, -0.01 / h)]);
                notes.push(format!("correlation {a}–{b}: one-sided (+): {e}"));
                Ok((v, se, format!("+{} correlation points (one-sided)", pct(h))))
            }
            (Err(e), Ok(d)) => {
                let (v, se) = joint.combination(&[(0, 0.01 / h), (*d, -0.01 / h)]);
                notes.push(format!("correlation {a}–{b}: one-sided (−): {e}"));
                Ok((v, se, format!("−{} correlation points (one-sided)", pct(h))))
            }
            (Err(e), Err(_)) => Err(e.clone()),
        };
        match found {
            Ok((v, se, bump)) => out.push(sens("correlation", &subject, v, se, &bump, unit)),
            Err(e) => notes.push(format!("correlation {a}–{b}: {e}")),
        }
    }
    match theta(loaded, settings, bumps.days) {
        Ok((v, se)) => out.push(sens(
            "theta",
            &Subject::Whole,
            v,
            se,
            &format!("+{} calendar day{}", bumps.days, if bumps.days == 1 { "" } else { "s" }),
            format!("{ccy} over {} calendar day{}", bumps.days, if bumps.days == 1 { "" } else { "s" }),
        )),
        Err(e) => notes.push(format!("theta: {e}")),
    }
    if let Some(x) = programs.first().and_then(crate::sim::exercise::Exercise::of) {
        let fit = format!("{},{:03}", x.fit_paths / 1000, x.fit_paths % 1000);
        notes.push(format!(
            "early exercise ({} may end, {} dates): its rule is fitted again by least squares in every scenario, on the same {fit} fit paths; every price is biased {} by the rule's shortfall",
            x.party.word(),
            x.dates,
            x.bias()
        ));
    }
    Ok(Risk {
        file: loaded.file.display().to_string(),
        market_file: loaded.market_path.display().to_string(),
        product: loaded.product.name.clone(),
        currency: ccy,
        notional: loaded.product.notional,
        price: joint.price(0),
        price_std_error: joint.std_error(0),
        paths: joint.paths,
        seed: settings.seed,
        control_variates: settings.control_variates,
        sampler: settings.sampler,
        sensitivities: out,
        notes,
    })
}

/// The value change over `days` calendar days with the market unchanged: the trade,
/// struck at today's spots, valued `days` later on the same paths.
fn theta(loaded: &Loaded, settings: &Settings, days: i64) -> Result<(f64, f64), String> {
    let struck = struck_today(loaded);
    let base = loaded.compile(&loaded.market, &struck).map_err(|f| pricing::one_line(&f))?;
    let later = loaded.market.with_valuation_later(days)?;
    let aged = Struck { aged_days: days, ..struck };
    let next = loaded.compile(&later, &aged).map_err(|f| pricing::one_line(&f))?;
    if next.grid.len() != base.grid.len() {
        return Err(format!(
            "a fixing falls on {}, the valuation date {days} day(s) later, so the aged trade has another number of simulation dates and cannot be priced on the same paths; price it with a market file valued then for an aged value without common paths",
            later.valuation_date
        ));
    }
    let joint: Joint = simulate_joint(&[base, next], settings).map_err(|d: Diagnostic| d.message)?;
    Ok(joint.combination(&[(1, 1.0), (0, -1.0)]))
}

fn sens(measure: &'static str, subject: &Subject, value: f64, std_error: f64, bump: &str, unit: String) -> Sensitivity {
    Sensitivity { measure, subject: subject.clone(), value, std_error, bump: bump.to_string(), unit }
}

/// `1.0` → `1`, `0.5` → `0.5`.
fn trim(x: f64) -> String {
    let s = format!("{x:.6}");
    s.trim_end_matches('0').trim_end_matches('.').to_string()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn parses_bumps() {
        let mut b = Bumps::default();
        b.set("vol=0.5").unwrap();
        b.set("spot=2%").unwrap();
        b.set("rate=1").unwrap();
        b.set("theta=7").unwrap();
        assert_eq!(b.vol, 0.005);
        assert_eq!(b.spot, 0.02);
        assert_eq!(b.rate, 0.0001);
        assert_eq!(b.days, 7);
        assert!(b.set("vega").is_err());
        assert!(b.set("spot=-1").is_err());
        assert!(b.set("spot=90").is_err());
        assert!(b.set("delta=1").is_err());
        assert!(b.set("theta=0.5").is_err());
    }
}
