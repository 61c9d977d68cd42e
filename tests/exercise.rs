//! Early exercise priced by least-squares regression (`holder may end for ...`,
//! `issuer may end for ...`): Bermudan puts against our CRR tree (itself tested against
//! Hull's American put and Longstaff and Schwartz's table in src/closed_form/tree.rs), the
//! issuer's call against the bounds every callable note obeys, and the engine's promises
//! (same bits on any thread count, split runs that merge exactly).
//!
//! The regression's rule is estimated, so a price is the value of a feasible policy: at
//! most the optimal value for the holder (biased low) and at least it for the issuer
//! (biased high). Where a test compares with the optimal value, it allows for that shortfall
//! on the biased side only, and says how much and why.

mod common;

use common::{assert_within, price, price_se, Scratch};
use pathfold::closed_form::{bermudan_binomial, black_scholes, OptionKind};

/// A put on BOOKA of the validation market (S = 100, σ = 25%, r = 8%, q = 4%), strike
/// 100, one year, that the holder may exercise on 12 monthly dates.
const MONTHLY_PUT: &str = r#"product "Bermudan put, 12 dates"
currency USD
notional 100
underlyings BOOKA
market "market.toml"

dates monthly = 12 steps from start to 1y

for each t in monthly {
    holder may end for max(100 - level(BOOKA), 0) using level(BOOKA)
}
"#;

fn in_validation_folder(tag: &str, name: &str, text: &str) -> Scratch {
    let s = Scratch::file(tag, name, text);
    std::fs::copy("payoffs/validation/market.toml", s.join("market.toml")).unwrap();
    s
}

#[test]
fn a_monthly_bermudan_put_agrees_with_the_binomial_tree() {
    let file = in_validation_folder("bermudan-monthly", "put.payoff", MONTHLY_PUT);
    let v = price(file.to_str().unwrap(), &["--paths", "100000", "--seed", "11"]);
    let (mc, se) = price_se(&v);
    // Reference: CRR tree with the same 12 exercise dates, 200 steps between dates
    // (src/closed_form/tree.rs, tested against Hull's American put, from memory).
    let tree = bermudan_binomial(OptionKind::Put, 100.0, 100.0, 1.0, 0.08, 0.04, 0.25, 12, 200);
    let european = black_scholes(OptionKind::Put, 100.0, 100.0, 1.0, 0.08, 0.04, 0.25);
    assert!(tree > european + 0.1, "early exercise is worth something here: {tree} against {european}");
    // The holder's fitted rule can only fall short of the best one: the price may be below
    // the tree by 4 standard errors plus an allowance of 0.25% of the value (Longstaff and
    // Schwartz's own put estimates fall 0.1-0.2% below the finite-difference values), but
    // not above it by more than 4 standard errors.
    assert!(mc <= tree + 4.0 * se, "above the optimal value: {mc} ± {se} against the tree's {tree}");
    assert!(mc >= tree - 4.0 * se - 0.0025 * tree, "too far below the tree: {mc} ± {se} against {tree}");
    assert_eq!(v["early_exercise"]["bias"], "low");
    assert_eq!(v["early_exercise"]["party"], "holder");
    assert_eq!(v["early_exercise"]["dates"], 12);
}

#[test]
fn longstaff_and_schwartz_first_put() {
    // Longstaff and Schwartz (2001), Table 1, first row (from memory): S = 36, K = 40,
    // σ = 20%, r = 6%, T = 1, 50 exercise dates: finite-difference value 4.478 (our CRR
    // tree: 4.4779), their simulated value 4.472 (standard error 0.010), European value
    // 3.844 (Black–Scholes).
    let v = price("payoffs/validation/bermudan_put.payoff", &["--paths", "100000", "--seed", "5"]);
    let (mc, se) = price_se(&v);
    // Above the European value, which ignores the right to exercise early.
    assert!(mc - 4.0 * se > 3.844, "{mc} ± {se}");
    // Biased low only: within 4 SE above 4.478, and within 4 SE plus an allowance of 0.009
    // (0.2%, a little more than the 0.006 by which their own estimate falls short) below.
    assert!(mc <= 4.478 + 4.0 * se && mc >= 4.478 - 4.0 * se - 0.009, "{mc} ± {se} against 4.478");
    // And their simulated value, within 4 combined standard errors.
    assert_within("Longstaff–Schwartz simulated value", mc, se.hypot(0.010), 4.472, 4.0);
}

/// A note paying a fixed coupon of `coupon` a quarter and 100% at the end of two years,
/// with an equity-linked loss: if ZPHX ends below 70% of initial, the principal is
/// notional × perf. `call` is the statement put on quarterly dates 1 to 7.
fn fixed_coupon_note(call: &str) -> String {
    format!(
        r#"product "Fixed-coupon note"
currency USD
notional 1_000_000
underlyings ZPHX
market "market.toml"

param coupon = 2%
dates quarterly = every 3m from 2027-03-01 to 2028-12-01

for each t in quarterly {{
    pay notional * coupon
    if t != last(quarterly) {{
        {call}
    }} else {{
        pay notional * (if perf(ZPHX) < 70% then perf(ZPHX) else 1)
    }}
}}
"#
    )
}

