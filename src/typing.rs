//! Stage 2, typing: syntax tree → typed product.
//!
//! Resolves every name (parameters, schedules, state, lets, underlyings, the loop date),
//! gives every expression a type (number, flag or date), folds parameters to their values
//! (after `--set` overrides) and refuses what cannot mean anything: unknown names, wrong
//! types, a `pay` outside a dated block, statements after `end`. Date arithmetic that needs
//! the valuation date waits for [`crate::compile`]. All problems found are reported at once.

use std::collections::HashMap;

use crate::diagnostic::{closest, Diagnostic, Span};
use crate::syntax::{self, Aggregate, BinaryOp, DateTerm, ExprKind, Item, Name, Party, Stmt, UnaryOp};

/// The type of an expression.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Ty {
    Number,
    Flag,
    Date,
}

impl Ty {
    fn describe(self) -> &'static str {
        match self {
            Ty::Number => "a number",
            Ty::Flag => "a flag (true/false)",
            Ty::Date => "a date",
        }
    }
}

/// A date as the checked product refers to it; turned into a time by `compile`.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum DateRef {
    /// A written date: `2027-12-01`, `1y`, `start`.
    Term(DateTerm),
    /// The date of the enclosing `for each` loop.
    Loop,
    /// `first(s)`
    First(usize),
    /// `last(s)`
    Last(usize),
    /// A schedule name used as a date: allowed when it holds one date.
    Only(usize),
    /// A `let` holding a date.
    Let(usize),
    /// `previous(t)`: the loop's date before the current one (the start date on the first).
    Previous,
}

/// A checked payment lag: `2 business days after t calendar ZEX`.
#[derive(Clone, Debug, PartialEq)]
pub struct PayLag {
    /// Whole business days, at most [`MAX_LAG_DAYS`]; 0 is the date itself rolled following.
    pub days: u32,
    /// The holiday calendar's name, checked against the market's calendars file by `compile`.
    pub calendar: Option<(String, Span)>,
    /// The lag clause, for messages.
    pub span: Span,
}

/// The longest payment lag, in business days (about four years).
pub const MAX_LAG_DAYS: u32 = 1_000;

/// A function of numbers.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Func {
    Min,
    Max,
    Abs,
    Exp,
    Log,
    Sqrt,
    Floor,
    /// `remainder(x, n)`: `x - floor(x / n) * n`, so it has the sign of `n`.
    Remainder,
}

/// Direction of a continuously monitored barrier.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Direction {
    /// `perf(X) <= level`: touched from above.
    Down,
    /// `perf(X) >= level`: touched from below.
    Up,
}

/// A checked, typed expression.
#[derive(Clone, Debug, PartialEq)]
pub struct TExpr {
    pub kind: TKind,
    pub ty: Ty,
    pub span: Span,
}

#[derive(Clone, Debug, PartialEq)]
pub enum TKind {
    /// A number or a flag (1 or 0) known before simulation: literals, parameters, notional.
    Const(f64),
    /// A date-valued expression.
    Date(DateRef),
    /// The current value of a `state`.
    State(usize),
    /// A `let` holding a number or flag.
    Let(usize),
    Unary(UnaryOp, Box<TExpr>),
    Binary(BinaryOp, Box<TExpr>, Box<TExpr>),
    If(Box<TExpr>, Box<TExpr>, Box<TExpr>),
    Func(Func, Vec<TExpr>),
    /// `level(X)` / `level(X, d)`: the level of underlying X at the current date or at d.
    Level {
        asset: usize,
        at: Option<DateRef>,
    },
    /// `initial(X)`: the level at the start date.
    Initial(usize),
    /// `perf(X)` / `perf(X, d)`: level / initial.
    Perf {
        asset: usize,
        at: Option<DateRef>,
    },
    /// `position(t)`: 1 for the first date of the loop's schedule, 2 for the next...
    Position,
    /// `years(d)`: ACT/365 years from the start date to d.
    Years(DateRef),
    /// `average(expr over s)` and friends, over the dates of s up to the current date.
    Aggregate(Aggregate, Box<TExpr>, usize),
    /// `touched(perf(X) <= 65% from a to b)`: continuous monitoring between a and b.
    Touched {
        asset: usize,
        direction: Direction,
        level: f64,
        relative: bool,
        from: DateRef,
        to: DateRef,
    },
    /// `highest(perf(X) from a to b)` (`up`) or `lowest(...)`: the continuously monitored
    /// extreme of the level (a performance if `relative`) between a and b.
    Extreme {
        asset: usize,
        up: bool,
        relative: bool,
        from: DateRef,
        to: DateRef,
    },
}

/// A checked statement.
#[derive(Clone, Debug, PartialEq)]
pub enum TStmt {
    Let(usize, TExpr),
    Assign(usize, TExpr),
    If {
        cond: TExpr,
        then: Vec<TStmt>,
        otherwise: Vec<TStmt>,
    },
    Pay {
        amount: TExpr,
        on: Option<(DateRef, Span)>,
        /// `N business days after` the `on` date (`pay x on 2 business days after t`).
        lag: Option<PayLag>,
        span: Span,
    },
    End(Span),
    /// `pay amount on first touch(...)`: `amount` is known before simulation and
    /// `barrier` is a [`TKind::Touched`].
    PayAtHit {
        amount: TExpr,
        barrier: TExpr,
        span: Span,
    },
    /// `holder may end for amount using x, y`: `using` filled in with the default
    /// (every underlying's `perf`, every state) when the file gives none.
    Choice {
        party: Party,
        amount: TExpr,
        using: Vec<TExpr>,
        span: Span,
    },
}

/// The most variables an early-exercise rule regresses on (`using`): the basis grows with
/// their square.
pub const MAX_CHOICE_VARIABLES: usize = 6;

/// When a block runs.
#[derive(Clone, Debug, PartialEq)]
pub enum When {
    /// `for each t in s`: on each date of schedule s.
    Each(usize),
    /// `at d`: once, on d.
    At(DateRef, Span),
}

#[derive(Clone, Debug, PartialEq)]
pub struct Block {
    pub when: When,
    pub body: Vec<TStmt>,
    pub span: Span,
}

#[derive(Clone, Debug, PartialEq)]
pub struct ScheduleDef {
    pub name: String,
    pub schedule: syntax::Schedule,
}

#[derive(Clone, Debug, PartialEq)]
pub struct StateDef {
    pub name: String,
    pub init: f64,
    /// A number or a flag, fixed by the starting value.
    pub ty: Ty,
}

/// A payoff file after the check: every name resolved, every expression typed.
#[derive(Clone, Debug, PartialEq)]
pub struct Product {
    pub name: String,
    pub currency: String,
    /// Where the payoff names its currency, for market errors about it.
    pub currency_span: Span,
    pub notional: f64,
    pub underlyings: Vec<Name>,
    /// Default market file named by the payoff, relative to the payoff file.
    pub market: Option<(String, Span)>,
    pub start: Option<(DateRef, Span)>,
    /// Parameter names and values after overrides, in file order.
    pub params: Vec<(String, f64)>,
    /// How each parameter's value was written, for reports (`2.25%` rather than 0.0225).
    pub params_written: Vec<Written>,
    pub schedules: Vec<ScheduleDef>,
    pub states: Vec<StateDef>,
    /// How many `let` slots the blocks use.
    pub lets: usize,
    /// Span of each let slot's name, for messages.
    pub let_names: Vec<String>,
    pub blocks: Vec<Block>,
    /// Things that are allowed but probably not meant, such as `perf(X) < 90`.
    pub warnings: Vec<Diagnostic>,
}

