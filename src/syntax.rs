//! Stage 1: text → syntax tree.
//!
//! The pest grammar in `grammar/payoff.pest` recognises a payoff file; one pass here lowers
//! pest's pairs into our own tree, where every node carries its byte span. No pest type
//! leaves this module: a pest error becomes a [`Diagnostic`] at the border.

use pest::iterators::Pair;
use pest::pratt_parser::{Assoc, Op, PrattParser};
use pest::Parser as _;

use crate::date::Date;
use crate::diagnostic::{Diagnostic, Span};

#[derive(pest_derive::Parser)]
#[grammar = "../grammar/payoff.pest"]
struct PayoffParser;

/// A name as written, with where it was written.
#[derive(Clone, Debug, PartialEq)]
pub struct Name {
    pub text: String,
    pub span: Span,
}

/// A whole payoff file.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct File {
    pub items: Vec<Item>,
}

/// A top-level line or block.
#[derive(Clone, Debug, PartialEq)]
pub enum Item {
    /// `product "Three-name worst-of note"`
    Product(String, Span),
    /// `currency USD`
    Currency(Name),
    /// `notional 1_000_000`
    Notional(Expr),
    /// `underlyings ZPHX, QMEN, OSMP`
    Underlyings(Vec<Name>),
    /// `market "market.toml"`: default market file, relative to the payoff file.
    Market(String, Span),
    /// `start 2026-12-01`: the initial fixing date (default: the valuation date).
    Start(Expr),
    /// `param coupon = 2.25%`
    Param(Name, Expr),
    /// `dates quarterly = every 3m from 2027-03-01 to 2029-12-01`
    Dates(Name, Schedule),
    /// `state missed = 0`
    State(Name, Expr),
    /// `for each t in quarterly { ... }`
    Each { var: Name, schedule: Name, body: Vec<Stmt>, span: Span },
    /// `at last(quarterly) { ... }`
    At { date: Expr, body: Vec<Stmt>, span: Span },
    /// A statement written outside any block; always an error in the check.
    Stray(Stmt, Span),
}

/// A date as written in a schedule.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum DateTerm {
    /// `2027-03-01`
    Iso(Date),
    /// `1.5y`: years after the valuation date.
    Years(f64),
    /// `start`: the initial fixing date.
    Start,
}

/// A schedule of dates.
#[derive(Clone, Debug, PartialEq)]
pub struct Schedule {
    pub kind: ScheduleKind,
    pub span: Span,
    /// `rolled ...` and `calendar NAME` after the schedule.
    pub rolling: Rolling,
}

/// How a schedule's dates meet business days: `rolled modified following calendar ZEX`.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Rolling {
    pub roll: Option<(Roll, Span)>,
    /// The holiday calendar, by the name the market's calendars file gives it.
    pub calendar: Option<(String, Span)>,
}

/// `rolled following`, `rolled modified following`, `rolled preceding`.
pub use crate::calendar::Roll;

#[derive(Clone, Debug, PartialEq)]
pub enum ScheduleKind {
    /// `2027-06-01, 2027-12-01` or `0.5y, 1y`
    List(Vec<(DateTerm, Span)>),
    /// `every 3m from 2027-03-01 to 2029-12-01`: both ends included.
    Every { count: u32, unit: PeriodUnit, from: (DateTerm, Span), to: (DateTerm, Span) },
    /// `252 steps from start to 1y`: the ends of `n` equal steps; `from` itself excluded.
    Steps { n: u32, from: (DateTerm, Span), to: (DateTerm, Span) },
    /// `business days from 2026-12-02 to 2027-12-01`: Monday to Friday, both ends included.
    BusinessDays { from: (DateTerm, Span), to: (DateTerm, Span) },
}

#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum PeriodUnit {
    Days,
    Weeks,
    Months,
    Years,
}

/// A statement inside a `for each` or `at` block, run in date order.
#[derive(Clone, Debug, PartialEq)]
pub enum Stmt {
    /// `let worst = min(perf(A), perf(B))`
    Let(Name, Expr),
    /// `missed = missed + 1` (assigns a `state`)
    Assign(Name, Expr),
    /// `if cond { ... } else { ... }`
    If { cond: Expr, then: Vec<Stmt>, otherwise: Vec<Stmt>, span: Span },
    /// `pay amount`, `pay amount on 2030-01-03`, or `pay amount on 2 business days after t
    /// calendar ZEX` (`on` is then the date after which the lag counts).
    Pay { amount: Expr, on: Option<Expr>, lag: Option<Lag>, span: Span },
    /// `end`: the product ends on this path; nothing later happens.
    End(Span),
    /// `pay amount on first touch(perf(X) >= 130% from start to t)`: paid at the moment
    /// the barrier is first touched in the window, discounted from that moment.
    PayAtHit { amount: Expr, condition: Box<Expr>, from: Box<Expr>, to: Box<Expr>, span: Span },
    /// `holder may end for amount` / `issuer may end for amount using x, y`: on this date
    /// the party may end the product against `amount`, paid on the date; priced by
    /// least-squares regression on `using` (default: every underlying's `perf` and every
    /// state).
    Choice { party: Party, amount: Expr, using: Vec<Expr>, span: Span },
}

/// A payment lag: `2 business days after t calendar ZEX` (the date itself is the `on` of
/// its `pay`).
#[derive(Clone, Debug, PartialEq)]
pub struct Lag {
    /// The number of business days, as written (`2`, a parameter); checked to be whole and
    /// not negative when typed.
    pub days: Expr,
    /// The holiday calendar, by the name the market's calendars file gives it; without it
    /// only weekends are skipped.
    pub calendar: Option<(String, Span)>,
    /// From the count to the end of the clause.
    pub span: Span,
}

/// Who holds an early-exercise right.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Party {
    /// `holder may end ...`: the holder ends the product when that is worth more to them.
    Holder,
    /// `issuer may end ...`: the issuer ends the product when that costs them less.
    Issuer,
}

impl Party {
    /// The word the payoff file uses.
    pub fn word(self) -> &'static str {
        match self {
            Party::Holder => "holder",
            Party::Issuer => "issuer",
        }
    }
}

#[derive(Clone, Debug, PartialEq)]
pub struct Expr {
    pub kind: ExprKind,
    pub span: Span,
}

#[derive(Clone, Debug, PartialEq)]
pub enum ExprKind {
    /// `2.5`, `1_000_000`, `70%` (stored as 0.7)
    Number(f64),
    /// `true`, `false`
    Flag(bool),
    /// `2027-12-01`, `0.5y`, `start`
    Date(DateTerm),
    /// `coupon`, `t`, `notional`
    Name(String),
    /// `-x`, `not x`
    Unary(UnaryOp, Box<Expr>),
    /// `a + b`, `a and b`, `a <= b`
    Binary(BinaryOp, Box<Expr>, Box<Expr>),
    /// `if c then a else b`
    If(Box<Expr>, Box<Expr>, Box<Expr>),
    /// `max(a, b, c)`, `perf(ZPHX)`, `level(ZPHX, 0.5y)`
    Call(Name, Vec<Expr>),
    /// `average(perf(ZPHX) over fixings)`
    Aggregate(Aggregate, Box<Expr>, Name),
    /// `touched(perf(OSMP) <= 65% from start to 1y)`
    Touched { condition: Box<Expr>, from: Box<Expr>, to: Box<Expr> },
    /// `highest(perf(VNTL) from start to 1y)`, `lowest(level(VNTL) from a to b)`: the
    /// continuously monitored extreme over a window (`highest` when `up`).
    Extreme { up: bool, observed: Box<Expr>, from: Box<Expr>, to: Box<Expr> },
}

#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum UnaryOp {
    Neg,
    Not,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum BinaryOp {
    Add,
    Sub,
    Mul,
    Div,
    Lt,
    Le,
    Gt,
    Ge,
    Eq,
    Ne,
    And,
    Or,
}

