//! Stage 3: typed product + market → flat program.
//!
//! Dates become times on one grid (ACT/365 fixed from the valuation date), schedules are
//! generated and validated, and every block is unrolled over its dates into straight-line
//! operations on registers. Each operation works on a whole block of paths at once (see
//! [`crate::sim`]), so the cost of dispatching it is paid once per block, not per path.
//! Names are slots, parameters and dates are constants, and `if` on a date (such as
//! `t == last(s)`) is decided here, not on every path.

use crate::date::Date;
use crate::diagnostic::{Diagnostic, Span};
use crate::market::Market;
use crate::syntax::{Aggregate, BinaryOp, DateTerm, PeriodUnit, ScheduleKind, UnaryOp};
use crate::typing::{self, DateRef, Direction, Func, Product, TExpr, TKind, TStmt, When};

/// Where an operation reads a value for each path of a block.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Src {
    /// A register: one value per path.
    Reg(u32),
    /// A simulated level: `grid index * assets + asset`.
    Level(u32),
    /// The same value on every path.
    Const(f64),
    /// The 1/0 outcome of a continuously monitored barrier.
    Monitor(u32),
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
    /// Dates on which blocks run; `End` refers to them by index.
    pub events: Vec<Slot>,
    /// Dates on which payments are made; `Pay` refers to them by index.
    pub payments: Vec<Slot>,
    /// Source spans of the `pay` statements, for reporting a non-finite amount.
    pub pay_sites: Vec<Span>,
    /// Averaging schedules: (asset, grid indices of the fixings), offered to the engine as geometric-average control variates.
    pub averages: Vec<(usize, Vec<usize>)>,
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
    events: Vec<Slot>,
    payments: Vec<Slot>,
    pay_sites: Vec<Span>,
    averages: Vec<(usize, Vec<usize>)>,
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
}

