//! The payoff's own digitals: comparisons of levels with fixed thresholds on the last
//! date, found in the compiled program, for control variates whose expectations are
//! normal orthant probabilities.
//!
//! An autocallable's or a digital's value jumps where a comparison flips: at maturity a
//! worst-of note pays the notional above its barrier and the worst performance below it.
//! The controls that read smooth functions of the levels (forwards, calls, hedges) cannot
//! follow that jump; the indicator of the same event can, and under the model its
//! expectation is exact: the log levels are jointly normal, so `P(all Sₐ(T) ≥ hₐ)` is a
//! normal orthant probability ([`crate::closed_form::normal_orthant`]).
//!
//! What counts as such a comparison is read off the operations, not the source: a value
//! that is a level, a positive multiple of one (`perf(X)`), or the `min` (or `max`) of
//! such values on one date, through increasing steps (adding or subtracting a constant,
//! multiplying by a positive one, `log`, `exp`, `sqrt`), compared (`<`, `<=`, `>`, `>=`)
//! with a constant that puts the threshold on the levels above zero.
//! `min(...) ≥ c` is the event "every level at or above its threshold"; `max(...) ≥ c` is
//! the complement of "every level below it", the same control up to sign. Only the last
//! date's comparisons are taken: there nothing later smooths the jump (an early
//! redemption pays nearly the same on neighbouring dates), and every path has a level
//! there even when it ended early. A product that can end early also gets each asset's
//! own digital at those thresholds valued on the date it ends (`sim::paths`).

use crate::compile::{Bin, Op, Program, Src, Un};

/// The most digital controls one program gets: each one is a column of the regression.
pub const MOST: usize = 4;

/// One event of the last date: every listed asset's level at or above its threshold
/// (`above`), or every one below it.
#[derive(Clone, Debug, PartialEq)]
pub struct Event {
    /// `(asset, threshold level)`, in asset order.
    pub thresholds: Vec<(usize, f64)>,
    pub above: bool,
}

/// How a value is built from the levels of one date.
#[derive(Clone, Copy, Debug, PartialEq)]
enum Shape {
    One,
    Min,
    Max,
}

/// An increasing function applied to a value, so that `f(x) > c` is `x > f⁻¹(c)`.
#[derive(Clone, Copy, Debug, PartialEq)]
enum Step {
    Add(f64),
    /// By a positive factor.
    Mul(f64),
    Log,
    Exp,
    Sqrt,
}

impl Step {
    /// The threshold on the value before this step for a threshold `c` after it; `None`
    /// where the comparison does not depend on the value (`exp(x) > 0`).
    fn before(self, c: f64) -> Option<f64> {
        match self {
            Step::Add(b) => Some(c - b),
            Step::Mul(a) => Some(c / a),
            Step::Log => Some(c.exp()),
            Step::Exp => (c > 0.0).then(|| c.ln()),
            Step::Sqrt => (c >= 0.0).then_some(c * c),
        }
    }
}

/// A value `f(shape over a of (wₐ · level of asset a on grid date `date`))`, `wₐ > 0`,
/// `f` the increasing steps `after`, in order.
#[derive(Clone, Debug, PartialEq)]
struct Levels {
    date: usize,
    shape: Shape,
    /// `(asset, weight)`, in asset order, each asset once.
    terms: Vec<(usize, f64)>,
    after: Vec<Step>,
}

impl Levels {
    fn scaled(mut self, by: f64) -> Option<Levels> {
        if !(by.is_finite() && by > 0.0) {
            return None;
        }
        if !self.after.is_empty() {
            return Some(self.then(Step::Mul(by)));
        }
        for t in &mut self.terms {
            t.1 *= by;
        }
        Some(self)
    }

    fn then(mut self, step: Step) -> Levels {
        // `log(w·S) + b` is `log(w·eᵇ·S)`: kept in the weights, so that the logs of
        // several levels, each shifted by its own constant, still combine by `min`.
        if let (Step::Add(b), [Step::Log]) = (step, &self.after[..]) {
            let factor = b.exp();
            if factor.is_finite() && factor > 0.0 {
                for t in &mut self.terms {
                    t.1 *= factor;
                }
                return self;
            }
        }
        self.after.push(step);
        self
    }

