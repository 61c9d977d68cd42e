//! An input beside the stages: the market the simulation runs on — valuation date, flat rates per
//! currency and, per underlying, spot, volatility, dividend yield and pairwise correlations,
//! read from a TOML file.
//!
//! Everything is checked here, once, when the file is read: a built [`Market`] holds only
//! finite numbers in range, so the simulation loop never re-validates. A file with problems
//! yields every problem found, each with its place in the file and a fix, not just the first.
//!
//! The format:
//!
//! ```toml
//! valuation_date = 2026-12-01          # TOML local date
//!
//! [rates]                               # continuously compounded, flat, per ISO 4217 code
//! USD = 0.038
//!
//! [underlyings.ZPHX]
//! currency = "USD"                      # ISO 4217 code; may be left out when [rates] has one
//! spot = 4250.0
//! volatility = 0.18                     # annual, lognormal
//! dividend_yield = 0.019                # continuous; 0 when absent
//!
//! [correlations]                        # each pair once, either order
//! ZPHX = { QMEN = 0.55 }
//! ```

use std::collections::BTreeMap;
use std::path::Path;

use crate::curve::{Curve, Pillar, Reading};
use crate::date::Date;
use crate::diagnostic::{closest, Diagnostic, Span};
use crate::files::read_regular_file;

/// One underlying's parameters, all finite: spot > 0, volatilities in (0, 5] with a
/// forward variance that never falls.
#[derive(Clone, Debug, PartialEq)]
pub struct Underlying {
    /// The ISO 4217 code of the currency the underlying is quoted in.
    pub currency: String,
    pub spot: f64,
    /// Annual lognormal implied volatility, as a fraction (0.18 for 18%): flat, or by maturity.
    pub volatility: Curve,
    /// Continuous dividend yield, as a fraction (may be negative): flat, or by maturity.
    pub dividend_yield: Curve,
    /// Discrete dividends, by ex-date (increasing; each date once).
    pub dividends: Vec<Dividend>,
    /// The correlation of the underlying with the price of its own currency in another
    /// currency, keyed by that currency (for quanto pricing).
    pub fx_correlations: BTreeMap<String, f64>,
}

impl Underlying {
    /// An underlying on flat inputs, without discrete dividends or FX data.
    pub fn flat(currency: &str, spot: f64, volatility: f64, dividend_yield: f64) -> Underlying {
        Underlying {
            currency: currency.to_string(),
            spot,
            volatility: Curve::Flat(volatility),
            dividend_yield: Curve::Flat(dividend_yield),
            dividends: Vec::new(),
            fx_correlations: BTreeMap::new(),
        }
    }
}

/// A discrete dividend: the level goes ex on `date` (the level of that date is after it).
#[derive(Clone, Debug, PartialEq)]
pub struct Dividend {
    pub date: Date,
    pub amount: DividendAmount,
    pub span: Option<Span>,
}

/// What a discrete dividend takes off the level.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum DividendAmount {
    /// A cash amount in the underlying's currency. Model: it is paid as the fraction
    /// `amount / F(t⁻)` of the level, `F(t⁻)` the forward just before the ex-date, so the
    /// forward drops by exactly the amount and the level stays lognormal.
    Cash(f64),
    /// A fraction of the level, in (0, 1): exact under lognormal dynamics.
    Fraction(f64),
}

/// Validated market data. Once built, every number in it is usable as is.
#[derive(Clone, Debug, PartialEq)]
pub struct Market {
    pub valuation_date: Date,
    rates: BTreeMap<String, Curve>,
    /// Volatilities of exchange rates: `(A, B)` is the price of one A in B.
    fx_volatilities: BTreeMap<(String, String), f64>,
    /// In file order, so reports list names as the user wrote them.
    underlyings: Vec<(String, Underlying)>,
    /// Keyed by the pair in sorted order, so either order finds it.
    correlations: BTreeMap<(String, String), Given>,
    /// The fixings of past dates, from the file the market names (`fixings = "..."`,
    /// relative to the market file); read by [`Market::load`].
    pub fixings: Option<crate::fixings::Fixings>,
    /// The fixings file as written, and where.
    fixings_name: Option<(String, Option<Span>)>,
    /// Holiday calendars, from the file the market names (`calendars = "..."`).
    pub calendars: Option<crate::calendar::Calendars>,
    calendars_name: Option<(String, Option<Span>)>,
    /// Names that have their own line under `[correlations]`, with the span of the name:
    /// a missing pair is best added to an existing line (a second line would be a TOML
    /// duplicate key).
    correlation_rows: BTreeMap<String, Option<Span>>,
}

/// A correlation as given in the file; the span lets later errors point back at it.
#[derive(Clone, Copy, Debug, PartialEq)]
struct Given {
    value: f64,
    span: Option<Span>,
}

/// A pivot below this means the correlation matrix is singular up to rounding: names that
/// move exactly together (or against each other) leave nothing for the next row to divide by.
const MIN_PIVOT: f64 = 1e-12;

/// Volatilities above this are surely a percentage typed as a number.
const MAX_VOLATILITY: f64 = 5.0;

impl Market {
    /// Reads and validates a market file. Errors carry the file path and, where possible,
    /// the span of the offending value.
    pub fn load(path: &Path) -> Result<Market, Vec<Diagnostic>> {
        let text = read_regular_file(path).map_err(|err| {
            vec![Diagnostic::new(format!("cannot read the market file: {err}"))
                .with_fix("check that the path is right and the file is readable")
                .in_file(path)]
        })?;
        let mut market = Market::from_toml(&text, path)?;
        if let Some((name, span)) = market.fixings_name.clone() {
            let file = path.parent().unwrap_or(Path::new(".")).join(&name);
            if !file.is_file() {
                let mut d = Diagnostic::new(format!("the fixings file {} named here does not exist", file.display()))
                    .with_fix("write the path relative to the market file, e.g. fixings = \"fixings.csv\"")
                    .in_file(path);
                d.span = span;
                return Err(vec![d]);
            }
            market.fixings = Some(crate::fixings::Fixings::load(&file)?);
        }
        if let Some((name, span)) = market.calendars_name.clone() {
            let file = path.parent().unwrap_or(Path::new(".")).join(&name);
            if !file.is_file() {
                let mut d = Diagnostic::new(format!("the calendars file {} named here does not exist", file.display()))
                    .with_fix("write the path relative to the market file, e.g. calendars = \"holidays.csv\"")
                    .in_file(path);
                d.span = span;
                return Err(vec![d]);
            }
            market.calendars = Some(crate::calendar::Calendars::load(&file)?);
        }
        Ok(market)
    }

    /// Validates market data given as TOML text; `file` is only used to label errors.
    pub fn from_toml(text: &str, file: &Path) -> Result<Market, Vec<Diagnostic>> {
        let root = match parse_tree(text) {
            Ok(root) => root,
            Err(err) => {
                let message = err.message().trim_end().to_string();
                let diagnostic = match err.span() {
                    Some(range) => Diagnostic::at(Span::new(range.start, range.end), message),
                    None => Diagnostic::new(message),
                };
                return Err(vec![diagnostic
                    .with_fix("fix the TOML syntax at this place: keys are `name = value`, sections `[rates]`, `[underlyings.NAME]`, `[correlations]`")
                    .in_file(file)]);
            }
        };
        let mut reader = Reader { file, errors: Vec::new(), valuation: None };
        let market = reader.market(root);
        // In file order; errors without a place (a missing key) last.
        reader.errors.sort_by_key(|d| d.span.map_or(usize::MAX, |s| s.start));
        match market {
            Some(market) if reader.errors.is_empty() => Ok(market),
            _ => Err(reader.errors),
        }
    }

    /// The continuously compounded zero-rate curve of an ISO 4217 currency code.
    pub fn rate(&self, currency: &str) -> Option<&Curve> {
        self.rates.get(currency)
    }

    /// The volatility of the price of one `of` in `in_` (the same as of its inverse).
    pub fn fx_volatility(&self, of: &str, in_: &str) -> Option<f64> {
        self.fx_volatilities
            .get(&(of.to_string(), in_.to_string()))
            .or_else(|| self.fx_volatilities.get(&(in_.to_string(), of.to_string())))
            .copied()
    }

    pub fn underlying(&self, name: &str) -> Option<&Underlying> {
        self.underlyings.iter().find(|(n, _)| n == name).map(|(_, u)| u)
    }

    /// Underlying names in the order the file gives them.
    pub fn underlying_names(&self) -> impl Iterator<Item = &str> {
        self.underlyings.iter().map(|(n, _)| n.as_str())
    }

    /// The correlation of two underlyings: 1 for a defined name with itself, `None` when
    /// the pair isn't given or a name isn't defined.
    pub fn correlation(&self, a: &str, b: &str) -> Option<f64> {
        if a == b {
            return self.underlying(a).map(|_| 1.0);
        }
        self.correlations.get(&pair_key(a, b)).map(|g| g.value)
    }

    /// Every underlying's parameters, in file order.
    pub fn underlyings(&self) -> impl Iterator<Item = (&str, &Underlying)> {
        self.underlyings.iter().map(|(n, u)| (n.as_str(), u))
    }

    fn bumped_underlying(&self, name: &str, change: impl FnOnce(&mut Underlying)) -> Result<Market, String> {
        let mut m = self.clone();
        let u = m
            .underlyings
            .iter_mut()
            .find(|(n, _)| n == name)
            .map(|(_, u)| u)
            .ok_or_else(|| format!("the market has no underlying `{name}`"))?;
        change(u);
        if !(u.spot.is_finite() && u.spot > 0.0) {
            return Err(format!("the bumped spot of `{name}` is not positive"));
        }
        if !u.volatility.values().iter().all(|v| v.is_finite() && *v > 0.0 && *v <= MAX_VOLATILITY) {
            return Err(format!("the bumped volatility of `{name}` is outside (0, {MAX_VOLATILITY}]"));
        }
        if let Some((a, b)) = falling_variance(&u.volatility, m.valuation_date) {
            return Err(format!(
                "the bumped volatilities of `{name}` imply a negative forward variance between {a} and {b}"
            ));
        }
        Ok(m)
    }

