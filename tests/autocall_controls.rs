//! Products that can end early get stopped-hedge control variates: the gains of holding
//! each underlying until the product ends, whose expectation is exactly zero. These tests
//! price such products against closed forms in the validation market
//! (payoffs/validation/market.toml: BOOKA S = 100, r = 8%, q = 4%, σ = 25%; PAIRA
//! S = 100, σ = 20%, q = 1% and PAIRB S = 105, σ = 30%, q = 3%, correlation 0.5).

mod common;

use common::{assert_within, controls, price_se, MarketArg};
use pathfold::closed_form::{bivariate_norm_cdf, norm_cdf};

const MARKET: &str = "payoffs/validation/market.toml";
const R: f64 = 0.08;

fn price_text(name: &str, underlyings: &str, body: &str, extra: &[&str]) -> serde_json::Value {
    common::price_body(name, underlyings, body, MarketArg::File(MARKET), "31", extra)
}

#[test]
fn the_asset_paid_when_an_autocall_ends_is_worth_its_spot() {
    // Paying the level, grown at the dividend yield, on the date the product ends: a
    // discounted asset with its dividends reinvested is a martingale, so by optional
    // stopping the price is the spot, 100, whatever the rule that ends it (common
    // practice). The hedge held while alive is this payoff less 100, so the controlled
    // estimate is 100 up to rounding: any bias in the control's zero mean would show.
    let body = "dates obs = 4 steps from start to 1y\nfor each t in obs {\n if perf(BOOKA) >= 1.05 or t == last(obs) {\n  pay level(BOOKA) * exp(0.04 * years(t))\n  end\n }\n}\n";
    let v = price_text("stopped.payoff", "BOOKA", body, &["--paths", "20000"]);
    let (p, se) = price_se(&v);
    assert!(controls(&v).iter().any(|c| c == "BOOKA hedge while alive"), "{v}");
    assert!((p - 100.0).abs() <= 4.0 * se + 1e-9, "{p} ± {se} vs 100");
    // Without controls the same paths give an ordinary error: the hedge did the work.
    let plain = price_text("stopped.payoff", "BOOKA", body, &["--paths", "20000", "--no-control"]);
    let (p0, se0) = price_se(&plain);
    assert_within("stopped asset, no controls", p0, se0, 100.0, 4.0);
    assert!(se < 1e-3 * se0, "controlled {se} vs plain {se0}");
}

#[test]
fn a_two_date_autocall_on_one_asset_matches_its_bivariate_closed_form() {
    // At 0.5y it pays 105 and ends if BOOKA is at or above its initial level; else at 1y
    // it pays 110 if it is. With x(t) = ln S(t)/S(0) ~ N(μt, σ²t), μ = r − q − σ²/2 and
    // a(t) = μ√t/σ: price = 105·e^{−0.5r}·N(a(0.5)) + 110·e^{−r}·M(−a(0.5), a(1); −√0.5),
    // M the bivariate normal distribution (src/closed_form, checked against published
    // values there) (common practice: the joint law of a Brownian motion at two dates).
    let v = price_text("two_dates.payoff", "BOOKA", TWO_DATES, &["--paths", "200000"]);
    let (p, se) = price_se(&v);
    assert!(controls(&v).iter().any(|c| c.contains("hedge")), "{v}");
    assert_within("two-date autocall", p, se, two_dates_reference(), 4.0);
}

/// A two-date autocall on BOOKA: 105 at 0.5y if at or above its initial level, else 110
/// at 1y if it is.
const TWO_DATES: &str =
    "dates obs = 0.5y, 1y\nfor each t in obs {\n if perf(BOOKA) >= 1 {\n  pay 100 + 5 * position(t)\n  end\n }\n}\n";

/// [`TWO_DATES`]' closed form: `105·e^{−0.5r}·N(a(0.5)) + 110·e^{−r}·M(−a(0.5), a(1); −√0.5)`.
fn two_dates_reference() -> f64 {
    let (sigma, q) = (0.25, 0.04);
    let mu = R - q - 0.5 * sigma * sigma;
    let a = |t: f64| mu * t.sqrt() / sigma;
    105.0 * (-0.5 * R).exp() * norm_cdf(a(0.5))
        + 110.0 * (-R).exp() * bivariate_norm_cdf(-a(0.5), a(1.0), -(0.5f64).sqrt())
}