impl BinaryOp {
    pub fn symbol(self) -> &'static str {
        match self {
            BinaryOp::Add => "+",
            BinaryOp::Sub => "-",
            BinaryOp::Mul => "*",
            BinaryOp::Div => "/",
            BinaryOp::Lt => "<",
            BinaryOp::Le => "<=",
            BinaryOp::Gt => ">",
            BinaryOp::Ge => ">=",
            BinaryOp::Eq => "==",
            BinaryOp::Ne => "!=",
            BinaryOp::And => "and",
            BinaryOp::Or => "or",
        }
    }
}

/// Aggregates over the dates of a schedule up to the current date.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Aggregate {
    Average,
    /// `geometric_average(perf(X) over s)`: the exponential of the average logarithm.
    GeometricAverage,
    Sum,
    Highest,
    Lowest,
    Count,
    Any,
    All,
}

impl Aggregate {
    pub fn name(self) -> &'static str {
        match self {
            Aggregate::Average => "average",
            Aggregate::GeometricAverage => "geometric_average",
            Aggregate::Sum => "sum",
            Aggregate::Highest => "highest",
            Aggregate::Lowest => "lowest",
            Aggregate::Count => "count",
            Aggregate::Any => "any",
            Aggregate::All => "all",
        }
    }
}

/// The deepest nesting a payoff may have: brackets `(` and `{`, prefix `-` and `not`, and
/// `if` inside `if` (an `else if` chain counts one level per `if`), all counted together.
/// Checked on the raw text before the grammar, which recurses, sees it.
pub const MAX_NESTING: usize = 200;

/// The deepest expression tree a payoff may build: each operator of a chain such as
/// `a + b + c` is a level, so a sum may have this many terms.
pub const MAX_EXPRESSION_DEPTH: usize = 1_000;

/// The most dates one schedule may hold.
pub const MAX_SCHEDULE_DATES: usize = 100_000;

/// The furthest a date written in years may lie after the valuation date, and the longest
/// period of an `every` schedule.
pub const MAX_YEARS: u32 = 200;

/// The stack given to [`on_deep_stack`]: room for every stage that walks a tree as deep as
/// the limits above allow, even in an unoptimised build (where frames are large).
const DEEP_STACK_BYTES: usize = 64 << 20;

/// Runs `f` (parsing, checking or compiling a payoff: stages that recurse once per level of
/// nesting) on a thread with a stack of known size, so that a payoff under the limits never
/// overflows, whatever thread calls: a batch's worker threads have small stacks. If no
/// thread can be started, `f` runs on the calling thread.
pub fn on_deep_stack<T: Send>(f: impl FnOnce() -> T + Send) -> T {
    let job = std::sync::Mutex::new(Some(f));
    let take = || job.lock().unwrap_or_else(std::sync::PoisonError::into_inner).take();
    let ran = std::thread::scope(|scope| {
        let spawned =
            std::thread::Builder::new().stack_size(DEEP_STACK_BYTES).spawn_scoped(scope, || take().map(|f| f()));
        match spawned {
            Ok(handle) => handle.join().unwrap_or_else(|panic| std::panic::resume_unwind(panic)),
            Err(_) => None,
        }
    });
    match ran {
        Some(value) => value,
        None => take().map(|f| f()).expect("the job runs on one thread or the other"),
    }
}

/// The most rule calls the parser may make on one file. A file is read in time linear in
/// its length, about 1,000 calls a line, so this is plenty for any term sheet. It guards
/// against a grammar rule that reads the same text in two ways at each level of nesting:
/// twice the time per level, days for forty (`highest(` and `lowest(` once opened both a
/// window's extreme and an aggregate, and `if lowest(` on line after line took a second
/// for eighteen lines; one rule now reads both). The bound turns any such slip into an
/// error found in a fraction of a second.
const PARSE_CALLS: usize = 5_000_000;

/// Parses a payoff file's text into a syntax tree.
pub fn parse(source: &str) -> Result<File, Diagnostic> {
    check_nesting(source)?;
    pest::set_call_limit(std::num::NonZeroUsize::new(PARSE_CALLS));
    let mut pairs = PayoffParser::parse(Rule::file, source).map_err(|e| from_pest(e, source))?;
    let file = pairs.next().expect("the file rule always yields one pair");
    let mut lowering = Lowering { errors: Vec::new() };
    let items = file.into_inner().filter(|p| p.as_rule() != Rule::EOI).map(|p| lowering.item(p)).collect();
    match lowering.errors.into_iter().next() {
        Some(e) => Err(e),
        None => Ok(File { items }),
    }
}

/// The first `(` of `source` never closed, outside comments and strings.
fn unclosed_paren(source: &str) -> Option<usize> {
    let mut open: Vec<usize> = Vec::new();
    let (mut comment, mut string) = (false, false);
    for (i, c) in source.char_indices() {
        match c {
            '\n' => comment = false,
            _ if comment => {}
            '"' => string = !string,
            _ if string => {}
            '#' => comment = true,
            '(' => open.push(i),
            ')' => {
                open.pop();
            }
            _ => {}
        }
    }
    open.first().copied()
}

/// A cheap scan of the raw text that refuses nesting deeper than [`MAX_NESTING`] before the
/// recursive grammar can run out of stack. It over-counts rather than under-counts: every
/// `-` and `not` in a row counts, and every `if` since the last statement boundary (`=`,
/// `pay`, `end`, a keyword starting a top-level line, or a `}` not followed by `else`).
fn check_nesting(source: &str) -> Result<(), Diagnostic> {
    struct Frame {
        /// Levels open outside this bracket, the bracket itself included.
        base: usize,
        /// `if`s open inside this bracket.
        ifs: usize,
        /// Prefix operators in a row.
        run: usize,
    }
    let too_deep = |at: usize, len: usize| {
        Diagnostic::at(
            Span::new(at, at + len),
            format!("the payoff is nested more than {MAX_NESTING} levels deep here"),
        )
        .with_fix(format!(
            "brackets, `-`, `not` and `if` inside one another count together, at most {MAX_NESTING}; \
                 name the inner parts with `let`, or write a long `else if` chain as separate `if`s"
        ))
    };
    let bytes = source.as_bytes();
    let mut frames = vec![Frame { base: 0, ifs: 0, run: 0 }];
    let mut after_brace = false;
    let mut i = 0;
    while i < bytes.len() {
        let b = bytes[i];
        let start = i;
        match b {
            b'#' => {
                while i < bytes.len() && bytes[i] != b'\n' && bytes[i] != b'\r' {
                    i += 1;
                }
                continue;
            }
            b' ' | b'\t' | b'\r' | b'\n' => {
                i += 1;
                continue;
            }
            _ => {}
        }
        let top = frames.last_mut().expect("the outermost frame stays");
        if after_brace {
            after_brace = false;
            if !source[i..].starts_with("else") {
                top.ifs = 0;
                top.run = 0;
            }
        }
        match b {
            b'"' => {
                i += 1;
                while i < bytes.len() && !matches!(bytes[i], b'"' | b'\n' | b'\r') {
                    i += 1;
                }
                i += 1;
                top.run = 0;
            }
            b'(' | b'{' => {
                let base = top.base + top.ifs + top.run + 1;
                if base > MAX_NESTING {
                    return Err(too_deep(start, 1));
                }
                frames.push(Frame { base, ifs: 0, run: 0 });
                i += 1;
            }
            b')' | b'}' => {
                if frames.len() > 1 {
                    frames.pop();
                }
                let top = frames.last_mut().expect("the outermost frame stays");
                top.run = 0;
                after_brace = b == b'}';
                i += 1;
            }
            b'-' => {
                top.run += 1;
                if top.base + top.ifs + top.run > MAX_NESTING {
                    return Err(too_deep(start, 1));
                }
                i += 1;
            }
            b'<' | b'>' | b'!' | b'=' => {
                let two = bytes.get(i + 1) == Some(&b'=');
                if b == b'=' && !two {
                    // `name = value`: a new value starts.
                    top.ifs = 0;
                    top.run = 0;
                }
                i += if two { 2 } else { 1 };
            }
            c if c.is_ascii_alphanumeric() || c == b'_' || c >= 0x80 => {
                while i < bytes.len() && (bytes[i].is_ascii_alphanumeric() || matches!(bytes[i], b'_' | b'.')) {
                    i += 1;
                }
                if i == start {
                    // A character outside ASCII: the grammar reports it.
                    i += source[i..].chars().next().map_or(1, char::len_utf8);
                    continue;
                }
                match &source[start..i] {
                    "not" => {
                        top.run += 1;
                        if top.base + top.ifs + top.run > MAX_NESTING {
                            return Err(too_deep(start, 3));
                        }
                    }
                    "if" => {
                        top.ifs += 1;
                        if top.base + top.ifs + top.run > MAX_NESTING {
                            return Err(too_deep(start, 2));
                        }
                    }
                    "pay" | "end" | "param" | "dates" | "state" | "for" | "at" | "let" => {
                        top.ifs = 0;
                        top.run = 0;
                    }
                    "then" | "else" | "and" | "or" | "on" | "from" | "to" | "over" => {}
                    _ => top.run = 0,
                }
            }
            _ => i += 1,
        }
    }
    Ok(())
}