    /// A copy with `name`'s spot multiplied by `factor` (1.01 for +1%).
    pub fn with_spot_scaled(&self, name: &str, factor: f64) -> Result<Market, String> {
        self.bumped_underlying(name, |u| u.spot *= factor)
    }

    /// A copy with `name`'s volatility moved by `shift` (0.01 for one volatility point).
    pub fn with_volatility_shifted(&self, name: &str, shift: f64) -> Result<Market, String> {
        self.bumped_underlying(name, |u| u.volatility = u.volatility.shifted(shift))
    }

    /// A copy with `name`'s dividend yield moved by `shift` (0.0001 for one basis point).
    pub fn with_dividend_shifted(&self, name: &str, shift: f64) -> Result<Market, String> {
        self.bumped_underlying(name, |u| u.dividend_yield = u.dividend_yield.shifted(shift))
    }

    /// A copy with every rate moved by `shift` (0.0001 for one basis point).
    pub fn with_rates_shifted(&self, shift: f64) -> Market {
        let mut m = self.clone();
        for r in m.rates.values_mut() {
            *r = r.shifted(shift);
        }
        m
    }

    /// A copy with the correlation of `a` and `b` moved by `shift`; an error if the pair
    /// is not given, leaves [-1, 1], or the matrix of `names` is no longer positive
    /// definite.
    pub fn with_correlation_shifted(&self, a: &str, b: &str, shift: f64, names: &[&str]) -> Result<Market, String> {
        let mut m = self.clone();
        let given = m
            .correlations
            .get_mut(&pair_key(a, b))
            .ok_or_else(|| format!("the market gives no correlation between {a} and {b}"))?;
        given.value += shift;
        if !(-1.0..=1.0).contains(&given.value) {
            return Err(format!("the correlation of {a} and {b} moved by {shift} leaves [-1, 1]"));
        }
        m.cholesky(names, Path::new("market"))
            .map_err(|_| format!("the correlation matrix with {a}–{b} moved by {shift} is not positive definite"))?;
        Ok(m)
    }

    /// A copy valued `days` calendar days later, everything else unchanged.
    pub fn with_valuation_later(&self, days: i64) -> Result<Market, String> {
        let mut m = self.clone();
        m.valuation_date = self
            .valuation_date
            .add_days(days)
            .ok_or_else(|| "the valuation date moved forward is past the supported years".to_string())?;
        Ok(m)
    }

    /// Lower-triangular Cholesky factor (row-major) of the correlation matrix of `names` in
    /// that order, so that `L·Lᵀ` is the matrix. `file` labels the error: the market file.
    ///
    /// Errors: an undefined or repeated name; pairs not given (the message names them and
    /// the fix shows what to add under `[correlations]`); a matrix that is not positive
    /// definite (the message names the row where the factorisation fails and the pair most
    /// at odds with the rest).
    pub fn cholesky(&self, names: &[&str], file: &Path) -> Result<Vec<Vec<f64>>, Diagnostic> {
        for (i, name) in names.iter().enumerate() {
            if self.underlying(name).is_none() {
                let known: Vec<&str> = self.underlying_names().collect();
                let fix = match closest(name, known.iter().copied()) {
                    Some(near) => format!("did you mean `{near}`?"),
                    None => format!(
                        "add [underlyings.{name}] with spot and volatility to the market file (defined: {})",
                        list_or_none(&known)
                    ),
                };
                return Err(Diagnostic::new(format!("no underlying `{name}` in the market file"))
                    .with_fix(fix)
                    .in_file(file));
            }
            if names[..i].contains(name) {
                return Err(Diagnostic::new(format!("underlying `{name}` is listed twice"))
                    .with_fix("list each underlying once")
                    .in_file(file));
            }
        }

        let mut missing = Vec::new();
        let matrix: Vec<Vec<f64>> = names
            .iter()
            .map(|a| {
                names
                    .iter()
                    .map(|b| {
                        self.correlation(a, b).unwrap_or_else(|| {
                            // Each unordered pair once, earlier name first.
                            let (ia, ib) = (position(names, a), position(names, b));
                            if ia < ib {
                                missing.push((*a, *b));
                            }
                            0.0
                        })
                    })
                    .collect()
            })
            .collect();
        if !missing.is_empty() {
            return Err(self.missing_pairs(&missing, file));
        }

        let n = names.len();
        let mut factor = vec![vec![0.0; n]; n];
        for i in 0..n {
            let (done, rest) = factor.split_at_mut(i);
            let row = &mut rest[0];
            for (j, upper) in done.iter().enumerate() {
                row[j] = (matrix[i][j] - dot(&row[..j], &upper[..j])) / upper[j];
            }
            let pivot = matrix[i][i] - dot(&row[..i], &row[..i]);
            if pivot.is_nan() || pivot <= MIN_PIVOT {
                return Err(self.not_positive_definite(names, i, row, file));
            }
            row[i] = pivot.sqrt();
        }
        Ok(factor)
    }

    fn missing_pairs(&self, missing: &[(&str, &str)], file: &Path) -> Diagnostic {
        let pairs: Vec<String> = missing.iter().map(|(a, b)| format!("{a} and {b}")).collect();
        let message = format!("no correlation given between {}", pairs.join(", nor between "));

        // Group what to add by the line it goes on: an existing line of either name, or a
        // new line for the earlier name.
        let mut lines: Vec<(&str, bool, Vec<&str>)> = Vec::new();
        for &(a, b) in missing {
            let (row, other, exists) = if self.correlation_rows.contains_key(a) {
                (a, b, true)
            } else if self.correlation_rows.contains_key(b) {
                (b, a, true)
            } else {
                (a, b, false)
            };
            match lines.iter_mut().find(|(r, _, _)| *r == row) {
                Some((_, _, others)) => others.push(other),
                None => lines.push((row, exists, vec![other])),
            }
        }
        let steps: Vec<String> = lines
            .iter()
            .map(|(row, exists, others)| {
                let entries: Vec<String> = others.iter().map(|o| format!("{o} = <correlation>")).collect();
                if *exists {
                    format!("add `{}` inside the braces of the `{row} = {{ ... }}` line", entries.join(", "))
                } else {
                    format!("add the line `{row} = {{ {} }}`", entries.join(", "))
                }
            })
            .collect();
        let fix = format!("under [correlations], {}", steps.join("; "));

        let span = lines.first().and_then(|(row, _, _)| self.correlation_rows.get(*row).copied().flatten());
        let diagnostic = match span {
            Some(span) => Diagnostic::at(span, message),
            None => Diagnostic::new(message),
        };
        diagnostic.with_fix(fix).in_file(file)
    }

    fn not_positive_definite(&self, names: &[&str], failed: usize, row: &[f64], file: &Path) -> Diagnostic {
        let name = names[failed];
        // The earlier name whose entry in the failing row is largest pulls the row's
        // variance below zero the most: the pair most at odds with the rest.
        let culprit = (0..failed).max_by(|&x, &y| row[x].abs().total_cmp(&row[y].abs())).unwrap_or(0);
        let other = names[culprit];
        let value = self.correlation(name, other).unwrap_or(f64::NAN);
        let among = names[..=failed].join(", ");
        let message = format!(
            "the correlations among {among} cannot all hold at once: the correlation matrix is not positive definite, failing at {name}; the pair {name}–{other} ({value}) is the most at odds with the rest"
        );
        let fix = format!(
            "check {name}–{other} first, then the other correlations among {among}: two names that both move closely with a third cannot move strongly against each other, and distinct names cannot be correlated exactly ±1"
        );
        let span = self.correlations.get(&pair_key(name, other)).and_then(|g| g.span);
        let diagnostic = match span {
            Some(span) => Diagnostic::at(span, message),
            None => Diagnostic::new(message),
        };
        diagnostic.with_fix(fix).in_file(file)
    }
}

fn pair_key(a: &str, b: &str) -> (String, String) {
    if a <= b {
        (a.to_string(), b.to_string())
    } else {
        (b.to_string(), a.to_string())
    }
}

fn position(names: &[&str], name: &str) -> usize {
    names.iter().position(|n| *n == name).unwrap_or(usize::MAX)
}

fn dot(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| x * y).sum()
}

fn list_or_none(names: &[&str]) -> String {
    if names.is_empty() {
        "none".to_string()
    } else {
        names.join(", ")
    }
}

// ---------------------------------------------------------------------------------------
// Validation: from the spanned TOML tree to a `Market`, collecting every problem.

const TOP_KEYS: &[&str] =
    &["valuation_date", "fixings", "calendars", "rates", "underlyings", "correlations", "fx_volatilities"];
const UNDERLYING_KEYS: &[&str] =
    &["currency", "spot", "volatility", "dividend_yield", "cash_dividends", "proportional_dividends", "fx_correlation"];

struct Reader<'a> {
    file: &'a Path,
    errors: Vec<Diagnostic>,
    /// The valuation date, once read: tenors count from it.
    valuation: Option<Date>,
}

/// The first pair of volatility pillars (earlier, later) between which the total variance
/// `σ²T` falls, which no positive forward variance can give.
pub fn falling_variance(curve: &Curve, valuation: Date) -> Option<(String, String)> {
    let Curve::Pillars(pillars) = curve else { return None };
    let ahead: Vec<&Pillar> = pillars.iter().filter(|p| p.date > valuation).collect();
    ahead.windows(2).find_map(|w| {
        let total = |p: &Pillar| p.value * p.value * valuation.years_until(p.date);
        (total(w[1]) < total(w[0])).then(|| (w[0].label.clone(), w[1].label.clone()))
    })
}