/// Where a parameter's value was written.
#[derive(Clone, Debug, PartialEq)]
pub enum Written {
    /// The default in the payoff file, at this span.
    Default(Span),
    /// The text of a `--set` override.
    Override(String),
}

impl Written {
    /// The text as written, given the payoff file's source.
    pub fn text<'a>(&'a self, source: &'a str) -> &'a str {
        match self {
            Written::Default(span) => source.get(span.start..span.end).unwrap_or("?"),
            Written::Override(text) => text,
        }
    }
}

/// A `--set NAME=VALUE` override.
#[derive(Clone, Debug, PartialEq)]
pub struct Override {
    pub name: String,
    pub value: String,
}

impl Override {
    /// Parses `NAME=VALUE`.
    pub fn parse(text: &str) -> Result<Override, Diagnostic> {
        match text.split_once('=') {
            _ if text.chars().any(char::is_control) => Err(Diagnostic::new(format!(
                "`--set {}` holds a line break or another control character",
                text.escape_debug()
            ))
            .with_fix("give the value on one line, such as `--set coupon=2.5%`")),
            Some((n, v)) if !n.trim().is_empty() && !v.trim().is_empty() => {
                Ok(Override { name: n.trim().to_string(), value: v.trim().to_string() })
            }
            _ => Err(Diagnostic::new(format!("`--set {text}` is not of the form NAME=VALUE"))
                .with_fix("write for example `--set coupon=2.5%`")),
        }
    }
}

/// Checks a parsed file; `overrides` replace parameter defaults.
pub fn check(file: &syntax::File, overrides: &[Override]) -> Result<Product, Vec<Diagnostic>> {
    let mut c = Checker::default();
    c.run(file, overrides);
    if c.errors.is_empty() {
        c.product.warnings = collapse_warnings(std::mem::take(&mut c.warnings));
        Ok(c.product)
    } else {
        c.errors.sort_by_key(|d| d.span.map(|s| s.start));
        Err(c.errors)
    }
}

/// Whether a bare override `x` was probably meant as `x%`, given the default `d`: either
/// the default is a fraction below 1 and `x` is 1 or more (`coupon=4` against 2.25%), or
/// `x` read as a percentage lies within a factor of 10 of the default while `x` itself is
/// more than 10 times the default (`coupon=0.8` against 0.80%).
fn looks_like_a_missing_percent(x: f64, d: f64) -> bool {
    let (x, d) = (x.abs(), d.abs());
    if d == 0.0 || x == 0.0 || !x.is_finite() || !d.is_finite() {
        return false;
    }
    let as_percent = x / 100.0;
    (d < 1.0 && x >= 1.0) || (x > 10.0 * d && as_percent <= 10.0 * d && as_percent >= d / 10.0)
}

/// One warning per kind of slip: the same message at many places is shown once, at the
/// first place, with the number of other places (a long generated file must not print the
/// same advice thousands of times).
fn collapse_warnings(warnings: Vec<Diagnostic>) -> Vec<Diagnostic> {
    let mut out: Vec<(Diagnostic, usize)> = Vec::new();
    let mut seen_sites = std::collections::HashSet::new();
    for w in warnings {
        if !seen_sites.insert((w.span.map(|s| (s.start, s.end)), w.message.clone())) {
            continue;
        }
        match out.iter_mut().find(|(first, _)| first.message == w.message && first.fix == w.fix) {
            Some((_, more)) => *more += 1,
            None => out.push((w, 0)),
        }
    }
    out.into_iter()
        .map(|(mut w, more)| {
            if more > 0 {
                let places = if more == 1 { "place" } else { "places" };
                w.message = format!("{} (and at {more} more {places})", w.message);
            }
            w
        })
        .collect()
}

#[derive(Clone, Copy, Debug)]
enum Global {
    Param(f64, Ty),
    Notional,
    Schedule(usize),
    State(usize),
    Underlying(usize),
}

#[derive(Default)]
struct Checker {
    product: Product,
    errors: Vec<Diagnostic>,
    globals: HashMap<String, (Global, Span)>,
    /// Lexical scopes of lets inside a block: name → (slot, type).
    scopes: Vec<Vec<(String, usize, Ty)>>,
    loop_var: Option<(String, usize)>,
    notional_seen: bool,
    /// Header lines that may appear once, and where they were.
    seen: HashMap<&'static str, Span>,
    warnings: Vec<Diagnostic>,
    /// Let slots holding a performance, for the warning on `worst < 70`.
    performance_lets: std::collections::HashSet<usize>,
    /// The party of the first `may end`, and where it was written.
    choice: Option<(Party, Span)>,
}

impl Default for Product {
    fn default() -> Self {
        Product {
            name: String::new(),
            currency: String::new(),
            currency_span: Span::default(),
            notional: 1.0,
            underlyings: Vec::new(),
            market: None,
            start: None,
            params: Vec::new(),
            params_written: Vec::new(),
            schedules: Vec::new(),
            states: Vec::new(),
            lets: 0,
            let_names: Vec::new(),
            blocks: Vec::new(),
            warnings: Vec::new(),
        }
    }
}

const FUNCTIONS: &[&str] = &[
    "min",
    "max",
    "abs",
    "exp",
    "log",
    "sqrt",
    "floor",
    "remainder",
    "level",
    "initial",
    "perf",
    "position",
    "years",
    "first",
    "last",
    "previous",
];

impl Checker {
    fn error(&mut self, span: Span, message: impl Into<String>, fix: impl Into<String>) {
        self.errors.push(Diagnostic::at(span, message).with_fix(fix));
    }

    fn once(&mut self, what: &'static str, span: Span) {
        if self.seen.insert(what, span).is_some() {
            self.error(span, format!("`{what}` is given twice"), format!("keep one `{what}` line"));
        }
    }

    fn declare(&mut self, name: &Name, global: Global) -> bool {
        if self.globals.contains_key(&name.text) {
            self.error(
                name.span,
                format!("`{}` is already defined", name.text),
                "give each parameter, schedule, state and underlying its own name",
            );
            return false;
        }
        self.globals.insert(name.text.clone(), (global, name.span));
        true
    }