fn in_demo_folder(tag: &str, text: &str) -> Scratch {
    let s = Scratch::file(tag, "note.payoff", text);
    std::fs::copy("payoffs/market.toml", s.join("market.toml")).unwrap();
    s
}

#[test]
fn an_issuer_callable_note_is_worth_no_more_than_never_called_nor_called_at_once() {
    // Common practice: the issuer's right to call has non-negative value to the issuer,
    // so the callable note is worth at most the note never called and at most the note
    // called on the first date (one of the policies the issuer may follow). The fitted
    // rule is biased high (it can only fall short of the issuer's best), so these bounds
    // test that it is a good rule; all three run on the same seed, and the comparison
    // allows 4 standard errors of the difference, bounded by the sum of the two errors.
    let callable = in_demo_folder("callable-note", &fixed_coupon_note("issuer may end for notional"));
    let never = in_demo_folder("never-called-note", &fixed_coupon_note("let nothing = 0"));
    let first =
        in_demo_folder("first-called-note", &fixed_coupon_note("if t == first(quarterly) {\n pay notional\n end\n }"));
    let args = ["--paths", "50000", "--seed", "3"];
    let (c, c_se) = price_se(&price(callable.to_str().unwrap(), &args));
    let (n, n_se) = price_se(&price(never.to_str().unwrap(), &args));
    let (f, f_se) = price_se(&price(first.to_str().unwrap(), &args));
    assert!(c <= n + 4.0 * (c_se + n_se), "callable {c} ± {c_se} above never called {n} ± {n_se}");
    assert!(c <= f + 4.0 * (c_se + f_se), "callable {c} ± {c_se} above called at once {f} ± {f_se}");
    // A coupon of 2% a quarter at a rate of 3.8% a year: the issuer gains by calling, and
    // the call is worth something against never calling.
    assert!(c < n - 4.0 * (c_se + n_se), "the call is worth nothing? {c} against {n}");
}

#[test]
fn a_certain_note_is_called_exactly_when_calling_is_cheapest() {
    // A note with no equity risk (8% a quarter on a 3.8% rate): going on is worth more
    // than par on every call date, so the issuer calls on the first one, and the price is
    // the first coupon and par on 2027-03-01, discounted (the regression on a constant
    // fits it exactly; common practice).
    let text = r#"product "Certain note"
currency USD
notional 1_000_000
underlyings ZPHX
market "market.toml"

dates quarterly = every 3m from 2027-03-01 to 2028-12-01

for each t in quarterly {
    pay notional * 8%
    if t != last(quarterly) {
        issuer may end for notional
    } else {
        pay notional
    }
}
"#;
    let note = in_demo_folder("certain-note", text);
    let v = price(note.to_str().unwrap(), &["--paths", "2000"]);
    let expected = 1_080_000.0 * (-0.038 * common::years("2027-03-01")).exp();
    let got = v["price"].as_f64().unwrap();
    assert!((got - expected).abs() <= 1e-9 * expected, "{got} against {expected}");
    assert_eq!(v["profile"][0]["end_probability"].as_f64(), Some(1.0));
    assert_eq!(v["early_exercise"]["bias"], "high");
}

/// A JSON report without the time taken.
fn without_time(json: &str) -> serde_json::Value {
    let mut v: serde_json::Value = serde_json::from_str(json).expect("JSON");
    v.as_object_mut().unwrap().remove("elapsed_seconds");
    v
}

fn ok(args: &[&str]) -> String {
    let out = common::output(args);
    assert_eq!(out.status.code(), Some(0), "{args:?}: {}", String::from_utf8_lossy(&out.stderr));
    String::from_utf8(out.stdout).unwrap()
}

#[test]
fn the_callable_demo_gives_the_same_bits_on_one_and_two_threads_and_in_parts() {
    let file = "payoffs/callable_autocall.payoff";
    let base = ["price", file, "--paths", "20000", "--seed", "9", "--format", "json"];
    let one = ok(&[&base[..], &["--threads", "1"]].concat());
    let two = ok(&[&base[..], &["--threads", "2"]].concat());
    assert_eq!(without_time(&one), without_time(&two));
    // Three parts, each fitting the same rule, merge to the single run's bits.
    let dir = Scratch::dir("callable-parts");
    let parts: Vec<String> = (1..=3)
        .map(|k| {
            let out = dir.join(&format!("part-{k}.json")).display().to_string();
            let part = format!("{k}/3");
            ok(&["price", file, "--paths", "20000", "--seed", "9", "--part", &part, "--output", &out]);
            out
        })
        .collect();
    let mut merge = vec!["merge", "--format", "json"];
    merge.extend(parts.iter().map(String::as_str));
    assert_eq!(without_time(&ok(&merge)), without_time(&one));
    let v = without_time(&one);
    assert_eq!(v["early_exercise"]["party"], "issuer");
    assert_eq!(v["early_exercise"]["bias"], "high");
}