/// The date of a pillar written as a tenor (`10d`, `2w`, `6m`, `1y`) from `valuation`,
/// or as an ISO date; `None` if it is neither.
fn pillar_date(text: &str, valuation: Date) -> Option<Date> {
    if let Some(d) = Date::parse(text) {
        return Some(d);
    }
    let unit = text.chars().last()?;
    let count: i64 = text[..text.len() - 1].parse().ok().filter(|n: &i64| *n > 0 && *n <= 2400)?;
    if !text[..text.len() - 1].bytes().all(|b| b.is_ascii_digit()) {
        return None;
    }
    match unit {
        'd' => valuation.add_days(count),
        'w' => valuation.add_days(7 * count),
        'm' => valuation.add_months(count),
        'y' => valuation.add_months(12 * count),
        _ => None,
    }
}

/// What a value of a curve must satisfy: `None`, or the message and the fix.
type Check<'c> = &'c dyn Fn(f64, &str, &str) -> Option<(String, String)>;

impl Reader<'_> {
    fn error(&mut self, span: Option<Span>, message: String, fix: String) {
        let diagnostic = match span {
            Some(span) => Diagnostic::at(span, message),
            None => Diagnostic::new(message),
        };
        self.errors.push(diagnostic.with_fix(fix).in_file(self.file));
    }

    /// Reports a key that isn't allowed here; returns the allowed key it is likely a typo of.
    fn unknown_key<'k>(&mut self, key: &Key, place: &str, allowed: &[&'k str]) -> Option<&'k str> {
        let message = format!("unknown key `{}` in {place}", key.name);
        let near = closest(&key.name, allowed.iter().copied());
        let fix = if key.name == "valuation_date" {
            "move `valuation_date = ...` above the first [section]: TOML puts a key in the table above it".to_string()
        } else {
            let hint = near.map(|near| format!("did you mean `{near}`? ")).unwrap_or_default();
            format!("{hint}allowed keys: {}", allowed.join(", "))
        };
        self.error(key.span, message, fix);
        near
    }

    /// The entries of a node that must be a table, or `None` (with an error) if it isn't.
    fn table<'n>(&mut self, node: &'n Node, path: &str, example: &str) -> Option<&'n [(Key, Node)]> {
        match &node.kind {
            Kind::Table(entries) => Some(entries),
            other => {
                self.error(
                    node.span,
                    format!("{path} must be a table (got {})", other.describe()),
                    format!("write it as {example}"),
                );
                None
            }
        }
    }

    /// A finite number (integers accepted), or `None` with an error.
    fn number(&mut self, node: &Node, path: &str, key: &str) -> Option<f64> {
        let value = match &node.kind {
            Kind::Integer(i) => *i as f64,
            Kind::Float(f) => *f,
            Kind::String(s) if s.trim().parse::<f64>().is_ok() => {
                let message = format!("{path} must be a number, not a string");
                self.error(node.span, message, format!("remove the quotes: {key} = {}", s.trim()));
                return None;
            }
            other => {
                let message = format!("{path} must be a number (got {})", other.describe());
                self.error(node.span, message, format!("write a number, e.g. {key} = 0.25"));
                return None;
            }
        };
        if !value.is_finite() {
            let message = format!("{path} must be a finite number (got {value})");
            self.error(node.span, message, format!("write a finite number, e.g. {key} = 0.25"));
            return None;
        }
        Some(value)
    }

    fn market(&mut self, root: Node) -> Option<Market> {
        let Kind::Table(entries) = root.kind else {
            self.error(
                None,
                "the market file must be a TOML table".into(),
                "write `valuation_date = ...` and [rates], [underlyings.NAME], [correlations] sections".into(),
            );
            return None;
        };
        let mut sections: BTreeMap<&str, &Node> = BTreeMap::new();
        for (key, node) in &entries {
            if TOP_KEYS.contains(&key.name.as_str()) {
                sections.insert(key.name.as_str(), node);
            } else {
                self.unknown_key(key, "the market file", TOP_KEYS);
            }
        }

        let valuation_date = sections.get("valuation_date").and_then(|node| self.valuation_date(node));
        self.valuation = valuation_date;
        let rates = sections.get("rates").map(|node| self.rates(node)).unwrap_or_default();
        // With one currency in [rates] an underlying's currency can only be that one: no
        // quanto is possible, so the line may be left out.
        let only_currency = (rates.len() == 1).then(|| rates.keys().next().cloned()).flatten();
        let (underlyings, declared) = match sections.get("underlyings") {
            Some(node) => self.underlyings(node, only_currency.as_deref()),
            None => (Vec::new(), Vec::new()),
        };
        let (correlations, correlation_rows) = match sections.get("correlations") {
            Some(node) => self.correlations(node, &declared),
            None => (BTreeMap::new(), BTreeMap::new()),
        };
        let fx_volatilities =
            sections.get("fx_volatilities").map(|node| self.fx_volatilities(node)).unwrap_or_default();
        let mut file_name = |key: &str, example: &str| {
            sections.get(key).and_then(|node| match &node.kind {
                Kind::String(name) if !name.trim().is_empty() => Some((name.clone(), node.span)),
                other => {
                    self.error(
                        node.span,
                        format!("{key} must be the name of a file in quotes (got {})", other.describe()),
                        format!("write for example {key} = \"{example}\" (relative to the market file)"),
                    );
                    None
                }
            })
        };
        let fixings_name = file_name("fixings", "fixings.csv");
        let calendars_name = file_name("calendars", "holidays.csv");
        let valuation_date = match sections.get("valuation_date") {
            Some(_) => valuation_date,
            None => {
                // A date written below a [section] header is reported there instead
                // (so the sections are read first).
                let misplaced = self.errors.iter().any(|d| d.message.starts_with("unknown key `valuation_date`"));
                if !misplaced {
                    // A missing key has no place of its own: the start of the file.
                    self.error(
                        Some(Span::new(0, 0)),
                        "missing valuation_date".into(),
                        "add `valuation_date = YYYY-MM-DD` (a TOML date, no quotes) above the first [section]".into(),
                    );
                }
                None
            }
        };
        Some(Market {
            valuation_date: valuation_date?,
            rates,
            fx_volatilities,
            fixings: None,
            fixings_name,
            calendars: None,
            calendars_name,
            underlyings,
            correlations,
            correlation_rows,
        })
    }

    fn valuation_date(&mut self, node: &Node) -> Option<Date> {
        let example = "valuation_date = 2026-12-01";
        match &node.kind {
            Kind::Date(text) => {
                if let Some(date) = Date::parse(text) {
                    return Some(date);
                }
                let fix = match text.get(..10).and_then(Date::parse) {
                    Some(date) => format!("drop the time: valuation_date = {date}"),
                    None => format!("write a calendar date, e.g. {example}"),
                };
                self.error(node.span, format!("valuation_date must be a date without a time (got {text})"), fix);
            }
            Kind::String(text) if Date::parse(text).is_some() => {
                self.error(
                    node.span,
                    "valuation_date must be a TOML date, not a string".into(),
                    format!("remove the quotes: valuation_date = {text}"),
                );
            }
            other => {
                let message = format!("valuation_date must be a date (got {})", other.describe());
                self.error(node.span, message, format!("write it as YYYY-MM-DD without quotes, e.g. {example}"));
            }
        }
        None
    }

    fn rates(&mut self, node: &Node) -> BTreeMap<String, Curve> {
        let mut rates = BTreeMap::new();
        let Some(entries) = self.table(node, "rates", "[rates] with lines like `USD = 0.038`") else {
            return rates;
        };
        for (key, value) in entries {
            let code = &key.name;
            if code == "valuation_date" {
                self.unknown_key(key, "[rates]", &[]);
                continue;
            }
            let path = format!("rates.{code}");
            if !(code.len() == 3 && code.bytes().all(|b| b.is_ascii_uppercase())) {
                let fix = if code.len() == 3 && code.bytes().all(|b| b.is_ascii_alphabetic()) {
                    format!("write the code in capitals: {}", code.to_ascii_uppercase())
                } else {
                    "use a three-letter ISO 4217 code such as USD".to_string()
                };
                self.error(key.span, format!("`{code}` in [rates] is not an ISO 4217 currency code"), fix);
                continue;
            }
            let check = |rate: f64, path: &str, key: &str| {
                (rate.abs() > 1.0)
                    .then(|| (format!("{path} must be between -1 and 1 (got {})", show(rate)), percent_fix(key, rate)))
            };
            if let Some(curve) = self.curve(value, &path, code, &check, Reading::Rate) {
                rates.insert(code.clone(), curve);
            }
        }
        rates
    }

    /// The valid underlyings, and every name declared (valid or not), so that correlations
    /// naming a broken underlying aren't reported a second time as naming an unknown one.
    fn underlyings(&mut self, node: &Node, only_currency: Option<&str>) -> (Vec<(String, Underlying)>, Vec<String>) {
        let mut valid = Vec::new();
        let mut declared = Vec::new();
        let Some(entries) = self.table(node, "underlyings", "[underlyings.NAME] sections") else {
            return (valid, declared);
        };
        for (key, node) in entries {
            let name = &key.name;
            if !is_name(name) {
                self.error(
                    key.span,
                    format!("underlying name `{name}` cannot be written in a payoff"),
                    "use letters, digits and _, starting with a letter, e.g. ZPHX".into(),
                );
                continue;
            }
            declared.push(name.clone());
            if let Some(underlying) = self.underlying(key, node, only_currency) {
                valid.push((name.clone(), underlying));
            }
        }
        (valid, declared)
    }

    fn underlying(&mut self, key: &Key, node: &Node, only_currency: Option<&str>) -> Option<Underlying> {
        let name = &key.name;
        let example = format!("[underlyings.{name}] with currency, spot, volatility and dividend_yield lines");
        let entries = self.table(node, &format!("underlyings.{name}"), &example)?;
        let mut spot = None;
        let mut volatility = None;
        let mut dividend_yield = Some(Curve::Flat(0.0));
        let mut currency = None;
        let mut dividends = Vec::new();
        let defaulted = only_currency.map(str::to_string);
        let mut fx_correlations = BTreeMap::new();
        let mut broken = false;
        // A misspelt key is already reported; don't report its field as missing too.
        let mut misspelt = Vec::new();
        for (field, value) in entries {
            let path = format!("underlyings.{name}.{}", field.name);
            match field.name.as_str() {
                "currency" => match self.currency(value, &path) {
                    Some(code) => currency = Some(code),
                    None => broken = true,
                },
                "spot" => {
                    spot = self.number(value, &path, "spot");
                    if let Some(x) = spot.filter(|x| *x <= 0.0) {
                        let message = format!("{path} must be greater than 0 (got {})", show(x));
                        self.error(value.span, message, "a spot price is positive".into());
                        spot = None;
                    }
                    broken |= spot.is_none();
                }
                "volatility" => {
                    let check = |x: f64, path: &str, _: &str| {
                        if x <= 0.0 {
                            Some((
                                format!("{path} must be greater than 0 (got {})", show(x)),
                                "write the annual volatility as a positive fraction, e.g. volatility = 0.25 for 25%"
                                    .to_string(),
                            ))
                        } else if x > MAX_VOLATILITY {
                            Some((
                                format!(
                                    "{path} must be at most {MAX_VOLATILITY} (got {}); it looks like a percentage",
                                    show(x)
                                ),
                                percent_fix("volatility", x),
                            ))
                        } else {
                            None
                        }
                    };
                    volatility = self.curve(value, &path, "volatility", &check, Reading::Volatility);
                    broken |= volatility.is_none();
                }
                "dividend_yield" => {
                    let check = |x: f64, path: &str, _: &str| {
                        (x.abs() > 1.0).then(|| {
                            (
                                format!(
                                    "{path} must be between -1 and 1 (got {}); it looks like a percentage",
                                    show(x)
                                ),
                                percent_fix("dividend_yield", x),
                            )
                        })
                    };
                    dividend_yield = self.curve(value, &path, "dividend_yield", &check, Reading::Rate);
                    broken |= dividend_yield.is_none();
                }
                "cash_dividends" | "proportional_dividends" => {
                    broken |= !self.dividends(value, &path, field.name == "cash_dividends", &mut dividends);
                }
                "fx_correlation" => broken |= !self.fx_correlation(value, &path, &mut fx_correlations),
                _ => {
                    if let Some(near) = self.unknown_key(field, &format!("[underlyings.{name}]"), UNDERLYING_KEYS) {
                        misspelt.push(near);
                    }
                    broken = true;
                }
            }
        }
        if currency.is_none() && !entries.iter().any(|(k, _)| k.name == "currency") {
            currency = defaulted;
        }
        let given = [
            ("currency", currency.is_some(), "currency = \"USD\""),
            ("spot", spot.is_some(), "spot = 100.0"),
            ("volatility", volatility.is_some(), "volatility = 0.25"),
        ];
        for (field, found, example) in given {
            let present = entries.iter().any(|(k, _)| k.name == field);
            if !found && !present && !misspelt.contains(&field) {
                self.error(
                    key.span.or(node.span),
                    format!("underlyings.{name} has no {field}"),
                    format!("add a line such as `{example}` under [underlyings.{name}]"),
                );
                broken = true;
            }
        }
        let currency = currency?;
        if let Some((other, span)) =
            fx_correlations.iter().find(|(c, _)| **c == currency).map(|(c, g)| (c.clone(), g.1))
        {
            self.error(
                span,
                format!("underlyings.{name}.fx_correlation.{other} names the underlying's own currency"),
                format!("give the correlation with the price of {currency} in another currency (the payoff's), e.g. fx_correlation = {{ EUR = -0.2 }}"),
            );
            broken = true;
        }
        dividends.sort_by_key(|d: &Dividend| d.date);
        for w in dividends.windows(2) {
            if w[0].date == w[1].date {
                self.error(
                    w[1].span,
                    format!("underlyings.{name} has two dividends going ex on {}", w[0].date),
                    "give one dividend per ex-date: add the amounts, or remove one".into(),
                );
                broken = true;
            }
        }
        if broken {
            return None;
        }
        Some(Underlying {
            currency,
            spot: spot?,
            volatility: volatility?,
            dividend_yield: dividend_yield?,
            dividends,
            fx_correlations: fx_correlations.into_iter().map(|(c, (x, _))| (c, x)).collect(),
        })
    }

    /// A curve: one number, or a table of pillars (`6m = 0.2`, `2028-06-01 = 0.21`), each
    /// value checked by `check`; volatility pillars must not imply a negative forward variance.
    fn curve(&mut self, node: &Node, path: &str, key: &str, check: Check<'_>, reading: Reading) -> Option<Curve> {
        let Kind::Table(entries) = &node.kind else {
            let x = self.number(node, path, key)?;
            if let Some((message, fix)) = check(x, path, key) {
                self.error(node.span, message, fix);
                return None;
            }
            return Some(Curve::Flat(x));
        };
        if entries.is_empty() {
            self.error(
                node.span,
                format!("{path} has no pillars"),
                format!("write one number, e.g. {key} = 0.2, or pillars, e.g. {key} = {{ 6m = 0.21, 1y = 0.2 }}"),
            );
            return None;
        }
        let mut pillars: Vec<Pillar> = Vec::new();
        let mut ok = true;
        for (pillar, value) in entries {
            let at = format!("{path}.{}", pillar.name);
            let date = match self.valuation {
                Some(valuation) => match pillar_date(&pillar.name, valuation) {
                    Some(d) if d > valuation => Some(d),
                    Some(_) => {
                        self.error(
                            pillar.span,
                            format!("the pillar {} of {path} is not after the valuation date {valuation}", pillar.name),
                            "give pillars after the valuation date (a tenor such as 6m, or a later date)".into(),
                        );
                        ok = false;
                        None
                    }
                    None => {
                        self.error(
                            pillar.span,
                            format!("`{}` in {path} is neither a tenor nor a date", pillar.name),
                            "write a tenor as a count and d, w, m or y (10d, 2w, 6m, 5y) or a date as YYYY-MM-DD"
                                .into(),
                        );
                        ok = false;
                        None
                    }
                },
                // Without a valuation date (reported elsewhere) tenors cannot be placed.
                None => {
                    ok = false;
                    None
                }
            };
            let Some(x) = self.number(value, &at, &pillar.name) else {
                ok = false;
                continue;
            };
            if let Some((message, fix)) = check(x, &at, &pillar.name) {
                self.error(value.span, message, fix);
                ok = false;
                continue;
            }
            if let Some(date) = date {
                if let Some(same) = pillars.iter().find(|p| p.date == date) {
                    self.error(
                        pillar.span,
                        format!(
                            "the pillars {} and {} of {path} fall on the same date {date}",
                            same.label, pillar.name
                        ),
                        "give each maturity once".into(),
                    );
                    ok = false;
                    continue;
                }
                pillars.push(Pillar { date, label: pillar.name.clone(), value: x, span: value.span });
            }
        }
        if !ok {
            return None;
        }
        pillars.sort_by_key(|p| p.date);
        let curve = Curve::Pillars(pillars);
        if let (Reading::Volatility, Some(valuation)) = (reading, self.valuation) {
            if let Some((a, b)) = falling_variance(&curve, valuation) {
                let span = match &curve {
                    Curve::Pillars(p) => p.iter().find(|p| p.label == b).and_then(|p| p.span),
                    Curve::Flat(_) => None,
                };
                self.error(
                    span,
                    format!("{path} implies a negative forward variance between the pillars {a} and {b}: the total variance σ²T falls"),
                    format!("raise the volatility at {b} or lower it at {a}, so that σ²T grows with the maturity"),
                );
                return None;
            }
        }
        Some(curve)
    }

    /// Discrete dividends `{ 2027-03-15 = 0.85, ... }` into `out`; false if any is wrong.
    fn dividends(&mut self, node: &Node, path: &str, cash: bool, out: &mut Vec<Dividend>) -> bool {
        let example = if cash {
            "cash_dividends = { 2027-03-15 = 0.85 }"
        } else {
            "proportional_dividends = { 2027-03-15 = 0.01 }"
        };
        let Some(entries) = self.table(node, path, example) else { return false };
        let mut ok = true;
        for (key, value) in entries {
            let at = format!("{path}.{}", key.name);
            let Some(date) = Date::parse(&key.name) else {
                self.error(
                    key.span,
                    format!("`{}` in {path} is not an ex-date", key.name),
                    format!("key each dividend by its ex-date as YYYY-MM-DD, e.g. {example}"),
                );
                ok = false;
                continue;
            };
            let Some(x) = self.number(value, &at, &key.name) else {
                ok = false;
                continue;
            };
            let problem = if cash {
                (x <= 0.0).then(|| {
                    (
                        format!("{at} must be greater than 0 (got {})", show(x)),
                        "a cash dividend is a positive amount in the underlying's currency".to_string(),
                    )
                })
            } else if x <= 0.0 || x >= 1.0 {
                let fix = if (1.0..100.0).contains(&x) {
                    percent_fix(&key.name, x)
                } else {
                    "a proportional dividend is a fraction of the level between 0 and 1, e.g. 0.012 for 1.2%"
                        .to_string()
                };
                Some((format!("{at} must be between 0 and 1, both excluded (got {})", show(x)), fix))
            } else {
                None
            };
            if let Some((message, fix)) = problem {
                self.error(value.span, message, fix);
                ok = false;
                continue;
            }
            let amount = if cash { DividendAmount::Cash(x) } else { DividendAmount::Fraction(x) };
            out.push(Dividend { date, amount, span: key.span });
        }
        ok
    }

    /// `fx_correlation = { USD = -0.3 }` into `out`; false if any entry is wrong.
    fn fx_correlation(&mut self, node: &Node, path: &str, out: &mut BTreeMap<String, (f64, Option<Span>)>) -> bool {
        let Some(entries) = self.table(node, path, "fx_correlation = { USD = -0.3 }") else { return false };
        let mut ok = true;
        for (key, value) in entries {
            let at = format!("{path}.{}", key.name);
            if !is_currency(&key.name) {
                self.error(
                    key.span,
                    format!("`{}` in {path} is not an ISO 4217 currency code", key.name),
                    "key the correlation by the three-letter code of the other currency, e.g. USD".into(),
                );
                ok = false;
                continue;
            }
            let Some(rho) = self.number(value, &at, &key.name) else {
                ok = false;
                continue;
            };
            if !(-1.0..=1.0).contains(&rho) {
                self.error(
                    value.span,
                    format!("{at} must be between -1 and 1 (got {})", show(rho)),
                    "a correlation lies between -1 and 1; -0.30 means -30%".into(),
                );
                ok = false;
                continue;
            }
            out.insert(key.name.clone(), (rho, key.span));
        }
        ok
    }

    /// `[fx_volatilities]` with lines `EUR_USD = 0.085` (the price of one EUR in USD).
    fn fx_volatilities(&mut self, node: &Node) -> BTreeMap<(String, String), f64> {
        let mut out = BTreeMap::new();
        let Some(entries) = self.table(node, "fx_volatilities", "[fx_volatilities] with lines like `EUR_USD = 0.085`")
        else {
            return out;
        };
        for (key, value) in entries {
            let path = format!("fx_volatilities.{}", key.name);
            let pair = key.name.split_once('_').filter(|(a, b)| is_currency(a) && is_currency(b) && a != b);
            let Some((a, b)) = pair else {
                self.error(
                    key.span,
                    format!("`{}` in [fx_volatilities] is not a currency pair", key.name),
                    "write two different ISO 4217 codes joined by _, e.g. EUR_USD for the price of one EUR in USD"
                        .into(),
                );
                continue;
            };
            let Some(x) = self.number(value, &path, &key.name) else { continue };
            if x <= 0.0 || x > MAX_VOLATILITY {
                let fix = if x > MAX_VOLATILITY {
                    percent_fix(&key.name, x)
                } else {
                    "an FX volatility is a positive fraction, e.g. 0.085 for 8.5%".to_string()
                };
                self.error(value.span, format!("{path} must be in (0, {MAX_VOLATILITY}] (got {})", show(x)), fix);
                continue;
            }
            let inverse = (b.to_string(), a.to_string());
            if out.contains_key(&inverse) {
                self.error(
                    key.span,
                    format!("the volatility of {a} against {b} is given twice ({b}_{a} too)"),
                    "give each pair once: the volatility of a rate and of its inverse are the same".into(),
                );
                continue;
            }
            out.insert((a.to_string(), b.to_string()), x);
        }
        out
    }

    /// The ISO 4217 code of an underlying's `currency = "USD"`, or `None` with an error.
    fn currency(&mut self, node: &Node, path: &str) -> Option<String> {
        let example = "currency = \"USD\"";
        let Kind::String(code) = &node.kind else {
            let message = format!("{path} must be a currency code in quotes (got {})", node.kind.describe());
            self.error(node.span, message, format!("write the ISO 4217 code in quotes, e.g. {example}"));
            return None;
        };
        if code.len() == 3 && code.bytes().all(|b| b.is_ascii_uppercase()) {
            return Some(code.clone());
        }
        let fix = if code.len() == 3 && code.bytes().all(|b| b.is_ascii_alphabetic()) {
            format!("write the code in capitals: currency = \"{}\"", code.to_ascii_uppercase())
        } else {
            format!("use a three-letter ISO 4217 code, e.g. {example}")
        };
        self.error(node.span, format!("{path} `{code}` is not an ISO 4217 currency code"), fix);
        None
    }

    #[allow(clippy::type_complexity)]
    fn correlations(
        &mut self,
        node: &Node,
        declared: &[String],
    ) -> (BTreeMap<(String, String), Given>, BTreeMap<String, Option<Span>>) {
        let mut pairs: BTreeMap<(String, String), Given> = BTreeMap::new();
        let mut rows = BTreeMap::new();
        let example = "[correlations] with lines like `ZPHX = { QMEN = 0.55 }`";
        let Some(entries) = self.table(node, "correlations", example) else {
            return (pairs, rows);
        };
        let known: Vec<&str> = declared.iter().map(String::as_str).collect();
        for (row_key, row) in entries {
            let a = row_key.name.as_str();
            let a_known = self.declared(row_key, &format!("correlations.{a}"), &known);
            let example = format!("`{a} = {{ OTHER = 0.5 }}`");
            let Some(row_entries) = self.table(row, &format!("correlations.{a}"), &example) else {
                continue;
            };
            if a_known {
                rows.insert(a.to_string(), row_key.span);
            }
            for (col_key, value) in row_entries {
                let b = col_key.name.as_str();
                let path = format!("correlations.{a}.{b}");
                let b_known = self.declared(col_key, &path, &known);
                let Some(rho) = self.number(value, &path, b) else {
                    continue;
                };
                if !(-1.0..=1.0).contains(&rho) {
                    // 40 is surely 40% typed as a number; 1.4 is more likely a slip.
                    let fix = if (2.0..=100.0).contains(&rho.abs()) {
                        percent_fix(b, rho)
                    } else {
                        "a correlation lies between -1 and 1; 0.40 means 40%".to_string()
                    };
                    self.error(value.span, format!("{path} must be between -1 and 1 (got {})", show(rho)), fix);
                    continue;
                }
                if a == b {
                    if rho != 1.0 {
                        self.error(
                            value.span,
                            format!("{path} is the correlation of {a} with itself, which is 1 (got {})", show(rho)),
                            format!("remove `{b} = {}`", show(rho)),
                        );
                    }
                    continue;
                }
                if !(a_known && b_known) {
                    continue;
                }
                let given = Given { value: rho, span: value.span };
                match pairs.get(&pair_key(a, b)) {
                    Some(first) if first.value != rho => {
                        self.error(
                            value.span,
                            format!(
                                "the correlation of {a} and {b} is given twice with different values ({} and {})",
                                show(first.value),
                                show(rho)
                            ),
                            "give each pair once, in either order, and delete the other".into(),
                        );
                    }
                    Some(_) => {}
                    None => {
                        pairs.insert(pair_key(a, b), given);
                    }
                }
            }
        }
        (pairs, rows)
    }

    /// Whether a name in [correlations] is a declared underlying; reports it if not.
    fn declared(&mut self, key: &Key, path: &str, known: &[&str]) -> bool {
        if known.contains(&key.name.as_str()) {
            return true;
        }
        let fix = match closest(&key.name, known.iter().copied()) {
            Some(near) => format!("did you mean `{near}`?"),
            None => format!("define [underlyings.{}] or correct the name (defined: {})", key.name, list_or_none(known)),
        };
        self.error(key.span, format!("{path} names `{}`, which is not under [underlyings]", key.name), fix);
        false
    }
}

