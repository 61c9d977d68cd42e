//! Stage 3: typed product + market → flat program.
//!
//! Dates become times on one grid (ACT/365 fixed from the valuation date), schedules are
//! generated and validated, and every block is unrolled over its dates into straight-line
//! operations on registers. Each operation works on a whole block of paths at once (see
//! [`crate::sim`]), so the cost of dispatching it is paid once per block, not per path.
//! Names are slots, parameters and dates are constants, and `if` on a date (such as
//! `t == last(s)`) is decided here, not on every path.

mod live;
mod logs;

pub use live::live_ops;

use crate::date::Date;
use crate::diagnostic::{Diagnostic, Span};
use crate::market::Market;
use crate::syntax::{Aggregate, BinaryOp, DateTerm, Party, PeriodUnit, ScheduleKind, UnaryOp};
use crate::typing::{self, DateRef, Direction, Func, Product, TExpr, TKind, TStmt, When};

/// Where an operation reads a value for each path of a block.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Src {
    /// A register: one value per path.
    Reg(u32),
    /// A simulated level: `grid index * assets + asset`.
    Level(u32),
    /// The log of a simulated level, indexed as `Level` (comparisons made on logs,
    /// `compile::logs`).
    LogLevel(u32),
    /// The same value on every path.
    Const(f64),
    /// The 1/0 outcome of a continuously monitored barrier.
    Monitor(u32),
    /// A value read off the path between grid dates ([`PathValue`]).
    Path(u32),
}

/// A two-argument operation.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Bin {
    Add,
    Sub,
    Mul,
    Div,
    Min,
    Max,
    /// `remainder(a, b)`: `a - floor(a / b) * b`.
    Rem,
    Lt,
    Le,
    Gt,
    Ge,
    Eq,
    Ne,
    And,
    Or,
    /// `a and not b`, for the mask of an `else` branch.
    AndNot,
}

/// A one-argument operation.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Un {
    Neg,
    Not,
    Abs,
    Exp,
    Log,
    Sqrt,
    Floor,
}

/// An in-place accumulation `dst = op(dst, src)`.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Acc {
    Add,
    Min,
    Max,
}

/// One operation of the program; each runs over all paths of a block.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Op {
    /// `dst = a op b`; `dst` is never one of the sources.
    Bin { op: Bin, dst: u32, a: Src, b: Src },
    /// A comparison `dst = a op b` that also counts the paths where an operand is not a
    /// number, against [`Program::condition_sites`]`[site]`: such a condition has no answer.
    Cmp { op: Bin, dst: u32, a: Src, b: Src, site: u32 },
    /// `dst = op(a)`; `dst` is not `a`.
    Un { op: Un, dst: u32, a: Src },
    /// `dst = if cond then a else b` (the value of an `if` expression).
    Select { dst: u32, cond: Src, a: Src, b: Src },
    /// `dst = op(dst, src)`.
    Acc { op: Acc, dst: u32, src: Src },
    /// `dst = src`.
    Copy { dst: u32, src: Src },
    /// `dst = src` on the paths where `mask` is set (assignment to a state).
    Assign { dst: u32, mask: u32, src: Src },
    /// Pays `amount` on the paths where `mask` is set, discounted by `discount`.
    Pay { mask: u32, amount: Src, slot: u32, discount: f64, site: u32 },
    /// Ends the product on the paths where `mask` is set.
    End { mask: u32, slot: u32 },
    /// `holder may end for amount` (early-exercise date `site` of [`Program::choices`]):
    /// `dst` = 1 on the paths, among those where `mask` is set, on which the party ends the
    /// product by its rule; a `Pay` of `amount` and an `End` on `dst` follow.
    Choose { site: u32, mask: u32, amount: Src, discount: f64, dst: u32 },
}

impl Op {
    /// The operands the operation reads.
    pub fn sources(&self) -> impl Iterator<Item = Src> {
        let (a, b, c) = match *self {
            Op::Bin { a, b, .. } | Op::Cmp { a, b, .. } => (Some(a), Some(b), None),
            Op::Un { a, .. } => (Some(a), None, None),
            Op::Select { cond, a, b, .. } => (Some(cond), Some(a), Some(b)),
            Op::Acc { src, .. } | Op::Copy { src, .. } | Op::Assign { src, .. } => (Some(src), None, None),
            Op::Pay { amount, .. } | Op::Choose { amount, .. } => (Some(amount), None, None),
            Op::End { .. } => (None, None, None),
        };
        [a, b, c].into_iter().flatten()
    }
}

/// What is known of a continuously monitored window when the block runs.
enum Watch {
    /// It lies before the valuation date, or was touched then: decided from the fixings.
    Past(bool),
    /// Watched on the simulated paths from this monitor's window on.
    Live(Monitor),
}

/// One early-exercise date: a `may end` statement on one run date.
#[derive(Clone, Debug, PartialEq)]
pub struct Choice {
    pub party: Party,
    /// The variables of the regression (`using`), read when the statement runs.
    pub using: Vec<Src>,
    /// Each variable enters the basis as `(x - centre) / scale`: a performance around 1,
    /// a level around the spot, other numbers as they are.
    pub centre: Vec<f64>,
    pub scale: Vec<f64>,
    /// The `may end` statement.
    pub span: Span,
    /// The date it runs on.
    pub time: f64,
    /// The exercise rule; compiled as [`Rule::Never`], fitted by `sim::exercise`.
    pub rule: Rule,
}

/// What a `Choose` does on its paths.
#[derive(Clone, Debug, PartialEq)]
pub enum Rule {
    /// Never ends the product (the rule is not fitted yet).
    Never,
    /// Never ends the product, but keeps what the fit of this date needs.
    Record,
    /// Ends it where the stated payment beats the fitted value of going on: the
    /// coefficients of the basis (`sim::rule`).
    Fitted(Vec<f64>),
}

/// The register that holds 1 on paths where the product is still alive.
pub const ALIVE: u32 = 0;

/// One underlying as the engine simulates it.
#[derive(Clone, Debug, PartialEq)]
pub struct AssetModel {
    pub name: String,
    pub spot: f64,
    pub volatility: f64,
    pub dividend_yield: f64,
}

/// A continuously monitored barrier, resolved by the engine between grid points.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Monitor {
    pub asset: usize,
    pub direction: Direction,
    /// Barrier level: a fraction of the initial level if `relative`, else absolute.
    pub level: f64,
    pub relative: bool,
    /// Grid indices of the ends of the monitored interval.
    pub from: usize,
    pub to: usize,
}

/// A value the engine reads off each path between grid dates, from the Brownian bridge
/// (exact in law given the simulated levels).
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum PathValue {
    /// `pay ... on first touch(...)`: the discount factor `exp(−r·τ)` from the first time τ
    /// the barrier of monitor `monitor` is touched in its window, 0 on paths where it is not.
    /// τ is drawn from the first-passage law of the Brownian bridge over the step where the
    /// crossing happens, the crossing decided exactly as for the monitor's flag.
    HitDiscount { monitor: usize },
    /// `highest(level(X) from a to b)` / `lowest(...)`: the running extreme of the level
    /// over grid indices `from..=to`, each step's bridge extreme drawn from its law given
    /// both ends (a performance is this divided by the initial level).
    Extreme { asset: usize, up: bool, from: usize, to: usize },
}

/// A date of the per-date profile.
#[derive(Clone, Debug, PartialEq)]
pub struct Slot {
    pub time: f64,
    /// The calendar date, when the payoff gave dates rather than year offsets.
    pub date: Option<Date>,
}

impl Slot {
    pub fn label(&self) -> String {
        match self.date {
            Some(d) => d.to_string(),
            None => format!("{}y", trim_float(self.time)),
        }
    }
}

fn trim_float(x: f64) -> String {
    let s = format!("{x:.6}");
    s.trim_end_matches('0').trim_end_matches('.').to_string()
}

/// A compiled payoff, ready for the engine. Immutable and shared by all worker threads.
#[derive(Clone, Debug)]
pub struct Program {
    pub name: String,
    pub currency: String,
    pub notional: f64,
    pub valuation_date: Date,
    pub rate: f64,
    pub assets: Vec<AssetModel>,
    /// Cholesky factor of the assets' correlation matrix (lower triangular).
    pub cholesky: Vec<Vec<f64>>,
    /// Times in years from the valuation date, `grid[past] == 0`; the times before it are
    /// past dates (levels from the fixings), the times after it are simulated.
    pub grid: Vec<f64>,
    /// Grid index of the initial fixing (the `start` date).
    pub start: usize,
    pub ops: Vec<Op>,
    pub registers: usize,
    /// Initial values of the state registers `1..=states.len()`.
    pub states: Vec<f64>,
    pub monitors: Vec<Monitor>,
    /// Values read off the paths between grid dates: hit times, running extremes.
    pub path_values: Vec<PathValue>,
    /// Dates on which blocks run; `End` refers to them by index.
    pub events: Vec<Slot>,
    /// Dates on which payments are made; `Pay` refers to them by index.
    pub payments: Vec<Slot>,
    /// Source spans of the `pay` statements, for reporting a non-finite amount.
    pub pay_sites: Vec<Span>,
    /// Source spans of the comparisons, for reporting one asked of a value that is not a
    /// number. Their tallies follow the `pay` sites' in [`crate::sim`]'s bad-path counts.
    pub condition_sites: Vec<Span>,
    /// Averaging schedules: (asset, grid indices of the fixings), offered to the engine as geometric-average control variates.
    pub averages: Vec<(usize, Vec<usize>)>,
    /// Early-exercise dates (`may end`), in the order they run; `Choose` refers to them.
    pub choices: Vec<Choice>,
    /// The dynamics read at the grid times, when some input is not flat (curves, discrete
    /// dividends, quanto); `None`: flat rate, volatilities and yields of `assets`.
    pub curves: Option<crate::dynamics::GridCurves>,
    /// Each underlying's dynamics, for reports.
    pub dynamics: Vec<crate::dynamics::AssetDynamics>,
    /// The correlation matrix of the assets as the market gives it, for reports.
    pub correlations: Vec<Vec<f64>>,
    /// The payoff currency's `∫₀ᵗ r`, for reports.
    pub discounting: crate::curve::Integral,
    /// The grid index of the valuation date; the indices before it are past dates.
    pub past: usize,
    /// The fixings at the past grid indices, `[k][asset]` (NaN where none is given: such
    /// a level is never read).
    pub past_levels: Vec<Vec<f64>>,
}