#[test]
fn the_surprises_of_an_autocall_keep_its_bivariate_closed_form() {
    // The two-date autocall above, priced with the surprises of its trigger on both dates
    // (each date's indicator less its chance given the level before: mean zero, common
    // practice as for the stopped hedges): the same reference (the bivariate normal law of
    // a Brownian motion at two dates, common practice), within 4 standard errors that
    // the surprises make about half as wide as without them.
    let v = common::price_body(
        "surprises.payoff",
        "BOOKA",
        TWO_DATES,
        MarketArg::File(MARKET),
        "37",
        &["--paths", "300000"],
    );
    let (p, se) = price_se(&v);
    assert!(
        controls(&v).iter().any(|c| c == "BOOKA at or above 100% of spot, surprises on 2 dates while alive"),
        "{v}"
    );
    assert_within("two-date autocall with surprises", p, se, two_dates_reference(), 4.0);
    assert!(v["variance_reduction"].as_f64().unwrap() > 200.0, "{v}");
}

#[test]
fn the_surprises_stay_where_they_pay_for_their_time_and_go_elsewhere() {
    // A trial of 4,096 paths decides (src/sim/mod.rs, `controls_for`): a worst-of note whose
    // end is its main risk keeps them (its variance cut about doubles), the demo's
    // coupon autocallable, with two events on twelve dates, does not; whatever the path
    // count (a run grown to a target error gets the controls of its final size).
    let body = "dates q = 8 steps from start to 2y\nfor each t in q {\n let worst = min(perf(PAIRA), perf(PAIRB))\n if worst >= 1.05 {\n  pay 100 + 2 * position(t)\n  end\n }\n if t == last(q) {\n  pay if worst >= 0.6 then 100 else 100 * worst\n }\n}\n";
    let surprises = |v: &serde_json::Value| controls(v).iter().filter(|c| c.contains("surprises on")).count();
    let note = price_text("note.payoff", "PAIRA, PAIRB", body, &["--paths", "100000"]);
    // The trigger is compared on every date, the barrier on the last.
    let named = |c: &str| controls(&note).iter().any(|n| n == c);
    assert!(
        named("PAIRA, PAIRB all at or above 105% of spot, surprises on 8 dates while alive"),
        "{:?}",
        controls(&note)
    );
    assert!(
        named("PAIRA, PAIRB all at or above 60% of spot, surprises on 1 date while alive"),
        "{:?}",
        controls(&note)
    );
    assert_eq!(surprises(&note), 2, "{:?}", controls(&note));
    let small = price_text("note.payoff", "PAIRA, PAIRB", body, &["--paths", "6000"]);
    assert_eq!(controls(&small), controls(&note));
    let demo = common::price("payoffs/worst_of_autocall.payoff", &["--paths", "100000", "--seed", "31"]);
    assert_eq!(surprises(&demo), 0, "{:?}", controls(&demo));
    // The trial runs on streams of its own, once: the same bits on any thread count.
    let run = |threads: &str| {
        let v = price_text("note.payoff", "PAIRA, PAIRB", body, &["--paths", "100000", "--threads", threads]);
        (v["price"].as_f64().unwrap().to_bits(), v["std_error"].as_f64().unwrap().to_bits())
    };
    assert_eq!(run("1"), run("2"));
}

#[test]
fn a_worst_of_autocall_on_two_assets_matches_its_closed_form() {
    // At 0.5y it pays 104 and ends if both PAIRA and PAIRB are at or above their initial
    // levels; otherwise it pays 100 at 1y. P(both up at 0.5y) = M(a_A, a_B; ρ) with
    // a = μ√t/σ per asset, so price = 104·e^{−0.5r}·P + 100·e^{−r}·(1 − P) (common
    // practice: the joint law of two correlated log-levels).
    let body = "dates obs = 0.5y, 1y\nfor each t in obs {\n if t == first(obs) and min(perf(PAIRA), perf(PAIRB)) >= 1 {\n  pay 104\n  end\n }\n if t == last(obs) {\n  pay 100\n }\n}\n";
    let a = |sigma: f64, q: f64| (R - q - 0.5 * sigma * sigma) * 0.5f64.sqrt() / sigma;
    let p_up = bivariate_norm_cdf(a(0.20, 0.01), a(0.30, 0.03), 0.5);
    let reference = 104.0 * (-0.5 * R).exp() * p_up + 100.0 * (-R).exp() * (1.0 - p_up);
    let v = price_text("worst_of.payoff", "PAIRA, PAIRB", body, &["--paths", "200000"]);
    let (p, se) = price_se(&v);
    assert!(controls(&v).iter().any(|c| c == "PAIRB hedge while worst"), "{v}");
    assert_within("two-asset worst-of autocall", p, se, reference, 4.0);
}

