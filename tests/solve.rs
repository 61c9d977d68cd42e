//! `pathfold solve` against exact coupons from discount factors, and against an
//! independent re-pricing on another seed. Fixed seeds throughout.

mod common;

use common::*;

fn solve(args: &[&str]) -> serde_json::Value {
    let mut all = vec!["solve"];
    all.extend_from_slice(args);
    all.extend_from_slice(&["--format", "json"]);
    let (out, err, code) = run(&all);
    assert_eq!(code, Some(0), "{err}");
    serde_json::from_str(&out).expect("json")
}

#[test]
fn a_fixed_coupon_note_solves_to_the_coupon_from_discount_factors() {
    // Reference (common practice): a note paying c at 1y and 1 + c at 2y is worth
    // c·(D1 + D2) + D2 per unit of notional, with D(t) = e^{−rt}, r = 5%; at 98% the
    // coupon is (0.98 − D2) / (D1 + D2).
    let v = solve(&["tests/risk/fixed_coupon_note.payoff", "--for", "coupon", "--target", "98%", "--paths", "1000"]);
    let (d1, d2) = ((-0.05f64).exp(), (-0.10f64).exp());
    let exact = (0.98 - d2) / (d1 + d2);
    let value = v["value"].as_f64().unwrap();
    assert!((value - exact).abs() < 1e-9, "{value} vs {exact}");
    assert_eq!(v["affine"], true);
    assert_eq!(v["reached"], true);
    assert!(v["evaluations"].as_u64().unwrap() <= 6, "{v}");
    assert!((v["price"].as_f64().unwrap() - 980_000.0).abs() < 1e-3);
    for key in ["parameter", "value", "std_error", "price", "price_std_error", "target", "evaluations"] {
        assert!(!v[key].is_null(), "{key} missing");
    }
}

#[test]
fn the_demo_autocall_at_the_solved_coupon_reprices_to_the_target_on_another_seed() {
    // Reference: the target itself; an independent run (another seed, control variates
    // on) at the solved coupon must be within 3 of its combined standard errors.
    let v = solve(&["payoffs/worst_of_autocall.payoff", "--for", "coupon", "--target", "98%", "--paths", "40000"]);
    let coupon = v["value"].as_f64().unwrap();
    let coupon_se = v["std_error"].as_f64().unwrap();
    assert!(coupon > 0.0225 && coupon < 0.09, "{coupon}");
    let set = format!("coupon={coupon}");
    let p = price("payoffs/worst_of_autocall.payoff", &["--paths", "40000", "--seed", "99", "--set", &set]);
    let (price, se) = price_se(&p);
    // The solved coupon's own error moves the target by coupon_se × slope.
    let slope = v["slope"].as_f64().unwrap();
    let combined = (se * se + (coupon_se * slope).powi(2)).sqrt();
    assert_within("autocall at the solved coupon", price, combined, 980_000.0, 3.0);
}

#[test]
fn solve_refuses_unknown_names_flags_and_empty_brackets() {
    let file = "tests/risk/fixed_coupon_note.payoff";
    let (_, err, code) = run(&["solve", file, "--for", "cupon", "--target", "98%"]);
    assert_eq!(code, Some(2));
    assert!(err.contains("no parameter `cupon`") && err.contains("coupon"), "{err}");
    let (_, err, code) = run(&["solve", file, "--for", "callable", "--target", "98%"]);
    assert_eq!(code, Some(2));
    assert!(err.contains("flag"), "{err}");
    let (_, err, code) = run(&["solve", file, "--for", "coupon", "--target", "98%", "--between", "5%..9%"]);
    assert_eq!(code, Some(2));
    assert!(err.contains("no root") && err.contains("--between"), "{err}");
    let (_, err, code) = run(&["solve", file, "--for", "coupon", "--target", "98%", "--between", "9%..5%"]);
    assert_eq!(code, Some(2));
    assert!(err.contains("LO must be below HI"), "{err}");
}

#[test]
fn a_step_in_the_parameter_is_reported_not_hidden() {
    // On fixed paths the price is a step function of a barrier level (`protection`): the
    // search ends at the jump nearest the target, and says that the target is not met.
    let v = solve(&["payoffs/worst_of_autocall.payoff", "--for", "protection", "--target", "97%", "--paths", "4000"]);
    assert_eq!(v["affine"], false);
    assert_eq!(v["reached"], false);
    let value = v["value"].as_f64().unwrap();
    assert!(value > 0.0 && value < 2.4, "{value}");
}