    fn run(&mut self, file: &syntax::File, overrides: &[Override]) {
        // Pass 1: declarations, in file order (a parameter may use the ones above it).
        let mut overrides_left: Vec<&Override> = Vec::new();
        for o in overrides {
            if overrides_left.iter().any(|seen| seen.name == o.name) {
                self.errors.push(
                    Diagnostic::new(format!("`--set {}` is given twice", o.name))
                        .with_fix(format!("keep one `--set {}=...`", o.name)),
                );
            } else {
                overrides_left.push(o);
            }
        }
        for item in &file.items {
            match item {
                Item::Product(name, span) => {
                    self.once("product", *span);
                    self.product.name.clone_from(name);
                }
                Item::Currency(code) => {
                    self.once("currency", code.span);
                    let ok = code.text.len() == 3 && code.text.chars().all(|c| c.is_ascii_uppercase());
                    if !ok {
                        self.error(
                            code.span,
                            format!("`{}` is not an ISO 4217 currency code", code.text),
                            "write three capital letters, such as USD or EUR",
                        );
                    }
                    self.product.currency.clone_from(&code.text);
                    self.product.currency_span = code.span;
                }
                Item::Underlyings(names) => {
                    self.once("underlyings", names[0].span);
                    for n in names {
                        let idx = self.product.underlyings.len();
                        if self.declare(n, Global::Underlying(idx)) {
                            self.product.underlyings.push(n.clone());
                        }
                    }
                }
                Item::Market(path, span) => {
                    self.once("market", *span);
                    self.product.market = Some((path.clone(), *span));
                }
                Item::Param(name, expr) => {
                    let mut written = Written::Default(expr.span);
                    let value = match overrides_left.iter().position(|o| o.name == name.text) {
                        Some(i) => {
                            let o = overrides_left.remove(i);
                            written = Written::Override(o.value.clone());
                            // A refused override is reported; the default keeps the
                            // parameter declared so that its uses raise no further errors.
                            self.override_value(o, expr).or_else(|| self.constant_quiet(expr))
                        }
                        None => self.constant(expr, "a parameter"),
                    };
                    if let Some((v, ty)) = value {
                        if self.declare(name, Global::Param(v, ty)) {
                            self.product.params.push((name.text.clone(), v));
                            self.product.params_written.push(written);
                        }
                    }
                }
                Item::Dates(name, schedule) => {
                    let idx = self.product.schedules.len();
                    if self.declare(name, Global::Schedule(idx)) {
                        self.product
                            .schedules
                            .push(ScheduleDef { name: name.text.clone(), schedule: schedule.clone() });
                    }
                }
                Item::State(name, expr) => {
                    if let Some((v, ty)) = self.constant(expr, "a state's starting value") {
                        let idx = self.product.states.len();
                        if self.declare(name, Global::State(idx)) {
                            self.product.states.push(StateDef { name: name.text.clone(), init: v, ty });
                        }
                    }
                }
                Item::Notional(expr) => {
                    self.once("notional", expr.span);
                    self.notional_seen = true;
                    if let Some((v, ty)) = self.constant(expr, "the notional") {
                        if ty != Ty::Number || !(v > 0.0 && v.is_finite()) {
                            self.error(
                                expr.span,
                                "the notional must be a positive number",
                                "write for example `notional 1_000_000`",
                            );
                        } else {
                            self.product.notional = v;
                        }
                    }
                    self.globals.insert("notional".into(), (Global::Notional, expr.span));
                }
                Item::Start(_) | Item::Each { .. } | Item::At { .. } | Item::Stray(..) => {}
            }
        }
        for o in overrides_left {
            let names: Vec<&str> = self.product.params.iter().map(|(n, _)| n.as_str()).collect();
            let fix = match closest(&o.name, names.iter().copied()) {
                Some(c) => format!("did you mean `{c}`? This payoff's parameters: {}", names.join(", ")),
                None if names.is_empty() => "this payoff declares no `param`".to_string(),
                None => format!("this payoff's parameters: {}", names.join(", ")),
            };
            self.errors
                .push(Diagnostic::new(format!("`--set {}`: no parameter named `{}`", o.name, o.name)).with_fix(fix));
        }
        if !self.seen.contains_key("underlyings") {
            self.errors.push(
                Diagnostic::at(Span::new(0, 0), "the payoff names no underlyings")
                    .with_fix("add a line such as `underlyings ZPHX`"),
            );
        }
        if !self.seen.contains_key("currency") {
            self.errors.push(
                Diagnostic::at(Span::new(0, 0), "the payoff names no currency")
                    .with_fix("add a line such as `currency USD`"),
            );
        }
        // Pass 2: start date and blocks.
        let mut has_block = false;
        for item in &file.items {
            match item {
                Item::Start(expr) => {
                    self.once("start", expr.span);
                    if let Some(d) = self.date(expr) {
                        self.product.start = Some((d, expr.span));
                    }
                }
                Item::Each { var, schedule, body, span } => {
                    has_block = true;
                    let Some(s) = self.schedule_ref(schedule) else { continue };
                    if self.globals.contains_key(&var.text) {
                        self.error(
                            var.span,
                            format!("the loop date `{}` hides a name defined above", var.text),
                            "pick another name for the loop date, such as `t`",
                        );
                    }
                    self.loop_var = Some((var.text.clone(), s));
                    let body = self.block(body);
                    self.loop_var = None;
                    self.product.blocks.push(Block { when: When::Each(s), body, span: *span });
                }
                Item::At { date, body, span } => {
                    has_block = true;
                    let Some(d) = self.date(date) else { continue };
                    if let DateRef::Only(s) = d {
                        if !holds_one_date(&self.product.schedules[s].schedule) {
                            let n = &self.product.schedules[s].name;
                            self.error(
                                date.span,
                                format!("`{n}` is a schedule of several dates, so `at {n}` has no one date"),
                                format!("loop over it with `for each t in {n} {{ ... }}`, or write `at last({n})` or `at first({n})`"),
                            );
                            continue;
                        }
                    }
                    let body = self.block(body);
                    self.product.blocks.push(Block { when: When::At(d, date.span), body, span: *span });
                }
                Item::Stray(stmt, span) => {
                    let what = match stmt {
                        Stmt::Pay { .. } => "`pay`",
                        Stmt::End(_) => "`end`",
                        Stmt::Let(..) => "`let`",
                        Stmt::If { .. } => "`if`",
                        Stmt::Assign(..) => "an assignment",
                        Stmt::PayAtHit { .. } => "`pay ... on first touch(...)`",
                        Stmt::Choice { .. } => "`may end`",
                    };
                    self.error(
                        *span,
                        format!("{what} must stand inside a dated block"),
                        "put it inside `for each t in SCHEDULE { ... }` or `at DATE { ... }`, which say when it happens",
                    );
                }
                _ => {}
            }
        }
        if !has_block && self.errors.is_empty() {
            self.errors.push(
                Diagnostic::at(Span::new(0, 0), "the payoff never pays anything: it has no dated block")
                    .with_fix("add for example `at 1y { pay notional * max(perf(ZPHX) - 1, 0) }`"),
            );
        }
    }

    fn override_value(&mut self, o: &Override, default: &syntax::Expr) -> Option<(f64, Ty)> {
        let Ok(file) = syntax::parse(&format!("param x = {}", o.value)) else {
            self.errors.push(
                Diagnostic::new(format!("`--set {}={}`: `{}` is not a value", o.name, o.value, o.value))
                    .with_fix("give a number, a percentage or a flag, such as 2.5%, 0.025 or true"),
            );
            return None;
        };
        let Some(Item::Param(_, expr)) = file.items.first() else { return None };
        let before = self.errors.len();
        let v = self.constant(expr, "an override");
        if self.errors.len() > before {
            for e in &mut self.errors[before..] {
                e.span = None;
                e.message = format!("`--set {}={}`: {}", o.name, o.value, e.message);
                e.fix = Some(format!(
                    "give a number, a percentage or a flag (2.5%, 0.025, true), or a parameter declared above `{}`",
                    o.name
                ));
            }
            return None;
        }
        let default_value = self.constant_quiet(default);
        if let (Some((x, Ty::Number)), Some((d, Ty::Number))) = (v, default_value) {
            if !o.value.contains('%') && looks_like_a_missing_percent(x, d) {
                self.warnings.push(
                    Diagnostic::new(format!(
                        "`--set {}={}` sets `{}` to {}, that is {}%, where the default is {}",
                        o.name,
                        o.value,
                        o.name,
                        o.value,
                        x * 100.0,
                        d
                    ))
                    .with_fix(format!("if you meant {} percent, write `--set {}={}%`", o.value, o.name, o.value))
                    .as_warning(),
                );
            }
        }
        let default_ty = default_value.map(|(_, t)| t);
        if let (Some((_, ty)), Some(dty)) = (v, default_ty) {
            if ty != dty {
                self.errors.push(
                    Diagnostic::new(format!(
                        "`--set {}={}` gives {} but `{}` is {}",
                        o.name,
                        o.value,
                        ty.describe(),
                        o.name,
                        dty.describe()
                    ))
                    .with_fix(format!("give `{}` {}", o.name, dty.describe())),
                );
                return None;
            }
        }
        v
    }