    /// `min(self, other)` (`up` false) or `max`, when both read one date through the same
    /// steps (an increasing function commutes with `min` and `max`).
    fn combined(self, other: Levels, up: bool) -> Option<Levels> {
        let shape = if up { Shape::Max } else { Shape::Min };
        let fits = |s: Shape| s == Shape::One || s == shape;
        if self.date != other.date || !fits(self.shape) || !fits(other.shape) || self.after != other.after {
            return None;
        }
        let mut terms = self.terms;
        for (a, w) in other.terms {
            match terms.iter_mut().find(|t| t.0 == a) {
                // min(w₁S, w₂S) = min(w₁, w₂)·S for a positive level; max likewise.
                Some(t) => t.1 = if up { t.1.max(w) } else { t.1.min(w) },
                None => terms.push((a, w)),
            }
        }
        terms.sort_by_key(|t| t.0);
        Some(Levels { date: self.date, shape, terms, after: self.after })
    }
}

/// The distinct events compared on the program's last grid date, over at most three
/// assets each: at most [`MOST`] of them, the first in an order of the events themselves.
pub fn last_date_events(p: &Program) -> Vec<Event> {
    let last = p.grid.len().saturating_sub(1);
    let mut events: Vec<Event> =
        compared_events(p).into_iter().filter(|(date, _)| *date == last).map(|(_, e)| e).collect();
    in_order(&mut events);
    events.truncate(MOST);
    events
}

/// The distinct events compared on the program's grid dates after the valuation date,
/// over at most three assets each, with the dates each is compared on (in order): at most
/// [`MOST`] of them, the first in an order of the events themselves.
pub fn dated_events(p: &Program) -> Vec<(Event, Vec<usize>)> {
    let mut events: Vec<Event> = Vec::new();
    let compared = compared_events(p);
    for (_, e) in &compared {
        if !events.iter().any(|x| same_event(x, e)) {
            events.push(e.clone());
        }
    }
    in_order(&mut events);
    events.truncate(MOST);
    events
        .into_iter()
        .map(|e| {
            let mut dates: Vec<usize> =
                compared.iter().filter(|(_, x)| same_event(x, &e)).map(|(date, _)| *date).collect();
            dates.sort_unstable();
            dates.dedup();
            (e, dates)
        })
        .collect()
}

/// In an order of their own, not the program's: two writings of one payoff that compare
/// the same things get the same controls.
fn in_order(events: &mut [Event]) {
    events.sort_by(|x, y| {
        y.above.cmp(&x.above).then_with(|| {
            let key = |e: &Event| e.thresholds.iter().map(|t| (t.0, t.1.to_bits())).collect::<Vec<_>>();
            key(x).cmp(&key(y))
        })
    });
}

/// Whether two events are one: the same side, the same assets, thresholds equal to
/// within rounding.
fn same_event(x: &Event, y: &Event) -> bool {
    x.above == y.above
        && x.thresholds.len() == y.thresholds.len()
        && x.thresholds.iter().zip(&y.thresholds).all(|(a, b)| a.0 == b.0 && (a.1 - b.1).abs() <= 1e-12 * b.1)
}