/// A three-letter ISO 4217 code in capitals.
fn is_currency(code: &str) -> bool {
    code.len() == 3 && code.bytes().all(|b| b.is_ascii_uppercase())
}

/// Names as the payoff language writes them: a letter or `_`, then letters, digits or `_`.
fn is_name(name: &str) -> bool {
    let mut chars = name.chars();
    chars.next().is_some_and(|c| c.is_ascii_alphabetic() || c == '_')
        && chars.all(|c| c.is_ascii_alphanumeric() || c == '_')
}

fn percent_fix(key: &str, value: f64) -> String {
    let fraction = show(value / 100.0);
    format!("write it as a fraction: {fraction} means {}%, so {key} = {fraction}", show(value))
}

/// Shortest decimal of a number rounded to 12 places, so `3.8 / 100` shows as 0.038.
fn show(x: f64) -> String {
    let rounded = (x * 1e12).round() / 1e12;
    if rounded.is_finite() {
        format!("{rounded}")
    } else {
        format!("{x}")
    }
}

// ---------------------------------------------------------------------------------------
// A TOML tree in which every value and key carries its span.
//
// The market is validated by hand (to report unknown keys and wrong types with their
// place, whatever shape the file has), so the file is first read into this small tree
// from toml_edit's parsed document, whose keys and values carry their spans publicly.