fn pratt() -> PrattParser<Rule> {
    PrattParser::new()
        .op(Op::infix(Rule::or, Assoc::Left))
        .op(Op::infix(Rule::and, Assoc::Left))
        .op(Op::prefix(Rule::not))
        .op(Op::infix(Rule::lt, Assoc::Left)
            | Op::infix(Rule::le, Assoc::Left)
            | Op::infix(Rule::gt, Assoc::Left)
            | Op::infix(Rule::ge, Assoc::Left)
            | Op::infix(Rule::eq, Assoc::Left)
            | Op::infix(Rule::ne, Assoc::Left))
        .op(Op::infix(Rule::add, Assoc::Left) | Op::infix(Rule::sub, Assoc::Left))
        .op(Op::infix(Rule::mul, Assoc::Left) | Op::infix(Rule::div, Assoc::Left))
        .op(Op::prefix(Rule::neg))
}

fn span_of(pair: &Pair<'_, Rule>) -> Span {
    let s = pair.as_span();
    Span::new(s.start(), s.end())
}

static PRATT: std::sync::LazyLock<PrattParser<Rule>> = std::sync::LazyLock::new(pratt);

struct Lowering {
    errors: Vec<Diagnostic>,
}

impl Lowering {
    fn item(&mut self, pair: Pair<'_, Rule>) -> Item {
        let span = span_of(&pair);
        let rule = pair.as_rule();
        let mut inner = children(pair);
        match rule {
            Rule::product_item => {
                let s = inner.next().unwrap();
                Item::Product(string_text(&s), span_of(&s))
            }
            Rule::currency_item => Item::Currency(name(inner.next().unwrap())),
            Rule::notional_item => Item::Notional(self.expr(inner.next().unwrap())),
            Rule::underlyings_item => Item::Underlyings(inner.map(name).collect()),
            Rule::market_item => {
                let s = inner.next().unwrap();
                Item::Market(string_text(&s), span_of(&s))
            }
            Rule::start_item => Item::Start(self.expr(inner.next().unwrap())),
            Rule::param_item => {
                let n = name(inner.next().unwrap());
                Item::Param(n, self.expr(inner.next().unwrap()))
            }
            Rule::state_item => {
                let n = name(inner.next().unwrap());
                Item::State(n, self.expr(inner.next().unwrap()))
            }
            Rule::dates_item => {
                let n = name(inner.next().unwrap());
                let mut schedule = self.schedule(inner.next().unwrap());
                for clause in inner {
                    let rule = clause.as_rule();
                    let span = span_of(&clause);
                    let Some(word) = clause.into_inner().nth(1) else { continue };
                    if rule == Rule::roll_clause {
                        let roll = match word.as_str().split_whitespace().next() {
                            Some("modified") => Roll::ModifiedFollowing,
                            Some("following") => Roll::Following,
                            _ => Roll::Preceding,
                        };
                        schedule.rolling.roll = Some((roll, span));
                    } else {
                        schedule.rolling.calendar = Some((word.as_str().to_string(), span_of(&word)));
                    }
                }
                Item::Dates(n, schedule)
            }
            Rule::each_block => {
                let var = name(inner.next().unwrap());
                let schedule = name(inner.next().unwrap());
                let body = self.block(inner.next().unwrap());
                Item::Each { var, schedule, body, span }
            }
            Rule::at_block => {
                let date = self.expr(inner.next().unwrap());
                let body = self.block(inner.next().unwrap());
                Item::At { date, body, span }
            }
            Rule::stray_stmt => Item::Stray(self.stmt(inner.next().unwrap()), span),
            other => unreachable!("grammar yields no item {other:?}"),
        }
    }

    fn schedule(&mut self, pair: Pair<'_, Rule>) -> Schedule {
        let span = span_of(&pair);
        let rule = pair.as_rule();
        let mut inner = children(pair);
        let kind = match rule {
            Rule::date_list => ScheduleKind::List(inner.map(|p| self.date_term(p)).collect()),
            Rule::every_sched => {
                let period = inner.next().unwrap();
                let text = period.as_str();
                let (digits, letter) = text.split_at(text.len() - 1);
                let unit = match letter {
                    "d" => PeriodUnit::Days,
                    "w" => PeriodUnit::Weeks,
                    "m" => PeriodUnit::Months,
                    _ => PeriodUnit::Years,
                };
                let most = match unit {
                    PeriodUnit::Days => MAX_YEARS * 365,
                    PeriodUnit::Weeks => MAX_YEARS * 52,
                    PeriodUnit::Months => MAX_YEARS * 12,
                    PeriodUnit::Years => MAX_YEARS,
                };
                let count = if digits.parse::<u32>().is_ok_and(|n| n > most) || digits.parse::<u32>().is_err() {
                    self.errors.push(
                        Diagnostic::at(span_of(&period), format!("`{text}` is too long a period"))
                            .with_fix(format!("a period is at most {MAX_YEARS} years, so at most {most}{letter}")),
                    );
                    1
                } else {
                    self.count(digits, span_of(&period), most, "a period")
                };
                let from = self.date_term(inner.next().unwrap());
                let to = self.date_term(inner.next().unwrap());
                ScheduleKind::Every { count, unit, from, to }
            }
            Rule::steps_sched => {
                let n = inner.next().unwrap();
                let n = self.count(
                    n.as_str(),
                    span_of(&n),
                    MAX_SCHEDULE_DATES as u32,
                    "the number of dates in one schedule",
                );
                let from = self.date_term(inner.next().unwrap());
                let to = self.date_term(inner.next().unwrap());
                ScheduleKind::Steps { n, from, to }
            }
            Rule::business_sched => {
                let from = self.date_term(inner.next().unwrap());
                let to = self.date_term(inner.next().unwrap());
                ScheduleKind::BusinessDays { from, to }
            }
            other => unreachable!("grammar yields no schedule {other:?}"),
        };
        Schedule { kind, span, rolling: Rolling::default() }
    }

    /// A whole count from 1 to `most`; `what` names it in the message.
    fn count(&mut self, digits: &str, span: Span, most: u32, what: &str) -> u32 {
        let n = digits.parse::<u32>();
        match n {
            Ok(n) if (1..=most).contains(&n) => n,
            Ok(0) => {
                self.errors.push(
                    Diagnostic::at(span, format!("`{digits}` is not a usable count"))
                        .with_fix("write a whole number from 1 up, such as `3` in `every 3m`"),
                );
                1
            }
            _ => {
                self.errors.push(
                    Diagnostic::at(span, format!("`{digits}` is too many: {what} is at most {most}"))
                        .with_fix(format!("write a whole number from 1 to {most}")),
                );
                1
            }
        }
    }

