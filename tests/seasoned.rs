//! Seasoned trades: a start before the valuation date, past levels from the fixings file
//! the market names (`tests/seasoned/market.toml` → `fixings.csv`), past payments left
//! out, products that ended in the past, barriers already touched. Fixed seeds; each
//! reference named beside its check.

mod common;

use common::*;
use pathfold::closed_form::{black_scholes, geometric_asian_discrete, norm_cdf, OptionKind};
use pathfold::date::Date;

const R: f64 = 0.038;

/// The call on the geometric average of `known` levels and lognormal levels at `times`
/// (years from today, spot `s`, carry `b`, volatility `sigma`), struck at `k`, paid at
/// `t_pay`: ln G is normal with the known part a constant (Kemna and Vorst's argument for
/// the geometric average, from memory).
#[allow(clippy::too_many_arguments)]
fn geometric_call(known: &[f64], s: f64, times: &[f64], b: f64, sigma: f64, k: f64, t_pay: f64, r: f64) -> f64 {
    let n = (known.len() + times.len()) as f64;
    let drift = b - 0.5 * sigma * sigma;
    let mean = (known.iter().map(|x| x.ln()).sum::<f64>() + times.iter().map(|t| s.ln() + drift * t).sum::<f64>()) / n;
    let var = sigma * sigma * times.iter().flat_map(|&a| times.iter().map(move |&c| a.min(c))).sum::<f64>() / (n * n);
    let expected = (mean + 0.5 * var).exp();
    let d1 = ((expected / k).ln() + 0.5 * var) / var.sqrt();
    (-r * t_pay).exp() * (expected * norm_cdf(d1) - k * norm_cdf(d1 - var.sqrt()))
}

fn month_dates(first: &str, count: i64) -> Vec<String> {
    let d = Date::parse(first).unwrap();
    (0..count).map(|i| d.add_months(i).unwrap().to_string()).collect()
}

#[test]
fn the_reference_reduces_to_the_discrete_geometric_asian_without_a_known_part() {
    // Cross-check of the reference above against the closed form tested in src/closed_form.
    let times: Vec<f64> = month_dates("2027-01-01", 12).iter().map(|d| years(d)).collect();
    let t = *times.last().unwrap();
    let ours = geometric_call(&[], 100.0, &times, R - ZPHX.q, ZPHX.vol, 95.0, t, R);
    let published = geometric_asian_discrete(OptionKind::Call, 100.0, 95.0, &times, t, R, R - ZPHX.q, ZPHX.vol);
    assert!((ours - published).abs() < 1e-10, "{ours} against {published}");
}

#[test]
fn a_seasoned_geometric_asian_matches_the_closed_form_with_its_known_part_factored_out() {
    // Struck at 4,100 on 2026-06-01; fixings from 2026-07-01 to 2027-06-01, the five before
    // the valuation date from the file, the one on it the spot (4,250), six to come.
    let known = [4150.0, 4080.0, 4180.0, 4220.0, 4195.0, 4250.0];
    let times: Vec<f64> = month_dates("2027-01-01", 6).iter().map(|d| years(d)).collect();
    let t = *times.last().unwrap();
    let reference = 100.0 / 4100.0 * geometric_call(&known, 4250.0, &times, R - ZPHX.q, ZPHX.vol, 4100.0, t, R);
    let v = price("tests/seasoned/geometric_asian.payoff", &["--paths", "200000", "--seed", "21", "--no-control"]);
    let (p, se) = price_se(&v);
    assert_within("seasoned geometric Asian", p, se, reference, 4.0);
    let fixings = &v["market_inputs"]["underlyings"][0]["fixings"];
    assert_eq!(fixings.as_array().map(Vec::len), Some(6), "the start and five past fixings: {fixings}");
    assert_eq!(fixings[0]["date"], "2026-06-01");
    assert_eq!(fixings[0]["level"], 4100.0);
}

#[test]
fn a_seasoned_knock_out_already_knocked_prices_its_remaining_rebate() {
    // Knocked out on 2026-10-01 (4,220 ≥ 102% of 4,100): all that is left is the 5% rebate
    // paid on 2027-06-01, so the price is its discounted amount, with no error (a fact of
    // the trade).
    let reference = 5.0 * (-R * years("2027-06-01")).exp();
    for threads in ["1", "2"] {
        let v = price("tests/seasoned/knocked_out.payoff", &["--paths", "4000", "--threads", threads]);
        let (p, se) = price_se(&v);
        assert!((p - reference).abs() < 1e-12, "{p} against {reference}");
        assert!(se < 1e-12, "no randomness left: {se}");
        assert_eq!(v["ended"], "2026-10-01");
    }
    let (table, _, code) = run(&["price", "tests/seasoned/knocked_out.payoff", "--paths", "2000"]);
    assert_eq!(code, Some(0));
    assert!(table.contains("ended             on 2026-10-01, before the valuation date"), "{table}");
}

#[test]
fn a_barrier_touched_in_the_past_is_read_from_the_day_s_low() {
    // The low of 2026-08-01 (3,650 ≤ 90% of 4,100) says the barrier was touched: the note
    // pays 100 × min(S_T/4100, 1) = (100/4100)·(S_T − (S_T − 4100)⁺): the discounted forward
    // less a Black–Scholes call (common practice).
    let t = years("2027-06-01");
    let forward = 4250.0 * (-ZPHX.q * t).exp();
    let call = black_scholes(OptionKind::Call, 4250.0, 4100.0, t, R, R - ZPHX.q, ZPHX.vol);
    let reference = 100.0 / 4100.0 * (forward - call);
    let (p, se) =
        price_se(&price("tests/seasoned/knocked_in.payoff", &["--paths", "200000", "--seed", "22", "--no-control"]));
    assert_within("note knocked in on a past low", p, se, reference, 4.0);
}

#[test]
fn a_seasoned_autocall_prices_as_the_same_product_started_today_without_its_past_observations() {
    // Equivalence: struck at 38.40 (today's spot); its two past observations did not call
    // and their coupons are paid, so what is left is the product started today on the
    // remaining dates. Same seed: the same future steps, so the same bits.
    for args in [vec!["--paths", "20000", "--seed", "23"], vec!["--paths", "20000", "--seed", "24", "--no-control"]] {
        let a = price("tests/seasoned/autocall_seasoned.payoff", &args);
        let b = price("tests/seasoned/autocall_today.payoff", &args);
        assert_eq!(price_se(&a), price_se(&b), "{args:?}");
        assert_eq!(a["ended"], serde_json::Value::Null);
    }
}
