//! The pricing service: one payoff file, a market, `--set` overrides and settings → a
//! priced result with its warnings and its reproducibility record, or the diagnostics of
//! why it could not be priced.
//!
//! Every command prices through here; this module chains the stages ([`crate::syntax`] →
//! [`crate::typing`] → [`crate::compile`] → [`crate::sim`]) and imports nothing above it.

use std::path::{Path, PathBuf};

use sha2::{Digest, Sha256};

use crate::compile;
use crate::diagnostic::{locate, render_all, Diagnostic};
use crate::files::{read_regular_bytes, read_regular_file};
use crate::market::Market;
use crate::sim::{self, Estimate, Settings};
use crate::syntax;
use crate::typing::{self, Override};

/// The caution every report and every file pathfold writes carries.
pub const CAUTION: &str = "Caution: a model value under stated assumptions (risk-neutral GBM with deterministic rates, dividends and volatilities), not a quote; independent validation and your firm's model-risk policy come first.";

/// The default cap on paths of an error-bounded run.
pub const DEFAULT_MAX_PATHS: u64 = 20_000_000;

/// An error target for `--target-se`.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Target {
    /// In the payoff's currency.
    Amount(f64),
    /// In percent of the payoff's notional (`0.01%` is 0.01 here).
    PercentOfNotional(f64),
}

impl Target {
    /// Parses `250` (currency) or `0.01%` (of notional).
    pub fn parse(text: &str) -> Result<Target, String> {
        let t = text.trim();
        let (number, percent) = match t.strip_suffix('%') {
            Some(n) => (n.trim(), true),
            None => (t, false),
        };
        match number.replace('_', "").parse::<f64>() {
            Ok(x) if x.is_finite() && x > 0.0 => {
                Ok(if percent { Target::PercentOfNotional(x) } else { Target::Amount(x) })
            }
            _ => Err("give a positive amount in the payoff's currency, e.g. `250`, or a percentage of notional, e.g. `0.01%`"
                .into()),
        }
    }

    /// The target in currency for a payoff of this notional.
    pub fn amount(self, notional: f64) -> f64 {
        match self {
            Target::Amount(x) => x,
            Target::PercentOfNotional(p) => p / 100.0 * notional.abs(),
        }
    }
}

/// Everything a single-file report shows.
#[derive(Clone, Debug)]
pub struct Priced {
    pub file: String,
    pub market_file: String,
    pub product: String,
    pub currency: String,
    pub notional: f64,
    pub params: Vec<(String, f64)>,
    /// Each parameter's value as written (`2.25%`, `true`), for people.
    pub params_written: Vec<String>,
    pub estimate: Estimate,
    /// What it takes to reproduce the number exactly.
    pub record: Record,
    /// Rendered warnings about the payoff (allowed, but probably not meant).
    pub warnings: String,
    /// The market inputs the price used.
    pub inputs: Inputs,
    /// The date the product ended, when it ended before the valuation date (a trade
    /// already redeemed or knocked out): its price is what is left to pay.
    pub ended: Option<String>,
}

/// The market inputs of a price, per underlying, read to the product's last simulated
/// date: what a reviewer checks first.
#[derive(Clone, Debug, PartialEq)]
pub struct Inputs {
    /// The last simulated date, and its time in years from the valuation date.
    pub horizon: String,
    pub years: f64,
    pub valuation_date: String,
    /// The payoff currency's zero rate to the horizon.
    pub discount_rate: f64,
    pub underlyings: Vec<UnderlyingInputs>,
}

/// One underlying's inputs (rates, yields and volatilities to the horizon).
#[derive(Clone, Debug, PartialEq)]
pub struct UnderlyingInputs {
    pub name: String,
    pub currency: String,
    pub spot: f64,
    /// The implied volatility to the horizon.
    pub volatility: f64,
    /// The continuous dividend yield averaged to the horizon.
    pub dividend_yield: f64,
    /// Discrete dividends going ex after the valuation date and up to the horizon.
    pub discrete_dividends: usize,
    /// The zero rate of the underlying's own currency to the horizon.
    pub rate: f64,
    pub quanto: Option<crate::dynamics::Quanto>,
    /// Correlations with the product's other underlyings.
    pub correlations: Vec<(String, f64)>,
    /// The fixings of past dates the product reads, in date order.
    pub fixings: Vec<(String, f64)>,
}