    /// `1.5y`: years after the valuation date, at most [`MAX_YEARS`].
    fn years(&mut self, text: &str, span: Span) -> DateTerm {
        let y = decimal(&text[..text.len() - 1]);
        if y.is_finite() && y <= f64::from(MAX_YEARS) {
            return DateTerm::Years(y);
        }
        self.errors.push(
            Diagnostic::at(
                span,
                format!(
                    "`{}` is too far ahead: dates lie at most {MAX_YEARS} years after the valuation date",
                    shortened(text)
                ),
            )
            .with_fix(format!("write a number of years from 0 to {MAX_YEARS}, or an ISO date such as 2031-12-01")),
        );
        DateTerm::Years(0.0)
    }

    fn date_term(&mut self, pair: Pair<'_, Rule>) -> (DateTerm, Span) {
        let span = span_of(&pair);
        let term = match pair.as_rule() {
            Rule::iso_date => self.iso_date(pair.as_str(), span),
            Rule::year_offset => self.years(pair.as_str(), span),
            Rule::start_ref => DateTerm::Start,
            other => unreachable!("grammar yields no date term {other:?}"),
        };
        (term, span)
    }

    fn iso_date(&mut self, text: &str, span: Span) -> DateTerm {
        match Date::parse(text) {
            Some(d) if d.in_range() => DateTerm::Iso(d),
            Some(_) => {
                self.errors.push(
                    Diagnostic::at(span, format!("{text} is outside the dates pathfold prices")).with_fix(format!(
                        "write a date from {}-01-01 to {}-12-31",
                        crate::date::FIRST_YEAR,
                        crate::date::LAST_YEAR
                    )),
                );
                DateTerm::Years(0.0)
            }
            None => {
                self.errors.push(
                    Diagnostic::at(span, format!("`{text}` is not a calendar date"))
                        .with_fix("write an ISO 8601 date YYYY-MM-DD that exists, such as 2027-02-28"),
                );
                DateTerm::Years(0.0)
            }
        }
    }

    fn block(&mut self, pair: Pair<'_, Rule>) -> Vec<Stmt> {
        children(pair).map(|p| self.stmt(p)).collect()
    }

    fn stmt(&mut self, pair: Pair<'_, Rule>) -> Stmt {
        let span = span_of(&pair);
        let rule = pair.as_rule();
        let mut inner = children(pair);
        match rule {
            Rule::let_stmt => {
                let n = name(inner.next().unwrap());
                Stmt::Let(n, self.expr(inner.next().unwrap()))
            }
            Rule::assign_stmt => {
                let n = name(inner.next().unwrap());
                Stmt::Assign(n, self.expr(inner.next().unwrap()))
            }
            Rule::if_stmt => {
                let cond = self.expr(inner.next().unwrap());
                let then = self.block(inner.next().unwrap());
                let otherwise = match inner.next() {
                    None => Vec::new(),
                    Some(p) if p.as_rule() == Rule::if_stmt => vec![self.stmt(p)],
                    Some(p) => self.block(p),
                };
                Stmt::If { cond, then, otherwise, span }
            }
            Rule::pay_stmt => {
                let amount = self.expr(inner.next().unwrap());
                let (on, lag) = match inner.next() {
                    Some(p) if p.as_rule() == Rule::lagged_date => {
                        let (on, lag) = self.lagged_date(p);
                        (Some(on), Some(lag))
                    }
                    Some(p) => (Some(self.expr(p)), None),
                    None => (None, None),
                };
                Stmt::Pay { amount, on, lag, span }
            }
            Rule::end_stmt => Stmt::End(span),
            Rule::pay_hit_stmt => {
                let amount = self.expr(inner.next().unwrap());
                let condition = Box::new(self.expr(inner.next().unwrap()));
                let from = Box::new(self.expr(inner.next().unwrap()));
                let to = Box::new(self.expr(inner.next().unwrap()));
                Stmt::PayAtHit { amount, condition, from, to, span }
            }
            Rule::choice_stmt => {
                let mut inner = inner.filter(|p| !matches!(p.as_rule(), Rule::kw_may | Rule::kw_using));
                let party = if inner.next().unwrap().as_str() == "holder" { Party::Holder } else { Party::Issuer };
                let amount = self.expr(inner.next().unwrap());
                let using = inner.map(|p| self.expr(p)).collect();
                Stmt::Choice { party, amount, using, span }
            }
            other => unreachable!("grammar yields no statement {other:?}"),
        }
    }

    fn expr(&mut self, pair: Pair<'_, Rule>) -> Expr {
        self.expr_depth(pair).0
    }

    /// `2 business days after t calendar ZEX`: the date `t` and the lag.
    fn lagged_date(&mut self, pair: Pair<'_, Rule>) -> (Expr, Lag) {
        let span = span_of(&pair);
        let mut inner = children(pair);
        let count = inner.next().unwrap();
        let count_span = span_of(&count);
        let negative = count.as_str().starts_with('-');
        let value = self.primary(count.into_inner().next().unwrap()).0;
        let days = if negative {
            Expr { kind: ExprKind::Unary(UnaryOp::Neg, Box::new(value)), span: count_span }
        } else {
            value
        };
        let on = self.expr(inner.next().unwrap());
        let calendar = inner.next().and_then(|c| c.into_inner().nth(1)).map(|w| (w.as_str().to_string(), span_of(&w)));
        (on, Lag { days, calendar, span })
    }

    /// An expression with the depth of its tree. A tree deeper than
    /// [`MAX_EXPRESSION_DEPTH`] is refused while it is built, so that no later stage (nor
    /// dropping the tree) recurses deeper than that.
    fn expr_depth(&mut self, pair: Pair<'_, Rule>) -> (Expr, usize) {
        let too_deep = std::cell::Cell::new(None);
        let out = PRATT
            .map_primary(|p| self.primary(p))
            .map_prefix(|op, (rhs, depth)| {
                let span = span_of(&op).join(rhs.span);
                let unary = if op.as_rule() == Rule::neg { UnaryOp::Neg } else { UnaryOp::Not };
                bounded(Expr { kind: ExprKind::Unary(unary, Box::new(rhs)), span }, depth + 1, span_of(&op), &too_deep)
            })
            .map_infix(|(lhs, dl), op, (rhs, dr)| {
                let at = span_of(&op);
                let op = match op.as_rule() {
                    Rule::add => BinaryOp::Add,
                    Rule::sub => BinaryOp::Sub,
                    Rule::mul => BinaryOp::Mul,
                    Rule::div => BinaryOp::Div,
                    Rule::lt => BinaryOp::Lt,
                    Rule::le => BinaryOp::Le,
                    Rule::gt => BinaryOp::Gt,
                    Rule::ge => BinaryOp::Ge,
                    Rule::eq => BinaryOp::Eq,
                    Rule::ne => BinaryOp::Ne,
                    Rule::and => BinaryOp::And,
                    _ => BinaryOp::Or,
                };
                let span = lhs.span.join(rhs.span);
                bounded(
                    Expr { kind: ExprKind::Binary(op, Box::new(lhs), Box::new(rhs)), span },
                    dl.max(dr) + 1,
                    at,
                    &too_deep,
                )
            })
            .parse(children(pair));
        if let Some(at) = too_deep.get() {
            self.too_deep(at);
        }
        out
    }

    fn too_deep(&mut self, at: Span) {
        if self.errors.is_empty() {
            self.errors.push(
                Diagnostic::at(
                    at,
                    format!("this expression holds more than {MAX_EXPRESSION_DEPTH} operations one inside another"),
                )
                .with_fix(format!(
                    "an expression takes at most {MAX_EXPRESSION_DEPTH} levels (each operator of a chain such as \
                     `a + b + c` is one); split it into several `let`s and combine those"
                )),
            );
        }
    }