const TIME_EPS: f64 = 1e-9;

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
            events: Vec::new(),
            payments: Vec::new(),
            pay_sites: Vec::new(),
            averages: Vec::new(),
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
                DateRef::Loop | DateRef::Let(_) => None,
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
                                let holidays = self.holidays(&def.schedule.rolling);
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
    fn holidays(&mut self, rolling: &crate::syntax::Rolling) -> Option<std::collections::BTreeSet<Date>> {
        let (name, span) = rolling.calendar.as_ref()?;
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
        let holidays = self.holidays(rolling).unwrap_or_default();
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
        let mut runs: Vec<(f64, usize, When_, Option<usize>)> = Vec::new();
        for (b, block) in self.product.blocks.iter().enumerate() {
            match &block.when {
                When::Each(s) => {
                    for (i, w) in self.schedules[*s].iter().enumerate() {
                        runs.push((w.0, b, *w, Some(i + 1)));
                    }
                }
                When::At(d, span) => {
                    if let Some(w) = self.resolve(*d, *span, None) {
                        runs.push((w.0, b, w, None));
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
        for (_, b, w, position) in runs {
            let block = &self.product.blocks[b];
            // Every run date is a row of the profile, whether or not the product ends there.
            self.event_slot(w);
            let now = Now { idx: self.grid_index(w.0), loop_date: position.map(|p| (w, p)), event: w };
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

    fn finish(self) -> Program {
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
            states: self.product.states.iter().map(|s| s.init).collect(),
            monitors: self.monitors,
            events: self.events,
            payments: self.payments,
            pay_sites: self.pay_sites,
            averages: self.averages,
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
            TStmt::Pay { amount, on, span } => {
                let pay_at = match on {
                    Some((d, dspan)) => match self.resolve(*d, *dspan, Some(&now)) {
                        Some(w) if w.0 + TIME_EPS < now.event.0 => {
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
                        Some(w) => w,
                        None => return false,
                    },
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
        }
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
                let a = self.resolve(*from, e.span, Some(&now))?;
                let b = self.resolve(*to, e.span, Some(&now))?;
                if b.0 < a.0 {
                    self.error(
                        e.span,
                        format!("the monitoring window ends ({}) before it starts ({})", label(b), label(a)),
                        "write the earlier date after `from`",
                    );
                    return None;
                }
                if b.0 > now.event.0 + TIME_EPS {
                    self.error(
                        e.span,
                        format!(
                            "whether the barrier was touched up to {} is not known yet on {}",
                            label(b),
                            label(now.event)
                        ),
                        "end the monitoring window on or before the date of the block",
                    );
                    return None;
                }
                if *relative && a.0 + TIME_EPS < self.start.0 {
                    self.error(
                        e.span,
                        "a barrier relative to the initial level cannot be watched before the start date",
                        "begin the window at `start` or later",
                    );
                    return None;
                }
                let (mut barrier, mut relative) = (*level, *relative);
                if relative && self.grid_index(self.start.0) < self.past {
                    // Struck in the past: the barrier is a known level.
                    match self.initial(*asset, e.span, &now)?.src {
                        Src::Const(x) => (barrier, relative) = (barrier * x, false),
                        _ => {
                            self.error(e.span, "the initial level of a past start is not known", "give its fixing");
                            return None;
                        }
                    }
                }
                let mut a = a;
                if a.0 < -TIME_EPS {
                    // The past part of the window, from the fixings: touched if a close, or a
                    // day's low (high) where given, is at or beyond the barrier. Between
                    // fixings nothing is assumed to have crossed.
                    let (Some(first), true) = (a.1, !relative) else {
                        self.error(
                            e.span,
                            "a window that begins before the valuation date needs a calendar date and a known barrier level",
                            "begin the window at a written date or at a start with a fixing",
                        );
                        return None;
                    };
                    let last = self.valuation.add_days(-1).unwrap_or(self.valuation);
                    let down = *direction == Direction::Down;
                    let seen =
                        self.fixings.map(|f| f.between(&self.assets[*asset].name, first, last)).unwrap_or_default();
                    let touched = seen.iter().any(|(_, f)| {
                        if down {
                            f.level.min(f.low.unwrap_or(f.level)) <= barrier
                        } else {
                            f.level.max(f.high.unwrap_or(f.level)) >= barrier
                        }
                    });
                    if touched {
                        return Some(V::konst(1.0));
                    }
                    if b.0 < -TIME_EPS {
                        return Some(V::konst(0.0));
                    }
                    a = (0.0, Some(self.valuation));
                }
                let m = Monitor {
                    asset: *asset,
                    direction: *direction,
                    level: barrier,
                    relative,
                    from: self.grid_index(a.0),
                    to: self.grid_index(b.0),
                };
                let id = match self.monitors.iter().position(|x| *x == m) {
                    Some(i) => i,
                    None => {
                        self.monitors.push(m);
                        self.monitors.len() - 1
                    }
                };
                V { src: Src::Monitor(id as u32), temp: false }
            }
        })
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
        if agg == Aggregate::Average {
            if let TKind::Perf { asset, at: None } | TKind::Level { asset, at: None } = body.kind {
                let idx: Vec<usize> = dates.iter().map(|w| self.grid_index(w.0)).collect();
                if !self.averages.iter().any(|(a, i)| *a == asset && *i == idx) {
                    self.averages.push((asset, idx));
                }
            }
        }
        let acc_op = match agg {
            Aggregate::Average | Aggregate::Sum | Aggregate::Count => Acc::Add,
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
        Some(if agg == Aggregate::Average {
            self.push_bin(Bin::Mul, result, V::konst(1.0 / dates.len() as f64))
        } else {
            result
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
        | TKind::Touched { .. } => false,
    }
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
        TStmt::End(_) => {}
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
        TKind::Touched { from, to, .. } => {
            collect_ref(*from, times, c);
            collect_ref(*to, times, c);
        }
        _ => {}
    }
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
        Bin::Min => x.min(y),
        Bin::Max => x.max(y),
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
