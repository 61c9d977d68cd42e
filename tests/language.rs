//! The language says the same thing in different ways: written both ways, a payoff must
//! give the same bits for the same seed. These pin the meaning of aggregates, state and
//! blocks against each other (no Monte Carlo reference is involved: the paths are shared).

mod common;

use common::run;

fn price_of(name: &str, body: &str) -> String {
    let text = format!("product \"{name}\"\ncurrency USD\nnotional 1_000_000\nunderlyings QMEN\n{body}");
    let file = common::Scratch::file(&format!("language-{name}"), name, &text);
    let (stdout, stderr, code) = run(&[
        "price",
        file.to_str().unwrap(),
        "--market",
        "payoffs/market.toml",
        "--paths",
        "20000",
        "--seed",
        "4",
        "--no-control",
        "--format",
        "json",
    ]);
    assert_eq!(code, Some(0), "{name}: {stderr}");
    let v: serde_json::Value = serde_json::from_str(&stdout).unwrap();
    v["price"].to_string()
}

#[test]
fn a_running_lowest_read_every_day_is_the_daily_knock_in_flag() {
    let running = price_of(
        "running.payoff",
        "dates days = business days from 2026-12-02 to 2027-12-01\nfor each t in days {\n    if lowest(perf(QMEN) over days) < 80% {\n        pay notional * 5%\n        end\n    }\n}\n",
    );
    let flagged = price_of(
        "flagged.payoff",
        "dates days = business days from 2026-12-02 to 2027-12-01\nfor each t in days {\n    if perf(QMEN) < 80% {\n        pay notional * 5%\n        end\n    }\n}\n",
    );
    assert_eq!(running, flagged);
}

#[test]
fn count_over_a_schedule_is_a_state_counter() {
    let counted = price_of(
        "counted.payoff",
        "dates days = business days from 2026-12-02 to 2027-12-01\nat last(days) {\n    pay notional * count(perf(QMEN) >= 90% and perf(QMEN) <= 110% over days) / 1000\n}\n",
    );
    let stated = price_of(
        "stated.payoff",
        "dates days = business days from 2026-12-02 to 2027-12-01\nstate inside = 0\nfor each t in days {\n    if perf(QMEN) >= 90% and perf(QMEN) <= 110% {\n        inside = inside + 1\n    }\n    if t == last(days) {\n        pay notional * inside / 1000\n    }\n}\n",
    );
    assert_eq!(counted, stated);
}

#[test]
fn an_average_read_every_month_grows_with_the_fixings() {
    // Paying the running average each month equals paying each month's average of the
    // fixings so far, written out with a sum and the position.
    let average = price_of(
        "average.payoff",
        "dates monthly = every 1m from 2027-01-01 to 2027-12-01\nfor each t in monthly {\n    pay notional * average(perf(QMEN) over monthly) / 100\n}\n",
    );
    let summed = price_of(
        "summed.payoff",
        "dates monthly = every 1m from 2027-01-01 to 2027-12-01\nstate total = 0\nfor each t in monthly {\n    total = total + perf(QMEN)\n    pay notional * (total * (1 / position(t))) / 100\n}\n",
    );
    assert_eq!(average, summed);
}

/// A block that runs on two dates and pays `amount`, with `lets` bound before the `pay`.
fn two_date_loop(lets: &str, amount: &str) -> String {
    format!(
        "dates closes = business days from 2026-12-02 to 2027-12-01\ndates obs = 2027-06-01, 2027-12-01\nfor each t in obs {{\n{lets}    pay notional * {amount} / 100\n}}\n"
    )
}

#[test]
fn a_let_bound_to_an_aggregate_in_a_loop_prices_as_the_aggregate_written_inline() {
    // Issue 8, item 1: the running accumulator of an aggregate that reads only levels
    // was handed back to the free registers when the `let` holding it went out of scope,
    // so the next run of the loop overwrote it (wrong price) or read a register being
    // written (panic).
    for (agg, body) in [
        ("count", "perf(QMEN) > 100%"),
        ("lowest", "perf(QMEN)"),
        ("highest", "perf(QMEN)"),
        ("sum", "perf(QMEN)"),
        ("average", "perf(QMEN)"),
    ] {
        let call = format!("{agg}({body} over closes)");
        let bound = price_of(&format!("let-{agg}.payoff"), &two_date_loop(&format!("    let n = {call}\n"), "n"));
        let inline = price_of(&format!("inline-{agg}.payoff"), &two_date_loop("", &call));
        assert_eq!(bound, inline, "`{agg}` bound by a let");
    }
}

#[test]
fn a_let_of_a_let_prices_as_the_expression_written_inline() {
    // Two lets naming one register must not hand it back twice.
    let bound = price_of(
        "let-of-let.payoff",
        &two_date_loop(
            "    let a = lowest(perf(QMEN) over closes)\n    let b = a\n    let c = perf(QMEN) * 2\n    let d = c\n",
            "(a + b + c + d)",
        ),
    );
    let inline = price_of(
        "let-of-let-inline.payoff",
        &two_date_loop(
            "",
            "(lowest(perf(QMEN) over closes) + lowest(perf(QMEN) over closes) + perf(QMEN) * 2 + perf(QMEN) * 2)",
        ),
    );
    assert_eq!(bound, inline);
}

#[test]
fn a_let_bound_to_a_state_keeps_the_value_it_was_given() {
    // A let names a value, not the state: assigning the state afterwards leaves it as it
    // was, and the state's register is not handed back when the let goes out of scope.
    let bound = price_of(
        "let-state.payoff",
        "dates obs = every 3m from 2027-03-01 to 2027-12-01\nstate total = 0\nfor each t in obs {\n    let before = total\n    total = total + perf(QMEN)\n    let x = perf(QMEN) * 3\n    pay notional * (before + x + total) / 100\n}\n",
    );
    let stated = price_of(
        "let-state-inline.payoff",
        "dates obs = every 3m from 2027-03-01 to 2027-12-01\nstate total = 0\nstate before = 0\nfor each t in obs {\n    before = total\n    total = total + perf(QMEN)\n    pay notional * (before + perf(QMEN) * 3 + total) / 100\n}\n",
    );
    assert_eq!(bound, stated);
}

#[test]
fn a_remainder_is_its_floor_formula_written_out() {
    // A Napoleon-style count: how far the running count of up-days is past a multiple of 5.
    let remainder = price_of(
        "remainder.payoff",
        "dates days = every 1w from 2026-12-08 to 2027-12-01\nstate ups = 0\nfor each t in days {\n    if perf(QMEN) > 100% { ups = ups + 1 }\n    if t == last(days) { pay notional * remainder(ups * perf(QMEN), 5) / 100 }\n}\n",
    );
    let written = price_of(
        "written.payoff",
        "dates days = every 1w from 2026-12-08 to 2027-12-01\nstate ups = 0\nfor each t in days {\n    if perf(QMEN) > 100% { ups = ups + 1 }\n    if t == last(days) { pay notional * (ups * perf(QMEN) - floor(ups * perf(QMEN) / 5) * 5) / 100 }\n}\n",
    );
    assert_eq!(remainder, written);
}