// Without antithetic pairs, a path that has ended is no longer simulated: the paths still
// running are stepped date by date as the payoff reads them, and a path that ended gets its
// last-date level by one exact step only when a control reads it. The same references must
// hold, with and without controls.

#[test]
fn paths_that_stop_when_they_end_keep_the_two_date_closed_form() {
    // The bivariate closed form of the two-date autocall above (common practice), with
    // the barrier at 90%: about two paths in three end at 0.5y, so that the few still
    // running are stepped on their own (below a third of the lanes) after it.
    let body = "dates obs = 0.25y, 0.5y, 0.75y, 1y\nfor each t in obs {\n if t != first(obs) and t != 0.75y and perf(BOOKA) >= 0.9 {\n  pay 100 + 5 * position(t) / 2\n  end\n }\n}\n";
    let (sigma, q) = (0.25, 0.04);
    let mu = R - q - 0.5 * sigma * sigma;
    // P(ln S_t/S_0 ≥ ln 0.9) = N(a(t)).
    let a = |t: f64| (mu * t - 0.9f64.ln()) / (sigma * t.sqrt());
    let reference = 105.0 * (-0.5 * R).exp() * norm_cdf(a(0.5))
        + 110.0 * (-R).exp() * bivariate_norm_cdf(-a(0.5), a(1.0), -(0.5f64).sqrt());
    for extra in [&["--no-antithetic"][..], &["--no-antithetic", "--no-control"]] {
        let mut args = vec!["--paths", "200000"];
        args.extend_from_slice(extra);
        let v = price_text("stopping_two_dates.payoff", "BOOKA", body, &args);
        let (p, se) = price_se(&v);
        if extra.len() == 1 {
            // A control whose paths missed its closed-form mean would be left out.
            let names = controls(&v);
            assert!(names.iter().any(|n| n == "BOOKA forward") && names.iter().any(|n| n == "BOOKA call"), "{v}");
        }
        assert_within(&format!("two-date autocall, {extra:?}"), p, se, reference, 4.0);
    }
}

#[test]
fn paths_that_stop_when_they_end_keep_the_worst_of_closed_form_and_every_control() {
    // The two-asset worst-of closed form above (common practice), now with a date after
    // the redemption date so that paths which end are stopped before the last date; the
    // forward and call controls read the last date, so stopped paths get their last
    // level by one correlated step. Had that step the wrong law, the regression would
    // leave those controls out (their average would miss the closed form), with a warning.
    let body = "dates obs = 0.5y, 0.75y, 1y\nfor each t in obs {\n if t == first(obs) and min(perf(PAIRA), perf(PAIRB)) >= 1 {\n  pay 104\n  end\n }\n if t == last(obs) {\n  pay 100\n }\n}\n";
    let a = |sigma: f64, q: f64| (R - q - 0.5 * sigma * sigma) * 0.5f64.sqrt() / sigma;
    let p_up = bivariate_norm_cdf(a(0.20, 0.01), a(0.30, 0.03), 0.5);
    let reference = 104.0 * (-0.5 * R).exp() * p_up + 100.0 * (-R).exp() * (1.0 - p_up);
    let v = price_text("stopping_worst_of.payoff", "PAIRA, PAIRB", body, &["--paths", "200000", "--no-antithetic"]);
    let (p, se) = price_se(&v);
    let names = controls(&v);
    for c in ["PAIRA forward", "PAIRB call", "PAIRB hedge while worst"] {
        assert!(names.iter().any(|n| n == c), "{c} missing: {v}");
    }
    assert_within("two-asset worst-of autocall, stopped paths", p, se, reference, 4.0);
}