/// How a trade that is already struck is compiled, for sensitivities: what stays fixed
/// when the market moves. The default (nothing fixed) is an ordinary pricing.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Struck {
    /// The initial levels, by underlying in the product's order, used when the start is
    /// the valuation date: the trade counts as struck at these levels, so a bumped spot
    /// moves today's level and not the level `perf` divides by. `None`: today's spots.
    pub initial_levels: Option<Vec<f64>>,
    /// Days the trade has aged: year offsets (`1y`) count from the date it was written,
    /// this many days before the market's valuation date, so they shrink by as much (an
    /// offset that would fall before the valuation date is read on it). For theta.
    pub aged_days: i64,
}

/// Compiles a checked product against a market.
pub fn compile(product: &Product, market: &Market, market_file: &std::path::Path) -> Result<Program, Vec<Diagnostic>> {
    compile_struck(product, market, market_file, &Struck::default())
}

/// [`compile`], with what a struck trade keeps fixed ([`Struck`]).
pub fn compile_struck(
    product: &Product,
    market: &Market,
    market_file: &std::path::Path,
    struck: &Struck,
) -> Result<Program, Vec<Diagnostic>> {
    let mut errors = Vec::new();
    let valuation = market.valuation_date;
    // Underlyings from the market.
    let mut assets = Vec::new();
    let market_name = market_file.display();
    let mut dynamics = Vec::new();
    for u in &product.underlyings {
        match market.underlying(&u.text) {
            Some(m) => match crate::dynamics::asset(market, &u.text, m, &product.currency, u.span, market_file) {
                Ok(d) => {
                    assets.push(AssetModel {
                        name: u.text.clone(),
                        spot: m.spot,
                        volatility: m.volatility.flat().unwrap_or_else(|| d.volatility(0.0)),
                        dividend_yield: m.dividend_yield.flat().unwrap_or_else(|| d.dividend_yield(0.0)),
                    });
                    dynamics.push(d);
                }
                // A cash dividend as large as the forward: an error in the market file alone.
                Err(e) if e.file.is_some() => return Err(vec![e]),
                Err(e) => errors.push(e),
            },
            None => {
                let known: Vec<&str> = market.underlying_names().collect();
                errors.push(Diagnostic::at(u.span, format!("the market has no underlying `{}`", u.text)).with_fix(
                    format!("add [underlyings.{}] to the market file, or use one it has: {}", u.text, known.join(", ")),
                ));
            }
        }
    }
    let rate = market.rate(&product.currency);
    if rate.is_none() && !product.currency.is_empty() {
        errors.push(
            Diagnostic::at(
                product.currency_span,
                format!("the market file {market_name} has no rate for {}", product.currency),
            )
            .with_fix(format!("add `{} = 0.03` (for example) under [rates] in {market_name}", product.currency)),
        );
    }
    if !errors.is_empty() {
        return Err(errors);
    }
    let discounting = crate::dynamics::discounting(market, &product.currency);
    // The flat rate, for the flat arithmetic; with a curve, its zero rate to one year
    // (only reports read it then).
    let rate = rate.and_then(crate::curve::Curve::flat).unwrap_or_else(|| discounting.average(1.0));
    let flat = dynamics.iter().all(|d| d.flat);
    let names: Vec<&str> = assets.iter().map(|a| a.name.as_str()).collect();
    let cholesky = market.cholesky(&names, market_file).map_err(|e| vec![e])?;
    let correlations: Vec<Vec<f64>> =
        names.iter().map(|a| names.iter().map(|b| market.correlation(a, b).unwrap_or(0.0)).collect()).collect();
    let initial_levels = struck.initial_levels.clone().filter(|l| l.len() == assets.len());
    let mut c = Compiler::new(product, valuation, rate, assets);
    c.fixings = market.fixings.as_ref();
    c.calendars = market.calendars.as_ref();
    c.discounting = discounting.clone();
    if !flat {
        c.knots = dynamics.iter().flat_map(|d| d.knots.iter().copied()).collect();
    }
    c.aged = struck.aged_days as f64 / 365.0;
    c.initial_levels = initial_levels.clone();
    c.resolve_schedules();
    c.resolve_start();
    if !c.errors.is_empty() {
        return Err(c.errors);
    }
    c.build_grid();
    c.compile_blocks();
    if !c.errors.is_empty() {
        return Err(c.errors);
    }
    let mut program = c.finish();
    program.cholesky = cholesky;
    if !flat {
        program.curves = Some(crate::dynamics::GridCurves::new(&program.grid, &discounting, &dynamics));
    }
    program.dynamics = dynamics;
    program.correlations = correlations;
    // A barrier relative to an initial level fixed today is a fixed level.
    if let (Some(levels), true) = (&initial_levels, program.start == program.past) {
        for m in program.monitors.iter_mut().filter(|m| m.relative) {
            m.level *= levels[m.asset];
            m.relative = false;
        }
    }
    Ok(program)
}

/// A value during compilation: a source, and whether it is a temporary register that the
/// consumer must free.
#[derive(Clone, Copy, Debug)]
struct V {
    src: Src,
    temp: bool,
}

impl V {
    fn konst(x: f64) -> V {
        V { src: Src::Const(x), temp: false }
    }
}

/// A `let` binding during compilation.
#[derive(Clone, Copy, Debug)]
enum LetVal {
    /// A value; `temp` here means the let owns the register and hands it back when the
    /// run of the block ends. A let does not own what it only names: a level, a constant,
    /// another let's register, or the running accumulator of an aggregate (which lives
    /// on for the loop's later dates).
    Value(V),
    Date(f64, Option<Date>),
}

/// A resolved date.
type When_ = (f64, Option<Date>);

struct Compiler<'p> {
    product: &'p Product,
    valuation: Date,
    rate: f64,
    assets: Vec<AssetModel>,
    errors: Vec<Diagnostic>,
    schedules: Vec<Vec<When_>>,
    start: When_,
    grid: Vec<f64>,
    ops: Vec<Op>,
    free: Vec<u32>,
    registers: u32,
    lets: Vec<Option<LetVal>>,
    monitors: Vec<Monitor>,
    path_values: Vec<PathValue>,
    /// Where each monitor and path value is in its list, so that finding one costs the
    /// same however many there are (a loop over many dates makes one per date).
    monitor_index: std::collections::HashMap<MonitorKey, usize>,
    path_value_index: std::collections::HashMap<PathValueKey, usize>,
    /// Windows ending on the loop date (`touched(... from start to t)`, `highest(perf(X)
    /// from start to t)`) kept running between the loop's dates, by the expression's
    /// span: the register holding the value so far (or the first run's own source), the
    /// grid index the window starts at and the one it has reached. Each run then watches
    /// only the new steps, so a loop over n dates costs n steps, not n².
    running_windows: std::collections::HashMap<(usize, usize, bool), (Src, usize, usize)>,
    events: Vec<Slot>,
    payments: Vec<Slot>,
    pay_sites: Vec<Span>,
    condition_sites: Vec<Span>,
    averages: Vec<(usize, Vec<usize>)>,
    choices: Vec<Choice>,
    /// Running accumulators of aggregates that read only levels, by (site, schedule):
    /// the register and how many fixings it already holds.
    running: std::collections::HashMap<(usize, usize, usize), (u32, usize)>,
    /// Years the trade has aged ([`Struck::aged_days`]).
    aged: f64,
    /// Initial levels fixed for a start on the valuation date ([`Struck::initial_levels`]).
    initial_levels: Option<Vec<f64>>,
    /// The payoff currency's `∫₀ᵗ r`, for discounting payments.
    discounting: crate::curve::Integral,
    /// Times where a coefficient of the dynamics changes; they join the grid.
    knots: Vec<f64>,
    /// The fixings of past dates, when the market names a fixings file.
    fixings: Option<&'p crate::fixings::Fixings>,
    /// The holiday calendars, when the market names a calendars file.
    calendars: Option<&'p crate::calendar::Calendars>,
    /// The grid index of the valuation date: indices below it are past dates.
    past: usize,
}

/// The date context an expression is compiled in.
#[derive(Clone, Copy, Debug)]
struct Now {
    /// Grid index of the date the levels are read at.
    idx: usize,
    /// The loop's date and 1-based position, inside `for each`.
    loop_date: Option<(When_, usize)>,
    /// The date the block runs on (differs from `idx` inside an aggregate).
    event: When_,
    /// Inside `for each`: the loop's previous date (the start date on its first date).
    previous: Option<When_>,
}

const TIME_EPS: f64 = 1e-9;

/// The most `may end` dates times grid dates: the fit of the exercise rule simulates its
/// paths over the whole grid once per exercise date (a year of daily exercise, 252 × 253,
/// is within; two years are not).
pub const MAX_EXERCISE_WORK: usize = 250_000;

/// The most dates one schedule may hold (the syntax already refuses more steps).
pub use crate::syntax::MAX_SCHEDULE_DATES;

/// The most dates all schedules together may hold, so the most simulation dates.
pub const MAX_GRID_DATES: usize = 200_000;

