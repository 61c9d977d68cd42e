//! Continuous barrier monitoring: `touched(...)` is resolved between simulated dates with the
//! Brownian-bridge crossing probability, so it needs no extra dates and has no bias. The
//! references are Reiner–Rubinstein closed forms (src/closed_form, checked against Haug's
//! barrier table, from memory), in the validation market (payoffs/validation/market.toml:
//! S = 100, r = 8%, q = 4%, σ = 25% for BOOKA).

mod common;

use common::{assert_within, price_se, run};
use pathfold::closed_form::{standard_barrier_with_rebate, BarrierKind, OptionKind, RebateTiming};

const MARKET: &str = "payoffs/validation/market.toml";

fn down_in_put(h: f64) -> f64 {
    standard_barrier_with_rebate(
        OptionKind::Put,
        BarrierKind::DownAndIn,
        100.0,
        100.0,
        h,
        0.0,
        RebateTiming::AtExpiry,
        1.0,
        0.08,
        0.04,
        0.25,
    )
}

fn price_text(name: &str, body: &str, extra: &[&str]) -> serde_json::Value {
    let text = format!("product \"{name}\"\ncurrency USD\nnotional 100\nunderlyings BOOKA\n{body}");
    let file = common::Scratch::file(&format!("barriers-{name}"), name, &text);
    let mut args = vec!["price", file.to_str().unwrap(), "--market", MARKET, "--format", "json", "--seed", "21"];
    args.extend_from_slice(extra);
    let (stdout, stderr, code) = run(&args);
    assert_eq!(code, Some(0), "{stderr}");
    serde_json::from_str(&stdout).unwrap()
}

#[test]
fn a_window_split_in_two_at_one_level_is_the_same_barrier() {
    // Same uniforms on the same intervals: the split window must give the same bits.
    let whole = "dates mid = 0.5y\nat 1y {\n if touched(level(BOOKA) <= 85 from start to 1y) { pay max(100 - level(BOOKA), 0) }\n}\n";
    let split = "dates mid = 0.5y\nat 1y {\n if touched(level(BOOKA) <= 85 from start to mid) or touched(level(BOOKA) <= 85 from mid to 1y) { pay max(100 - level(BOOKA), 0) }\n}\n";
    let a = price_text("whole.payoff", whole, &["--paths", "40000"]);
    let b = price_text("split.payoff", split, &["--paths", "40000"]);
    assert_eq!(a["price"], b["price"]);
    let (p, se) = price_se(&a);
    assert_within("down-and-in put, H = 85", p, se, down_in_put(85.0), 3.5);
}

#[test]
fn levels_that_differ_by_period_lie_between_the_single_level_prices() {
    // Barrier 90 for the first half-year, 80 for the second: worth more than the
    // down-and-in put at 80 throughout and less than the one at 90 throughout.
    let body = "at 1y {\n if touched(perf(BOOKA) <= 90% from start to 0.5y) or touched(perf(BOOKA) <= 80% from 0.5y to 1y) { pay max(100 - level(BOOKA), 0) }\n}\n";
    let (p, se) = price_se(&price_text("stepped.payoff", body, &["--paths", "100000"]));
    let (lo, hi) = (down_in_put(80.0), down_in_put(90.0));
    assert!(p > lo + 4.0 * se && p < hi - 4.0 * se, "{p} ± {se} not inside ({lo}, {hi})");
}

#[test]
fn the_bridge_needs_no_extra_dates() {
    // The same barrier with one simulated date or with twelve: both agree with the
    // continuous closed form, so the bridge, not the grid, does the monitoring.
    let reference = down_in_put(90.0);
    for (name, dates) in [("coarse.payoff", ""), ("fine.payoff", "dates monthly = 12 steps from start to 1y\n")] {
        let body = format!(
            "{dates}at 1y {{\n if touched(level(BOOKA) <= 90 from start to 1y) {{ pay max(100 - level(BOOKA), 0) }}\n}}\n"
        );
        let (p, se) = price_se(&price_text(name, &body, &["--paths", "100000"]));
        assert_within(name, p, se, reference, 3.5);
    }
}

#[test]
fn an_up_barrier_is_watched_from_below() {
    // Up-and-out call, barrier 130, no rebate (Reiner–Rubinstein).
    let reference = standard_barrier_with_rebate(
        OptionKind::Call,
        BarrierKind::UpAndOut,
        100.0,
        100.0,
        130.0,
        0.0,
        RebateTiming::AtExpiry,
        1.0,
        0.08,
        0.04,
        0.25,
    );
    let body = "at 1y {\n if not touched(perf(BOOKA) >= 130% from start to 1y) { pay max(level(BOOKA) - 100, 0) }\n}\n";
    let (p, se) = price_se(&price_text("up_out.payoff", body, &["--paths", "100000"]));
    assert_within("up-and-out call", p, se, reference, 3.5);
}