    fn constant_quiet(&mut self, expr: &syntax::Expr) -> Option<(f64, Ty)> {
        let before = self.errors.len();
        let v = self.constant(expr, "a parameter");
        self.errors.truncate(before);
        v
    }

    /// Evaluates an expression that must be known before simulation.
    fn constant(&mut self, expr: &syntax::Expr, what: &str) -> Option<(f64, Ty)> {
        let e = self.expr(expr)?;
        match e.kind {
            TKind::Const(v) if !v.is_finite() => {
                self.error(expr.span, format!("{what} is not a finite number here"), "look for a division by zero");
                None
            }
            TKind::Const(v) if e.ty != Ty::Date => Some((v, e.ty)),
            _ if e.ty == Ty::Date => {
                self.error(
                    expr.span,
                    format!("{what} must be a number or a flag, not a date"),
                    "use a number such as 100% or 1_000_000",
                );
                None
            }
            _ => {
                self.error(
                    expr.span,
                    format!("{what} must be known before simulation"),
                    "use only numbers and parameters here; levels and states are known only on a path",
                );
                None
            }
        }
    }

    fn schedule_ref(&mut self, name: &Name) -> Option<usize> {
        match self.globals.get(&name.text) {
            Some((Global::Schedule(s), _)) => Some(*s),
            Some(_) => {
                self.error(
                    name.span,
                    format!("`{}` is not a schedule", name.text),
                    "name a schedule declared with `dates NAME = ...`",
                );
                None
            }
            None => {
                let fix = self.suggest(&name.text, "declare it with `dates NAME = ...`");
                self.error(name.span, format!("unknown schedule `{}`", name.text), fix);
                None
            }
        }
    }

    fn suggest(&self, name: &str, otherwise: &str) -> String {
        let mut names: Vec<&str> = self.globals.keys().map(String::as_str).collect();
        names.extend(self.scopes.iter().flatten().map(|(n, _, _)| n.as_str()));
        if let Some((v, _)) = &self.loop_var {
            names.push(v);
        }
        names.extend(FUNCTIONS);
        match closest(name, names) {
            Some(c) => format!("did you mean `{c}`?"),
            None => otherwise.to_string(),
        }
    }

    fn block(&mut self, stmts: &[Stmt]) -> Vec<TStmt> {
        self.scopes.push(Vec::new());
        let mut out = Vec::new();
        let mut ended: Option<Span> = None;
        for stmt in stmts {
            if let Some(end) = ended {
                let span = stmt_span(stmt);
                self.error(
                    span,
                    "this statement never runs: the product has ended just before",
                    format!("move it above the `end` at byte {}", end.start),
                );
                ended = None;
            }
            if let Stmt::End(span) = stmt {
                ended = Some(*span);
            }
            if let Some(s) = self.stmt(stmt) {
                out.push(s);
            }
        }
        self.scopes.pop();
        out
    }

    fn lookup_let(&self, name: &str) -> Option<(usize, Ty)> {
        self.scopes
            .iter()
            .rev()
            .flat_map(|s| s.iter().rev())
            .find(|(n, _, _)| n == name)
            .map(|&(_, slot, ty)| (slot, ty))
    }

    fn stmt(&mut self, stmt: &Stmt) -> Option<TStmt> {
        match stmt {
            Stmt::Let(name, expr) => {
                let e = self.expr(expr)?;
                if self.globals.contains_key(&name.text) || self.loop_var.as_ref().is_some_and(|(v, _)| *v == name.text)
                {
                    self.error(
                        name.span,
                        format!("`let {}` hides a name defined above", name.text),
                        "pick another name",
                    );
                    return None;
                }
                let slot = self.product.lets;
                self.product.lets += 1;
                if self.is_performance(&e) {
                    self.performance_lets.insert(slot);
                }
                self.product.let_names.push(name.text.clone());
                self.scopes.last_mut().expect("inside a block").push((name.text.clone(), slot, e.ty));
                Some(TStmt::Let(slot, e))
            }
            Stmt::Assign(name, expr) => {
                let e = self.expr(expr);
                let slot = match self.globals.get(&name.text) {
                    Some((Global::State(s), _)) => *s,
                    _ => {
                        self.error(
                            name.span,
                            format!("`{}` is not a state, so it cannot change", name.text),
                            format!(
                                "declare it at the top with `state {} = 0`; use `let` for a value that does not change",
                                name.text
                            ),
                        );
                        return None;
                    }
                };
                let e = e?;
                let ty = self.product.states[slot].ty;
                if e.ty != ty {
                    self.error(
                        e.span,
                        format!("`{}` holds {}, but this is {}", name.text, ty.describe(), e.ty.describe()),
                        format!("assign {} (its type is set by its starting value)", ty.describe()),
                    );
                    return None;
                }
                Some(TStmt::Assign(slot, e))
            }
            Stmt::If { cond, then, otherwise, .. } => {
                let c = self.expr(cond);
                let then = self.block(then);
                let otherwise = self.block(otherwise);
                let c = self.expect(c?, Ty::Flag, "the condition of `if`")?;
                Some(TStmt::If { cond: c, then, otherwise })
            }
            Stmt::Pay { amount, on, lag, span } => {
                let a = self.expr(amount);
                let on = match on {
                    Some(d) => Some((self.date(d)?, d.span)),
                    None => None,
                };
                let lag = match lag {
                    Some(l) => Some(self.lag(l)?),
                    None => None,
                };
                let a = self.expect(a?, Ty::Number, "the amount of `pay`")?;
                Some(TStmt::Pay { amount: a, on, lag, span: *span })
            }
            Stmt::End(span) => Some(TStmt::End(*span)),
            Stmt::PayAtHit { amount, condition, from, to, span } => {
                let a = self.expr(amount);
                let barrier = self.touched(condition, from, to, condition.span.join(to.span));
                let a = self.expect(a?, Ty::Number, "the amount of `pay`")?;
                if !matches!(a.kind, TKind::Const(_)) {
                    self.error(
                        a.span,
                        "an amount paid at the moment of the touch must be known before simulation",
                        "pay a fixed amount, such as `notional * 5%`; the levels and states of the block's date are not known yet at the touch",
                    );
                    return None;
                }
                Some(TStmt::PayAtHit { amount: a, barrier: barrier?, span: *span })
            }
            Stmt::Choice { party, amount, using, span } => self.choice(*party, amount, using, *span),
        }
    }

