//! Language v2: windows since the loop's previous date, geometric averages, payments at
//! the touch and continuous running extremes.
//!
//! Two kinds of check: equivalences (two writings of one payoff give the same bits for the
//! same seed: the paths are shared, so no reference is needed), and Monte Carlo prices
//! against a named closed form within 4 standard errors with a fixed seed.

mod common;

use common::{assert_within, run, Scratch};
use pathfold::closed_form::{geometric_asian_discrete, standard_barrier, BarrierKind, OptionKind};

/// Prices a payoff written against the demo market (ZPHX, VNTL...) and returns its JSON.
fn demo(name: &str, body: &str, extra: &[&str]) -> serde_json::Value {
    let text = format!("product \"{name}\"\ncurrency USD\nnotional 1_000_000\nunderlyings ZPHX, VNTL\n{body}");
    let file = Scratch::file(&format!("v2-{name}"), name, &text);
    let mut args = vec!["price", file.to_str().unwrap(), "--market", "payoffs/market.toml", "--format", "json"];
    args.extend_from_slice(extra);
    let (stdout, stderr, code) = run(&args);
    assert_eq!(code, Some(0), "{name}: {stderr}");
    serde_json::from_str(&stdout).unwrap()
}

/// The price and standard error as printed (shortest round-trip digits: equal strings are equal bits).
fn bits(v: &serde_json::Value) -> (String, String) {
    (v["price"].to_string(), v["std_error"].to_string())
}

const SEED: [&str; 4] = ["--paths", "20000", "--seed", "11"];

/// [`SEED`] without control variates: for equivalences of writings whose control sets differ.
const SEED_PLAIN: [&str; 5] = ["--paths", "20000", "--seed", "11", "--no-control"];

/// Prices a payoff against the validation market (BOOKA: S = 100, σ = 25%, r = 8%, q = 4%;
/// BOOKB: the same with σ = 30%).
fn textbook(name: &str, body: &str, paths: &str) -> (f64, f64) {
    let text = format!(
        "product \"{name}\"\ncurrency USD\nnotional 100\nunderlyings BOOKA, BOOKB\nmarket \"market.toml\"\n{body}"
    );
    let dir = Scratch::dir(&format!("v2-textbook-{name}"));
    std::fs::copy("payoffs/validation/market.toml", dir.join("market.toml")).unwrap();
    let file = dir.join(name);
    std::fs::write(&file, text).unwrap();
    let v = common::price(file.to_str().unwrap(), &["--paths", paths, "--seed", "5"]);
    common::price_se(&v)
}

const DAYS: &str = "dates days = business days from 2026-12-02 to 2027-12-01\n";

#[test]
fn a_daily_knock_out_checked_since_the_previous_date_prices_as_the_single_window() {
    // Up-and-out call on ZPHX, barrier 130% watched continuously, 5% rebate paid at the touch.
    // The same paths and payments, so the same bits; without control variates, since a
    // loop with an `end` also gets the stopped hedges, which the single window has no use for.
    let since_previous = demo(
        "since_previous.payoff",
        &format!(
            "{DAYS}for each t in days {{
    if touched(perf(ZPHX) >= 130% from previous(t) to t) {{
        pay notional * 5% on first touch(perf(ZPHX) >= 130% from previous(t) to t)
        end
    }}
    if t == last(days) {{ pay notional * max(perf(ZPHX) - 1, 0) }}
}}
"
        ),
        &SEED_PLAIN,
    );
    let from_start = demo(
        "from_start.payoff",
        &format!(
            "{DAYS}for each t in days {{
    if touched(perf(ZPHX) >= 130% from start to t) {{
        pay notional * 5% on first touch(perf(ZPHX) >= 130% from start to t)
        end
    }}
    if t == last(days) {{ pay notional * max(perf(ZPHX) - 1, 0) }}
}}
"
        ),
        &SEED_PLAIN,
    );
    let single = demo(
        "single.payoff",
        &format!(
            "{DAYS}at last(days) {{
    if touched(perf(ZPHX) >= 130% from start to last(days)) {{
        pay notional * 5% on first touch(perf(ZPHX) >= 130% from start to last(days))
    }} else {{
        pay notional * max(perf(ZPHX) - 1, 0)
    }}
}}
"
        ),
        &SEED_PLAIN,
    );
    assert_eq!(bits(&since_previous), bits(&single));
    assert_eq!(bits(&from_start), bits(&single));
    // The knock-out happens on some paths, so the rebate is part of the price.
    let ended: f64 = since_previous["profile"]
        .as_array()
        .unwrap()
        .iter()
        .filter_map(|r| r["end_probability"].as_f64())
        .take(250)
        .sum();
    assert!(ended > 0.01, "some paths knock out before the last day: {ended}");
}