#[test]
fn the_callable_demo_is_worth_no_more_than_the_same_note_without_the_call() {
    // Common practice, as above, on the demo: the same autocallable without the issuer's
    // call (payoffs/worst_of_autocall.payoff), same seed.
    let args = ["--paths", "50000", "--seed", "2"];
    let (c, c_se) = price_se(&price("payoffs/callable_autocall.payoff", &args));
    let (n, n_se) = price_se(&price("payoffs/worst_of_autocall.payoff", &args));
    assert!(c <= n + 4.0 * (c_se + n_se), "callable {c} ± {c_se} above the plain note {n} ± {n_se}");
}

/// The demo autocallable with `statement` added on every quarterly date, after the
/// coupon and the autocall.
fn autocall_with(statement: &str) -> String {
    let text = std::fs::read_to_string("payoffs/worst_of_autocall.payoff").unwrap();
    let anchor = "    if t == last(quarterly) {";
    assert!(text.contains(anchor));
    text.replacen(anchor, &format!("    {statement}\n{anchor}"), 1)
}

#[test]
fn a_right_never_worth_using_changes_nothing() {
    // Equivalences: a holder's right to end the note for nothing is never in the money,
    // and an issuer's right to call at a thousand times the notional always costs more
    // than going on; either way no path ends early, and the price is the plain note's, bit
    // for bit, on the same seed.
    let args = ["--paths", "20000", "--seed", "4"];
    let plain = price("payoffs/worst_of_autocall.payoff", &args);
    for (tag, statement) in
        [("worthless-put", "holder may end for 0"), ("dear-call", "issuer may end for notional * 1000")]
    {
        let s = Scratch::file(tag, "note.payoff", &autocall_with(statement));
        std::fs::copy("payoffs/market.toml", s.join("market.toml")).unwrap();
        let v = price(s.to_str().unwrap(), &args);
        assert_eq!(price_se(&v), price_se(&plain), "{statement}");
        assert!(v["early_exercise"].is_object(), "{statement}");
    }
}

#[test]
fn an_error_bounded_run_gives_the_bits_of_a_plain_run_of_its_paths() {
    // The rule does not depend on the path count, so `--target-se` keeps its promise.
    let v = price("payoffs/callable_autocall.payoff", &["--paths", "5000", "--target-se", "0.1%", "--seed", "6"]);
    let paths = v["paths"].as_u64().unwrap();
    assert!(paths > 5000, "the run added paths: {paths}");
    let paths = paths.to_string();
    let plain = price("payoffs/callable_autocall.payoff", &["--paths", &paths, "--seed", "6"]);
    assert_eq!(price_se(&v), price_se(&plain));
}

#[test]
fn a_right_on_the_last_date_alone_is_the_european_option() {
    // Equivalence: exercisable only at expiry, with nothing paid after, the holder takes
    // the payment wherever it is positive, which is the European put written with `pay`,
    // bit for bit on the same seed; and that is Black–Scholes (3.844 for Longstaff and
    // Schwartz's put, from memory) within 4 standard errors.
    let write = |statement: &str| {
        format!(
            "product \"put\"\ncurrency USD\nnotional 40\nunderlyings LSPUT\nmarket \"american_market.toml\"\nat 1y {{\n    {statement}\n}}\n"
        )
    };
    let dir = Scratch::dir("last-date-right");
    std::fs::copy("payoffs/validation/american_market.toml", dir.join("american_market.toml")).unwrap();
    std::fs::write(dir.join("right.payoff"), write("holder may end for max(40 - level(LSPUT), 0)")).unwrap();
    std::fs::write(dir.join("pay.payoff"), write("pay max(40 - level(LSPUT), 0)")).unwrap();
    let args = ["--paths", "20000", "--seed", "8"];
    let right = price(dir.join("right.payoff").to_str().unwrap(), &args);
    let pay = price(dir.join("pay.payoff").to_str().unwrap(), &args);
    assert_eq!(price_se(&right), price_se(&pay));
    let (mc, se) = price_se(&right);
    let bs = black_scholes(OptionKind::Put, 36.0, 40.0, 1.0, 0.06, 0.06, 0.2);
    assert!((bs - 3.844).abs() < 5e-4);
    assert_within("Black–Scholes put", mc, se, bs, 4.0);
}

#[test]
fn sensitivities_of_a_bermudan_put_say_how_the_rule_was_fitted() {
    // The holder's monthly put: delta negative, and the report notes the refit and the
    // direction of the bias.
    let file = in_validation_folder("bermudan-risk", "put.payoff", MONTHLY_PUT);
    let (stdout, stderr, code) = common::run(&["risk", file.to_str().unwrap(), "--paths", "4000", "--format", "json"]);
    assert_eq!(code, Some(0), "{stderr}");
    let v: serde_json::Value = serde_json::from_str(&stdout).unwrap();
    let notes: Vec<&str> = v["notes"].as_array().unwrap().iter().map(|n| n.as_str().unwrap()).collect();
    assert!(notes.iter().any(|n| n.contains("holder may end, 12 dates") && n.contains("biased low")), "{notes:?}");
    let delta = v["sensitivities"].as_array().unwrap().iter().find(|s| s["measure"] == "delta").unwrap();
    assert!(delta["value"].as_f64().unwrap() < 0.0, "{delta}");
}