    fn primary(&mut self, pair: Pair<'_, Rule>) -> (Expr, usize) {
        let span = span_of(&pair);
        let text = pair.as_str();
        let mut depth = 0;
        let kind = match pair.as_rule() {
            Rule::expr => return self.expr_depth(pair),
            Rule::number => ExprKind::Number(decimal(text)),
            Rule::percent => ExprKind::Number(decimal(&text[..text.len() - 1]) / 100.0),
            Rule::boolean => ExprKind::Flag(text == "true"),
            Rule::iso_date => ExprKind::Date(self.iso_date(text, span)),
            Rule::year_offset => ExprKind::Date(self.years(text, span)),
            Rule::start_ref => ExprKind::Date(DateTerm::Start),
            Rule::ident => ExprKind::Name(text.to_string()),
            Rule::if_expr => {
                let mut inner = children(pair);
                let (c, dc) = self.expr_depth(inner.next().unwrap());
                let (a, da) = self.expr_depth(inner.next().unwrap());
                let (b, db) = self.expr_depth(inner.next().unwrap());
                depth = dc.max(da).max(db);
                ExprKind::If(Box::new(c), Box::new(a), Box::new(b))
            }
            Rule::touched => {
                let mut inner = children(pair);
                let (condition, dc) = self.expr_depth(inner.next().unwrap());
                let (from, df) = self.expr_depth(inner.next().unwrap());
                let (to, dt) = self.expr_depth(inner.next().unwrap());
                depth = dc.max(df).max(dt);
                ExprKind::Touched { condition: Box::new(condition), from: Box::new(from), to: Box::new(to) }
            }
            Rule::extreme => {
                let mut inner = children(pair);
                let up = inner.next().unwrap().as_str() == "highest";
                let (observed, dc) = self.expr_depth(inner.next().unwrap());
                let tail = inner.next().unwrap();
                if tail.as_rule() == Rule::over_dates {
                    depth = dc;
                    let agg = if up { Aggregate::Highest } else { Aggregate::Lowest };
                    ExprKind::Aggregate(agg, Box::new(observed), name(children(tail).next().unwrap()))
                } else {
                    let mut window = children(tail);
                    let (from, df) = self.expr_depth(window.next().unwrap());
                    let (to, dt) = self.expr_depth(window.next().unwrap());
                    depth = dc.max(df).max(dt);
                    ExprKind::Extreme { up, observed: Box::new(observed), from: Box::new(from), to: Box::new(to) }
                }
            }
            Rule::aggregate => {
                let mut inner = children(pair);
                let agg = match inner.next().unwrap().as_str() {
                    "average" => Aggregate::Average,
                    "geometric_average" => Aggregate::GeometricAverage,
                    "sum" => Aggregate::Sum,
                    "count" => Aggregate::Count,
                    "any" => Aggregate::Any,
                    _ => Aggregate::All,
                };
                let (body, d) = self.expr_depth(inner.next().unwrap());
                depth = d;
                let schedule = name(inner.next().unwrap());
                ExprKind::Aggregate(agg, Box::new(body), schedule)
            }
            Rule::call => {
                let mut inner = children(pair);
                let callee = name(inner.next().unwrap());
                let mut args = Vec::new();
                for p in inner {
                    let (a, d) = self.expr_depth(p);
                    depth = depth.max(d);
                    args.push(a);
                }
                ExprKind::Call(callee, args)
            }
            other => unreachable!("grammar yields no primary {other:?}"),
        };
        // Leaves are depth 0; a node holding others is one more than its deepest.
        let depth = match kind {
            ExprKind::If(..)
            | ExprKind::Touched { .. }
            | ExprKind::Extreme { .. }
            | ExprKind::Aggregate(..)
            | ExprKind::Call(..) => depth + 1,
            _ => 0,
        };
        let too_deep = std::cell::Cell::new(None);
        let out = bounded(Expr { kind, span }, depth, span, &too_deep);
        if let Some(at) = too_deep.get() {
            self.too_deep(at);
        }
        out
    }
}

/// `e` with its depth, or a stand-in leaf when it is deeper than [`MAX_EXPRESSION_DEPTH`]
/// (the place is noted in `too_deep`); the tree goes away at most one level too deep.
fn bounded(e: Expr, depth: usize, at: Span, too_deep: &std::cell::Cell<Option<Span>>) -> (Expr, usize) {
    if depth <= MAX_EXPRESSION_DEPTH {
        return (e, depth);
    }
    if too_deep.get().is_none() {
        too_deep.set(Some(at));
    }
    (Expr { kind: ExprKind::Number(0.0), span: e.span }, 0)
}