impl Inputs {
    /// The inputs a compiled program prices with.
    pub fn of(program: &compile::Program) -> Inputs {
        let t = program.grid.last().copied().unwrap_or(0.0);
        let horizon = program
            .valuation_date
            .add_days((t * 365.0).round() as i64)
            .map_or_else(|| format!("{t:.4}y"), |d| d.to_string());
        let underlyings = program
            .assets
            .iter()
            .zip(&program.dynamics)
            .enumerate()
            .map(|(i, (a, d))| UnderlyingInputs {
                name: a.name.clone(),
                currency: d.currency.clone(),
                spot: a.spot,
                volatility: d.volatility(t),
                dividend_yield: d.dividend_yield(t),
                discrete_dividends: d.dividend_count_to(t),
                rate: d.own_rate(t),
                quanto: d.quanto.clone(),
                correlations: program
                    .assets
                    .iter()
                    .enumerate()
                    .filter(|(j, _)| *j != i)
                    .map(|(j, b)| {
                        (b.name.clone(), program.correlations.get(i).and_then(|r| r.get(j)).copied().unwrap_or(0.0))
                    })
                    .collect(),
                fixings: program
                    .past_levels
                    .iter()
                    .zip(&program.grid)
                    .filter(|(levels, _)| levels[i].is_finite())
                    .map(|(levels, t)| {
                        let date = program.valuation_date.add_days((t * 365.0).round() as i64);
                        (date.map_or_else(|| format!("{t:.4}y"), |d| d.to_string()), levels[i])
                    })
                    .collect(),
            })
            .collect();
        Inputs {
            horizon,
            years: t,
            valuation_date: program.valuation_date.to_string(),
            discount_rate: program.discounting.average(t),
            underlyings,
        }
    }
}

/// The reproducibility record of one result: with the same files (checked by hash), the
/// same version and these settings, pathfold gives the same bits.
#[derive(Clone, Debug, PartialEq)]
pub struct Record {
    pub version: &'static str,
    /// SHA-256 of the payoff file's bytes, hex.
    pub payoff_sha256: String,
    /// SHA-256 of the market file's bytes, hex.
    pub market_sha256: String,
    /// Whether control variates were asked for (the estimate lists those used).
    pub control_variates: bool,
    /// The `--set` overrides, as given.
    pub overrides: Vec<String>,
    /// The error target of an error-bounded run, if any.
    pub target: Option<TargetOutcome>,
}

/// How an error-bounded run (`--target-se`) ended.
#[derive(Clone, Debug, PartialEq)]
pub struct TargetOutcome {
    /// The target standard error, in currency.
    pub std_error: f64,
    /// The largest path count allowed.
    pub max_paths: u64,
    pub met: bool,
}

impl Priced {
    pub fn percent_of_notional(&self) -> f64 {
        100.0 * self.estimate.price / self.notional
    }

    /// The 95% confidence interval under the normal approximation.
    pub fn interval(&self) -> (f64, f64) {
        let half = 1.959_963_984_540_054 * self.estimate.std_error;
        (self.estimate.price - half, self.estimate.price + half)
    }
}

/// Why a file could not be priced.
#[derive(Debug)]
pub struct Failure {
    pub diagnostics: Vec<Diagnostic>,
    /// The text of the file the diagnostics point into, for drawing the caret.
    pub source: Option<String>,
    /// True for our own failure rather than bad input.
    pub internal: bool,
}

impl Failure {
    pub(crate) fn input(diagnostics: Vec<Diagnostic>, source: Option<String>) -> Self {
        Failure { diagnostics, source, internal: false }
    }

    pub fn render(&self) -> String {
        render_all(&self.diagnostics, self.source.as_deref())
    }
}

/// `file:line:col: message (fix: …)`, plus how many more problems the file has.
pub fn one_line(f: &Failure) -> String {
    let Some(d) = f.diagnostics.first() else {
        return "could not be priced (no diagnostic: please report this)".into();
    };
    let mut s = place(d, f.source.as_deref());
    s.push_str(&d.message);
    if let Some(fix) = &d.fix {
        s.push_str(&format!(" (fix: {fix})"));
    }
    if f.diagnostics.len() > 1 {
        s.push_str(&format!(" (and {} more)", f.diagnostics.len() - 1));
    }
    s
}

fn place(d: &Diagnostic, source: Option<&str>) -> String {
    match (&d.file, d.span, source) {
        (Some(file), Some(span), Some(src)) => {
            let (line, col, _) = locate(src, span.start);
            format!("{}:{line}:{col}: ", file.display())
        }
        (Some(file), _, _) => format!("{}: ", file.display()),
        (None, _, _) => String::new(),
    }
}

/// Hex SHA-256 of some bytes.
pub fn sha256_hex(bytes: &[u8]) -> String {
    Sha256::digest(bytes).iter().map(|b| format!("{b:02x}")).collect()
}

