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