impl<'p> Compiler<'p> {
    fn new(product: &'p Product, valuation: Date, rate: f64, assets: Vec<AssetModel>) -> Self {
        let states = product.states.len() as u32;
        Compiler {
            product,
            valuation,
            rate,
            assets,
            errors: Vec::new(),
            schedules: Vec::new(),
            start: (0.0, Some(valuation)),
            grid: Vec::new(),
            ops: Vec::new(),
            free: Vec::new(),
            registers: 1 + states,
            lets: vec![None; product.lets],
            monitors: Vec::new(),
            path_values: Vec::new(),
            monitor_index: std::collections::HashMap::new(),
            path_value_index: std::collections::HashMap::new(),
            running_windows: std::collections::HashMap::new(),
            events: Vec::new(),
            payments: Vec::new(),
            pay_sites: Vec::new(),
            condition_sites: Vec::new(),
            averages: Vec::new(),
            choices: Vec::new(),
            running: std::collections::HashMap::new(),
            aged: 0.0,
            initial_levels: None,
            discounting: crate::curve::Curve::Flat(rate).at(valuation, crate::curve::Reading::Rate),
            knots: Vec::new(),
            fixings: None,
            calendars: None,
            past: 0,
        }
    }

    fn error(&mut self, span: Span, message: impl Into<String>, fix: impl Into<String>) {
        self.errors.push(Diagnostic::at(span, message).with_fix(fix));
    }

    /// A written date as a time, refusing dates before the valuation date.
    fn term(&mut self, term: DateTerm, span: Span) -> Option<When_> {
        match term {
            DateTerm::Iso(d) => {
                // Past dates are read from the fixings, when there are fixings.
                if d < self.valuation && self.fixings.is_none() {
                    self.error(
                        span,
                        format!("{d} is before the valuation date {}", self.valuation),
                        "pathfold prices from the valuation date on; for a trade already running, name its fixings file in the market file (`fixings = \"fixings.csv\"`), else use a later date",
                    );
                    return None;
                }
                Some((self.valuation.years_until(d), Some(d)))
            }
            DateTerm::Years(y) => Some(((y - self.aged).max(0.0), None)),
            DateTerm::Start => Some(self.start),
        }
    }

    fn resolve_start(&mut self) {
        if let Some((d, span)) = self.product.start {
            let resolved = match d {
                DateRef::Term(t) => self.term(t, span),
                DateRef::First(s) => self.schedules.get(s).and_then(|v| v.first().copied()),
                DateRef::Last(s) => self.schedules.get(s).and_then(|v| v.last().copied()),
                DateRef::Only(s) => self.only(s, span),
                DateRef::Loop | DateRef::Let(_) | DateRef::Previous => None,
            };
            if let Some(w) = resolved {
                self.start = w;
            }
        }
    }

    fn only(&mut self, s: usize, span: Span) -> Option<When_> {
        let dates = self.schedules.get(s)?;
        if dates.len() == 1 {
            Some(dates[0])
        } else {
            let name = self.product.schedules[s].name.clone();
            self.error(
                span,
                format!("`{name}` holds {} dates, so it is not one date", dates.len()),
                format!("write `first({name})`, `last({name})` or loop with `for each t in {name}`"),
            );
            None
        }
    }

    fn resolve_schedules(&mut self) {
        let mut total = 0;
        for def in &self.product.schedules {
            let span = def.schedule.span;
            let room = MAX_SCHEDULE_DATES.min(MAX_GRID_DATES.saturating_sub(total));
            let dates = match &def.schedule.kind {
                ScheduleKind::List(terms) => terms.iter().filter_map(|&(t, s)| self.term(t, s)).collect::<Vec<_>>(),
                ScheduleKind::Every { count, unit, from, to } => self.every(*count, *unit, *from, *to, room),
                ScheduleKind::Steps { n, from, to } => match (self.term(from.0, from.1), self.term(to.0, to.1)) {
                    _ if *n as usize > room => {
                        self.too_many(&def.name, span, total);
                        Vec::new()
                    }
                    (Some(a), Some(b)) => (1..=*n)
                        .map(|i| {
                            let t = a.0 + (b.0 - a.0) * f64::from(i) / f64::from(*n);
                            (t, if i == *n { b.1 } else { None })
                        })
                        .collect(),
                    _ => Vec::new(),
                },
                ScheduleKind::BusinessDays { from, to } => match (from.0, to.0) {
                    (DateTerm::Iso(a), DateTerm::Iso(b)) => {
                        if self.term(from.0, from.1).is_none() {
                            Vec::new()
                        } else {
                            // Written dates lie in the supported years, so this is bounded.
                            let weekdays = (a.days_until(b).max(0) as usize + 1) * 5 / 7;
                            if weekdays > room + 1 {
                                self.too_many(&def.name, span, total);
                                Vec::new()
                            } else {
                                let mut out = Vec::new();
                                let mut d = Some(a);
                                let holidays = self.holidays(def.schedule.rolling.calendar.as_ref());
                                while let Some(day) = d.filter(|day| *day <= b) {
                                    if day.is_weekday() && !holidays.as_ref().is_some_and(|h| h.contains(&day)) {
                                        out.push((self.valuation.years_until(day), Some(day)));
                                    }
                                    d = day.add_days(1);
                                }
                                if out.len() > room {
                                    self.too_many(&def.name, span, total);
                                    out.clear();
                                }
                                out
                            }
                        }
                    }
                    _ => {
                        self.error(
                            span,
                            "business days need calendar dates at both ends",
                            "write for example `business days from 2026-12-02 to 2027-12-01`",
                        );
                        Vec::new()
                    }
                },
            };
            let dates = self.rolled(def, dates);
            if dates.len() > room {
                // A list written out by hand, or an `every` schedule that ran over.
                self.too_many(&def.name, span, total);
                self.schedules.push(Vec::new());
                continue;
            }
            total += dates.len();
            if dates.is_empty() && self.errors.is_empty() {
                self.error(
                    span,
                    format!("the schedule `{}` holds no dates", def.name),
                    "check that its first date is not after its last",
                );
            }
            for w in dates.windows(2) {
                if w[1].0 <= w[0].0 + TIME_EPS {
                    let (a, b) = (label(w[0]), label(w[1]));
                    self.error(
                        span,
                        format!("the schedule `{}` is not in increasing order: {b} comes after {a}", def.name),
                        "list the dates from earliest to latest, each once",
                    );
                    break;
                }
            }
            if let Some(first) = dates.first().filter(|_| self.fixings.is_none()) {
                if first.0 < -TIME_EPS {
                    self.error(
                        span,
                        format!("the schedule `{}` starts before the valuation date", def.name),
                        "use dates on or after the valuation date",
                    );
                }
            }
            self.schedules.push(dates);
        }
    }

    /// The holidays of a schedule's `calendar NAME`, or `None` (with an error if the name
    /// or the calendars file is missing).
    fn holidays(&mut self, calendar: Option<&(String, Span)>) -> Option<std::collections::BTreeSet<Date>> {
        let (name, span) = calendar?;
        match self.calendars.map(|c| (c.holidays(name), c)) {
            Some((Some(h), _)) => Some(h.clone()),
            Some((None, c)) => {
                let known = c.names().join(", ");
                let file = c.file.display().to_string();
                self.error(
                    *span,
                    format!("no calendar `{name}` in {file}"),
                    format!("use one it lists ({known}), or add lines `{name},YYYY-MM-DD` to it"),
                );
                None
            }
            None => {
                self.error(
                    *span,
                    format!("the market names no calendars file, so `{name}` has no holidays"),
                    "add `calendars = \"holidays.csv\"` to the market file, with lines `calendar,date`",
                );
                None
            }
        }
    }

    /// The payment date of `pay ... on N business days after DATE calendar NAME`: `w` (the
    /// date, written at `span`) moved by the lag on the calendar's business days.
    fn lagged(&mut self, w: When_, lag: &typing::PayLag, span: Span) -> Option<When_> {
        // A loop runs this once per date: each problem is told once.
        let told = self.errors.len();
        let keep_first = |c: &mut Self| {
            if let Some(new) = c.errors.get(told) {
                if c.errors[..told].iter().any(|e| e.span == new.span && e.message == new.message) {
                    c.errors.truncate(told);
                }
            }
        };
        let Some(d) = w.1 else {
            self.error(
                span,
                "this date is a year offset, which has no weekday to count business days from",
                "write the date as a calendar date (2027-12-01), or loop over a schedule of calendar dates",
            );
            keep_first(self);
            return None;
        };
        let holidays = match &lag.calendar {
            Some(c) => {
                let holidays = self.holidays(Some(c));
                keep_first(self);
                holidays?
            }
            None => std::collections::BTreeSet::new(),
        };
        match crate::calendar::business_days_after(d, lag.days, &holidays) {
            Some(p) => Some((self.valuation.years_until(p), Some(p))),
            None => {
                self.error(
                    lag.span,
                    format!("{} business days after {d} is past the last date pathfold handles", lag.days),
                    "use an earlier date or a shorter lag",
                );
                None
            }
        }
    }

    /// A schedule's dates moved by its `rolled ...` convention onto business days (of its
    /// calendar, or Monday to Friday without one).
    fn rolled(&mut self, def: &typing::ScheduleDef, dates: Vec<When_>) -> Vec<When_> {
        let rolling = &def.schedule.rolling;
        let Some((rule, span)) = rolling.roll else {
            if let (Some((_, span)), false) =
                (&rolling.calendar, matches!(def.schedule.kind, ScheduleKind::BusinessDays { .. }))
            {
                self.error(
                    *span,
                    format!("the calendar of `{}` is not used: its dates are not rolled", def.name),
                    "write `rolled following`, `rolled modified following` or `rolled preceding` before `calendar`",
                );
            }
            return dates;
        };
        let holidays = self.holidays(rolling.calendar.as_ref()).unwrap_or_default();
        let mut out = Vec::with_capacity(dates.len());
        for (t, d) in dates {
            let Some(d) = d else {
                self.error(
                    span,
                    format!("the dates of `{}` are year offsets, which have no weekday to roll", def.name),
                    "write the schedule with calendar dates, e.g. every 3m from 2027-03-01 to 2029-12-01",
                );
                return Vec::new();
            };
            match crate::calendar::roll(d, rule, &holidays) {
                Some(r) => out.push((self.valuation.years_until(r), Some(r))),
                None => out.push((t, Some(d))),
            }
        }
        out
    }