    /// `holder may end for amount using x, y`: one party per product (so the direction of
    /// the regression's bias is known), a number to pay, and at most
    /// [`MAX_CHOICE_VARIABLES`] numbers or flags to regress on.
    fn choice(&mut self, party: Party, amount: &syntax::Expr, using: &[syntax::Expr], span: Span) -> Option<TStmt> {
        let a = self.expr(amount);
        let vars: Vec<Option<TExpr>> = using.iter().map(|e| self.expr(e)).collect();
        let mut ok = true;
        match self.choice {
            Some((first, _)) if first != party => {
                self.error(
                    span,
                    format!(
                        "this product already lets the {0} end it (`{0} may end` above); one product gives the choice to one party only",
                        first.word()
                    ),
                    "price the issuer's call and the holder's put as two products, or keep one of the two",
                );
                ok = false;
            }
            Some(_) => {}
            None => self.choice = Some((party, span)),
        }
        let a = self.expect(a?, Ty::Number, "the amount of `may end`");
        let mut vars_ok = Vec::new();
        for v in vars {
            let v = v?;
            if v.ty == Ty::Date {
                self.error(
                    v.span,
                    "a date cannot be regressed on: the exercise rule reads numbers or flags",
                    "write a number that describes the path, such as `perf(X)` or a state",
                );
                ok = false;
            }
            vars_ok.push(v);
        }
        let vars_given = !using.is_empty();
        let using = if !vars_given {
            let perfs = (0..self.product.underlyings.len()).map(|asset| TExpr {
                kind: TKind::Perf { asset, at: None },
                ty: Ty::Number,
                span,
            });
            let states = self.product.states.iter().enumerate().map(|(slot, st)| TExpr {
                kind: TKind::State(slot),
                ty: st.ty,
                span,
            });
            perfs.chain(states).collect::<Vec<_>>()
        } else {
            vars_ok
        };
        if using.len() > MAX_CHOICE_VARIABLES {
            let what = if vars_given { "" } else { " (by default every underlying's performance and every state)" };
            self.error(
                span,
                format!(
                    "the exercise rule would regress on {} variables{what}; at most {MAX_CHOICE_VARIABLES} are allowed",
                    using.len()
                ),
                "name the ones that drive the decision with `using`, for example `using perf(ZPHX), missed`",
            );
            ok = false;
        }
        (ok && a.is_some()).then(|| TStmt::Choice { party, amount: a.unwrap(), using, span })
    }

    fn expect(&mut self, e: TExpr, ty: Ty, what: &str) -> Option<TExpr> {
        if e.ty == ty {
            Some(e)
        } else {
            let fix = match ty {
                Ty::Flag => "write a comparison such as `perf(X) >= 100%`",
                Ty::Number => "write an amount such as `notional * 5%`",
                Ty::Date => "write a date such as 2027-12-01, 1y, t or last(schedule)",
            };
            self.error(e.span, format!("{what} must be {}, but this is {}", ty.describe(), e.ty.describe()), fix);
            None
        }
    }

    /// A payment lag: its count of business days, a whole number from 0 to
    /// [`MAX_LAG_DAYS`] known before simulation.
    fn lag(&mut self, lag: &syntax::Lag) -> Option<PayLag> {
        let e = self.expr(&lag.days)?;
        let e = self.expect(e, Ty::Number, "the number of business days of a payment lag")?;
        let TKind::Const(v) = e.kind else {
            self.error(
                lag.days.span,
                "the number of business days of a payment lag must be known before simulation",
                "write a whole number or a parameter, e.g. `pay coupon on 2 business days after t`",
            );
            return None;
        };
        if v >= 0.0 && v.fract() == 0.0 && v <= f64::from(MAX_LAG_DAYS) {
            return Some(PayLag { days: v as u32, calendar: lag.calendar.clone(), span: lag.span });
        }
        if v > f64::from(MAX_LAG_DAYS) && v.fract() == 0.0 {
            self.error(
                lag.days.span,
                format!("a payment lag of {v} business days is too long"),
                format!("a payment lag is at most {MAX_LAG_DAYS} business days"),
            );
        } else {
            self.error(
                lag.days.span,
                format!("a payment lag of {v} business days is not a whole number of days, 0 or more"),
                "write for example `2 business days after t`; 0 pays on the date itself, or on the next business day when it is not one",
            );
        }
        None
    }

    /// A date-typed expression.
    fn date(&mut self, expr: &syntax::Expr) -> Option<DateRef> {
        let e = self.expr(expr)?;
        match e.kind {
            TKind::Date(d) => Some(d),
            _ => {
                self.error(
                    expr.span,
                    format!("expected a date, but this is {}", e.ty.describe()),
                    "write a date such as 2027-12-01, 1y, start, t, first(s) or last(s)",
                );
                None
            }
        }
    }

    fn asset_arg(&mut self, arg: &syntax::Expr, func: &str) -> Option<usize> {
        if let ExprKind::Name(n) = &arg.kind {
            if let Some((Global::Underlying(i), _)) = self.globals.get(n) {
                return Some(*i);
            }
            let names: Vec<&str> = self.product.underlyings.iter().map(|u| u.text.as_str()).collect();
            let fix = match closest(n, names.iter().copied()) {
                Some(c) => format!("did you mean `{c}`?"),
                None => format!("add it to the `underlyings` line (now: {})", names.join(", ")),
            };
            self.error(arg.span, format!("`{n}` is not an underlying of this payoff"), fix);
            return None;
        }
        self.error(
            arg.span,
            format!("`{func}` takes an underlying's name here"),
            format!("write for example `{func}(ZPHX)`"),
        );
        None
    }