#[test]
fn a_knock_out_on_the_move_since_the_previous_close_reads_the_previous_level() {
    // Knocked out if ZPHX rises more than 2% from one close to the next: written with a
    // state remembering yesterday's close, and with `level(ZPHX, previous(t))`.
    let remembered = demo(
        "jump_state.payoff",
        &format!(
            "{DAYS}state last_level = 0\nstate jumped = false
for each t in days {{
    if position(t) > 1 {{ jumped = jumped or level(ZPHX) / last_level > 1.02 }}
    last_level = level(ZPHX)
    if t == last(days) and not jumped {{ pay notional * max(perf(ZPHX) - 1, 0) }}
}}
"
        ),
        &SEED,
    );
    let previous = demo(
        "jump_previous.payoff",
        &format!(
            "{DAYS}for each t in days {{
    if position(t) > 1 and level(ZPHX) / level(ZPHX, previous(t)) > 1.02 {{ end }}
    if t == last(days) {{ pay notional * max(perf(ZPHX) - 1, 0) }}
}}
"
        ),
        &SEED,
    );
    assert_eq!(bits(&remembered), bits(&previous));
}

#[test]
fn a_continuous_highest_above_a_level_is_the_touch_of_that_level() {
    // Both read the same bridge draws: the step's maximum is at or above H exactly when
    // the bridge crosses H in `touched`.
    let highest = demo(
        "highest.payoff",
        "at 1y {\n    if highest(perf(VNTL) from start to 1y) < 125% { pay notional * max(perf(VNTL) - 1, 0) }\n}\n",
        &SEED,
    );
    let touched = demo(
        "touched.payoff",
        "at 1y {\n    if not touched(perf(VNTL) >= 125% from start to 1y) { pay notional * max(perf(VNTL) - 1, 0) }\n}\n",
        &SEED,
    );
    assert_eq!(bits(&highest), bits(&touched));
}

#[test]
fn a_running_extreme_kept_along_a_loop_is_the_extreme_over_the_whole_window() {
    let whole = demo(
        "extreme_whole.payoff",
        &format!("{DAYS}at last(days) {{ pay notional * (highest(perf(VNTL) from start to last(days)) - lowest(perf(VNTL) from start to last(days))) }}\n"),
        &SEED,
    );
    let running = demo(
        "extreme_running.payoff",
        &format!(
            "{DAYS}state top = 0\nstate bottom = 0
for each t in days {{
    top = highest(perf(VNTL) from start to t)
    bottom = lowest(perf(VNTL) from start to t)
    if t == last(days) {{ pay notional * (top - bottom) }}
}}
"
        ),
        &SEED,
    );
    let pieces = demo(
        "extreme_pieces.payoff",
        &format!(
            "{DAYS}state top = 1\nstate bottom = 1
for each t in days {{
    top = max(top, highest(perf(VNTL) from previous(t) to t))
    bottom = min(bottom, lowest(perf(VNTL) from previous(t) to t))
    if t == last(days) {{ pay notional * (top - bottom) }}
}}
"
        ),
        &SEED,
    );
    assert_eq!(bits(&whole), bits(&running));
    assert_eq!(bits(&whole), bits(&pieces));
}

#[test]
fn a_geometric_average_is_the_exponential_of_the_average_logarithm() {
    let body = |avg: &str| {
        format!(
            "dates monthly = every 1m from 2027-01-01 to 2028-12-01\nat last(monthly) {{ pay notional * max({avg} - 1, 0) }}\n"
        )
    };
    // Without control variates: the payoff is the same number on every path.
    let plain = ["--paths", "20000", "--seed", "3", "--no-control"];
    let aggregate = demo("geo_aggregate.payoff", &body("geometric_average(perf(ZPHX) over monthly)"), &plain);
    let written = demo("geo_written.payoff", &body("exp(average(log(perf(ZPHX)) over monthly))"), &plain);
    assert_eq!(bits(&aggregate), bits(&written));
    // With them, only the aggregate gets the geometric-average controls.
    let controlled = demo("geo_controlled.payoff", &body("geometric_average(perf(ZPHX) over monthly)"), &SEED);
    let names: Vec<&str> = controlled["controls"].as_array().unwrap().iter().map(|c| c.as_str().unwrap()).collect();
    assert!(names.contains(&"ZPHX geometric-average call"), "{names:?}");
}