/// Parses, checks, compiles and prices one payoff file.
pub fn price_file(
    file: &Path,
    market: Option<&Path>,
    overrides: &[Override],
    settings: &Settings,
) -> Result<Priced, Failure> {
    price_file_to(file, market, overrides, settings, None)
}

/// [`price_file`], optionally adding paths until the standard error meets a target
/// (`(target, max_paths)`).
pub fn price_file_to(
    file: &Path,
    market: Option<&Path>,
    overrides: &[Override],
    settings: &Settings,
    target: Option<(Target, u64)>,
) -> Result<Priced, Failure> {
    let compiled = compile_file(file, market, overrides)?;
    let program = &compiled.program;
    let (estimate, target) = match target {
        None => (sim::simulate(program, settings), None),
        Some((t, max_paths)) => {
            let se = t.amount(program.notional);
            match sim::simulate_to_target(program, settings, se, max_paths) {
                Ok((e, met)) => (Ok(e), Some(TargetOutcome { std_error: se, max_paths, met })),
                Err(d) => (Err(d), None),
            }
        }
    };
    compiled.priced(estimate, settings, overrides, target)
}

/// A payoff file parsed, checked and compiled against its market, with what the report
/// and the reproducibility record need of both files.
pub struct Compiled {
    pub file: PathBuf,
    pub source: String,
    pub product: typing::Product,
    /// The market file used: `--market`, or the one the payoff names.
    pub market_path: PathBuf,
    pub market_bytes: Vec<u8>,
    pub program: compile::Program,
}

/// Parses, checks and compiles one payoff file with its market data.
pub fn compile_file(file: &Path, market: Option<&Path>, overrides: &[Override]) -> Result<Compiled, Failure> {
    compile_loaded(load(file, market, overrides)?)
}

/// [`compile_file`] for a payoff's text; `file` names it in messages, and a market file
/// the payoff names is looked for beside `file`.
pub fn compile_source(
    file: &Path,
    source: String,
    market: Option<&Path>,
    overrides: &[Override],
) -> Result<Compiled, Failure> {
    compile_loaded(load_source(file, source, market, overrides)?)
}

/// Compiles a loaded payoff against its own market, as struck today.
fn compile_loaded(loaded: Loaded) -> Result<Compiled, Failure> {
    let program = loaded.compile(&loaded.market, &compile::Struck::default())?;
    let Loaded { file, source, product, market_path, .. } = loaded;
    let market_bytes = read_regular_bytes(&market_path).map_err(|e| {
        Failure::input(vec![Diagnostic::new(format!("cannot read the market file: {e}")).in_file(&market_path)], None)
    })?;
    Ok(Compiled { file, source, product, market_path, market_bytes, program })
}

impl Compiled {
    /// The report of a simulation of this payoff (or the failure of the simulation).
    pub fn priced(
        &self,
        estimate: Result<sim::Estimate, Diagnostic>,
        settings: &Settings,
        overrides: &[Override],
        target: Option<TargetOutcome>,
    ) -> Result<Priced, Failure> {
        let (file, source, product, program) = (&self.file, &self.source, &self.product, &self.program);
        let in_file = |ds: Vec<Diagnostic>| ds.into_iter().map(|d| d.in_file(file)).collect::<Vec<_>>();
        let estimate = estimate.map_err(|d| Failure::input(in_file(vec![d]), Some(source.clone())))?;
        let found = product.warnings.iter().chain(&estimate.warnings).cloned().collect();
        let warnings = render_all(&in_file(found), Some(source));
        // Ended before the valuation date: every path ends on the same past date.
        let ended = estimate
            .profile
            .iter()
            .find(|r| r.time < 0.0 && r.end_probability.is_some_and(|p| p >= 1.0 - 1e-12))
            .map(|r| r.label.clone());
        Ok(Priced {
            ended,
            warnings,
            inputs: Inputs::of(program),
            file: file.display().to_string(),
            market_file: self.market_path.display().to_string(),
            product: program.name.clone(),
            currency: program.currency.clone(),
            notional: program.notional,
            params: product.params.clone(),
            params_written: product.params_written.iter().map(|w| w.text(source).to_string()).collect(),
            estimate,
            record: Record {
                version: env!("CARGO_PKG_VERSION"),
                payoff_sha256: sha256_hex(source.as_bytes()),
                market_sha256: sha256_hex(&self.market_bytes),
                control_variates: settings.control_variates,
                overrides: overrides.iter().map(|o| format!("{}={}", o.name, o.value)).collect(),
                target,
            },
        })
    }
}