/// The children of a pair without the keywords, which carry no meaning once parsed.
fn children(pair: Pair<'_, Rule>) -> impl Iterator<Item = Pair<'_, Rule>> {
    pair.into_inner().filter(|p| !is_keyword(p.as_rule()))
}

fn is_keyword(rule: Rule) -> bool {
    matches!(
        rule,
        Rule::kw_product
            | Rule::kw_currency
            | Rule::kw_notional
            | Rule::kw_underlyings
            | Rule::kw_market
            | Rule::kw_start
            | Rule::kw_param
            | Rule::kw_dates
            | Rule::kw_state
            | Rule::kw_for
            | Rule::kw_each
            | Rule::kw_in
            | Rule::kw_at
            | Rule::kw_let
            | Rule::kw_if
            | Rule::kw_then
            | Rule::kw_else
            | Rule::kw_pay
            | Rule::kw_on
            | Rule::kw_end
            | Rule::kw_and
            | Rule::kw_or
            | Rule::kw_not
            | Rule::kw_every
            | Rule::kw_from
            | Rule::kw_to
            | Rule::kw_steps
            | Rule::kw_business
            | Rule::kw_days
            | Rule::kw_after
            | Rule::kw_over
            | Rule::kw_touched
            | Rule::kw_first
            | Rule::kw_touch
    )
}

fn name(pair: Pair<'_, Rule>) -> Name {
    Name { text: pair.as_str().to_string(), span: span_of(&pair) }
}

fn string_text(pair: &Pair<'_, Rule>) -> String {
    pair.clone().into_inner().next().map(|p| p.as_str().to_string()).unwrap_or_default()
}

/// `text`, cut in the middle when it is too long to quote in a message.
fn shortened(text: &str) -> String {
    let chars: Vec<char> = text.chars().collect();
    if chars.len() <= 24 {
        return text.to_string();
    }
    let head: String = chars[..10].iter().collect();
    let tail: String = chars[chars.len() - 10..].iter().collect();
    format!("{head}...{tail} ({} characters)", chars.len())
}

/// `1_000_000.5` → 1000000.5 (the grammar guarantees the digits).
fn decimal(text: &str) -> f64 {
    text.replace('_', "").parse().expect("the grammar only passes decimal digits")
}

/// A `may end` statement that stops before its amount (`issuer may end at notional`):
/// say what the statement's words are.
fn choice_slip(source: &str, at: usize) -> Option<Diagnostic> {
    let line_start = source[..at].rfind(['\n', '\r']).map_or(0, |i| i + 1);
    let before: Vec<&str> = source[line_start..at].split_whitespace().collect();
    let party = *before.first()?;
    if !matches!(party, "issuer" | "holder") || before.len() < 2 || before[1] != "may" || before.len() > 3 {
        return None;
    }
    let word: String = source[at..].chars().take_while(|c| !c.is_whitespace()).collect();
    let end = at + word.len().max(1).min(source.len() - at);
    Some(
        Diagnostic::at(
            Span::new(at, end),
            format!("`{party} may` is followed by `end for` and the amount paid when the {party} ends the product"),
        )
        .with_fix(format!("write `{party} may end for AMOUNT`, for example `{party} may end for notional`")),
    )
}

/// Turns pest's error into our diagnostic, with words a payoff writer would use.
fn from_pest(err: pest::error::Error<Rule>, source: &str) -> Diagnostic {
    use pest::error::{ErrorVariant, InputLocation};
    let at = match err.location {
        InputLocation::Pos(p) => p,
        InputLocation::Span((s, _)) => s,
    };
    if matches!(&err.variant, ErrorVariant::CustomError { message } if message.starts_with("call limit")) {
        // Where the parser gave up says little: point at the first `(` never closed.
        let open = unclosed_paren(source).unwrap_or(at.min(source.len()));
        return Diagnostic::at(
            Span::new(open, (open + 1).min(source.len())),
            "brackets opened here and after it are never closed, in a way the parser cannot read in reasonable time",
        )
        .with_fix("close each `(` where its call or group ends; a long expression reads more easily split with `let`");
    }
    if let Some(d) = slip(source, at).or_else(|| choice_slip(source, at)) {
        return d;
    }
    // A reserved word where a name belongs is the likeliest slip: say so plainly.
    let word: String = source[at..].chars().take_while(|c| c.is_ascii_alphanumeric() || *c == '_').collect();
    let line_start = source[..at].rfind('\n').map_or(0, |i| i + 1);
    let at_line_start = source[line_start..at].trim().is_empty();
    if at_line_start && !word.is_empty() && !RESERVED.contains(&word.as_str()) {
        if let Some(near) = crate::diagnostic::closest(&word, TOP_LEVEL.iter().copied()) {
            return Diagnostic::at(
                Span::new(at, at + word.len()),
                format!("`{word}` does not start a line of a payoff file"),
            )
            .with_fix(format!("did you mean `{near}`?"));
        }
    }
    if RESERVED.contains(&word.as_str()) {
        return Diagnostic::at(
            Span::new(at, at + word.len()),
            format!("`{word}` is a reserved word and cannot be a name"),
        )
        .with_fix(format!(
            "pick another name, such as `{word}_level`; the reserved words are listed in grammar/REFERENCE.md"
        ));
    }
    // A bracket left open before the place the parser stopped is the likeliest cause.
    if let Some(open) = unclosed_paren(source).filter(|&open| open < at) {
        return Diagnostic::at(Span::new(open, open + 1), "this `(` is never closed")
            .with_fix("close it with `)` where its call or group ends");
    }
    let mut expected = match &err.variant {
        ErrorVariant::ParsingError { positives, .. } => {
            positives.iter().filter_map(|r| describe(*r)).collect::<Vec<_>>()
        }
        ErrorVariant::CustomError { message } => vec![message.clone()],
    };
    expected.sort();
    expected.dedup();
    let message = if expected.is_empty() {
        "this is not valid payoff syntax".to_string()
    } else {
        format!("expected {}", join_or(&expected))
    };
    Diagnostic::at(Span::new(at, at + 1), message).with_fix("compare the line with the syntax in grammar/REFERENCE.md")
}

/// A specific hint for a natural slip at byte `at`, where the grammar stopped: operators
/// and words from other languages, and the forms of `if` and `touched` mixed up.
fn slip(source: &str, at: usize) -> Option<Diagnostic> {
    let rest = &source[at..];
    // Only what stands before on the same line counts.
    let before = source[..at].trim_end_matches([' ', '\t']);
    let line_before = &source[source[..at].rfind(['\n', '\r']).map_or(0, |i| i + 1)..at];
    let word: String = rest.chars().take_while(|c| c.is_ascii_alphanumeric() || *c == '_').collect();
    let hint = |start: usize, len: usize, message: &str, fix: &str| {
        Some(Diagnostic::at(Span::new(start, start + len), message).with_fix(fix))
    };
    if rest.starts_with("&&") {
        return hint(at, 2, "`&&` is not an operator in pathfold", "write `and`, as in `perf(A) > 1 and perf(B) > 1`");
    }
    if rest.starts_with("||") {
        return hint(
            at,
            2,
            "`||` is not an operator in pathfold",
            "write `or`, as in `perf(A) < 70% or perf(B) < 70%`",
        );
    }
    if word == "elif" {
        return hint(at, 4, "`elif` is not a pathfold word", "write `else if`, as in `} else if perf(A) > 1 {`");
    }
    if rest.starts_with('*') && before.ends_with('*') {
        return hint(
            before.len() - 1,
            2,
            "`**` is not an operator in pathfold: there is no power operator",
            "multiply (`x * x`), or write `exp(y * log(x))` for x to the power y",
        );
    }
    let after_percent = before.ends_with('%') && rest.starts_with(|c: char| c.is_ascii_alphanumeric() || c == '(');
    if rest.starts_with('%') || after_percent {
        let start = if after_percent { before.len() - 1 } else { at };
        return hint(
            start,
            1,
            "`%` only marks a percentage, right after its number (70% is 0.70); it is not a remainder operator",
            "for a remainder write `remainder(x, n)`",
        );
    }
    if let Some(len) = period_with_exponent(rest) {
        return hint(
            at,
            len,
            "a period is a whole number of days, weeks, months or years, written out without an exponent",
            "write the number in full, as in `5y` or `18m`; dates lie at most 200 years after the valuation date",
        );
    }
    let words_before = line_before.split(|c: char| !c.is_ascii_alphanumeric() && c != '_');
    if word == "then" && words_before.clone().any(|w| w == "if") {
        return hint(
            at,
            4,
            "an `if` statement takes its branch in braces, not after `then`",
            "write `if c { pay x }`; `then` belongs to the value form `if c then a else b`, which needs its `else`",
        );
    }
    // Inside an unclosed `touched(` or `first touch(`: the window is missing or misspelt.
    let opened = |word: &'static str| source[..at].rfind(word).map(|i| (i, word));
    if let Some((open, word)) = opened("touched(").max(opened("first touch(")) {
        let inside = &source[open + word.len()..at];
        let depth = inside.chars().fold(1i32, |d, c| match c {
            '(' => d + 1,
            ')' => d - 1,
            _ => d,
        });
        if depth > 0 && (!inside.contains(" from ") || rest.starts_with(')')) {
            if word == "first touch(" {
                return hint(
                    open,
                    "first touch".len(),
                    "`first touch(...)` needs its window: the condition, then `from DATE to DATE`",
                    "write for example `pay notional * 5% on first touch(perf(ZPHX) >= 130% from start to 1y)`",
                );
            }
            return hint(
                open,
                "touched".len(),
                "`touched(...)` needs its window: the condition, then `from DATE to DATE`",
                "write for example `touched(perf(OSMP) <= 65% from start to 1y)`",
            );
        }
    }
    None
}

/// The length of a period written with an exponent (`1e20y`, `2.5E3d`) at the start of
/// `text`, if there is one.
fn period_with_exponent(text: &str) -> Option<usize> {
    let b = text.as_bytes();
    let digits = |mut i: usize| {
        while i < b.len() && (b[i].is_ascii_digit() || b[i] == b'_') {
            i += 1;
        }
        i
    };
    let mut i = digits(0);
    if i == 0 {
        return None;
    }
    if b.get(i) == Some(&b'.') {
        i = digits(i + 1);
    }
    if !matches!(b.get(i), Some(b'e' | b'E')) {
        return None;
    }
    i += 1;
    if matches!(b.get(i), Some(b'+' | b'-')) {
        i += 1;
    }
    let end = digits(i);
    if end == i || !matches!(b.get(end), Some(b'd' | b'w' | b'm' | b'y')) {
        return None;
    }
    let after = b.get(end + 1);
    (!after.is_some_and(|c| c.is_ascii_alphanumeric() || *c == b'_')).then_some(end + 1)
}

/// The words that start a top-level line.
const TOP_LEVEL: &[&str] =
    &["product", "currency", "notional", "underlyings", "market", "start", "param", "dates", "state", "for", "at"];

/// The grammar's reserved words (rule `keyword`).
const RESERVED: &[&str] = &[
    "start",
    "param",
    "dates",
    "state",
    "for",
    "at",
    "let",
    "if",
    "then",
    "else",
    "pay",
    "on",
    "end",
    "and",
    "or",
    "not",
    "touched",
    "true",
    "false",
    "geometric_average",
    "average",
    "sum",
    "highest",
    "lowest",
    "count",
    "any",
    "all",
];

fn join_or(items: &[String]) -> String {
    match items {
        [] => String::new(),
        [one] => one.clone(),
        [init @ .., last] => format!("{} or {}", init.join(", "), last),
    }
}

fn describe(rule: Rule) -> Option<String> {
    let s = match rule {
        Rule::EOI => "the end of the file",
        Rule::product_item
        | Rule::currency_item
        | Rule::notional_item
        | Rule::underlyings_item
        | Rule::market_item
        | Rule::start_item
        | Rule::param_item
        | Rule::dates_item
        | Rule::state_item
        | Rule::each_block
        | Rule::at_block => "a top-level line (product, currency, notional, underlyings, market, start, param, dates, state, for each, at)",
        Rule::expr | Rule::primary => "an expression",
        Rule::ident => "a name",
        Rule::string => "a quoted text",
        Rule::schedule | Rule::every_sched | Rule::steps_sched | Rule::business_sched | Rule::date_list => {
            "a schedule (dates, `every 3m from .. to ..`, `N steps from .. to ..` or `business days from .. to ..`)"
        }
        Rule::iso_date | Rule::year_offset | Rule::start_ref => "a date (2027-03-01, 1.5y or start)",
        Rule::period => "a period such as 3m, 1w, 1d or 1y",
        Rule::integer => "a whole number",
        Rule::block => "`{`",
        Rule::let_stmt | Rule::if_stmt | Rule::pay_stmt | Rule::pay_hit_stmt | Rule::end_stmt | Rule::assign_stmt => {
            "a statement (let, if, pay, end, or `name = value`)"
        }
        Rule::choice_stmt => "a statement (let, if, pay, end, `holder may end for ...`, or `name = value`)",
        Rule::or | Rule::and | Rule::le | Rule::ge | Rule::ne | Rule::eq | Rule::lt | Rule::gt
        | Rule::add | Rule::sub | Rule::mul | Rule::div => "an operator",
        Rule::number | Rule::percent => "a number",
        // After `highest(x`: a window (`from .. to ..`) or a schedule (`over dates`).
        Rule::kw_from => "`from`",
        Rule::kw_to => "`to`",
        Rule::kw_over => "`over`",
        _ => return None,
    };
    Some(s.to_string())
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A compact printed form of an expression, for tests.
    fn show(e: &Expr) -> String {
        match &e.kind {
            ExprKind::Number(x) => format!("{x}"),
            ExprKind::Flag(b) => format!("{b}"),
            ExprKind::Date(d) => format!("{d:?}"),
            ExprKind::Name(n) => n.clone(),
            ExprKind::Unary(UnaryOp::Neg, a) => format!("(- {})", show(a)),
            ExprKind::Unary(UnaryOp::Not, a) => format!("(not {})", show(a)),
            ExprKind::Binary(op, a, b) => format!("({} {} {})", op.symbol(), show(a), show(b)),
            ExprKind::If(c, a, b) => format!("(if {} {} {})", show(c), show(a), show(b)),
            ExprKind::Call(n, args) => {
                format!("({} {})", n.text, args.iter().map(show).collect::<Vec<_>>().join(" "))
            }
            ExprKind::Aggregate(a, body, s) => format!("({} {} {})", a.name(), show(body), s.text),
            ExprKind::Touched { condition, from, to } => {
                format!("(touched {} {} {})", show(condition), show(from), show(to))
            }
            ExprKind::Extreme { up, observed, from, to } => {
                let name = if *up { "highest" } else { "lowest" };
                format!("({name}-continuous {} {} {})", show(observed), show(from), show(to))
            }
        }
    }

    fn expr_of(src: &str) -> String {
        let file = parse(&format!("param x = {src}")).unwrap();
        match &file.items[0] {
            Item::Param(_, e) => show(e),
            other => panic!("{other:?}"),
        }
    }

    #[test]
    fn precedence_and_literals() {
        assert_eq!(expr_of("1 + 2 * 3"), "(+ 1 (* 2 3))");
        assert_eq!(expr_of("-a * b"), "(* (- a) b)");
        assert_eq!(expr_of("a < b and not c or d"), "(or (and (< a b) (not c)) d)");
        assert_eq!(expr_of("70% * 1_000_000"), "(* 0.7 1000000)");
        assert_eq!(expr_of("if a >= 60% then 1 else a"), "(if (>= a 0.6) 1 a)");
        assert_eq!(expr_of("max(a, b, c) - 1"), "(- (max a b c) 1)");
        assert_eq!(expr_of("average(perf(ZPHX) over fixings)"), "(average (perf ZPHX) fixings)");
        assert_eq!(expr_of("level(ZPHX, 0.5y)"), "(level ZPHX Years(0.5))");
        assert_eq!(expr_of("geometric_average(perf(ZPHX) over m)"), "(geometric_average (perf ZPHX) m)");
        assert_eq!(expr_of("highest(perf(VNTL) over days)"), "(highest (perf VNTL) days)");
        assert_eq!(
            expr_of("highest(perf(VNTL) from start to 1y)"),
            "(highest-continuous (perf VNTL) Start Years(1.0))"
        );
        assert_eq!(
            expr_of("lowest(level(VNTL) from previous(t) to t)"),
            "(lowest-continuous (level VNTL) (previous t) t)"
        );
        assert_eq!(
            expr_of("touched(perf(OSMP) <= 65% from start to 2027-12-01)"),
            "(touched (<= (perf OSMP) 0.65) Start Iso(Date(21153)))"
        );
    }

    #[test]
    fn statements_split_on_newlines_without_separators() {
        let file = parse("for each t in q {\n pay notional * c\n missed = 0\n end\n}").unwrap();
        let Item::Each { body, .. } = &file.items[0] else { panic!() };
        assert_eq!(body.len(), 3);
        assert!(matches!(body[1], Stmt::Assign(..)));
        assert!(matches!(body[2], Stmt::End(_)));
    }

    #[test]
    fn a_payment_at_the_touch_is_its_own_statement() {
        let file =
            parse("at 1y {\n pay 5 on first touch(perf(Z) >= 130% from start to 1y)\n pay 1 on first(s)\n}").unwrap();
        let Item::At { body, .. } = &file.items[0] else { panic!() };
        let Stmt::PayAtHit { amount, condition, from, to, .. } = &body[0] else { panic!("{:?}", body[0]) };
        assert_eq!(
            (show(amount), show(condition), show(from), show(to)),
            ("5".into(), "(>= (perf Z) 1.3)".into(), "Start".into(), "Years(1.0)".into())
        );
        assert!(matches!(&body[1], Stmt::Pay { on: Some(_), .. }));
    }

    #[test]
    fn early_exercise_statements() {
        let file = parse(
            "for each t in q {\n holder may end for max(40 - level(P), 0)\n issuer may end for notional using perf(P), n\n issuer = 1\n}",
        )
        .unwrap();
        let Item::Each { body, .. } = &file.items[0] else { panic!() };
        let Stmt::Choice { party: Party::Holder, amount, using, .. } = &body[0] else { panic!("{:?}", body[0]) };
        assert_eq!((show(amount), using.len()), ("(max (- 40 (level P)) 0)".to_string(), 0));
        let Stmt::Choice { party: Party::Issuer, amount, using, .. } = &body[1] else { panic!("{:?}", body[1]) };
        assert_eq!(show(amount), "notional");
        assert_eq!(using.iter().map(show).collect::<Vec<_>>(), ["(perf P)", "n"]);
        // The party words are not reserved: a state may still be called `issuer`.
        assert!(matches!(&body[2], Stmt::Assign(n, _) if n.text == "issuer"));
    }

    #[test]
    fn rolled_schedules_and_calendars() {
        let text = "dates m = every 1m from 2027-01-31 to 2027-12-31 rolled modified  following calendar ZEX\n\
            dates p = 2027-06-05 rolled preceding\ndates b = business days from 2026-12-02 to 2027-01-29 calendar ZEX\n\
            dates calendar = 2027-01-04";
        let file = parse(text).unwrap();
        let rolling = |i: usize| match &file.items[i] {
            Item::Dates(_, s) => s.rolling.clone(),
            _ => panic!("a dates item"),
        };
        let m = rolling(0);
        assert_eq!(m.roll.map(|r| r.0), Some(Roll::ModifiedFollowing));
        assert_eq!(m.calendar.as_ref().map(|c| c.0.as_str()), Some("ZEX"));
        assert_eq!(rolling(1).roll.map(|r| r.0), Some(Roll::Preceding));
        assert_eq!(rolling(1).calendar, None);
        assert_eq!(rolling(2).roll, None);
        assert_eq!(rolling(2).calendar.map(|c| c.0), Some("ZEX".to_string()));
        // `calendar` and `rolled` are words of fixed places, not reserved: a schedule may be
        // called `calendar`.
        assert_eq!(rolling(3), Rolling::default());
    }

    #[test]
    fn payment_lags() {
        let text = "for each t in s {\n  pay 1 on 2 business days after t calendar ZEX\n  pay 2 on lag business days after last(s)\n\
            pay 3 on -1 business days after t\n  pay 4 on maturity\n  after = 1\n}";
        let file = parse(text).unwrap();
        let Item::Each { body, .. } = &file.items[0] else { panic!("{:?}", file.items[0]) };
        let lag = |i: usize| match &body[i] {
            Stmt::Pay { on, lag, .. } => {
                (on.as_ref().map(show), lag.as_ref().map(|l| (show(&l.days), l.calendar.clone().map(|c| c.0))))
            }
            other => panic!("{other:?}"),
        };
        assert_eq!(lag(0), (Some("t".to_string()), Some(("2".to_string(), Some("ZEX".to_string())))));
        assert_eq!(lag(1), (Some("(last s)".to_string()), Some(("lag".to_string(), None))));
        assert_eq!(lag(2).1.map(|l| l.0), Some("(- 1)".to_string()));
        // Without `business days after`, `on` takes a date as before; `after` is no reserved word.
        assert_eq!(lag(3), (Some("maturity".to_string()), None));
        assert!(matches!(&body[4], Stmt::Assign(n, _) if n.text == "after"));
    }

    #[test]
    fn schedules() {
        let file = parse("dates q = every 3m from 2027-03-01 to 2029-12-01\ndates d = 252 steps from start to 1y\ndates days = business days from 2026-12-02 to 2027-12-01").unwrap();
        assert!(matches!(
            &file.items[0],
            Item::Dates(_, Schedule { kind: ScheduleKind::Every { count: 3, unit: PeriodUnit::Months, .. }, .. })
        ));
        assert!(matches!(&file.items[1], Item::Dates(_, Schedule { kind: ScheduleKind::Steps { n: 252, .. }, .. })));
        assert!(
            matches!(&file.items[2], Item::Dates(n, Schedule { kind: ScheduleKind::BusinessDays { .. }, .. }) if n.text == "days")
        );
    }

    #[test]
    fn nesting_is_counted_before_the_grammar_runs() {
        let deep = |n: usize| format!("param x = {}1{}", "(".repeat(n), ")".repeat(n));
        assert!(parse(&deep(MAX_NESTING)).is_ok());
        let err = parse(&deep(MAX_NESTING + 1)).unwrap_err();
        assert_eq!(err.span, Some(Span::new(10 + MAX_NESTING, 11 + MAX_NESTING)));
        // Sequential `if`s in a block are not nested; an `else if` chain is.
        let ifs = |sep: &str, n: usize| {
            let chain: Vec<String> = (0..n).map(|i| format!("if x > {i} {{ pay 1 }}")).collect();
            format!("at 1y {{\n{}\n}}", chain.join(sep))
        };
        assert!(parse(&ifs("\n", 1_000)).is_ok());
        assert!(parse(&ifs(" else ", 1_000)).is_err());
        // Brackets inside comments and texts do not count.
        assert!(parse(&format!("product \"{}\" # {}", "(".repeat(500), "(".repeat(500))).is_ok());
    }

    #[test]
    fn windows_and_aggregates_nest_as_deep_as_brackets_may() {
        // `highest(` and `lowest(` open both a window's extreme and an aggregate; each
        // level must be read once, not once per reading of the level above (that took
        // twice the time per level and refused fourteen levels as never closed).
        let nested =
            |open: &str, close: &str, n: usize| format!("at 1y {{ pay {}perf(X){} }}", open.repeat(n), close.repeat(n));
        let deep = MAX_NESTING - 5;
        for (open, close) in [
            ("lowest(", " over s)"),
            ("highest(", " from start to 1y)"),
            ("lowest(highest(", " from start to 1y) over s)"),
            ("average(max(1, ", ") over s)"),
            ("touched(1 < ", " from start to 1y)"),
        ] {
            let n = if open.matches('(').count() == 2 { deep / 2 } else { deep };
            let file = parse(&nested(open, close, n)).unwrap_or_else(|e| panic!("{open}: {}", e.message));
            assert_eq!(file.items.len(), 1);
        }
        // The two readings of one name give their two trees.
        assert_eq!(expr_of("lowest(perf(X) over s)"), "(lowest (perf X) s)");
        assert_eq!(expr_of("highest(perf(X) over s)"), "(highest (perf X) s)");
        assert_eq!(expr_of("highest(perf(X) from start to 1y)"), "(highest-continuous (perf X) Start Years(1.0))");
        assert_eq!(expr_of("lowest(highest(x from 1 to 2) over s)"), "(lowest (highest-continuous x 1 2) s)");
    }

    #[test]
    fn long_chains_are_refused_while_the_tree_is_built() {
        let sum = |n: usize| format!("param x = {}", vec!["1"; n].join(" + "));
        assert!(parse(&sum(MAX_EXPRESSION_DEPTH + 1)).is_ok());
        let err = parse(&sum(MAX_EXPRESSION_DEPTH + 2)).unwrap_err();
        assert!(err.message.contains("more than 1000 operations"), "{}", err.message);
    }

    #[test]
    fn the_deep_stages_run_from_a_thread_with_a_small_stack() {
        let src = format!("param x = {}", vec!["-1"; MAX_EXPRESSION_DEPTH].join(" + "));
        let small = std::thread::Builder::new().stack_size(64 << 10);
        let handle = small.spawn(move || on_deep_stack(|| parse(&src).is_ok())).expect("a thread");
        assert!(handle.join().expect("no overflow"));
    }

    #[test]
    fn a_period_with_an_exponent_is_recognised() {
        assert_eq!(period_with_exponent("1e20y { pay 1 }"), Some(5));
        assert_eq!(period_with_exponent("2.5E+3d,"), Some(7));
        assert_eq!(period_with_exponent("1e20"), None);
        assert_eq!(period_with_exponent("1e20years"), None);
        assert_eq!(period_with_exponent("20y"), None);
    }

    #[test]
    fn slips_get_their_hint_only_where_they_stand() {
        let message = |src: &str| parse(src).unwrap_err().message;
        assert!(message("param a = 7 % 2").contains("not a remainder operator"));
        // A percentage ending a line is not a remainder: the next line's slip is its own.
        assert!(!message("param a = 70%\nfoo bar").contains("remainder"));
        assert!(message("at 1y { if a then pay 1 }").contains("braces"));
        assert!(message("at 1y { let then = 1 }").contains("reserved word"));
    }

    #[test]
    fn syntax_errors_point_at_the_place() {
        let err = parse("product \"x\"\nparam = 5").unwrap_err();
        assert_eq!(err.span, Some(Span::new(18, 19)));
        assert_eq!(err.message, "expected a name");
        let err = parse("dates d = 2027-02-30").unwrap_err();
        assert_eq!(err.message, "`2027-02-30` is not a calendar date");
    }
}