    /// A schedule, or the error naming it, when it would hold more dates than allowed.
    fn too_many(&mut self, name: &str, span: Span, before: usize) {
        let (message, fix) = if before + MAX_SCHEDULE_DATES <= MAX_GRID_DATES {
            (
                format!("the schedule `{name}` holds more than {MAX_SCHEDULE_DATES} dates"),
                format!("use a longer period, fewer steps or a shorter span; a schedule holds at most {MAX_SCHEDULE_DATES} dates"),
            )
        } else {
            (
                format!("the schedules up to `{name}` hold more than {MAX_GRID_DATES} dates together"),
                format!("all schedules together hold at most {MAX_GRID_DATES} dates; use fewer or sparser schedules"),
            )
        };
        self.error(span, message, fix);
    }

    /// The dates of an `every` schedule, at most `room + 1` of them (more is refused by the caller).
    fn every(
        &mut self,
        count: u32,
        unit: PeriodUnit,
        from: (DateTerm, Span),
        to: (DateTerm, Span),
        room: usize,
    ) -> Vec<When_> {
        let (Some(a), Some(b)) = (self.term(from.0, from.1), self.term(to.0, to.1)) else { return Vec::new() };
        let mut out = Vec::new();
        let count = i64::from(count);
        match (a.1, b.1, from.0) {
            (Some(da), Some(db), DateTerm::Iso(_)) | (Some(da), Some(db), DateTerm::Start) => {
                for i in 0..=room as i64 {
                    let d = match unit {
                        PeriodUnit::Days => da.add_days(i * count),
                        PeriodUnit::Weeks => da.add_days(7 * i * count),
                        PeriodUnit::Months => da.add_months(i * count),
                        PeriodUnit::Years => da.add_months(12 * i * count),
                    };
                    // Past the last supported year is past any written end date.
                    let Some(d) = d.filter(|d| *d <= db) else { break };
                    out.push((self.valuation.years_until(d), Some(d)));
                }
            }
            _ => {
                let step = count as f64
                    * match unit {
                        PeriodUnit::Days => 1.0 / 365.0,
                        PeriodUnit::Weeks => 7.0 / 365.0,
                        PeriodUnit::Months => 1.0 / 12.0,
                        PeriodUnit::Years => 1.0,
                    };
                let n = ((b.0 - a.0) / step + 1e-9).floor();
                if n >= 0.0 {
                    // Both ends are at most MAX_YEARS ahead, so `n` is finite; cap it anyway.
                    let n = n.min(room as f64) as u32;
                    for i in 0..=n {
                        out.push((a.0 + step * f64::from(i), None));
                    }
                }
            }
        }
        out
    }

    /// The simulation grid: the valuation date, the start date, every schedule date and
    /// every date written in a block (payment dates excepted: they only discount).
    fn build_grid(&mut self) {
        let mut times = vec![0.0, self.start.0];
        times.extend(self.schedules.iter().flatten().map(|w| w.0));
        for block in &self.product.blocks {
            if let When::At(d, _) = &block.when {
                collect_ref(*d, &mut times, self);
            }
            for s in &block.body {
                collect_stmt(s, &mut times, self);
            }
        }
        let seasoned = self.fixings.is_some();
        times.retain(|t| t.is_finite() && (seasoned || *t >= -TIME_EPS));
        // Where the dynamics change before the last date: steps with constant coefficients.
        let last = times.iter().copied().fold(0.0, f64::max);
        times.extend(self.knots.iter().copied().filter(|&t| t > TIME_EPS && t < last - TIME_EPS));
        times.sort_by(f64::total_cmp);
        times.dedup_by(|a, b| (*a - *b).abs() < TIME_EPS);
        // The valuation date (always there: the list starts with it); before it, past dates.
        self.past = times.iter().position(|t| t.abs() < TIME_EPS).unwrap_or(0);
        times[self.past] = 0.0;
        self.grid = times;
    }

    fn grid_index(&self, t: f64) -> usize {
        // The grid is sorted and its points are more than TIME_EPS apart.
        let i = self.grid.partition_point(|g| *g < t - TIME_EPS);
        assert!(i < self.grid.len() && (self.grid[i] - t).abs() < TIME_EPS, "every referenced date is on the grid");
        i
    }

    /// Whether register `r` holds a `state` variable.
    fn is_state(&self, r: u32) -> bool {
        r != ALIVE && (r as usize) <= self.product.states.len()
    }

    fn alloc(&mut self) -> u32 {
        self.free.pop().unwrap_or_else(|| {
            self.registers += 1;
            self.registers - 1
        })
    }

    fn release(&mut self, v: V) {
        if let (true, Src::Reg(r)) = (v.temp, v.src) {
            self.free.push(r);
        }
    }

    fn compile_blocks(&mut self) {
        // Unroll each block over its dates, then order all runs by date (file order on ties).
        // (time, block, date, position in the loop, the loop's previous date)
        type Run = (f64, usize, When_, Option<usize>, Option<When_>);
        let mut runs: Vec<Run> = Vec::new();
        for (b, block) in self.product.blocks.iter().enumerate() {
            match &block.when {
                When::Each(s) => {
                    let mut previous = self.start;
                    for (i, w) in self.schedules[*s].iter().enumerate() {
                        runs.push((w.0, b, *w, Some(i + 1), Some(previous)));
                        previous = *w;
                    }
                }
                When::At(d, span) => {
                    if let Some(w) = self.resolve(*d, *span, None) {
                        runs.push((w.0, b, w, None, None));
                    }
                }
            }
        }
        runs.sort_by(|x, y| x.0.total_cmp(&y.0).then(x.1.cmp(&y.1)));
        if runs.is_empty() && self.errors.is_empty() {
            self.errors.push(
                Diagnostic::new("no block ever runs: its schedules hold no dates")
                    .with_fix("give the `for each` loop a schedule with dates"),
            );
        }
        for (_, b, w, position, previous) in runs {
            let block = &self.product.blocks[b];
            // Every run date is a row of the profile, whether or not the product ends there.
            self.event_slot(w);
            let now = Now { idx: self.grid_index(w.0), loop_date: position.map(|p| (w, p)), event: w, previous };
            self.stmts(&block.body, now, ALIVE);
            // Lets live for one run of a block.
            for slot in 0..self.lets.len() {
                if let Some(LetVal::Value(v)) = self.lets[slot].take() {
                    self.release(v);
                }
            }
        }
    }

    fn event_slot(&mut self, w: When_) -> u32 {
        slot_of(&mut self.events, w)
    }

    fn finish(mut self) -> Program {
        let states: Vec<f64> = self.product.states.iter().map(|s| s.init).collect();
        drop_needless_checks(&mut self.ops, self.registers as usize, &states);
        let choice_reads: Vec<Vec<Src>> = self.choices.iter().map(|c| c.using.clone()).collect();
        self.ops = logs::compare_in_logs(std::mem::take(&mut self.ops), &mut self.registers, &choice_reads);
        let past_levels = (0..self.past)
            .map(|k| (0..self.assets.len()).map(|a| self.past_fixing(a, k).map_or(f64::NAN, |f| f.level)).collect())
            .collect();
        Program {
            name: self.product.name.clone(),
            currency: self.product.currency.clone(),
            notional: self.product.notional,
            valuation_date: self.valuation,
            rate: self.rate,
            assets: self.assets,
            cholesky: Vec::new(),
            start: self.grid.iter().position(|g| (g - self.start.0).abs() < TIME_EPS).unwrap_or(0),
            grid: self.grid,
            ops: self.ops,
            registers: self.registers as usize,
            states,
            monitors: self.monitors,
            path_values: self.path_values,
            events: self.events,
            payments: self.payments,
            pay_sites: self.pay_sites,
            condition_sites: self.condition_sites,
            averages: self.averages,
            choices: self.choices,
            curves: None,
            dynamics: Vec::new(),
            correlations: Vec::new(),
            past: self.past,
            past_levels,
            discounting: self.discounting,
        }
    }

    fn resolve(&mut self, d: DateRef, span: Span, now: Option<&Now>) -> Option<When_> {
        match d {
            DateRef::Term(t) => self.term(t, span),
            DateRef::Loop => now.and_then(|n| n.loop_date).map(|(w, _)| w),
            DateRef::First(s) => self.schedules[s].first().copied(),
            DateRef::Last(s) => self.schedules[s].last().copied(),
            DateRef::Only(s) => self.only(s, span),
            DateRef::Let(slot) => match self.lets[slot] {
                Some(LetVal::Date(t, d)) => Some((t, d)),
                _ => None,
            },
            DateRef::Previous => now.and_then(|n| n.previous),
        }
    }

    /// Compiles statements that run on the paths where register `mask` is 1. Returns
    /// whether any of them may end the product.
    fn stmts(&mut self, stmts: &[TStmt], now: Now, mask: u32) -> bool {
        let mut ends = false;
        for s in stmts {
            ends |= self.stmt(s, now, mask);
        }
        ends
    }