    fn expr(&mut self, expr: &syntax::Expr) -> Option<TExpr> {
        let span = expr.span;
        let num = |kind| Some(TExpr { kind, ty: Ty::Number, span });
        match &expr.kind {
            ExprKind::Number(v) if !v.is_finite() => {
                self.error(
                    span,
                    "this number is too large: numbers go up to about 1.8e308",
                    "write a smaller number; amounts are in units of the currency, and a percentage such as 2.25% is a fraction",
                );
                None
            }
            ExprKind::Number(v) => num(TKind::Const(*v)),
            ExprKind::Flag(b) => Some(TExpr { kind: TKind::Const(f64::from(u8::from(*b))), ty: Ty::Flag, span }),
            ExprKind::Date(d) => Some(TExpr { kind: TKind::Date(DateRef::Term(*d)), ty: Ty::Date, span }),
            ExprKind::Name(n) => self.name(n, span),
            ExprKind::Unary(op, a) => {
                let a = self.expr(a)?;
                let want = if *op == UnaryOp::Neg { Ty::Number } else { Ty::Flag };
                let what = if *op == UnaryOp::Neg { "`-`" } else { "`not`" };
                let a = self.expect(a, want, &format!("the operand of {what}"))?;
                let kind = match a.kind {
                    TKind::Const(v) if *op == UnaryOp::Neg => TKind::Const(-v),
                    TKind::Const(v) => TKind::Const(f64::from(u8::from(v == 0.0))),
                    _ => TKind::Unary(*op, Box::new(a)),
                };
                Some(TExpr { kind, ty: want, span })
            }
            ExprKind::Binary(op, a, b) => {
                let (a, b) = (self.expr(a), self.expr(b));
                self.binary(*op, a?, b?, span)
            }
            ExprKind::If(c, a, b) => {
                let (c, a, b) = (self.expr(c), self.expr(a), self.expr(b));
                let (c, a, b) = (c?, a?, b?);
                let c = self.expect(c, Ty::Flag, "the condition of `if`")?;
                if a.ty != b.ty || a.ty == Ty::Date {
                    self.error(
                        span,
                        format!("`if` gives {} on one side and {} on the other", a.ty.describe(), b.ty.describe()),
                        "make both branches numbers (or both flags)",
                    );
                    return None;
                }
                let ty = a.ty;
                if let TKind::Const(cv) = c.kind {
                    return Some(if cv != 0.0 { a } else { b });
                }
                Some(TExpr { kind: TKind::If(Box::new(c), Box::new(a), Box::new(b)), ty, span })
            }
            ExprKind::Call(name, args) => self.call(name, args, span),
            ExprKind::Aggregate(agg, body, sched) => {
                let body = self.expr(body);
                let s = self.schedule_ref(sched)?;
                let body = body?;
                let want = match agg {
                    Aggregate::Count | Aggregate::Any | Aggregate::All => Ty::Flag,
                    Aggregate::GeometricAverage => Ty::Number,
                    _ => Ty::Number,
                };
                let body = self.expect(body, want, &format!("the inside of `{}`", agg.name()))?;
                let ty = if matches!(agg, Aggregate::Any | Aggregate::All) { Ty::Flag } else { Ty::Number };
                Some(TExpr { kind: TKind::Aggregate(*agg, Box::new(body), s), ty, span })
            }
            ExprKind::Touched { condition, from, to } => self.touched(condition, from, to, span),
            ExprKind::Extreme { up, observed, from, to } => self.extreme(*up, observed, from, to, span),
        }
    }

    fn name(&mut self, n: &str, span: Span) -> Option<TExpr> {
        if let Some((slot, ty)) = self.lookup_let(n) {
            let kind = if ty == Ty::Date { TKind::Date(DateRef::Let(slot)) } else { TKind::Let(slot) };
            return Some(TExpr { kind, ty, span });
        }
        if self.loop_var.as_ref().is_some_and(|(v, _)| v == n) {
            return Some(TExpr { kind: TKind::Date(DateRef::Loop), ty: Ty::Date, span });
        }
        match self.globals.get(n).map(|(g, _)| *g) {
            Some(Global::Param(v, ty)) => Some(TExpr { kind: TKind::Const(v), ty, span }),
            Some(Global::Notional) => Some(TExpr { kind: TKind::Const(self.product.notional), ty: Ty::Number, span }),
            Some(Global::State(s)) => Some(TExpr { kind: TKind::State(s), ty: self.product.states[s].ty, span }),
            Some(Global::Schedule(s)) => Some(TExpr { kind: TKind::Date(DateRef::Only(s)), ty: Ty::Date, span }),
            Some(Global::Underlying(_)) => {
                self.error(
                    span,
                    format!("`{n}` is an underlying, not a value"),
                    format!("write `perf({n})` for its performance or `level({n})` for its level"),
                );
                None
            }
            None => {
                let otherwise = if self.loop_var.is_none() && !self.scopes.is_empty() {
                    "declare it with `param`, `state`, `let` or `dates`; a loop date such as `t` exists only inside `for each t in SCHEDULE { ... }`"
                } else {
                    "declare it with `param`, `state`, `let` or `dates`"
                };
                let fix = if n == "notional" && !self.notional_seen {
                    "declare it at the top with `notional 1_000_000`".to_string()
                } else {
                    self.suggest(n, otherwise)
                };
                self.error(span, format!("unknown name `{n}`"), fix);
                None
            }
        }
    }

    /// Whether an expression is a performance (a ratio to the initial level): `perf(X)`,
    /// an average, highest or lowest of one, a min or max of several, or a `let` of one.
    fn is_performance(&self, e: &TExpr) -> bool {
        match &e.kind {
            TKind::Perf { .. } => true,
            TKind::Aggregate(
                Aggregate::Average | Aggregate::GeometricAverage | Aggregate::Highest | Aggregate::Lowest,
                body,
                _,
            ) => self.is_performance(body),
            TKind::Extreme { relative, .. } => *relative,
            TKind::Func(Func::Min | Func::Max, args) => {
                args.iter().any(|a| self.is_performance(a))
                    && args.iter().all(|a| self.is_performance(a) || matches!(a.kind, TKind::Const(_)))
            }
            TKind::Let(slot) => self.performance_lets.contains(slot),
            _ => false,
        }
    }

    fn binary(&mut self, op: BinaryOp, a: TExpr, b: TExpr, span: Span) -> Option<TExpr> {
        use BinaryOp::*;
        let (want, out) = match op {
            Add | Sub | Mul | Div => (Ty::Number, Ty::Number),
            Lt | Le | Gt | Ge | Eq | Ne => (if a.ty == Ty::Date { Ty::Date } else { Ty::Number }, Ty::Flag),
            And | Or => (Ty::Flag, Ty::Flag),
        };
        let want = if matches!(op, Eq | Ne) && a.ty == Ty::Flag { Ty::Flag } else { want };
        let what = format!("the operands of `{}`", op.symbol());
        if a.ty != want || b.ty != want {
            let bad = if a.ty != want { &a } else { &b };
            let fix = match (want, bad.ty) {
                (Ty::Date, _) => "compare a date with a date, such as `t == last(quarterly)`",
                (Ty::Number, Ty::Date) => "dates only compare; use `years(d)` for a date as a number of years",
                (Ty::Number, _) => "use numbers here; a flag becomes a number with `if c then 1 else 0`",
                (Ty::Flag, _) => "use comparisons here, such as `perf(X) >= 100%`",
            };
            self.error(bad.span, format!("{what} must be {}, but this is {}", want.describe(), bad.ty.describe()), fix);
            return None;
        }
        if matches!(op, Lt | Le | Gt | Ge) {
            let big = |e: &TExpr| matches!(e.kind, TKind::Const(c) if c.abs() > 5.0);
            let perf = |e: &TExpr| self.is_performance(e);
            if let Some(k) = [(&a, &b), (&b, &a)].into_iter().find(|(p, k)| perf(p) && big(k)).map(|(_, k)| k) {
                let TKind::Const(c) = k.kind else { unreachable!("checked above") };
                self.warnings.push(
                    Diagnostic::at(
                        span,
                        format!("a performance is compared with {c}, that is {}% of the initial level", c * 100.0),
                    )
                    .with_fix(format!("if you meant {c} percent, write `{c}%` (here or where the parameter is given)"))
                    .as_warning(),
                );
            }
        }
        if let (TKind::Const(x), TKind::Const(y)) = (&a.kind, &b.kind) {
            let compares = !matches!(op, BinaryOp::Add | BinaryOp::Sub | BinaryOp::Mul | BinaryOp::Div);
            if compares && (x.is_nan() || y.is_nan()) {
                self.error(span, "this condition compares a value that is not a number", NOT_A_NUMBER_FIX);
                return None;
            }
            let v = fold(op, *x, *y);
            return Some(TExpr { kind: TKind::Const(v), ty: out, span });
        }
        Some(TExpr { kind: TKind::Binary(op, Box::new(a), Box::new(b)), ty: out, span })
    }