#[derive(Debug)]
struct Node {
    /// `None` for tables TOML creates implicitly (`[a.b]` makes `a`).
    span: Option<Span>,
    kind: Kind,
}

#[derive(Debug)]
enum Kind {
    /// Entries in file order.
    Table(Vec<(Key, Node)>),
    Integer(i64),
    Float(f64),
    Boolean,
    String(String),
    /// Any TOML date or date-time, as written.
    Date(String),
    Array,
}

impl Kind {
    fn describe(&self) -> &'static str {
        match self {
            Kind::Table(_) => "a table",
            Kind::Integer(_) | Kind::Float(_) => "a number",
            Kind::Boolean => "true or false",
            Kind::String(_) => "a string",
            Kind::Date(_) => "a date",
            Kind::Array => "an array",
        }
    }
}

#[derive(Debug)]
struct Key {
    name: String,
    span: Option<Span>,
}

/// Parses TOML text into the spanned tree; a syntax error keeps toml_edit's message and place.
fn parse_tree(text: &str) -> Result<Node, toml_edit::TomlError> {
    let document = toml_edit::ImDocument::parse(text)?;
    Ok(table_node(document.as_table()))
}

fn span_of(range: Option<std::ops::Range<usize>>) -> Option<Span> {
    range.map(|r| Span::new(r.start, r.end))
}