#[test]
fn the_asset_paid_when_a_stopped_path_ends_is_still_worth_its_spot() {
    // Optional stopping, as in the first test (common practice): the stopped hedge makes
    // the controlled estimate 100 up to rounding.
    let body = "dates obs = 4 steps from start to 1y\nfor each t in obs {\n if perf(BOOKA) >= 1.05 or t == last(obs) {\n  pay level(BOOKA) * exp(0.04 * years(t))\n  end\n }\n}\n";
    let v = price_text("stopped_lanes.payoff", "BOOKA", body, &["--paths", "20000", "--no-antithetic"]);
    let (p, se) = price_se(&v);
    assert!((p - 100.0).abs() <= 4.0 * se + 1e-9, "{p} ± {se} vs 100");
}

#[test]
fn an_autocall_written_with_end_agrees_with_its_writing_without() {
    // Two writings of one three-asset worst-of autocall: one ends the product (its paths
    // stop being simulated), the other keeps a flag and simulates every path to the end.
    // They share the stream until the first path ends; the prices must agree within four
    // combined standard errors.
    let with_end = "dates q = 8 steps from start to 2y\nfor each t in q {\n let worst = min(perf(PAIRA), perf(PAIRB))\n if worst >= 1.02 {\n  pay 100 + 3 * position(t)\n  end\n }\n if t == last(q) {\n  pay if worst >= 0.7 then 100 else 100 * worst\n }\n}\n";
    let with_flag = "state called = 0\ndates q = 8 steps from start to 2y\nfor each t in q {\n let worst = min(perf(PAIRA), perf(PAIRB))\n if called == 0 and worst >= 1.02 {\n  pay 100 + 3 * position(t)\n  called = 1\n }\n if t == last(q) and called == 0 {\n  pay if worst >= 0.7 then 100 else 100 * worst\n }\n}\n";
    let args = ["--paths", "100000", "--no-antithetic", "--no-control"];
    let (p1, se1) = price_se(&price_text("written_with_end.payoff", "PAIRA, PAIRB", with_end, &args));
    let (p2, se2) = price_se(&price_text("written_with_flag.payoff", "PAIRA, PAIRB", with_flag, &args));
    let combined = (se1 * se1 + se2 * se2).sqrt();
    assert!((p1 - p2).abs() <= 4.0 * combined, "with end {p1} ± {se1}, with a flag {p2} ± {se2}");
    assert_ne!(p1, p2, "the writing with `end` should stop its ended paths (different draws)");
}

#[test]
fn controls_valued_when_the_product_ends_agree_whether_the_paths_keep_log_levels_or_not() {
    // Two writings of one worst-of autocall: `worst >= 1.02` is compared in log levels
    // (the paths keep them), `sqrt(worst) >= sqrt(1.02)` on the levels (the paths keep
    // none, and the controls valued when the product ends take the logarithms
    // themselves). The same draws, the same events up to a level within an ulp of a
    // threshold, and the same controls up to the logarithm's last bits: prices and
    // standard errors agree to 1e-9.
    let body = |call: &str, barrier: &str| {
        format!("dates q = 6 steps from start to 1.5y\nfor each t in q {{\n let worst = min(perf(PAIRA), perf(PAIRB))\n if {call} {{\n  pay 100 + 3 * position(t)\n  end\n }}\n if t == last(q) {{\n  pay if {barrier} then 100 else 100 * worst\n }}\n}}\n")
    };
    let args = ["--paths", "40000"];
    let logs = price_text("compared_in_logs.payoff", "PAIRA, PAIRB", &body("worst >= 1.02", "worst >= 0.7"), &args);
    let (call, barrier) = (format!("sqrt(worst) >= {}", 1.02f64.sqrt()), format!("sqrt(worst) >= {}", 0.7f64.sqrt()));
    let levels = price_text("compared_in_levels.payoff", "PAIRA, PAIRB", &body(&call, &barrier), &args);
    assert_eq!(controls(&logs), controls(&levels));
    let ended = controls(&logs).iter().filter(|c| c.contains("valued when the product ends")).count();
    assert!(ended >= 3, "digitals and puts valued when the product ends: {:?}", controls(&logs));
    let ((p1, se1), (p2, se2)) = (price_se(&logs), price_se(&levels));
    assert!((p1 - p2).abs() <= 1e-9 * p1.abs() && (se1 - se2).abs() <= 1e-9 * se1, "{p1} ± {se1} vs {p2} ± {se2}");
}