    fn stmt(&mut self, s: &TStmt, now: Now, mask: u32) -> bool {
        match s {
            TStmt::Let(slot, e) => {
                if let TKind::Date(d) = e.kind {
                    if let Some(w) = self.resolve(d, e.span, Some(&now)) {
                        self.lets[*slot] = Some(LetVal::Date(w.0, w.1));
                    }
                } else if let Some(v) = self.expr(e, now) {
                    // A let names the value it is given: a state's register changes when
                    // the state is assigned, so the let keeps a copy of it.
                    let v = match v.src {
                        Src::Reg(r) if !v.temp && self.is_state(r) => {
                            let dst = self.alloc();
                            self.ops.push(Op::Copy { dst, src: v.src });
                            V { src: Src::Reg(dst), temp: true }
                        }
                        _ => v,
                    };
                    // A temporary becomes the let's own until the run of the block ends.
                    self.lets[*slot] = Some(LetVal::Value(v));
                }
                false
            }
            TStmt::Assign(state, e) => {
                if let Some(v) = self.expr(e, now) {
                    let dst = 1 + *state as u32;
                    self.ops.push(Op::Assign { dst, mask, src: v.src });
                    self.release(v);
                }
                false
            }
            TStmt::If { cond, then, otherwise } => {
                let Some(c) = self.expr(cond, now) else { return false };
                if let Src::Const(k) = c.src {
                    let chosen = if k != 0.0 { then } else { otherwise };
                    return self.stmts(chosen, now, mask);
                }
                let m_then = self.alloc();
                self.ops.push(Op::Bin { op: Bin::And, dst: m_then, a: Src::Reg(mask), b: c.src });
                let m_else = if otherwise.is_empty() {
                    None
                } else {
                    let m = self.alloc();
                    self.ops.push(Op::Bin { op: Bin::AndNot, dst: m, a: Src::Reg(mask), b: c.src });
                    Some(m)
                };
                self.release(c);
                let mut ends = self.stmts(then, now, m_then);
                if let Some(m) = m_else {
                    ends |= self.stmts(otherwise, now, m);
                    self.free.push(m);
                }
                self.free.push(m_then);
                if ends && mask != ALIVE {
                    // Paths that ended inside the branches stop here too.
                    self.ops.push(Op::Acc { op: Acc::Min, dst: mask, src: Src::Reg(ALIVE) });
                }
                ends
            }
            TStmt::Pay { amount, on, lag, span } => {
                let pay_at = match on {
                    Some((d, dspan)) => {
                        let Some(w) = self.resolve(*d, *dspan, Some(&now)) else { return false };
                        let w = match lag {
                            Some(lag) => match self.lagged(w, lag, *dspan) {
                                Some(w) => w,
                                None => return false,
                            },
                            None => w,
                        };
                        if w.0 + TIME_EPS < now.event.0 {
                            self.error(
                                *dspan,
                                format!(
                                    "the payment date {} is before the date the amount is known ({})",
                                    label(w),
                                    label(now.event)
                                ),
                                "pay on or after the observation date",
                            );
                            return false;
                        }
                        w
                    }
                    None => now.event,
                };
                if pay_at.0 < -TIME_EPS {
                    // Paid before the valuation date: not part of what is left.
                    return false;
                }
                let Some(v) = self.expr(amount, now) else { return false };
                let slot = slot_of(&mut self.payments, pay_at);
                let site = self.pay_sites.len() as u32;
                self.pay_sites.push(*span);
                // With a flat rate, `∫₀ᵗ r` is `r·t` to the bit.
                let discount = (-self.discounting.value(pay_at.0)).exp();
                self.ops.push(Op::Pay { mask, amount: v.src, slot, discount, site });
                self.release(v);
                false
            }
            TStmt::End(_) => {
                let slot = slot_of(&mut self.events, now.event);
                self.ops.push(Op::End { mask, slot });
                true
            }
            TStmt::PayAtHit { amount, barrier, span } => {
                let TKind::Touched { asset, direction, level, relative, from, to } = barrier.kind else {
                    return false;
                };
                // A touch before the valuation date was paid then: nothing is left to pay.
                let Some(Watch::Live(m)) =
                    self.monitor(asset, direction, level, relative, from, to, barrier.span, &now)
                else {
                    return false;
                };
                let Some(a) = self.expr(amount, now) else { return false };
                // In a loop, a window ending on the loop date runs on from the last date,
                // as for `touched`: its flag and its discount factor (the first touch's).
                let flag = self.running_window(barrier, to, m.from, m.to, Combine::Bin(Bin::Or), |from, to| {
                    Source::Monitor(Monitor { from, to, ..m })
                });
                let flag = flag.map_or_else(|| Src::Monitor(self.monitor_id(m) as u32), |v| v.src);
                let discount = self.running_window(barrier, to, m.from, m.to, Combine::First, |from, to| {
                    Source::Hit(Monitor { from, to, ..m })
                });
                let discount = discount.map_or_else(
                    || {
                        let monitor = self.monitor_id(m);
                        Src::Path(self.path_value(PathValue::HitDiscount { monitor }) as u32)
                    },
                    |v| v.src,
                );
                let hit = self.alloc();
                self.ops.push(Op::Bin { op: Bin::And, dst: hit, a: Src::Reg(mask), b: flag });
                let value = self.push_bin(Bin::Mul, a, V { src: discount, temp: false });
                // Shown in the profile on the date of the block; its present value is exact.
                let slot = slot_of(&mut self.payments, now.event);
                let site = self.pay_sites.len() as u32;
                self.pay_sites.push(*span);
                self.ops.push(Op::Pay { mask: hit, amount: value.src, slot, discount: 1.0, site });
                self.release(value);
                self.free.push(hit);
                false
            }
            TStmt::Choice { party, amount, using, span } => self.choice(*party, amount, using, *span, now, mask),
        }
    }

    /// `holder may end for amount using x, y`: a `Choose` deciding, path by path, whether
    /// the party ends the product here, then the payment and the end on those paths.
    fn choice(&mut self, party: Party, amount: &TExpr, using: &[TExpr], span: Span, now: Now, mask: u32) -> bool {
        let Some(a) = self.expr(amount, now) else { return false };
        let mut vars = Vec::new();
        for e in using {
            let Some(v) = self.expr(e, now) else { return false };
            let (centre, scale) = match e.kind {
                TKind::Perf { .. } => (1.0, 1.0),
                TKind::Level { asset, .. } => {
                    let spot = self.assets.get(asset).map_or(1.0, |x| x.spot);
                    (spot, spot)
                }
                _ => (0.0, 1.0),
            };
            vars.push((v, centre, scale));
        }
        let site = self.choices.len() as u32;
        // Said once, at the first date past the limit.
        let work = self.choices.len() * self.grid.len();
        if work <= MAX_EXERCISE_WORK && work + self.grid.len() > MAX_EXERCISE_WORK {
            self.error(
                span,
                format!(
                    "early exercise on more than {} dates over a grid of {} dates: fitting its rule takes one pass over the fit paths per exercise date, and exercise dates times grid dates may be at most {},000",
                    MAX_EXERCISE_WORK / self.grid.len(),
                    self.grid.len(),
                    MAX_EXERCISE_WORK / 1000
                ),
                "let the party end the product on fewer dates (weekly or monthly rather than daily)",
            );
        }
        self.choices.push(Choice {
            party,
            using: vars.iter().map(|(v, _, _)| v.src).collect(),
            centre: vars.iter().map(|x| x.1).collect(),
            scale: vars.iter().map(|x| x.2).collect(),
            span,
            time: now.event.0,
            rule: Rule::Never,
        });
        let dst = self.alloc();
        let discount = (-self.discounting.value(now.event.0)).exp();
        self.ops.push(Op::Choose { site, mask, amount: a.src, discount, dst });
        let slot = slot_of(&mut self.payments, now.event);
        let pay_site = self.pay_sites.len() as u32;
        self.pay_sites.push(span);
        self.ops.push(Op::Pay { mask: dst, amount: a.src, slot, discount, site: pay_site });
        let end = slot_of(&mut self.events, now.event);
        self.ops.push(Op::End { mask: dst, slot: end });
        if mask != ALIVE {
            // The statements after this one, under the same `if`, run only where the
            // product goes on.
            self.ops.push(Op::Acc { op: Acc::Min, dst: mask, src: Src::Reg(ALIVE) });
        }
        self.free.push(dst);
        for (v, _, _) in vars {
            self.release(v);
        }
        self.release(a);
        true
    }

    fn push_bin(&mut self, op: Bin, a: V, b: V) -> V {
        if let (Src::Const(x), Src::Const(y)) = (a.src, b.src) {
            return V::konst(eval_bin(op, x, y));
        }
        let dst = self.alloc();
        self.ops.push(Op::Bin { op, dst, a: a.src, b: b.src });
        self.release(a);
        self.release(b);
        V { src: Src::Reg(dst), temp: true }
    }

    /// A comparison: folded when both sides are known, else counted for operands that
    /// are not numbers (a condition on such a value has no answer, and must not quietly
    /// take the `else` side).
    fn push_cmp(&mut self, op: Bin, a: V, b: V, span: Span) -> Option<V> {
        if let (Src::Const(x), Src::Const(y)) = (a.src, b.src) {
            if x.is_nan() || y.is_nan() {
                self.error(span, "this condition compares a value that is not a number", typing::NOT_A_NUMBER_FIX);
                return None;
            }
            return Some(V::konst(eval_bin(op, x, y)));
        }
        let site = self.condition_sites.len() as u32;
        self.condition_sites.push(span);
        let dst = self.alloc();
        self.ops.push(Op::Cmp { op, dst, a: a.src, b: b.src, site });
        self.release(a);
        self.release(b);
        Some(V { src: Src::Reg(dst), temp: true })
    }

    fn push_un(&mut self, op: Un, a: V) -> V {
        if let Src::Const(x) = a.src {
            return V::konst(eval_un(op, x));
        }
        let dst = self.alloc();
        self.ops.push(Op::Un { op, dst, a: a.src });
        self.release(a);
        V { src: Src::Reg(dst), temp: true }
    }

    fn level(&mut self, asset: usize, idx: usize, span: Span) -> Option<V> {
        if idx == self.past {
            return Some(V::konst(self.assets[asset].spot));
        }
        if idx > self.past {
            return Some(V { src: Src::Level((idx * self.assets.len() + asset) as u32), temp: false });
        }
        let name = self.assets[asset].name.clone();
        let date = self.grid_date(idx);
        if let Some(f) = self.past_fixing(asset, idx) {
            return Some(V::konst(f.level));
        }
        let file = self.fixings.map_or_else(String::new, |f| f.file.display().to_string());
        self.error(
            span,
            format!("no fixing of {name} on {date} in the fixings file {file}: the level of a past date comes from the fixings"),
            format!("add the line `{date},{name},<level>` to {file}"),
        );
        None
    }