    /// Checks that `arg` of function `f` is the date of the enclosing `for each` loop;
    /// `more` ends the fix.
    fn loop_date_arg(&mut self, arg: &syntax::Expr, f: &str, more: &str) -> Option<()> {
        let ok = matches!(&arg.kind, ExprKind::Name(n) if self.loop_var.as_ref().is_some_and(|(v, _)| v == n));
        if !ok {
            self.error(
                arg.span,
                format!("`{f}` takes the date of the enclosing `for each` loop"),
                format!("write `{f}(t)` inside `for each t in SCHEDULE {{ ... }}`{more}"),
            );
            return None;
        }
        Some(())
    }

    fn call(&mut self, name: &Name, args: &[syntax::Expr], span: Span) -> Option<TExpr> {
        let f = name.text.as_str();
        let arity = |c: &mut Checker, lo: usize, hi: usize, usage: &str| -> bool {
            if args.len() < lo || args.len() > hi {
                c.error(
                    span,
                    format!("`{f}` takes {}, not {}", count_words(lo, hi), args.len()),
                    format!("write `{usage}`"),
                );
                false
            } else {
                true
            }
        };
        let number = |kind| Some(TExpr { kind, ty: Ty::Number, span });
        match f {
            "min" | "max" => {
                if !arity(self, 1, usize::MAX, &format!("{f}(a, b, ...)")) {
                    return None;
                }
                let mut out = Vec::new();
                for a in args {
                    let e = self.expr(a);
                    out.push(self.expect(e?, Ty::Number, &format!("each argument of `{f}`"))?);
                }
                let func = if f == "min" { Func::Min } else { Func::Max };
                if out.len() == 1 {
                    return out.pop();
                }
                if out.iter().all(|e| matches!(e.kind, TKind::Const(_))) {
                    let vals = out.iter().map(|e| if let TKind::Const(v) = e.kind { v } else { 0.0 });
                    let v = if func == Func::Min {
                        vals.fold(f64::INFINITY, min_or_nan)
                    } else {
                        vals.fold(f64::NEG_INFINITY, max_or_nan)
                    };
                    return number(TKind::Const(v));
                }
                number(TKind::Func(func, out))
            }
            "remainder" => {
                if !arity(self, 2, 2, "remainder(x, n)") {
                    return None;
                }
                let x = self.expr(&args[0]);
                let n = self.expr(&args[1]);
                let x = self.expect(x?, Ty::Number, "the first argument of `remainder`")?;
                let n = self.expect(n?, Ty::Number, "the second argument of `remainder`")?;
                if let TKind::Const(d) = n.kind {
                    if d == 0.0 {
                        self.error(n.span, "`remainder` by 0 is not a number", "divide by a number other than 0");
                        return None;
                    }
                }
                if let (TKind::Const(a), TKind::Const(d)) = (&x.kind, &n.kind) {
                    return number(TKind::Const(remainder(*a, *d)));
                }
                number(TKind::Func(Func::Remainder, vec![x, n]))
            }
            "abs" | "exp" | "log" | "sqrt" | "floor" => {
                if !arity(self, 1, 1, &format!("{f}(x)")) {
                    return None;
                }
                let e = self.expr(&args[0]);
                let e = self.expect(e?, Ty::Number, &format!("the argument of `{f}`"))?;
                let func = match f {
                    "abs" => Func::Abs,
                    "exp" => Func::Exp,
                    "log" => Func::Log,
                    "sqrt" => Func::Sqrt,
                    _ => Func::Floor,
                };
                if let TKind::Const(v) = e.kind {
                    let r = apply(func, v);
                    if !r.is_finite() {
                        self.error(span, format!("`{f}` of {v} is not a number"), "check the argument's sign");
                        return None;
                    }
                    return number(TKind::Const(r));
                }
                number(TKind::Func(func, vec![e]))
            }
            "level" | "perf" => {
                if !arity(self, 1, 2, &format!("{f}(ZPHX) or {f}(ZPHX, 2027-06-01)")) {
                    return None;
                }
                let asset = self.asset_arg(&args[0], f);
                let at = match args.get(1) {
                    Some(d) => Some(self.date(d)?),
                    None => None,
                };
                let asset = asset?;
                number(if f == "level" { TKind::Level { asset, at } } else { TKind::Perf { asset, at } })
            }
            "initial" => {
                if !arity(self, 1, 1, "initial(ZPHX)") {
                    return None;
                }
                number(TKind::Initial(self.asset_arg(&args[0], f)?))
            }
            "position" => {
                if !arity(self, 1, 1, "position(t)") {
                    return None;
                }
                self.loop_date_arg(&args[0], "position", "")?;
                number(TKind::Position)
            }
            "previous" => {
                if !arity(self, 1, 1, "previous(t)") {
                    return None;
                }
                self.loop_date_arg(
                    &args[0],
                    "previous",
                    ": the loop's date before t (the start date on its first date)",
                )?;
                Some(TExpr { kind: TKind::Date(DateRef::Previous), ty: Ty::Date, span })
            }
            "years" => {
                if !arity(self, 1, 1, "years(t)") {
                    return None;
                }
                number(TKind::Years(self.date(&args[0])?))
            }
            "first" | "last" => {
                if !arity(self, 1, 1, &format!("{f}(schedule)")) {
                    return None;
                }
                let ExprKind::Name(n) = &args[0].kind else {
                    self.error(
                        args[0].span,
                        format!("`{f}` takes a schedule's name"),
                        format!("write `{f}(quarterly)`"),
                    );
                    return None;
                };
                let s = self.schedule_ref(&Name { text: n.clone(), span: args[0].span })?;
                let d = if f == "first" { DateRef::First(s) } else { DateRef::Last(s) };
                Some(TExpr { kind: TKind::Date(d), ty: Ty::Date, span })
            }
            _ => {
                let fix = match closest(f, FUNCTIONS.iter().copied()) {
                    Some(c) => format!("did you mean `{c}`?"),
                    None => format!("the functions are {}", FUNCTIONS.join(", ")),
                };
                self.error(name.span, format!("unknown function `{f}`"), fix);
                None
            }
        }
    }

    fn touched(
        &mut self,
        condition: &syntax::Expr,
        from: &syntax::Expr,
        to: &syntax::Expr,
        span: Span,
    ) -> Option<TExpr> {
        let usage = "write `touched(perf(X) <= 65% from start to last(s))` or with `>=` for an up barrier";
        let ExprKind::Binary(op, lhs, rhs) = &condition.kind else {
            self.error(condition.span, "`touched` needs a barrier condition on one underlying", usage);
            return None;
        };
        let (observed, barrier, direction) = match (op, &lhs.kind, &rhs.kind) {
            (BinaryOp::Le | BinaryOp::Lt, ExprKind::Call(..), _) => (lhs, rhs, Direction::Down),
            (BinaryOp::Ge | BinaryOp::Gt, ExprKind::Call(..), _) => (lhs, rhs, Direction::Up),
            (BinaryOp::Le | BinaryOp::Lt, _, ExprKind::Call(..)) => (rhs, lhs, Direction::Up),
            (BinaryOp::Ge | BinaryOp::Gt, _, ExprKind::Call(..)) => (rhs, lhs, Direction::Down),
            _ => {
                self.error(
                    condition.span,
                    "`touched` needs `perf(X)` or `level(X)` compared with a barrier level",
                    usage,
                );
                return None;
            }
        };
        let ExprKind::Call(f, args) = &observed.kind else { unreachable!("matched a call above") };
        let relative = match f.text.as_str() {
            "perf" => true,
            "level" => false,
            _ => {
                self.error(observed.span, "`touched` watches `perf(X)` or `level(X)`", usage);
                return None;
            }
        };
        if args.len() != 1 {
            self.error(
                observed.span,
                "inside `touched`, the level is watched over the whole interval, so give no date",
                usage,
            );
            return None;
        }
        let asset = self.asset_arg(&args[0], &f.text);
        let level = self.constant(barrier, "a barrier level");
        let (from, to) = (self.date(from), self.date(to));
        let (asset, (level, _), from, to) = (asset?, level?, from?, to?);
        if !(level > 0.0 && level.is_finite()) {
            self.error(barrier.span, "a barrier level must be a positive number", "write for example `65%`");
            return None;
        }
        Some(TExpr { kind: TKind::Touched { asset, direction, level, relative, from, to }, ty: Ty::Flag, span })
    }
}

