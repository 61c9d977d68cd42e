//! `pathfold check`: every case of the validation set (payoffs/validation/) agrees with its
//! closed form. The closed forms are tested against published values in src/closed_form/
//! (Hull's vanilla example; Haug's tables for digitals, barriers, Asians, lookbacks, forward
//! start; numerical integration for Margrabe and Stulz), each source named there.

mod common;

use common::run;

#[test]
fn every_validation_case_is_within_four_standard_errors() {
    let (stdout, stderr, code) = run(&["check", "--paths", "100000", "--seed", "7", "--format", "json"]);
    let v: serde_json::Value = serde_json::from_str(&stdout).unwrap_or_else(|e| panic!("{e}: {stdout}{stderr}"));
    let cases = v["cases"].as_array().expect("cases");
    assert!(cases.len() >= 32, "the validation set holds its cases");
    let mut failures = Vec::new();
    for c in cases {
        let z = c["z"].as_f64();
        if !(c["passed"].as_bool() == Some(true) && z.is_some_and(|z| z.abs() <= 4.0)) {
            failures.push(format!("{}: {c}", c["file"]));
        }
    }
    assert!(failures.is_empty(), "{}", failures.join("\n"));
    assert_eq!(code, Some(0), "{stderr}");
    // Every kind the issue names is there.
    let names: Vec<&str> = cases.iter().map(|c| c["reference"].as_str().unwrap()).collect();
    for needed in [
        "Black–Scholes",
        "cash-or-nothing",
        "asset-or-nothing",
        "Reiner–Rubinstein",
        "Reiner–Rubinstein + BGK",
        "discrete geometric Asian",
        "Goldman–Sosin–Gatto + BGK",
        "Conze–Viswanathan + BGK",
        "Goldman–Sosin–Gatto",
        "Conze–Viswanathan",
        "Margrabe",
        "Stulz",
        "Rubinstein forward start",
        "CRR tree, Bermudan",
    ] {
        assert!(names.contains(&needed), "no {needed} case");
    }
    assert_eq!(names.iter().filter(|n| **n == "Reiner–Rubinstein").count(), 8, "all eight barrier types");
    // Again with Haug's rebate convention: a knock-out's rebate paid at the moment of the
    // touch (`pay ... on first touch(...)`), a knock-in's at expiry.
    let at_touch = names.iter().filter(|n| **n == "Reiner–Rubinstein, rebate at the touch").count();
    assert_eq!(at_touch, 8, "all eight barrier types with the rebate at the touch");
    // Continuous lookbacks written with `highest`/`lowest` over a window: floating and
    // fixed strike, call and put.
    assert_eq!(names.iter().filter(|n| **n == "Goldman–Sosin–Gatto").count(), 2);
    assert_eq!(names.iter().filter(|n| **n == "Conze–Viswanathan").count(), 2);
}

#[test]
fn a_wrong_reference_fails_the_check_with_exit_status_one() {
    // A copy of one case whose closed form is deliberately off by 1%: the check must catch it.
    let dir = common::Scratch::dir("check-wrong-reference");
    for f in ["call_atm.payoff", "market.toml"] {
        std::fs::copy(format!("payoffs/validation/{f}"), dir.join(f)).unwrap();
    }
    std::fs::write(
        dir.join("references.toml"),
        "[[case]]\nfile = \"call_atm.payoff\"\nreference = { formula = \"black_scholes\", kind = \"call\", strike = 100.0, spot = 101.0, years = 1.0, rate = 0.08, carry = 0.04, volatility = 0.25 }\n",
    )
    .unwrap();
    let (stdout, _, code) = run(&["check", "--folder", dir.to_str().unwrap(), "--paths", "50000"]);
    assert_eq!(code, Some(1), "{stdout}");
    assert!(stdout.contains("FAIL"), "{stdout}");
}

#[test]
fn asian_call_control_cuts_variance_more_than_a_hundredfold() {
    // The geometric-average control on the catalogue's Asian call (issue requirement).
    let v = common::price("payoffs/asian_call.payoff", &["--paths", "50000"]);
    let cut = v["variance_reduction"].as_f64().unwrap();
    assert!(cut > 100.0, "variance cut {cut:.1}");
    let controls: Vec<&str> = v["controls"].as_array().unwrap().iter().map(|c| c.as_str().unwrap()).collect();
    assert!(controls.contains(&"ZPHX geometric-average call"), "{controls:?}");
}