#[test]
fn a_geometric_asian_call_matches_its_closed_form() {
    // Call on the geometric average of 12 monthly BOOKB levels, strike 95, one year; the
    // reference is the discrete geometric-average formula (Kemna–Vorst for discrete
    // fixings, tested in src/closed_form/asian.rs against Haug's table).
    let (mc, se) = textbook(
        "geometric.payoff",
        "dates monthly = 12 steps from start to 1y\nat 1y { pay max(geometric_average(level(BOOKB) over monthly) - 95, 0) }\n",
        "50000",
    );
    let times: Vec<f64> = (1..=12).map(|i| f64::from(i) / 12.0).collect();
    let reference = geometric_asian_discrete(OptionKind::Call, 100.0, 95.0, &times, 1.0, 0.08, 0.04, 0.30);
    assert_within("geometric Asian call", mc, se.max(1e-12), reference, 4.0);
    // Written without the aggregate (no geometric control), the same within its larger error.
    let (plain, plain_se) = textbook(
        "geometric_written.payoff",
        "dates monthly = 12 steps from start to 1y\nat 1y { pay max(exp(average(log(level(BOOKB)) over monthly)) - 95, 0) }\n",
        "50000",
    );
    assert_within("geometric Asian call, written out", plain, plain_se, reference, 4.0);
}

#[test]
fn a_rebate_paid_at_the_touch_is_worth_the_reiner_rubinstein_rebate_term() {
    // A knock-out whose option part is worthless (an up-and-out call struck above its
    // barrier, a down-and-out put struck below) is its rebate paid at the touch: the term
    // F of Reiner–Rubinstein (Haug, The Complete Guide to Option Pricing Formulas, ch. 4).
    for (name, condition, kind, barrier, strike, h) in [
        ("up", "level(BOOKA) >= 105", OptionKind::Call, BarrierKind::UpAndOut, 1_000.0, 105.0),
        ("down", "level(BOOKA) <= 95", OptionKind::Put, BarrierKind::DownAndOut, 1.0, 95.0),
    ] {
        let (mc, se) = textbook(
            &format!("rebate_{name}.payoff"),
            &format!("at 0.5y {{ pay 100 on first touch({condition} from start to 0.5y) }}\n"),
            "100000",
        );
        let reference = standard_barrier(kind, barrier, 100.0, strike, h, 100.0, 0.5, 0.08, 0.04, 0.25);
        assert_within(&format!("{name} rebate at the touch"), mc, se, reference, 4.0);
        // Paid at expiry instead, the rebate is worth visibly less (discounting over the
        // rest of the six months): the time of the touch matters.
        let (late, late_se) = textbook(
            &format!("rebate_{name}_late.payoff"),
            &format!("at 0.5y {{ if touched({condition} from start to 0.5y) {{ pay 100 }} }}\n"),
            "100000",
        );
        assert!(mc - late > 4.0 * se.hypot(late_se), "{name}: at the touch {mc} vs at expiry {late}");
    }
}

#[test]
fn the_new_constructs_give_the_same_bits_on_any_thread_count() {
    let file = "payoffs/knock_out_note.payoff";
    let one = common::price(file, &["--paths", "20000", "--seed", "9", "--threads", "1"]);
    let three = common::price(file, &["--paths", "20000", "--seed", "9", "--threads", "3"]);
    assert_eq!(bits(&one), bits(&three));
    let extremes =
        "at 1y {\n    pay notional * (highest(perf(VNTL) from start to 1y) - lowest(perf(ZPHX) from 0.5y to 1y))\n}\n";
    let a = demo("extremes_threads_1.payoff", extremes, &["--paths", "20000", "--threads", "1"]);
    let b = demo("extremes_threads_2.payoff", extremes, &["--paths", "20000", "--threads", "2"]);
    assert_eq!(bits(&a), bits(&b));
}