#[test]
fn stopped_paths_give_the_same_bits_on_any_thread_count() {
    let body = "dates q = 8 steps from start to 2y\nfor each t in q {\n if min(perf(PAIRA), perf(PAIRB)) >= 1 {\n  pay 100 + position(t)\n  end\n }\n if t == last(q) {\n  pay 100\n }\n}\n";
    let run = |threads: &str| {
        let v = price_text(
            "stopped_threads.payoff",
            "PAIRA, PAIRB",
            body,
            &["--paths", "30000", "--no-antithetic", "--threads", threads],
        );
        (v["price"].as_f64().unwrap().to_bits(), v["std_error"].as_f64().unwrap().to_bits())
    };
    assert_eq!(run("1"), run("2"));
}

#[test]
fn a_path_is_stepped_to_the_date_it_ends_on_whatever_the_order_of_the_writing() {
    // An issuer's call decided on the date before: the `end` of date t reads no level of
    // t. Written with the `end` before the first read of t, or after it (a `let` first),
    // the paths stepped to t must be the same: those that did not end on an earlier date.
    // Stepping only the paths still alive at the first read would leave the ones ending on
    // t at their previous level, which the stopped hedges read up to t: a biased control.
    let call_first = "state flag = 0\ndates q = 8 steps from start to 2y\nfor each t in q {\n if flag == 1 {\n  pay 101\n  end\n }\n if min(perf(PAIRA), perf(PAIRB)) >= 1.05 {\n  flag = 1\n }\n if t == last(q) {\n  pay 100\n }\n}\n";
    let read_first = "state flag = 0\ndates q = 8 steps from start to 2y\nfor each t in q {\n let worst = min(perf(PAIRA), perf(PAIRB))\n if flag == 1 {\n  pay 101\n  end\n }\n if worst >= 1.05 {\n  flag = 1\n }\n if t == last(q) {\n  pay 100\n }\n}\n";
    let args = ["--paths", "50000", "--no-antithetic"];
    let a = price_text("call_first.payoff", "PAIRA, PAIRB", call_first, &args);
    let b = price_text("read_first.payoff", "PAIRA, PAIRB", read_first, &args);
    assert_eq!(a["price"].as_f64().unwrap().to_bits(), b["price"].as_f64().unwrap().to_bits(), "{a}\n{b}");
    assert_eq!(a["std_error"].as_f64().unwrap().to_bits(), b["std_error"].as_f64().unwrap().to_bits());
    // Every control kept (none missed its zero mean), and the price agrees with the run in
    // antithetic pairs, which simulates every path to the end (and so may also take the
    // surprises, which read every date).
    let pairs = price_text("call_first.payoff", "PAIRA, PAIRB", call_first, &["--paths", "50000"]);
    let but_surprises: Vec<String> = controls(&pairs).into_iter().filter(|c| !c.contains("surprises on")).collect();
    assert_eq!(controls(&a), but_surprises);
    assert!(controls(&a).iter().any(|c| c == "PAIRA hedge scaled by the worst"), "{a}");
    let (p1, se1) = price_se(&a);
    let (p2, se2) = price_se(&price_text("call_first.payoff", "PAIRA, PAIRB", call_first, &["--paths", "50000"]));
    assert!((p1 - p2).abs() <= 4.0 * (se1 * se1 + se2 * se2).sqrt(), "stopped {p1} ± {se1}, pairs {p2} ± {se2}");
}

#[test]
fn paths_that_all_end_on_their_first_date_leave_no_lane_to_step() {
    // A level is always positive, so every path pays 100 and ends on the first date,
    // 0.25y: the price is 100·e^{−0.25r} exactly (common practice: a certain payment,
    // discounted). Stepped as they run, the paths are all packed away before the next
    // date, and the operations of the later dates run over no lane at all.
    let body = "dates q = 4 steps from start to 1y\nfor each t in q {\n if perf(BOOKA) > 0 {\n  pay 100\n  end\n }\n if t == last(q) {\n  pay 50\n }\n}\n";
    let reference = 100.0 * (-0.25 * R).exp();
    for extra in [&["--no-antithetic"][..], &["--no-antithetic", "--no-control"], &[]] {
        let args: Vec<&str> = ["--paths", "3000"].iter().chain(extra).copied().collect();
        let v = price_text("all_end.payoff", "BOOKA", body, &args);
        let (p, se) = price_se(&v);
        assert!((p - reference).abs() <= 1e-9 * reference && se <= 1e-9, "{extra:?}: {p} ± {se} vs {reference}");
    }
}