/// A payoff file read, checked and paired with its market: what every pricing of it
/// starts from. Compile it against the market, or a bumped copy, with [`Loaded::compile`].
#[derive(Clone, Debug)]
pub struct Loaded {
    pub file: std::path::PathBuf,
    pub source: String,
    pub product: typing::Product,
    pub market: Market,
    pub market_path: std::path::PathBuf,
}

/// Reads and checks a payoff file and its market (`--market`, or the file the payoff names).
pub fn load(file: &Path, market: Option<&Path>, overrides: &[Override]) -> Result<Loaded, Failure> {
    let bytes = read_regular_bytes(file).map_err(|e| {
        Failure::input(vec![Diagnostic::new(format!("cannot read the payoff file: {e}")).in_file(file)], None)
    })?;
    let source =
        crate::diagnostic::decode_source(bytes).map_err(|e| Failure::input(vec![e.0.in_file(file)], Some(e.1)))?;
    load_source(file, source, market, overrides)
}

/// [`load`] for a payoff's text; `file` names it in messages, and a market file the payoff
/// names is looked for beside `file`.
pub fn load_source(
    file: &Path,
    source: String,
    market: Option<&Path>,
    overrides: &[Override],
) -> Result<Loaded, Failure> {
    let in_file = |ds: Vec<Diagnostic>| ds.into_iter().map(|d| d.in_file(file)).collect::<Vec<_>>();
    // Parsing and checking recurse once per level of nesting: they get a stack of known size.
    let product = syntax::on_deep_stack(|| {
        let tree = syntax::parse(&source).map_err(|d| Failure::input(in_file(vec![d]), Some(source.clone())))?;
        typing::check(&tree, overrides).map_err(|ds| Failure::input(in_file(ds), Some(source.clone())))
    })?;
    let market_path = match (market, &product.market) {
        (Some(m), _) => m.to_path_buf(),
        (None, Some((name, _))) => file.parent().unwrap_or(Path::new(".")).join(name),
        (None, None) => {
            let d = Diagnostic::new("no market data: the payoff names no market file and none was given")
                .with_fix("pass `--market FILE`, or add a line `market \"market.toml\"` to the payoff");
            return Err(Failure::input(in_file(vec![d]), Some(source)));
        }
    };
    let market_data = match Market::load(&market_path) {
        Ok(m) => m,
        Err(ds) => {
            // The market file's problems, or those of the fixings file it names.
            let source_file = ds.first().and_then(|d| d.file.clone()).unwrap_or_else(|| market_path.clone());
            let text = read_regular_file(&source_file).ok();
            let ds = ds.into_iter().map(|d| d.in_file(&source_file)).collect();
            return Err(Failure::input(ds, text));
        }
    };
    Ok(Loaded { file: file.to_path_buf(), source, product, market: market_data, market_path })
}

impl Loaded {
    /// Compiles the product against `market` (this file's market or a bumped copy of it),
    /// keeping fixed what `struck` says.
    pub fn compile(&self, market: &Market, struck: &compile::Struck) -> Result<compile::Program, Failure> {
        let (file, market_path) = (&self.file, &self.market_path);
        syntax::on_deep_stack(|| compile::compile_struck(&self.product, market, market_path, struck)).map_err(|ds| {
            // Errors in the market (a correlation pair) name the market file; the rest point into the payoff.
            let market_side = ds.iter().any(|d| d.file.as_deref() == Some(market_path.as_path()));
            if market_side {
                Failure::input(ds, read_regular_file(market_path).ok())
            } else {
                Failure::input(ds.into_iter().map(|d| d.in_file(file)).collect(), Some(self.source.clone()))
            }
        })
    }

    /// The failure of a simulation of this file, pointing into it.
    pub fn failure(&self, d: Diagnostic) -> Failure {
        Failure::input(vec![d.in_file(&self.file)], Some(self.source.clone()))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn parses_targets() {
        assert_eq!(Target::parse("250"), Ok(Target::Amount(250.0)));
        assert_eq!(Target::parse("0.01%"), Ok(Target::PercentOfNotional(0.01)));
        assert_eq!(Target::parse("0.01%").map(|t| t.amount(1_000_000.0)), Ok(100.0));
        assert!(Target::parse("-1").is_err());
        assert!(Target::parse("abc%").is_err());
        assert!(Target::parse("0").is_err());
    }

    #[test]
    fn hashes_as_hex() {
        // The SHA-256 of "abc" from FIPS 180-2, appendix B.1.
        assert_eq!(sha256_hex(b"abc"), "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad");
    }
}