impl Checker {
    /// `highest(perf(X) from a to b)` / `lowest(level(X) from a to b)`.
    fn extreme(
        &mut self,
        up: bool,
        observed: &syntax::Expr,
        from: &syntax::Expr,
        to: &syntax::Expr,
        span: Span,
    ) -> Option<TExpr> {
        let name = if up { "highest" } else { "lowest" };
        let usage = format!(
            "write `{name}(perf(X) from start to t)` for the continuous extreme, or `{name}(perf(X) over SCHEDULE)` for the extreme of fixings"
        );
        let relative = match &observed.kind {
            ExprKind::Call(f, args) if f.text == "perf" || f.text == "level" => {
                if args.len() != 1 {
                    self.error(
                        observed.span,
                        format!("inside `{name}(... from .. to ..)` the level is watched over the whole window, so give no date"),
                        usage,
                    );
                    return None;
                }
                f.text == "perf"
            }
            _ => {
                self.error(
                    observed.span,
                    format!("`{name}` over a window watches `perf(X)` or `level(X)` of one underlying"),
                    usage,
                );
                return None;
            }
        };
        let ExprKind::Call(f, args) = &observed.kind else { unreachable!("matched a call above") };
        let asset = self.asset_arg(&args[0], &f.text);
        let (from, to) = (self.date(from), self.date(to));
        let (asset, from, to) = (asset?, from?, to?);
        Some(TExpr { kind: TKind::Extreme { asset, up, relative, from, to }, ty: Ty::Number, span })
    }
}

/// Whether a schedule surely holds a single date (a one-date list or one step).
fn holds_one_date(s: &syntax::Schedule) -> bool {
    match &s.kind {
        syntax::ScheduleKind::List(dates) => dates.len() == 1,
        syntax::ScheduleKind::Steps { n, .. } => *n == 1,
        syntax::ScheduleKind::Every { from, to, .. } => from.0 == to.0,
        syntax::ScheduleKind::BusinessDays { .. } => false,
    }
}

fn stmt_span(stmt: &Stmt) -> Span {
    match stmt {
        Stmt::Let(n, e) | Stmt::Assign(n, e) => n.span.join(e.span),
        Stmt::If { span, .. }
        | Stmt::Pay { span, .. }
        | Stmt::PayAtHit { span, .. }
        | Stmt::End(span)
        | Stmt::Choice { span, .. } => *span,
    }
}

fn count_words(lo: usize, hi: usize) -> String {
    let word = |n: usize| if n == 1 { "1 argument".to_string() } else { format!("{n} arguments") };
    if hi == usize::MAX {
        format!("at least {}", word(lo))
    } else if lo == hi {
        word(lo)
    } else {
        format!("{lo} or {hi} arguments")
    }
}

/// The fix offered for a value that is not a number, in a payment or a condition.
pub const NOT_A_NUMBER_FIX: &str = "look for a division by zero, the log or square root of a negative number, or an `exp` of more than 709 (numbers go up to about 1.8e308)";

/// The smaller of two numbers, or not a number when either is not one (`f64::min` would
/// quietly return the other, hiding the fault from the checks on payments).
#[inline(always)]
pub fn min_or_nan(x: f64, y: f64) -> f64 {
    let m = if x < y { x } else { y };
    if x.is_nan() {
        x
    } else {
        m
    }
}

/// The larger of two numbers, or not a number when either is not one.
#[inline(always)]
pub fn max_or_nan(x: f64, y: f64) -> f64 {
    let m = if x > y { x } else { y };
    if x.is_nan() {
        x
    } else {
        m
    }
}

/// Applies a binary operator to two known values (flags are 1 and 0).
pub fn fold(op: BinaryOp, x: f64, y: f64) -> f64 {
    let flag = |b: bool| f64::from(u8::from(b));
    match op {
        BinaryOp::Add => x + y,
        BinaryOp::Sub => x - y,
        BinaryOp::Mul => x * y,
        BinaryOp::Div => x / y,
        BinaryOp::Lt => flag(x < y),
        BinaryOp::Le => flag(x <= y),
        BinaryOp::Gt => flag(x > y),
        BinaryOp::Ge => flag(x >= y),
        BinaryOp::Eq => flag(x == y),
        BinaryOp::Ne => flag(x != y),
        BinaryOp::And => flag(x != 0.0 && y != 0.0),
        BinaryOp::Or => flag(x != 0.0 || y != 0.0),
    }
}

/// Applies a one-argument function.
pub fn apply(func: Func, x: f64) -> f64 {
    match func {
        Func::Abs => x.abs(),
        Func::Exp => x.exp(),
        Func::Log => x.ln(),
        Func::Sqrt => x.sqrt(),
        Func::Floor => x.floor(),
        Func::Min | Func::Max | Func::Remainder => x,
    }
}

/// The remainder of `x` divided by `n`, with the sign of `n`: `x - floor(x / n) * n`,
/// computed in exactly that order, so it gives the same bits as the expression written out.
pub fn remainder(x: f64, n: f64) -> f64 {
    x - (x / n).floor() * n
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_missing_percent_is_told_from_a_value_of_the_right_size() {
        // coupon=4 against 2.25%, coupon=0.8 against 0.80%: slips.
        assert!(looks_like_a_missing_percent(4.0, 0.0225));
        assert!(looks_like_a_missing_percent(0.8, 0.008));
        // A value of the default's own size, or a barrier written as a fraction: no slip.
        assert!(!looks_like_a_missing_percent(0.009, 0.008));
        assert!(!looks_like_a_missing_percent(0.7, 0.7));
        assert!(!looks_like_a_missing_percent(0.6, 0.7));
        assert!(!looks_like_a_missing_percent(2.0, 1.0));
        assert!(!looks_like_a_missing_percent(0.0, 0.008));
    }

    #[test]
    fn the_same_warning_collapses_to_one_with_a_count() {
        let w = |start| Diagnostic::at(Span::new(start, start + 1), "compared with 90").as_warning();
        let out = collapse_warnings(vec![w(1), w(5), w(5), w(9), Diagnostic::new("other").as_warning()]);
        assert_eq!(out.len(), 2);
        assert_eq!(out[0].message, "compared with 90 (and at 2 more places)");
        assert_eq!(out[0].span, Some(Span::new(1, 2)));
        assert_eq!(out[1].message, "other");
    }
}