fn entries<'t>(pairs: impl Iterator<Item = (&'t toml_edit::Key, &'t toml_edit::Item)>) -> Vec<(Key, Node)> {
    pairs
        .filter(|(_, item)| !item.is_none())
        .map(|(key, item)| (Key { name: key.get().to_string(), span: span_of(key.span()) }, item_node(item)))
        .collect()
}

fn table_node(table: &toml_edit::Table) -> Node {
    let span = if table.is_implicit() { None } else { span_of(table.span()) };
    let keys = table.iter().filter_map(|(name, _)| table.get_key_value(name));
    Node { span, kind: Kind::Table(entries(keys)) }
}

fn item_node(item: &toml_edit::Item) -> Node {
    match item {
        toml_edit::Item::Table(table) => table_node(table),
        toml_edit::Item::Value(value) => value_node(value),
        toml_edit::Item::ArrayOfTables(array) => Node { span: span_of(array.span()), kind: Kind::Array },
        toml_edit::Item::None => Node { span: None, kind: Kind::Table(Vec::new()) },
    }
}

fn value_node(value: &toml_edit::Value) -> Node {
    use toml_edit::Value;
    let kind = match value {
        Value::Integer(i) => Kind::Integer(*i.value()),
        Value::Float(f) => Kind::Float(*f.value()),
        Value::Boolean(_) => Kind::Boolean,
        Value::String(s) => Kind::String(s.value().clone()),
        Value::Datetime(d) => Kind::Date(d.value().to_string()),
        Value::Array(_) => Kind::Array,
        Value::InlineTable(table) => {
            let keys = table.iter().filter_map(|(name, _)| table.get_key_value(name));
            Kind::Table(entries(keys))
        }
    };
    Node { span: span_of(value.span()), kind }
}

#[cfg(test)]
mod tests {
    use super::*;

    const DEMO: &str = r#"# pathfold market data
valuation_date = 2026-12-01          # TOML local date

[rates]                               # continuously compounded, flat, per ISO 4217 currency
USD = 0.038

[underlyings.ZPHX]
currency = "USD"
spot = 4250
volatility = 0.18                     # annual, lognormal
dividend_yield = 0.019                # continuous

[underlyings.QMEN]
currency = "USD"
spot = 38.40
volatility = 0.32
dividend_yield = 0.031

[underlyings.OSMP]
currency = "USD"
spot = 112.00
volatility = 0.26
dividend_yield = 0.012

[underlyings.VNTL]
currency = "USD"
spot = 57.25
volatility = 0.29

[correlations]                        # each pair once, either order
ZPHX = { QMEN = 0.55, OSMP = 0.60, VNTL = 0.65 }
QMEN = { OSMP = 0.40, VNTL = 0.45 }
VNTL = { OSMP = 0.50 }
"#;