    /// The calendar date of a grid index (grid times are whole days from the valuation date
    /// when they come from dates).
    fn grid_date(&self, idx: usize) -> Date {
        self.valuation.add_days((self.grid[idx] * 365.0).round() as i64).unwrap_or(self.valuation)
    }

    /// The fixing of `asset` at a past grid index, if the fixings give it.
    fn past_fixing(&self, asset: usize, idx: usize) -> Option<crate::fixings::Fixing> {
        self.fixings?.get(&self.assets[asset].name, self.grid_date(idx))
    }

    fn initial(&mut self, asset: usize, span: Span, now: &Now) -> Option<V> {
        if self.start.0 > self.grid[now.idx] + TIME_EPS {
            self.error(
                span,
                format!(
                    "the initial fixing on {} is not known yet on {}",
                    label(self.start),
                    label((self.grid[now.idx], None))
                ),
                "use levels only on or after the start date",
            );
            return None;
        }
        let idx = self.grid_index(self.start.0);
        match &self.initial_levels {
            Some(levels) if idx == self.past => Some(V::konst(levels[asset])),
            _ => self.level(asset, idx, span),
        }
    }

    /// The date an expression is read on: the block's date, or inside an aggregate the
    /// fixing being folded.
    fn reading_date(&self, now: &Now) -> When_ {
        let t = self.grid[now.idx];
        if (t - now.event.0).abs() <= TIME_EPS {
            now.event
        } else {
            // Grid times are whole days (ACT/365) from the valuation date.
            (t, self.valuation.add_days((t * 365.0).round() as i64))
        }
    }

    /// The grid index of a date an expression reads a level at, refusing dates after the
    /// date the expression is evaluated on.
    fn read_index(&mut self, at: Option<DateRef>, span: Span, now: &Now) -> Option<usize> {
        let Some(d) = at else { return Some(now.idx) };
        let w = self.resolve(d, span, Some(now))?;
        if w.0 > self.grid[now.idx] + TIME_EPS {
            self.error(
                span,
                format!("the level on {} is not known yet on {}", label(w), label(self.reading_date(now))),
                "read levels only on or before the date of the block (or of the aggregate's fixing)",
            );
            return None;
        }
        Some(self.grid_index(w.0))
    }

    fn expr(&mut self, e: &TExpr, now: Now) -> Option<V> {
        Some(match &e.kind {
            TKind::Const(x) => V::konst(*x),
            TKind::Date(_) => {
                self.error(e.span, "a date cannot be used as a value here", "compare dates, or use `years(d)`");
                return None;
            }
            TKind::State(s) => V { src: Src::Reg(1 + *s as u32), temp: false },
            TKind::Let(slot) => match self.lets[*slot] {
                // Readers never free a let's register.
                Some(LetVal::Value(v)) => V { temp: false, ..v },
                _ => return None,
            },
            TKind::Unary(op, a) => {
                let a = self.expr(a, now)?;
                self.push_un(if *op == UnaryOp::Neg { Un::Neg } else { Un::Not }, a)
            }
            TKind::Binary(op, a, b) => {
                if a.ty == typing::Ty::Date {
                    let (TKind::Date(da), TKind::Date(db)) = (&a.kind, &b.kind) else { return None };
                    let x = self.resolve(*da, a.span, Some(&now))?;
                    let y = self.resolve(*db, b.span, Some(&now))?;
                    let (x, y) = (round_time(x.0), round_time(y.0));
                    return Some(V::konst(typing::fold(*op, x, y)));
                }
                let x = self.expr(a, now)?;
                let y = self.expr(b, now)?;
                let op = match op {
                    BinaryOp::Add => Bin::Add,
                    BinaryOp::Sub => Bin::Sub,
                    BinaryOp::Mul => Bin::Mul,
                    BinaryOp::Div => Bin::Div,
                    BinaryOp::Lt => Bin::Lt,
                    BinaryOp::Le => Bin::Le,
                    BinaryOp::Gt => Bin::Gt,
                    BinaryOp::Ge => Bin::Ge,
                    BinaryOp::Eq => Bin::Eq,
                    BinaryOp::Ne => Bin::Ne,
                    BinaryOp::And => Bin::And,
                    BinaryOp::Or => Bin::Or,
                };
                if is_comparison(op) {
                    return self.push_cmp(op, x, y, e.span);
                }
                self.push_bin(op, x, y)
            }
            TKind::If(c, a, b) => {
                let c = self.expr(c, now)?;
                if let Src::Const(k) = c.src {
                    // Decided by the dates: like an `if` statement, only the branch taken is
                    // compiled (the other may read fixings that are not there yet).
                    return self.expr(if k != 0.0 { a } else { b }, now);
                }
                let a = self.expr(a, now)?;
                let b = self.expr(b, now)?;
                let dst = self.alloc();
                self.ops.push(Op::Select { dst, cond: c.src, a: a.src, b: b.src });
                self.release(c);
                self.release(a);
                self.release(b);
                V { src: Src::Reg(dst), temp: true }
            }
            TKind::Func(f, args) => {
                let mut vals = Vec::with_capacity(args.len());
                for a in args {
                    vals.push(self.expr(a, now)?);
                }
                match f {
                    Func::Remainder => {
                        let n = vals.pop()?;
                        let x = vals.pop()?;
                        self.push_bin(Bin::Rem, x, n)
                    }
                    Func::Min | Func::Max => {
                        let op = if *f == Func::Min { Bin::Min } else { Bin::Max };
                        let mut it = vals.into_iter();
                        let first = it.next()?;
                        it.fold(first, |acc, v| self.push_bin(op, acc, v))
                    }
                    _ => {
                        let op = match f {
                            Func::Abs => Un::Abs,
                            Func::Exp => Un::Exp,
                            Func::Log => Un::Log,
                            Func::Sqrt => Un::Sqrt,
                            _ => Un::Floor,
                        };
                        self.push_un(op, vals.pop()?)
                    }
                }
            }
            TKind::Level { asset, at } => {
                let idx = self.read_index(*at, e.span, &now)?;
                self.level(*asset, idx, e.span)?
            }
            TKind::Initial(asset) => self.initial(*asset, e.span, &now)?,
            TKind::Perf { asset, at } => {
                let idx = self.read_index(*at, e.span, &now)?;
                let init = self.initial(*asset, e.span, &now)?;
                let level = self.level(*asset, idx, e.span)?;
                match init.src {
                    Src::Const(x) => self.push_bin(Bin::Mul, level, V::konst(1.0 / x)),
                    _ => self.push_bin(Bin::Div, level, init),
                }
            }
            TKind::Position => V::konst(now.loop_date.map_or(0.0, |(_, p)| p as f64)),
            TKind::Years(d) => {
                let w = self.resolve(*d, e.span, Some(&now))?;
                V::konst(w.0 - self.start.0)
            }
            TKind::Aggregate(agg, body, s) => self.aggregate(*agg, body, *s, e.span, now)?,
            TKind::Touched { asset, direction, level, relative, from, to } => {
                let m = match self.monitor(*asset, *direction, *level, *relative, *from, *to, e.span, &now)? {
                    Watch::Past(touched) => return Some(V::konst(if touched { 1.0 } else { 0.0 })),
                    Watch::Live(m) => m,
                };
                if let Some(v) = self.running_window(e, *to, m.from, m.to, Combine::Bin(Bin::Or), |from, to| {
                    Source::Monitor(Monitor { from, to, ..m })
                }) {
                    return Some(v);
                }
                V { src: Src::Monitor(self.monitor_id(m) as u32), temp: false }
            }
            TKind::Extreme { asset, up, relative, from, to } => {
                let (a, b) = self.extreme_window(*up, *relative, *from, *to, e.span, &now)?;
                let make = |from, to| PathValue::Extreme { asset: *asset, up: *up, from, to };
                let combine = Combine::Bin(if *up { Bin::Max } else { Bin::Min });
                let level = match self.running_window(e, *to, a, b, combine, |f, t| Source::Path(make(f, t))) {
                    Some(v) => v,
                    None => V { src: Src::Path(self.path_value(make(a, b)) as u32), temp: false },
                };
                if !*relative {
                    return Some(level);
                }
                // A performance, divided by the initial level as `perf(X)` is (so a struck
                // trade's fixed initial level applies to it too).
                let init = self.initial(*asset, e.span, &now)?;
                match init.src {
                    Src::Const(x) => self.push_bin(Bin::Mul, level, V::konst(1.0 / x)),
                    _ => self.push_bin(Bin::Div, level, init),
                }
            }
        })
    }

