//! Conditions on values that are not numbers (issue 8, the last silent case): a
//! comparison with such a value has no answer, so the run is refused at the condition
//! instead of quietly taking the `else` side. The check costs nothing where the operands
//! are always numbers (levels, performances and their minimum), and it changes no price.

mod common;

use std::path::Path;

use common::{price, price_se, Scratch};
use pathfold::compile::Op;
use pathfold::pricing::compile_source;

const HEADER: &str = "currency USD\nnotional 100\nunderlyings ZPHX, QMEN\n";

fn program(body: &str) -> pathfold::compile::Program {
    let source = format!("product \"conditions\"\n{HEADER}{body}");
    let market = Path::new(concat!(env!("CARGO_MANIFEST_DIR"), "/payoffs/market.toml"));
    compile_source(Path::new("conditions.payoff"), source, Some(market), &[])
        .unwrap_or_else(|f| panic!("{}", pathfold::pricing::one_line(&f)))
        .program
}

fn checked(p: &pathfold::compile::Program) -> usize {
    p.ops.iter().filter(|op| matches!(op, Op::Cmp { .. })).count()
}

#[test]
fn performances_and_their_minimum_are_compared_without_a_check() {
    let p = program(
        "at 1y {\n  if min(perf(ZPHX), perf(QMEN)) >= 100% { pay 1 }\n  if perf(ZPHX) * 2 - 1 > 1 { pay 1 }\n}\n",
    );
    assert_eq!(checked(&p), 0, "{:?}", p.ops);
}

#[test]
fn values_that_may_not_be_numbers_are_checked() {
    // A log, a square root, a quotient of two paths' values, a sum of two values that may
    // be +inf and -inf: each may be no number.
    let p = program(
        "at 1y {\n  if log(perf(ZPHX)) > 0 { pay 1 }\n  if sqrt(perf(QMEN) - 1) > 0 { pay 1 }\n  if perf(ZPHX) / perf(QMEN) > 1 { pay 1 }\n  if perf(ZPHX) + perf(QMEN) > 1 { pay 1 }\n}\n",
    );
    assert_eq!(checked(&p), 4, "{:?}", p.ops);
}

#[test]
fn a_checked_condition_prices_like_its_unchecked_twin() {
    // `log(x) > 0` holds exactly when `x > 1` (the log is correctly rounded and
    // increasing): two writings of one digital, the same bits on the same seed.
    let dir = Scratch::dir("conditions-twin");
    let market = concat!(env!("CARGO_MANIFEST_DIR"), "/payoffs/market.toml");
    let write = |name: &str, cond: &str| {
        let text =
            format!("product \"digital\"\n{HEADER}market \"{market}\"\nat 1y {{\n  if {cond} {{ pay notional }}\n}}\n");
        let path = dir.join(name);
        std::fs::write(&path, text).unwrap();
        path.to_str().unwrap().to_string()
    };
    let logged = write("logged.payoff", "log(perf(ZPHX)) > 0");
    let plain = write("plain.payoff", "perf(ZPHX) > 1");
    let a = price_se(&price(&logged, &["--paths", "20000"]));
    let b = price_se(&price(&plain, &["--paths", "20000"]));
    assert_eq!(a.0.to_bits(), b.0.to_bits(), "{a:?} vs {b:?}");
    assert_eq!(a.1.to_bits(), b.1.to_bits(), "{a:?} vs {b:?}");
}
