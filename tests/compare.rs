//! `pathfold compare` through the real binary, against a price list whose prices come
//! from closed forms independent of the simulation.

mod common;

use std::process::Output;

use common::output as pathfold;

use pathfold::closed_form::{black_scholes, cash_or_nothing, standard_barrier, BarrierKind, OptionKind};
use pathfold::output::CAUTION;

// The market of tests/compare/market.toml; every payoff there runs one year
// (2026-12-01 to 2027-12-01, 365 days ACT/365, so T = 1) on 1,000,000 notional.
const SPOT: f64 = 1.0; // performances: the initial level is 1
const R: f64 = 0.038;
const Q: f64 = 0.019;
const SIGMA: f64 = 0.18;
const T: f64 = 1.0;
const NOTIONAL: f64 = 1_000_000.0;

/// (file or product, reference price). Each reference is a closed form we implement and
/// check against published values in src/closed_form:
/// - call: Black–Scholes–Merton (Hull's worked example, from memory; Haug's tables);
/// - digital: Reiner–Rubinstein cash-or-nothing (Haug, ch. 4 example, from memory);
/// - barrier: Reiner–Rubinstein up-and-out call, continuous monitoring (Haug's standard
///   barrier table, ch. 4).
fn references() -> [(&'static str, f64); 3] {
    let b = R - Q;
    [
        ("call.payoff", NOTIONAL * black_scholes(OptionKind::Call, SPOT, 1.0, T, R, b, SIGMA)),
        ("digital", cash_or_nothing(OptionKind::Call, SPOT, 1.05, 0.10 * NOTIONAL, T, R, b, SIGMA)),
        (
            "Test up-and-out call",
            NOTIONAL * standard_barrier(OptionKind::Call, BarrierKind::UpAndOut, SPOT, 1.0, 1.3, 0.0, T, R, b, SIGMA),
        ),
    ]
}

/// Writes a price list in a folder of its own, removed when the result is dropped.
fn price_list(name: &str, text: &str) -> common::Scratch {
    common::Scratch::file(&format!("compare-{name}"), name, text)
}

/// The list with the closed-form prices: the call and digital by file, the barrier by
/// product name. `scale` multiplies the digital's price.
fn list_text(digital_scale: f64, digital_tolerance: &str) -> String {
    let [call, digital, barrier] = references();
    format!(
        "file,product,price,tolerance\n{},,{},\n{},,{},{}\n,{},{},\n",
        call.0,
        call.1,
        digital.0,
        digital.1 * digital_scale,
        digital_tolerance,
        barrier.0,
        barrier.1
    )
}

fn rows(o: &Output) -> Vec<std::collections::HashMap<String, String>> {
    let mut r = csv::Reader::from_reader(&o.stdout[..]);
    let headers = r.headers().unwrap().clone();
    r.records()
        .map(|rec| headers.iter().zip(rec.unwrap().iter()).map(|(h, v)| (h.into(), v.into())).collect())
        .collect()
}

// Plain Monte Carlo (no control variates, which would lean on the same closed forms),
// 20,000 paths, seed 11; agreement is |z| <= 3 (the default --max-z).
const RUN: [&str; 7] = ["tests/compare", "--paths", "20000", "--seed", "11", "--no-control", "--format=csv"];

#[test]
fn closed_form_prices_agree() {
    let list = price_list("good.csv", &list_text(1.0, ""));
    let o = pathfold(&[&["compare", list.to_str().unwrap()][..], &RUN[..]].concat());
    let lines = rows(&o);
    assert_eq!(o.status.code(), Some(0), "{lines:?}");
    assert_eq!(lines.len(), 3);
    for (line, (key, reference)) in lines.iter().zip(references()) {
        assert_eq!(line["key"], key);
        assert_eq!(line["verdict"], "agree", "{line:?}");
        assert_eq!(line["external_price"].parse::<f64>().unwrap(), reference);
        let z: f64 = line["z"].parse().unwrap();
        assert!(z.abs() <= 3.0, "{key}: z = {z}");
        assert_eq!(line["caution"], CAUTION);
        assert_eq!(line["payoff_sha256"].len(), 64);
    }
}

#[test]
fn one_wrong_price_is_flagged_alone() {
    // The digital quoted 10% too high: far outside 3 standard errors.
    let list = price_list("wrong.csv", &list_text(1.10, ""));
    let o = pathfold(&[&["compare", list.to_str().unwrap()][..], &RUN[..]].concat());
    assert_eq!(o.status.code(), Some(1));
    let verdicts: Vec<String> = rows(&o).iter().map(|l| l["verdict"].clone()).collect();
    assert_eq!(verdicts, ["agree", "disagree", "agree"]);

    // A tolerance of 12% of the quoted price covers the same difference.
    let list = price_list("tolerant.csv", &list_text(1.10, "12%"));
    let o = pathfold(&[&["compare", list.to_str().unwrap()][..], &RUN[..]].concat());
    assert_eq!(o.status.code(), Some(0));
}

#[test]
fn rows_without_payoffs_and_payoffs_without_rows_are_missing() {
    let [call, digital, _] = references();
    let text = format!("file,price\n{},{}\n{},{}\nnot_here.payoff,123.45\n", call.0, call.1, digital.0, digital.1);
    let list = price_list("missing.csv", &text);
    let o = pathfold(&[&["compare", list.to_str().unwrap()][..], &RUN[..]].concat());
    assert_eq!(o.status.code(), Some(1));
    let lines = rows(&o);
    let got: Vec<(&str, &str)> = lines.iter().map(|l| (l["key"].as_str(), l["verdict"].as_str())).collect();
    assert_eq!(
        got,
        [
            ("call.payoff", "agree"),
            ("digital", "agree"),
            ("not_here.payoff", "missing"),
            ("tests/compare/barrier.payoff", "missing"),
        ]
    );
    assert_eq!(lines[2]["message"], "no payoff file matches this row");
    assert_eq!(lines[3]["message"], "not in the price list");
}

#[test]
fn the_table_gives_a_verdict_per_product() {
    let list = price_list("table.csv", &list_text(1.10, ""));
    let o = pathfold(&["compare", list.to_str().unwrap(), "tests/compare", "--paths", "20000", "--no-control"]);
    let out = String::from_utf8(o.stdout).unwrap();
    assert!(out.lines().any(|l| l.starts_with("digital ") && l.contains("disagree")), "{out}");
    assert!(out.contains("2 agree, 1 disagree, 0 missing, 0 error"), "{out}");
    assert!(out.trim_end().ends_with(CAUTION));
}

#[test]
fn a_list_without_the_needed_columns_is_refused() {
    let list = price_list("bad_header.csv", "name,value\ncall,1\n");
    let o = pathfold(&["compare", list.to_str().unwrap(), "tests/compare"]);
    assert_eq!(o.status.code(), Some(2));
    let err = String::from_utf8(o.stderr).unwrap();
    assert!(err.contains("the price list needs a `price` column and a `file` or `product` column"), "{err}");
    assert!(err.contains("fix: the first line must name the columns"), "{err}");
}

#[test]
fn a_bad_row_is_an_error_line_and_the_rest_go_on() {
    let [call, ..] = references();
    let text = format!("file,price\n{},{}\ndigital,about 38k\n", call.0, call.1);
    let list = price_list("bad_row.csv", &text);
    let o = pathfold(&[&["compare", list.to_str().unwrap()][..], &RUN[..]].concat());
    assert_eq!(o.status.code(), Some(1));
    let lines = rows(&o);
    assert_eq!(lines[0]["verdict"], "agree");
    assert_eq!(lines[1]["verdict"], "error");
    assert!(lines[1]["message"].ends_with("bad_row.csv:3: the price `about 38k` is not a number (fix: write a plain decimal such as `79321.93`, no currency or thousands separators)"), "{:?}", lines[1]);
}

#[test]
fn a_thousands_separator_that_splits_a_price_is_an_error_not_a_tolerance() {
    // `170,506.83` unquoted: with a `tolerance` column left empty the row has one field too
    // many; without it the price would read as 170 with a tolerance of 506.83.
    let [call, ..] = references();
    let text = format!(
        "file,product,price,tolerance\n{},,{},\ndigital,,37,140.00,\ncall.payoff,,170,506.83\n",
        call.0, call.1
    );
    let list = price_list("separator.csv", &text);
    let o = pathfold(&[&["compare", list.to_str().unwrap()][..], &RUN[..]].concat());
    assert_eq!(o.status.code(), Some(1));
    let lines = rows(&o);
    assert_eq!(lines[0]["verdict"], "agree");
    assert_eq!(lines[1]["verdict"], "error");
    assert!(
        lines[1]["message"].ends_with("separator.csv:3: the row has 5 fields but the header names 4 columns; a price written with a thousands separator (`37,140.00`) splits into two fields (fix: write plain decimals such as `79321.93`, or put the price in double quotes)"),
        "{:?}",
        lines[1]
    );
    assert_eq!(lines[2]["verdict"], "error");
    assert!(
        lines[2]["message"].ends_with("separator.csv:4: the price `170` and the tolerance `506.83` read as one number with a thousands separator, `170,506.83` (fix: write plain decimals such as `79321.93`, or put the price in double quotes; for a price of 170 with a tolerance of 506.83 write the price as `170.0`)"),
        "{:?}",
        lines[2]
    );
    assert_eq!(lines[2]["external_price"], "");
}

#[test]
fn a_quote_rounded_to_cents_agrees_with_an_exact_price() {
    // With control variates the digital is its own control: pathfold's price is the
    // closed form to within a few millionths, far tighter than a quote written to cents.
    // A quote rounded to cents therefore agrees (the difference is the rounding, reported
    // as such); one two cents off does not.
    let [_, digital, _] = references();
    let args = ["tests/compare", "--paths", "20000", "--seed", "11", "--format=csv"];
    for (quoted, verdict) in [(format!("{:.2}", digital.1), "agree"), (format!("{:.2}", digital.1 + 0.02), "disagree")]
    {
        let list = price_list("cents.csv", &format!("file,price\n{},{quoted}\n", digital.0));
        let o = pathfold(&[&["compare", list.to_str().unwrap()][..], &args[..]].concat());
        let lines = rows(&o);
        let line = lines.iter().find(|l| l["key"] == digital.0).expect("the digital's line");
        assert_eq!(line["verdict"], verdict, "{quoted}: {line:?}");
        if verdict == "agree" {
            let z: f64 = line["z"].parse().unwrap();
            let se: f64 = line["std_error"].parse().unwrap();
            assert!(se < 1e-3, "the digital is not priced by its control: se {se}");
            // Whether |z| is small depends on how the rounding fell; the verdict must not.
            assert!(z.abs() <= 3.0 || line["message"].contains("rounding"), "{line:?}");
        }
    }
}