    fn file() -> &'static Path {
        Path::new("market.toml")
    }

    fn errors(text: &str) -> Vec<Diagnostic> {
        Market::from_toml(text, file()).expect_err("should be refused")
    }

    /// The single error of `text`, with the text its span covers.
    fn only_error(text: &str) -> (Diagnostic, String) {
        let errs = errors(text);
        assert_eq!(errs.len(), 1, "{errs:#?}");
        let d = errs.into_iter().next().unwrap();
        assert_eq!(d.file.as_deref(), Some(file()));
        let span = d.span.expect("a span");
        let covered = text[span.start..span.end].to_string();
        (d, covered)
    }

    /// The demo file with one line replaced.
    fn demo_with(line: &str, replacement: &str) -> String {
        assert!(DEMO.contains(line), "{line}");
        DEMO.replacen(line, replacement, 1)
    }

    #[test]
    fn reads_the_demo_market() {
        let m = Market::from_toml(DEMO, file()).unwrap();
        assert_eq!(m.valuation_date, Date::parse("2026-12-01").unwrap());
        assert_eq!(m.rate("USD"), Some(&Curve::Flat(0.038)));
        assert_eq!(m.rate("EUR"), None);
        assert_eq!(m.underlying_names().collect::<Vec<_>>(), ["ZPHX", "QMEN", "OSMP", "VNTL"]);
        assert_eq!(m.underlying("ZPHX"), Some(&Underlying::flat("USD", 4250.0, 0.18, 0.019)));
        assert_eq!(m.underlying("QMEN"), Some(&Underlying::flat("USD", 38.40, 0.32, 0.031)));
        assert_eq!(m.underlying("OSMP"), Some(&Underlying::flat("USD", 112.0, 0.26, 0.012)));
        assert_eq!(m.underlying("VNTL"), Some(&Underlying::flat("USD", 57.25, 0.29, 0.0)));
        assert_eq!(m.correlation("ZPHX", "QMEN"), Some(0.55));
        assert_eq!(m.correlation("QMEN", "ZPHX"), Some(0.55));
        assert_eq!(m.correlation("OSMP", "VNTL"), Some(0.50));
        assert_eq!(m.correlation("OSMP", "OSMP"), Some(1.0));
        assert_eq!(m.correlation("OSMP", "XXXX"), None);
        assert_eq!(m.correlation("XXXX", "XXXX"), None);
        let l = m.cholesky(&["ZPHX", "QMEN", "OSMP", "VNTL"], file()).unwrap();
        assert_eq!(l.len(), 4);
        assert!(l.iter().enumerate().all(|(i, row)| row[i + 1..].iter().all(|&x| x == 0.0)));
    }

    #[test]
    fn refuses_bad_numbers_at_their_place() {
        let (d, at) = only_error(&demo_with("volatility = 0.32", "volatility = -0.32"));
        assert_eq!(d.message, "underlyings.QMEN.volatility must be greater than 0 (got -0.32)");
        assert_eq!(at, "-0.32");
        assert!(d.fix.unwrap().contains("positive"));

        let (d, at) = only_error(&demo_with("volatility = 0.32", "volatility = 32"));
        assert_eq!(d.message, "underlyings.QMEN.volatility must be at most 5 (got 32); it looks like a percentage");
        assert_eq!(at, "32");
        assert_eq!(d.fix.unwrap(), "write it as a fraction: 0.32 means 32%, so volatility = 0.32");

        let (d, at) = only_error(&demo_with("spot = 38.40", "spot = 0"));
        assert_eq!(d.message, "underlyings.QMEN.spot must be greater than 0 (got 0)");
        assert_eq!(at, "0");

        let (d, at) = only_error(&demo_with("spot = 38.40", "spot = nan"));
        assert_eq!(d.message, "underlyings.QMEN.spot must be a finite number (got NaN)");
        assert_eq!(at, "nan");

        let (d, at) = only_error(&demo_with("spot = 38.40", "spot = \"38.40\""));
        assert_eq!(d.message, "underlyings.QMEN.spot must be a number, not a string");
        assert_eq!(d.fix.unwrap(), "remove the quotes: spot = 38.40");
        assert_eq!(at, "\"38.40\"");

        let (d, at) = only_error(&demo_with("dividend_yield = 0.031", "dividend_yield = inf"));
        assert_eq!(d.message, "underlyings.QMEN.dividend_yield must be a finite number (got inf)");
        assert_eq!(at, "inf");

        let (d, at) = only_error(&demo_with("USD = 0.038", "USD = 3.8"));
        assert_eq!(d.message, "rates.USD must be between -1 and 1 (got 3.8)");
        assert_eq!(d.fix.unwrap(), "write it as a fraction: 0.038 means 3.8%, so USD = 0.038");
        assert_eq!(at, "3.8");

        let (d, at) = only_error(&demo_with("USD = 0.038", "usd = 0.038"));
        assert_eq!(d.message, "`usd` in [rates] is not an ISO 4217 currency code");
        assert_eq!(at, "usd");
    }

    #[test]
    fn reads_and_checks_the_currency_of_each_underlying() {
        let text = DEMO.replacen("[underlyings.QMEN]\ncurrency = \"USD\"", "[underlyings.QMEN]\ncurrency = \"EUR\"", 1);
        let m = Market::from_toml(&text, file()).unwrap();
        assert_eq!(m.underlying("QMEN").unwrap().currency, "EUR");
        assert_eq!(m.underlying("ZPHX").unwrap().currency, "USD");

        let text = DEMO.replacen("[underlyings.QMEN]\ncurrency = \"USD\"", "[underlyings.QMEN]\ncurrency = \"usd\"", 1);
        let (d, at) = only_error(&text);
        assert_eq!(d.message, "underlyings.QMEN.currency `usd` is not an ISO 4217 currency code");
        assert_eq!(d.fix.unwrap(), "write the code in capitals: currency = \"USD\"");
        assert_eq!(at, "\"usd\"");

        let text = DEMO.replacen("[underlyings.QMEN]\ncurrency = \"USD\"", "[underlyings.QMEN]\ncurrency = 840", 1);
        let (d, at) = only_error(&text);
        assert_eq!(d.message, "underlyings.QMEN.currency must be a currency code in quotes (got a number)");
        assert_eq!(at, "840");
    }

    #[test]
    fn negative_dividend_yield_is_allowed() {
        let m = Market::from_toml(&demo_with("dividend_yield = 0.031", "dividend_yield = -0.004"), file()).unwrap();
        assert_eq!(m.underlying("QMEN").unwrap().dividend_yield, Curve::Flat(-0.004));
    }

    #[test]
    fn refuses_unknown_keys_naming_the_allowed_ones() {
        let (d, at) = only_error(&demo_with("volatility = 0.32", "volatilty = 0.32"));
        assert_eq!(d.message, "unknown key `volatilty` in [underlyings.QMEN]");
        assert_eq!(
            d.fix.unwrap(),
            "did you mean `volatility`? allowed keys: currency, spot, volatility, dividend_yield, cash_dividends, proportional_dividends, fx_correlation"
        );
        assert_eq!(at, "volatilty");

        let (d, at) = only_error(&demo_with("[rates]", "[rate]"));
        assert_eq!(d.message, "unknown key `rate` in the market file");
        assert!(d.fix.unwrap().starts_with("did you mean `rates`?"));
        assert_eq!(at, "rate");
    }

    #[test]
    fn wrong_shapes_are_reported_not_fatal() {
        let (d, at) = only_error(&demo_with("spot = 38.40", "spot = 2026-12-01"));
        assert_eq!(d.message, "underlyings.QMEN.spot must be a number (got a date)");
        assert_eq!(at, "2026-12-01");

        let (d, _) = only_error(&demo_with("spot = 38.40", "spot = [38.40]"));
        assert_eq!(d.message, "underlyings.QMEN.spot must be a number (got an array)");

        let text = demo_with("[rates]", "rates = true\n[other_rates]").replace("USD = 0.038\n", "");
        let errs = errors(&text);
        assert_eq!(errs.len(), 2, "{errs:#?}");
        assert_eq!(errs[0].message, "rates must be a table (got true or false)");
        assert_eq!(errs[1].message, "unknown key `other_rates` in the market file");

        let with_time = "valuation_date = 2026-12-01T09:30:00";
        let (d, at) = only_error(&demo_with("valuation_date = 2026-12-01", with_time));
        let message = "valuation_date must be a date without a time (got 2026-12-01T09:30:00)";
        assert_eq!(d.message, message);
        assert_eq!(d.fix.unwrap(), "drop the time: valuation_date = 2026-12-01");
        assert_eq!(at, "2026-12-01T09:30:00");

        // Written below [rates], the date belongs to that table: one error saying so.
        let text = demo_with("valuation_date = 2026-12-01", "")
            .replace("USD = 0.038", "USD = 0.038\nvaluation_date = 2026-12-01");
        let (d, at) = only_error(&text);
        assert_eq!(d.message, "unknown key `valuation_date` in [rates]");
        let fix = d.fix.unwrap();
        assert!(fix.starts_with("move `valuation_date = ...` above the first [section]"));
        assert_eq!(at, "valuation_date");

        let errs = errors(&demo_with("USD = 0.038", "USD = 0.038\nUSD = 0.04"));
        assert_eq!(errs.len(), 1);
        assert!(errs[0].message.contains("duplicate key"), "{}", errs[0].message);

        let missing = Path::new("/nonexistent/market.toml");
        let errs = Market::load(missing).unwrap_err();
        assert!(errs[0].message.starts_with("cannot read the market file"));
        assert_eq!(errs[0].file.as_deref(), Some(missing));
    }

    #[test]
    fn reads_curves_by_tenor_or_date_in_date_order() {
        let text = demo_with("USD = 0.038", "USD = { 2y = 0.04, 6m = 0.036, 2027-12-01 = 0.038 }\nEUR = 0.02")
            .replace("volatility = 0.32", "volatility = { 1y = 0.30, 3y = 0.28 }");
        let m = Market::from_toml(&text, file()).unwrap();
        let Some(Curve::Pillars(p)) = m.rate("USD") else { panic!("a USD curve") };
        let dates: Vec<String> = p.iter().map(|p| p.date.to_string()).collect();
        assert_eq!(dates, ["2027-06-01", "2027-12-01", "2028-12-01"]);
        assert_eq!(p.iter().map(|p| p.label.as_str()).collect::<Vec<_>>(), ["6m", "2027-12-01", "2y"]);
        assert_eq!(m.rate("EUR"), Some(&Curve::Flat(0.02)));
        let Curve::Pillars(v) = &m.underlying("QMEN").unwrap().volatility else { panic!("a volatility curve") };
        assert_eq!(v.iter().map(|p| p.value).collect::<Vec<_>>(), [0.30, 0.28]);
        // A bump moves every pillar and keeps the forward variance checked.
        let down = m.with_volatility_shifted("QMEN", -0.29);
        assert!(down.is_err(), "0.01 at 1y is fine but the bump leaves -0.01 at 3y");
    }

    #[test]
    fn refuses_bad_pillars_at_their_place() {
        let (d, at) = only_error(&demo_with("USD = 0.038", "USD = { 6q = 0.036 }"));
        assert_eq!(d.message, "`6q` in rates.USD is neither a tenor nor a date");
        assert_eq!(at, "6q");

        let (d, at) = only_error(&demo_with("USD = 0.038", "USD = { 2026-11-01 = 0.036 }"));
        assert_eq!(d.message, "the pillar 2026-11-01 of rates.USD is not after the valuation date 2026-12-01");
        assert_eq!(at, "2026-11-01");

        let (d, at) = only_error(&demo_with("USD = 0.038", "USD = { 1y = 0.03, 12m = 0.031 }"));
        assert_eq!(d.message, "the pillars 1y and 12m of rates.USD fall on the same date 2027-12-01");
        assert_eq!(at, "12m");

        let (d, at) = only_error(&demo_with("USD = 0.038", "USD = { 1y = 3.8 }"));
        assert_eq!(d.message, "rates.USD.1y must be between -1 and 1 (got 3.8)");
        assert_eq!(at, "3.8");

        let (d, at) = only_error(&demo_with("volatility = 0.32", "volatility = { 1y = 0.30, 2y = 0.20 }"));
        assert_eq!(
            d.message,
            "underlyings.QMEN.volatility implies a negative forward variance between the pillars 1y and 2y: the total variance σ²T falls"
        );
        assert_eq!(d.fix.unwrap(), "raise the volatility at 2y or lower it at 1y, so that σ²T grows with the maturity");
        assert_eq!(at, "0.20");

        let (d, _) = only_error(&demo_with("volatility = 0.32", "volatility = {}"));
        assert_eq!(d.message, "underlyings.QMEN.volatility has no pillars");
    }

    #[test]
    fn reads_and_checks_discrete_dividends() {
        let text = demo_with(
            "dividend_yield = 0.031",
            "cash_dividends = { 2027-03-15 = 0.40 }\nproportional_dividends = { 2027-01-15 = 0.01 }",
        );
        let m = Market::from_toml(&text, file()).unwrap();
        let d = &m.underlying("QMEN").unwrap().dividends;
        assert_eq!(d.len(), 2);
        assert_eq!(d[0].amount, DividendAmount::Fraction(0.01), "sorted by ex-date");
        assert_eq!(d[1].amount, DividendAmount::Cash(0.40));

        let (d, at) = only_error(&demo_with("dividend_yield = 0.031", "proportional_dividends = { 2027-01-15 = 1.5 }"));
        assert_eq!(
            d.message,
            "underlyings.QMEN.proportional_dividends.2027-01-15 must be between 0 and 1, both excluded (got 1.5)"
        );
        assert_eq!(at, "1.5");
        let (d, at) = only_error(&demo_with("dividend_yield = 0.031", "cash_dividends = { 2027-01-15 = -1 }"));
        assert_eq!(d.message, "underlyings.QMEN.cash_dividends.2027-01-15 must be greater than 0 (got -1)");
        assert_eq!(at, "-1");
        let (d, at) = only_error(&demo_with("dividend_yield = 0.031", "cash_dividends = { 3m = 0.4 }"));
        assert_eq!(d.message, "`3m` in underlyings.QMEN.cash_dividends is not an ex-date");
        assert_eq!(at, "3m");
        let both = "cash_dividends = { 2027-01-15 = 0.4 }\nproportional_dividends = { 2027-01-15 = 0.01 }";
        let (d, _) = only_error(&demo_with("dividend_yield = 0.031", both));
        assert_eq!(d.message, "underlyings.QMEN has two dividends going ex on 2027-01-15");
    }

    #[test]
    fn reads_and_checks_fx_inputs() {
        let text = demo_with("[correlations]", "[fx_volatilities]\nEUR_USD = 0.09\n\n[correlations]")
            .replace("dividend_yield = 0.031", "fx_correlation = { EUR = -0.3 }");
        let m = Market::from_toml(&text, file()).unwrap();
        assert_eq!(m.fx_volatility("EUR", "USD"), Some(0.09));
        assert_eq!(m.fx_volatility("USD", "EUR"), Some(0.09), "the inverse has the same volatility");
        assert_eq!(m.underlying("QMEN").unwrap().fx_correlations.get("EUR"), Some(&-0.3));

        let (d, at) = only_error(&demo_with("[correlations]", "[fx_volatilities]\nEURUSD = 0.09\n[correlations]"));
        assert_eq!(d.message, "`EURUSD` in [fx_volatilities] is not a currency pair");
        assert_eq!(at, "EURUSD");
        let (d, at) = only_error(&demo_with("[correlations]", "[fx_volatilities]\nEUR_USD = 9\n[correlations]"));
        assert_eq!(d.message, "fx_volatilities.EUR_USD must be in (0, 5] (got 9)");
        assert_eq!(at, "9");
        let (d, at) = only_error(&demo_with("dividend_yield = 0.031", "fx_correlation = { USD = 0.2 }"));
        assert_eq!(d.message, "underlyings.QMEN.fx_correlation.USD names the underlying's own currency");
        assert_eq!(at, "USD");
        let (d, at) = only_error(&demo_with("dividend_yield = 0.031", "fx_correlation = { EUR = -1.2 }"));
        assert_eq!(d.message, "underlyings.QMEN.fx_correlation.EUR must be between -1 and 1 (got -1.2)");
        assert_eq!(at, "-1.2");
    }

    #[test]
    fn missing_fields() {
        let (d, at) = only_error(&demo_with("spot = 38.40\n", ""));
        assert_eq!(d.message, "underlyings.QMEN has no spot");
        assert_eq!(at, "QMEN");

        // A missing key is placed at the start of the file, so the message has a line:col.
        let errs = errors(&demo_with("valuation_date = 2026-12-01", ""));
        assert_eq!(errs.len(), 1);
        assert_eq!(errs[0].message, "missing valuation_date");
        assert_eq!(errs[0].span, Some(Span::new(0, 0)));
        assert!(errs[0].render(Some(DEMO)).starts_with("market.toml:1:1: missing valuation_date"));

        // With one currency in [rates], an underlying without a currency line is quoted in it.
        let text = DEMO.replacen("[underlyings.QMEN]\ncurrency = \"USD\"\n", "[underlyings.QMEN]\n", 1);
        assert_eq!(Market::from_toml(&text, file()).unwrap().underlying("QMEN").unwrap().currency, "USD");
        // With two it must be named.
        let text = text.replacen("USD = 0.038\n", "USD = 0.038\nEUR = 0.02\n", 1);
        let (d, at) = only_error(&text);
        assert_eq!(d.message, "underlyings.QMEN has no currency");
        assert_eq!(d.fix.unwrap(), "add a line such as `currency = \"USD\"` under [underlyings.QMEN]");
        assert_eq!(at, "QMEN");

        let (d, at) = only_error(&demo_with("valuation_date = 2026-12-01", "valuation_date = \"2026-12-01\""));
        assert_eq!(d.message, "valuation_date must be a TOML date, not a string");
        assert_eq!(at, "\"2026-12-01\"");
    }

    #[test]
    fn refuses_bad_correlations() {
        let (d, at) = only_error(&demo_with("QMEN = { OSMP = 0.40,", "QMEN = { OSMP = 1.40,"));
        assert_eq!(d.message, "correlations.QMEN.OSMP must be between -1 and 1 (got 1.4)");
        assert_eq!(at, "1.40");

        let (d, at) = only_error(&demo_with("VNTL = { OSMP = 0.50 }", "VNTL = { OSMP = 0.50, QMEN = 0.46 }"));
        assert_eq!(d.message, "the correlation of VNTL and QMEN is given twice with different values (0.45 and 0.46)");
        assert_eq!(at, "0.46");

        // The same value twice is harmless.
        Market::from_toml(&demo_with("VNTL = { OSMP = 0.50 }", "VNTL = { OSMP = 0.50, QMEN = 0.45 }"), file()).unwrap();

        let (d, at) = only_error(&demo_with("VNTL = { OSMP = 0.50 }", "VNTL = { OSMP = 0.50, VNTX = 0.3 }"));
        assert_eq!(d.message, "correlations.VNTL.VNTX names `VNTX`, which is not under [underlyings]");
        assert_eq!(d.fix.unwrap(), "did you mean `VNTL`?");
        assert_eq!(at, "VNTX");

        let (d, at) = only_error(&demo_with("VNTL = { OSMP = 0.50 }", "VNTL = { OSMP = 0.50, VNTL = 0.9 }"));
        assert_eq!(d.message, "correlations.VNTL.VNTL is the correlation of VNTL with itself, which is 1 (got 0.9)");
        assert_eq!(at, "0.9");
    }

    #[test]
    fn collects_every_error_of_a_file() {
        let text = demo_with("volatility = 0.32", "volatility = -0.32").replace("USD = 0.038", "USD = 3.8");
        let errs = errors(&text);
        assert_eq!(errs.len(), 2, "{errs:#?}");
        assert!(errs[0].message.starts_with("rates.USD"));
        assert!(errs[1].message.starts_with("underlyings.QMEN.volatility"));
    }

    #[test]
    fn syntax_errors_carry_toml_place() {
        let text = demo_with("USD = 0.038", "USD = = 0.038");
        let errs = errors(&text);
        assert_eq!(errs.len(), 1);
        let span = errs[0].span.expect("a span");
        assert!(text[..span.start].ends_with("USD = "), "{span:?}");
        assert!(!errs[0].message.is_empty());
    }

    #[test]
    fn cholesky_of_two_reproduces_the_matrix() {
        let rho = -0.37;
        let text = format!(
            "valuation_date = 2026-12-01\n[underlyings.A]\ncurrency = \"USD\"\nspot = 1\nvolatility = 0.2\n[underlyings.B]\ncurrency = \"USD\"\nspot = 2\nvolatility = 0.3\n[correlations]\nB = {{ A = {rho} }}\n"
        );
        let m = Market::from_toml(&text, file()).unwrap();
        let l = m.cholesky(&["A", "B"], file()).unwrap();
        let c = [[1.0, rho], [rho, 1.0]];
        for i in 0..2 {
            for j in 0..2 {
                let llt: f64 = (0..2).map(|k| l[i][k] * l[j][k]).sum();
                assert!((llt - c[i][j]).abs() < 1e-14, "({i},{j}): {llt}");
            }
        }
        assert_eq!(l[0][1], 0.0);
    }

    #[test]
    fn refuses_a_matrix_that_is_not_positive_definite() {
        let text = "valuation_date = 2026-12-01\n\
            [underlyings.A]\ncurrency = \"USD\"\nspot = 1\nvolatility = 0.2\n\
            [underlyings.B]\ncurrency = \"USD\"\nspot = 1\nvolatility = 0.2\n\
            [underlyings.C]\ncurrency = \"USD\"\nspot = 1\nvolatility = 0.2\n\
            [correlations]\nA = { B = 0.9, C = 0.9 }\nB = { C = -0.9 }\n";
        let m = Market::from_toml(text, file()).unwrap();
        let d = m.cholesky(&["A", "B", "C"], file()).unwrap_err();
        assert!(d.message.contains("not positive definite, failing at C"), "{}", d.message);
        assert!(d.message.contains("the pair C–B (-0.9)"), "{}", d.message);
        let span = d.span.unwrap();
        assert_eq!(&text[span.start..span.end], "-0.9");
        assert!(d.fix.unwrap().starts_with("check C–B first"));
    }

    #[test]
    fn names_a_missing_pair_and_where_to_add_it() {
        let text = demo_with("QMEN = { OSMP = 0.40, VNTL = 0.45 }", "QMEN = { OSMP = 0.40 }");
        let m = Market::from_toml(&text, file()).unwrap();
        let d = m.cholesky(&["ZPHX", "QMEN", "VNTL"], file()).unwrap_err();
        assert_eq!(d.message, "no correlation given between QMEN and VNTL");
        assert_eq!(
            d.fix.as_deref(),
            Some("under [correlations], add `VNTL = <correlation>` inside the braces of the `QMEN = { ... }` line")
        );

        let text = demo_with("QMEN = { OSMP = 0.40, VNTL = 0.45 }\n", "").replace("VNTL = { OSMP = 0.50 }\n", "");
        let m = Market::from_toml(&text, file()).unwrap();
        let d = m.cholesky(&["QMEN", "VNTL"], file()).unwrap_err();
        assert_eq!(d.fix.as_deref(), Some("under [correlations], add the line `QMEN = { VNTL = <correlation> }`"));

        let d = m.cholesky(&["QMEN", "VNTX"], file()).unwrap_err();
        assert_eq!(d.message, "no underlying `VNTX` in the market file");
    }

    #[test]
    fn renders_with_a_caret() {
        let text = demo_with("volatility = 0.32", "volatility = -0.32");
        let d = &errors(&text)[0];
        let shown = d.render(Some(&text));
        assert!(shown.starts_with("market.toml:16:14: underlyings.QMEN.volatility"), "{shown}");
        assert!(shown.contains("^^^^^"), "{shown}");
    }

    #[test]
    fn bumped_copies_move_one_thing_and_keep_the_matrix_positive_definite() {
        let m = Market::from_toml(DEMO, file()).unwrap();
        let up = m.with_spot_scaled("ZPHX", 1.01).unwrap();
        assert_eq!(up.underlying("ZPHX").unwrap().spot, 4250.0 * 1.01);
        assert_eq!(up.underlying("QMEN"), m.underlying("QMEN"));
        assert!(m.with_spot_scaled("NONE", 1.01).is_err());
        assert!(m.with_volatility_shifted("ZPHX", -0.18).is_err(), "a volatility of 0 is refused");
        assert_eq!(m.with_rates_shifted(0.001).rate("USD"), Some(&Curve::Flat(0.038 + 0.001)));
        let names = ["ZPHX", "QMEN", "OSMP", "VNTL"];
        let c = m.with_correlation_shifted("QMEN", "ZPHX", 0.01, &names).unwrap();
        assert_eq!(c.correlation("ZPHX", "QMEN"), Some(0.55 + 0.01));
        // 0.55 + 0.5 leaves [-1, 1]; −0.9 against the others' positive correlations is not
        // positive definite.
        assert!(m.with_correlation_shifted("ZPHX", "QMEN", 0.5, &names).is_err());
        let e = m.with_correlation_shifted("ZPHX", "QMEN", -1.45, &names).unwrap_err();
        assert!(e.contains("not positive definite"), "{e}");
        assert_eq!(m.with_valuation_later(1).unwrap().valuation_date, Date::parse("2026-12-02").unwrap());
    }
}
