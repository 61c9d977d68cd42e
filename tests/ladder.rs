//! `pathfold ladder`: a call's ladder is increasing in spot and in volatility (facts of
//! the trade, common practice: a call's delta and vega are positive), the base row is
//! the base price, and the chart has one line and one ±2 SE band per second-axis value.

mod common;

use common::*;

#[test]
fn a_call_ladder_increases_in_spot_and_in_volatility() {
    let dir = Scratch::dir("ladder");
    let chart = dir.join("ladder.svg");
    let chart_arg = chart.to_str().unwrap();
    let (out, err, code) = run(&[
        "ladder",
        "tests/risk/hull_call.payoff",
        "--spot",
        "-20%..20%/10%",
        "--vol",
        "-5..5/5",
        "--paths",
        "20000",
        "--format",
        "json",
        "--chart",
        chart_arg,
    ]);
    assert_eq!(code, Some(0), "{err}");
    let v: serde_json::Value = serde_json::from_str(&out).expect("json");
    let rows = v["rows"].as_array().unwrap();
    assert_eq!(rows.len(), 5 * 3);
    let at = |s: f64, vol: f64| {
        rows.iter()
            .find(|r| r["shifts"][0].as_f64() == Some(s) && r["shifts"][1].as_f64() == Some(vol))
            .map(|r| {
                (r["price"].as_f64().unwrap(), r["change"].as_f64().unwrap(), r["change_std_error"].as_f64().unwrap())
            })
            .unwrap()
    };
    let spots = [-20.0, -10.0, 0.0, 10.0, 20.0];
    let vols = [-5.0, 0.0, 5.0];
    for &vol in &vols {
        for w in spots.windows(2) {
            assert!(at(w[1], vol).0 > at(w[0], vol).0, "not increasing in spot at vol {vol}: {w:?}");
        }
    }
    for &s in &spots {
        for w in vols.windows(2) {
            assert!(at(s, w[1]).0 > at(s, w[0]).0, "not increasing in vol at spot {s}: {w:?}");
        }
    }
    // The unshifted scenario is the base, exactly, on the same paths.
    let (p, change, se) = at(0.0, 0.0);
    assert_eq!(p, v["base_price"].as_f64().unwrap());
    assert_eq!((change, se), (0.0, 0.0));
    let svg = std::fs::read_to_string(&chart).expect("the chart is written");
    assert!(svg.starts_with("<svg"));
    assert_eq!(svg.matches("class=\"price\"").count(), 3);
    assert_eq!(svg.matches("class=\"band\"").count(), 3);
    assert!(svg.contains("Caution"));
}

#[test]
fn a_ladder_refuses_bad_axes() {
    let file = "tests/risk/hull_call.payoff";
    let (_, err, code) = run(&["ladder", file]);
    assert_eq!(code, Some(2));
    assert!(err.contains("--spot"), "{err}");
    let (_, err, code) = run(&["ladder", file, "--spot", "-1..1/1", "--vol", "-1..1/1", "--rate", "0..10/10"]);
    assert_eq!(code, Some(2));
    assert!(err.contains("one or two axes"), "{err}");
    let (_, err, code) = run(&["ladder", file, "--vol", "-30..0/10"]);
    assert_eq!(code, Some(2));
    assert!(err.contains("volatility"), "{err}");
    let (_, err, code) = run(&["ladder", file, "--spot", "-10..10/5", "--only", "QMEN"]);
    assert_eq!(code, Some(2));
    assert!(err.contains("no underlying `QMEN`"), "{err}");
}

#[test]
fn the_autocallables_ladder_with_control_variates_agrees_with_the_plain_one() {
    // Reference: the plain ladder on the same seed and paths (--no-control); every price
    // and every change within 4 of the two standard errors combined, the prices' errors
    // several times smaller with the controls (each scenario's own, fitted on a pilot).
    let ladder = |extra: &[&str]| {
        let mut args =
            vec!["ladder", "payoffs/worst_of_autocall.payoff", "--spot", "-10%..10%/10%", "--paths", "20000"];
        args.extend_from_slice(&["--seed", "4", "--format", "json"]);
        args.extend_from_slice(extra);
        let (out, err, code) = run(&args);
        assert_eq!(code, Some(0), "{err}");
        serde_json::from_str::<serde_json::Value>(&out).expect("json")
    };
    let (controlled, plain) = (ladder(&[]), ladder(&["--no-control"]));
    assert_eq!((&controlled["control_variates"], &plain["control_variates"]), (&true.into(), &false.into()));
    let rows = |v: &serde_json::Value| v["rows"].as_array().unwrap().clone();
    for (c, p) in rows(&controlled).iter().zip(&rows(&plain)) {
        for (value, error) in [("price", "std_error"), ("change", "change_std_error")] {
            let (x, y) = (c[value].as_f64().unwrap(), p[value].as_f64().unwrap());
            let combined = c[error].as_f64().unwrap().hypot(p[error].as_f64().unwrap());
            assert!(
                (x - y).abs() <= 4.0 * combined + 1e-9,
                "{value} at {}: {x} vs plain {y} (± {combined})",
                c["shifts"]
            );
        }
        let (se, plain_se) = (c["std_error"].as_f64().unwrap(), p["std_error"].as_f64().unwrap());
        assert!(se < 0.3 * plain_se, "price error {se} vs plain {plain_se}");
    }
}