    /// The monitor of `touched(...)` over the window `from`..`to`, refusing windows that
    /// run backwards, end after the block's date, or watch a relative barrier before the
    /// start. The part of a window before the valuation date is decided from the fixings:
    /// touched if a close, or a day's low (high) where given, is at or beyond the barrier;
    /// between fixings nothing is assumed to have crossed.
    #[allow(clippy::too_many_arguments)]
    fn monitor(
        &mut self,
        asset: usize,
        direction: Direction,
        level: f64,
        relative: bool,
        from: DateRef,
        to: DateRef,
        span: Span,
        now: &Now,
    ) -> Option<Watch> {
        let a = self.resolve(from, span, Some(now))?;
        let b = self.resolve(to, span, Some(now))?;
        if b.0 < a.0 {
            self.error(
                span,
                format!("the monitoring window ends ({}) before it starts ({})", label(b), label(a)),
                "write the earlier date after `from`",
            );
            return None;
        }
        if b.0 > now.event.0 + TIME_EPS {
            self.error(
                span,
                format!("whether the barrier was touched up to {} is not known yet on {}", label(b), label(now.event)),
                "end the monitoring window on or before the date of the block",
            );
            return None;
        }
        if relative && a.0 + TIME_EPS < self.start.0 {
            self.error(
                span,
                "a barrier relative to the initial level cannot be watched before the start date",
                "begin the window at `start` or later",
            );
            return None;
        }
        let (mut barrier, mut relative) = (level, relative);
        if relative && self.grid_index(self.start.0) < self.past {
            // Struck in the past: the barrier is a known level.
            match self.initial(asset, span, now)?.src {
                Src::Const(x) => (barrier, relative) = (barrier * x, false),
                _ => {
                    self.error(span, "the initial level of a past start is not known", "give its fixing");
                    return None;
                }
            }
        }
        let mut a = a;
        if a.0 < -TIME_EPS {
            let (Some(first), true) = (a.1, !relative) else {
                self.error(
                    span,
                    "a window that begins before the valuation date needs a calendar date and a known barrier level",
                    "begin the window at a written date or at a start with a fixing",
                );
                return None;
            };
            let last = self.valuation.add_days(-1).unwrap_or(self.valuation);
            let down = direction == Direction::Down;
            let seen = self.fixings.map(|f| f.between(&self.assets[asset].name, first, last)).unwrap_or_default();
            let touched = seen.iter().any(|(_, f)| {
                if down {
                    f.level.min(f.low.unwrap_or(f.level)) <= barrier
                } else {
                    f.level.max(f.high.unwrap_or(f.level)) >= barrier
                }
            });
            if touched {
                return Some(Watch::Past(true));
            }
            if b.0 < -TIME_EPS {
                return Some(Watch::Past(false));
            }
            a = (0.0, Some(self.valuation));
        }
        Some(Watch::Live(Monitor {
            asset,
            direction,
            level: barrier,
            relative,
            from: self.grid_index(a.0),
            to: self.grid_index(b.0),
        }))
    }

    /// The index of monitor `m`, the same barrier and window sharing one.
    fn monitor_id(&mut self, m: Monitor) -> usize {
        let key = (m.asset, m.direction == Direction::Up, m.level.to_bits(), m.relative, m.from, m.to);
        *self.monitor_index.entry(key).or_insert_with(|| {
            self.monitors.push(m);
            self.monitors.len() - 1
        })
    }

    /// The index of path value `v`, equal values sharing one.
    fn path_value(&mut self, v: PathValue) -> usize {
        let key = match v {
            PathValue::HitDiscount { monitor } => (0, monitor, false, 0, 0),
            PathValue::Extreme { asset, up, from, to } => (1, asset, up, from, to),
        };
        *self.path_value_index.entry(key).or_insert_with(|| {
            self.path_values.push(v);
            self.path_values.len() - 1
        })
    }

    /// The grid indices of the window of a continuous `highest`/`lowest`, with the same
    /// refusals as `touched`.
    fn extreme_window(
        &mut self,
        up: bool,
        relative: bool,
        from: DateRef,
        to: DateRef,
        span: Span,
        now: &Now,
    ) -> Option<(usize, usize)> {
        let name = if up { "highest" } else { "lowest" };
        let a = self.resolve(from, span, Some(now))?;
        let b = self.resolve(to, span, Some(now))?;
        if b.0 < a.0 {
            self.error(
                span,
                format!("the window of `{name}` ends ({}) before it starts ({})", label(b), label(a)),
                "write the earlier date after `from`",
            );
            return None;
        }
        if b.0 > now.event.0 + TIME_EPS {
            self.error(
                span,
                format!("the {name} level up to {} is not known yet on {}", label(b), label(now.event)),
                "end the window on or before the date of the block",
            );
            return None;
        }
        if relative && a.0 + TIME_EPS < self.start.0 {
            self.error(
                span,
                format!("`{name}` of a performance cannot be watched before the start date, which it is relative to"),
                "begin the window at `start` or later, or watch `level(X)`",
            );
            return None;
        }
        if a.0 < -TIME_EPS {
            self.error(
                span,
                format!("`{name}` over a window that begins before the valuation date is not supported: the fixings give one close a day, not the path between them"),
                "begin the window on or after the valuation date, or fold the past extreme in by hand with `max`/`min` of `level(X, DATE)` fixings",
            );
            return None;
        }
        Some((self.grid_index(a.0), self.grid_index(b.0)))
    }

    /// A window ending on the loop date, kept running between the loop's dates: on the
    /// first run the window's own value; on later runs (same start) the value so far
    /// combined with the value over the new steps only (`or`, `max`, `min`, or the first
    /// touch's discount factor when there is one). The result is the same number as
    /// watching the whole window again: the steps and their bridge draws are the same,
    /// and the combination is exact. `None` when the window does not end on the loop date.
    fn running_window(
        &mut self,
        e: &TExpr,
        to: DateRef,
        from_idx: usize,
        to_idx: usize,
        combine: Combine,
        make: impl Fn(usize, usize) -> Source,
    ) -> Option<V> {
        if to != DateRef::Loop {
            return None;
        }
        let key = (e.span.start, e.span.end, combine == Combine::First);
        let src = |c: &mut Compiler<'_>, source: Source| match source {
            Source::Monitor(m) => Src::Monitor(c.monitor_id(m) as u32),
            Source::Path(v) => Src::Path(c.path_value(v) as u32),
            Source::Hit(m) => {
                let monitor = c.monitor_id(m);
                Src::Path(c.path_value(PathValue::HitDiscount { monitor }) as u32)
            }
        };
        let value = match self.running_windows.get(&key).copied() {
            Some((so_far, from, reached)) if from == from_idx && reached <= to_idx => {
                if reached == to_idx {
                    so_far
                } else {
                    let new = src(self, make(reached, to_idx));
                    match (so_far, combine) {
                        (Src::Reg(r), Combine::Bin(op)) => {
                            let op = if op == Bin::Min { Acc::Min } else { Acc::Max };
                            self.ops.push(Op::Acc { op, dst: r, src: new });
                            so_far
                        }
                        (Src::Reg(r), Combine::First) => {
                            // A discount factor is positive exactly where the barrier was touched.
                            let t = self.alloc();
                            self.ops.push(Op::Select { dst: t, cond: so_far, a: so_far, b: new });
                            self.ops.push(Op::Copy { dst: r, src: Src::Reg(t) });
                            self.free.push(t);
                            so_far
                        }
                        (_, combine) => {
                            // The register lives on for the loop's later dates; never freed.
                            let r = self.alloc();
                            self.ops.push(match combine {
                                Combine::Bin(op) => Op::Bin { op, dst: r, a: so_far, b: new },
                                Combine::First => Op::Select { dst: r, cond: so_far, a: so_far, b: new },
                            });
                            Src::Reg(r)
                        }
                    }
                }
            }
            _ => src(self, make(from_idx, to_idx)),
        };
        self.running_windows.insert(key, (value, from_idx, to_idx));
        Some(V { src: value, temp: false })
    }

    fn aggregate(&mut self, agg: Aggregate, body: &TExpr, s: usize, span: Span, now: Now) -> Option<V> {
        let dates: Vec<When_> =
            self.schedules[s].iter().copied().filter(|w| w.0 <= self.grid[now.idx] + TIME_EPS).collect();
        if dates.is_empty() {
            let name = &self.product.schedules[s].name;
            let msg = format!("`{}` over `{name}` has no fixing on or before {}", agg.name(), label(now.event));
            self.error(
                span,
                msg,
                "aggregates see only the dates of the schedule up to the date of the block; evaluate it later",
            );
            return None;
        }
        if matches!(agg, Aggregate::Average | Aggregate::GeometricAverage) {
            if let TKind::Perf { asset, at: None } | TKind::Level { asset, at: None } = body.kind {
                let idx: Vec<usize> = dates.iter().map(|w| self.grid_index(w.0)).collect();
                if !self.averages.iter().any(|(a, i)| *a == asset && *i == idx) {
                    self.averages.push((asset, idx));
                }
            }
        }
        let acc_op = match agg {
            Aggregate::Average | Aggregate::GeometricAverage | Aggregate::Sum | Aggregate::Count => Acc::Add,
            Aggregate::Highest | Aggregate::Any => Acc::Max,
            Aggregate::Lowest | Aggregate::All => Acc::Min,
        };
        // An aggregate that reads only levels is the same running value at every date of a
        // loop: keep its accumulator between runs and add only the new fixings, so a daily
        // `lowest(... over days)` inside `for each t in days` costs one operation a day.
        let key = (span.start, span.end, s);
        let cached = if reads_only_levels(body) { self.running.get(&key).copied() } else { None };
        let (acc, done) = match cached {
            Some((acc, done)) if done <= dates.len() => (acc, done),
            _ => (self.alloc(), 0),
        };
        for (i, w) in dates.iter().enumerate().skip(done) {
            let inner = Now { idx: self.grid_index(w.0), ..now };
            let v = self.expr(body, inner)?;
            // The same operations as `exp(average(log(x) over s))`, so the same bits.
            let v = if agg == Aggregate::GeometricAverage { self.push_un(Un::Log, v) } else { v };
            if i == 0 {
                self.ops.push(Op::Copy { dst: acc, src: v.src });
            } else {
                self.ops.push(Op::Acc { op: acc_op, dst: acc, src: v.src });
            }
            self.release(v);
        }
        let result = if reads_only_levels(body) {
            // The accumulator lives on for later runs; consumers only read it.
            self.running.insert(key, (acc, dates.len()));
            V { src: Src::Reg(acc), temp: false }
        } else {
            V { src: Src::Reg(acc), temp: true }
        };
        Some(match agg {
            Aggregate::Average => self.push_bin(Bin::Mul, result, V::konst(1.0 / dates.len() as f64)),
            Aggregate::GeometricAverage => {
                let mean = self.push_bin(Bin::Mul, result, V::konst(1.0 / dates.len() as f64));
                self.push_un(Un::Exp, mean)
            }
            _ => result,
        })
    }
}