/// Every (grid date, event) compared in the program after the valuation date, each pair
/// once, in the program's order.
fn compared_events(p: &Program) -> Vec<(usize, Event)> {
    let na = p.assets.len();
    let last = p.grid.len().saturating_sub(1);
    if na == 0 || last <= p.past {
        return Vec::new();
    }
    let mut regs: Vec<Option<Levels>> = vec![None; p.registers];
    let read = |regs: &[Option<Levels>], s: Src| -> Option<Levels> {
        match s {
            Src::Level(i) => {
                let i = i as usize;
                Some(Levels { date: i / na, shape: Shape::One, terms: vec![(i % na, 1.0)], after: Vec::new() })
            }
            // A comparison made on logs (`compile::logs`).
            Src::LogLevel(i) => {
                let i = i as usize;
                Some(Levels { date: i / na, shape: Shape::One, terms: vec![(i % na, 1.0)], after: vec![Step::Log] })
            }
            Src::Reg(r) => regs.get(r as usize).cloned().flatten(),
            _ => None,
        }
    };
    let konst = |s: Src| match s {
        Src::Const(c) => Some(c),
        _ => None,
    };
    // Only the comparisons whose outcome reaches a payment or an end.
    let choice_reads: Vec<Vec<Src>> = p.choices.iter().map(|c| c.using.clone()).collect();
    let live = crate::compile::live_ops(&p.ops, p.registers, &choice_reads, |_| false);
    let mut events: Vec<(usize, Event)> = Vec::new();
    let mut compared = |regs: &[Option<Levels>], op: Bin, a: Src, b: Src| {
        if matches!(op, Bin::Lt | Bin::Le | Bin::Gt | Bin::Ge) {
            let pair = match (read(regs, a), read(regs, b)) {
                (Some(l), None) => konst(b).map(|c| (l, c)),
                (None, Some(l)) => konst(a).map(|c| (l, c)),
                _ => None,
            };
            if let Some((l, c)) = pair {
                note(&mut events, l, c, p.past);
            }
        }
    };
    for (op, &live) in p.ops.iter().zip(&live) {
        let (dst, value) = match *op {
            // A comparison whose outcome reaches no payment and no end (code the dates rule
            // out, a fold nothing pays) is no part of the payoff: two writings of one
            // payoff may differ there.
            Op::Bin { op, dst, .. } if !live && matches!(op, Bin::Lt | Bin::Le | Bin::Gt | Bin::Ge) => (dst, None),
            Op::Cmp { dst, .. } if !live => (dst, None),
            Op::Bin { op, dst, a, b } => {
                let value = match op {
                    Bin::Mul => match (read(&regs, a), read(&regs, b)) {
                        (Some(l), None) => konst(b).and_then(|c| l.scaled(c)),
                        (None, Some(l)) => konst(a).and_then(|c| l.scaled(c)),
                        _ => None,
                    },
                    Bin::Div => read(&regs, a).zip(konst(b)).and_then(|(l, c)| l.scaled(1.0 / c)),
                    Bin::Add => match (read(&regs, a), read(&regs, b)) {
                        (Some(l), None) => konst(b).filter(|c| c.is_finite()).map(|c| l.then(Step::Add(c))),
                        (None, Some(l)) => konst(a).filter(|c| c.is_finite()).map(|c| l.then(Step::Add(c))),
                        _ => None,
                    },
                    Bin::Sub => {
                        read(&regs, a).zip(konst(b).filter(|c| c.is_finite())).map(|(l, c)| l.then(Step::Add(-c)))
                    }
                    Bin::Min | Bin::Max => {
                        read(&regs, a).zip(read(&regs, b)).and_then(|(x, y)| x.combined(y, op == Bin::Max))
                    }
                    _ => {
                        compared(&regs, op, a, b);
                        None
                    }
                };
                (dst, value)
            }
            Op::Cmp { op, dst, a, b, .. } => {
                compared(&regs, op, a, b);
                (dst, None)
            }
            Op::Copy { dst, src } => (dst, read(&regs, src)),
            Op::Un { op, dst, a } => {
                let step = match op {
                    Un::Log => Some(Step::Log),
                    Un::Exp => Some(Step::Exp),
                    Un::Sqrt => Some(Step::Sqrt),
                    _ => None,
                };
                (dst, read(&regs, a).zip(step).map(|(l, s)| l.then(s)))
            }
            Op::Select { dst, .. } | Op::Acc { dst, .. } | Op::Assign { dst, .. } => (dst, None),
            Op::Choose { dst, .. } => (dst, None),
            Op::Pay { .. } | Op::End { .. } => continue,
        };
        if let Some(r) = regs.get_mut(dst as usize) {
            *r = value;
        }
    }
    events
}

/// Records the event `l` compared with `c`, when it is after the valuation date (`past`)
/// and new on its date.
fn note(events: &mut Vec<(usize, Event)>, l: Levels, c: f64, past: usize) {
    let Some(c) = l.after.iter().rev().try_fold(c, |c, step| step.before(c)) else { return };
    if l.date <= past || !(c.is_finite() && c > 0.0) || l.terms.len() > 3 {
        return;
    }
    let event = Event { thresholds: l.terms.iter().map(|&(a, w)| (a, c / w)).collect(), above: l.shape != Shape::Max };
    if !events.iter().any(|(date, e)| *date == l.date && same_event(e, &event)) {
        events.push((l.date, event));
    }
}