/// Whether an expression depends only on levels and constants (not on state, lets, the
/// loop date or monitors), so its value on a fixing date is the same in every run.
fn reads_only_levels(e: &TExpr) -> bool {
    match &e.kind {
        TKind::Const(_) | TKind::Initial(_) => true,
        TKind::Level { at, .. } | TKind::Perf { at, .. } => {
            matches!(at, None | Some(DateRef::Term(_) | DateRef::First(_) | DateRef::Last(_) | DateRef::Only(_)))
        }
        TKind::Unary(_, a) => reads_only_levels(a),
        TKind::Binary(_, a, b) => reads_only_levels(a) && reads_only_levels(b),
        TKind::If(c, a, b) => reads_only_levels(c) && reads_only_levels(a) && reads_only_levels(b),
        TKind::Func(_, args) => args.iter().all(reads_only_levels),
        TKind::Aggregate(_, body, _) => reads_only_levels(body),
        TKind::Date(_)
        | TKind::State(_)
        | TKind::Let(_)
        | TKind::Position
        | TKind::Years(_)
        | TKind::Touched { .. }
        | TKind::Extreme { .. } => false,
    }
}

/// A monitor as a key: asset, up, the level's bits, relative, from, to.
type MonitorKey = (usize, bool, u64, bool, usize, usize);
/// A path value as a key: kind, asset or monitor, up, from, to.
type PathValueKey = (u8, usize, bool, usize, usize);

/// What a window watches, for [`Compiler::running_window`].
enum Source {
    Monitor(Monitor),
    Path(PathValue),
    /// The discount factor of the first touch of the monitor's barrier.
    Hit(Monitor),
}

/// How a running window's value so far takes in the new steps.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum Combine {
    /// `or` of flags, `max` or `min` of extremes.
    Bin(Bin),
    /// The value so far where it is not 0 (the first touch's discount factor), else the new one.
    First,
}

/// Times compare as whole days when they come from calendar dates; rounding to 1e-9 years
/// keeps `1y == 2027-12-01` (365/365) exact.
fn round_time(t: f64) -> f64 {
    (t * 1e9).round() / 1e9
}

fn label(w: When_) -> String {
    Slot { time: w.0, date: w.1 }.label()
}

fn slot_of(slots: &mut Vec<Slot>, w: When_) -> u32 {
    if let Some(i) = slots.iter().position(|s| (s.time - w.0).abs() < TIME_EPS) {
        return i as u32;
    }
    slots.push(Slot { time: w.0, date: w.1 });
    (slots.len() - 1) as u32
}

fn collect_ref(d: DateRef, times: &mut Vec<f64>, c: &mut Compiler<'_>) {
    if let DateRef::Term(t) = d {
        if let Some(w) = c.term(t, Span::default()) {
            times.push(w.0);
        } else {
            // The error is reported with its place when the block is compiled.
            c.errors.pop();
        }
    }
}

fn collect_stmt(s: &TStmt, times: &mut Vec<f64>, c: &mut Compiler<'_>) {
    match s {
        TStmt::Let(_, e) | TStmt::Assign(_, e) => collect_expr(e, times, c),
        TStmt::If { cond, then, otherwise } => {
            collect_expr(cond, times, c);
            for s in then.iter().chain(otherwise) {
                collect_stmt(s, times, c);
            }
        }
        TStmt::Pay { amount, .. } => collect_expr(amount, times, c),
        TStmt::PayAtHit { barrier, .. } => collect_expr(barrier, times, c),
        TStmt::End(_) => {}
        TStmt::Choice { amount, using, .. } => {
            collect_expr(amount, times, c);
            for e in using {
                collect_expr(e, times, c);
            }
        }
    }
}

fn collect_expr(e: &TExpr, times: &mut Vec<f64>, c: &mut Compiler<'_>) {
    match &e.kind {
        TKind::Date(d) | TKind::Years(d) => collect_ref(*d, times, c),
        TKind::Level { at: Some(d), .. } | TKind::Perf { at: Some(d), .. } => collect_ref(*d, times, c),
        TKind::Unary(_, a) => collect_expr(a, times, c),
        TKind::Binary(_, a, b) => {
            collect_expr(a, times, c);
            collect_expr(b, times, c);
        }
        TKind::If(x, a, b) => {
            collect_expr(x, times, c);
            collect_expr(a, times, c);
            collect_expr(b, times, c);
        }
        TKind::Func(_, args) => {
            for a in args {
                collect_expr(a, times, c);
            }
        }
        TKind::Aggregate(_, body, _) => collect_expr(body, times, c),
        TKind::Touched { from, to, .. } | TKind::Extreme { from, to, .. } => {
            collect_ref(*from, times, c);
            collect_ref(*to, times, c);
        }
        _ => {}
    }
}

/// Turns back into plain comparisons the checked ones whose operands are always numbers,
/// so that the common conditions (a performance against a level) cost no extra pass.
///
/// The program is straight-line code, so one walk in order knows, for each register,
/// whether it can hold a value that is not a number. Levels are positive (at worst +inf
/// on an overflow) and constants are numbers; what keeps a number a number is listed in
/// `always_a_number`; anything else (a sum of two values, which may be inf - inf, a
/// quotient, a log, a square root...) may not be one.
fn drop_needless_checks(ops: &mut [Op], registers: usize, states: &[f64]) {
    let mut number = vec![false; registers];
    for (s, init) in states.iter().enumerate() {
        number[1 + s] = !init.is_nan();
    }
    number[ALIVE as usize] = true;
    let is_number = |number: &[bool], src: Src| match src {
        Src::Reg(r) => number[r as usize],
        Src::Const(x) => !x.is_nan(),
        Src::Level(_) | Src::LogLevel(_) | Src::Monitor(_) => true,
        // Drawn between grid dates from formulas with logs and square roots: checked.
        Src::Path(_) => false,
    };
    for op in ops.iter_mut() {
        let (dst, keeps) = match *op {
            Op::Cmp { op: cmp, dst, a, b, .. } => {
                if is_number(&number, a) && is_number(&number, b) {
                    *op = Op::Bin { op: cmp, dst, a, b };
                }
                (dst, true)
            }
            Op::Bin { op, dst, a, b } => (dst, always_a_number(op, a, b, |s| is_number(&number, s))),
            Op::Un { op, dst, a } => {
                (dst, matches!(op, Un::Neg | Un::Not | Un::Abs | Un::Exp | Un::Floor) && is_number(&number, a))
            }
            Op::Select { dst, a, b, .. } => (dst, is_number(&number, a) && is_number(&number, b)),
            Op::Acc { op, dst, src } => {
                (dst, matches!(op, Acc::Min | Acc::Max) && number[dst as usize] && is_number(&number, src))
            }
            Op::Copy { dst, src } => (dst, is_number(&number, src)),
            Op::Assign { dst, src, .. } => (dst, number[dst as usize] && is_number(&number, src)),
            // The exercise decision writes 1 or 0.
            Op::Choose { dst, .. } => (dst, true),
            Op::Pay { .. } | Op::End { .. } => continue,
        };
        number[dst as usize] = keeps;
    }
}

/// Whether `a op b` is a number whenever `a` and `b` are (levels may be +inf, so a sum or
/// product of two values is not: inf - inf and 0 * inf are not numbers).
fn always_a_number(op: Bin, a: Src, b: Src, is_number: impl Fn(Src) -> bool) -> bool {
    let finite = |s: Src| matches!(s, Src::Const(x) if x.is_finite());
    let nonzero = |s: Src| matches!(s, Src::Const(x) if x.is_finite() && x != 0.0);
    let both = is_number(a) && is_number(b);
    match op {
        Bin::Min | Bin::Max | Bin::And | Bin::Or | Bin::AndNot => both,
        Bin::Lt | Bin::Le | Bin::Gt | Bin::Ge | Bin::Eq | Bin::Ne => true,
        Bin::Add | Bin::Sub => both && (finite(a) || finite(b)),
        Bin::Mul => both && (nonzero(a) || nonzero(b)),
        Bin::Div => both && nonzero(b),
        Bin::Rem => false,
    }
}

/// Whether the operation compares two numbers (its answer is a flag).
pub fn is_comparison(op: Bin) -> bool {
    matches!(op, Bin::Lt | Bin::Le | Bin::Gt | Bin::Ge | Bin::Eq | Bin::Ne)
}

/// Applies a two-argument operation to one pair of values; flags are 1 and 0.
#[inline(always)]
pub fn eval_bin(op: Bin, x: f64, y: f64) -> f64 {
    let flag = |b: bool| if b { 1.0 } else { 0.0 };
    match op {
        Bin::Add => x + y,
        Bin::Sub => x - y,
        Bin::Mul => x * y,
        Bin::Div => x / y,
        Bin::Min => typing::min_or_nan(x, y),
        Bin::Max => typing::max_or_nan(x, y),
        Bin::Rem => typing::remainder(x, y),
        Bin::Lt => flag(x < y),
        Bin::Le => flag(x <= y),
        Bin::Gt => flag(x > y),
        Bin::Ge => flag(x >= y),
        Bin::Eq => flag(x == y),
        Bin::Ne => flag(x != y),
        Bin::And => flag(x != 0.0 && y != 0.0),
        Bin::Or => flag(x != 0.0 || y != 0.0),
        Bin::AndNot => flag(x != 0.0 && y == 0.0),
    }
}

/// Applies a one-argument operation.
#[inline(always)]
pub fn eval_un(op: Un, x: f64) -> f64 {
    match op {
        Un::Neg => -x,
        Un::Not => {
            if x == 0.0 {
                1.0
            } else {
                0.0
            }
        }
        Un::Abs => x.abs(),
        Un::Exp => x.exp(),
        Un::Log => x.ln(),
        Un::Sqrt => x.sqrt(),
        Un::Floor => x.floor(),
    }
}
