//! `pathfold risk` against the Black–Scholes Greeks of our closed form (itself checked in
//! src/closed_form/vanilla.rs against Hull's Greeks example, from memory), and the facts
//! of common random numbers. Fixed seeds throughout.

mod common;

use std::path::Path;

use common::*;
use pathfold::closed_form::{black_scholes, black_scholes_greeks, OptionKind};
use pathfold::risk::{risk_file, Bumps, Risk, Subject};
use pathfold::sim::{Sampler, Settings};

const S: f64 = 49.0;
const K: f64 = 50.0;
const R: f64 = 0.05;
const SIGMA: f64 = 0.2;
const T: f64 = 0.3846;

fn bs(s: f64, t: f64, r: f64, q: f64, sigma: f64) -> f64 {
    black_scholes(OptionKind::Call, s, K, t, r, r - q, sigma)
}

fn risk(file: &str, paths: u64, seed: u64) -> Risk {
    risk_with(file, paths, seed, false)
}

fn risk_with(file: &str, paths: u64, seed: u64, control_variates: bool) -> Risk {
    risk_sampled(file, paths, seed, control_variates, Sampler::Random)
}

fn risk_sampled(file: &str, paths: u64, seed: u64, control_variates: bool, sampler: Sampler) -> Risk {
    let settings = Settings { paths, seed, antithetic: true, control_variates, sampler };
    risk_file(Path::new(file), None, &[], &settings, &Bumps::default()).expect("risk runs")
}

fn get(r: &Risk, measure: &str) -> (f64, f64) {
    let s = r.sensitivities.iter().find(|s| s.measure == measure).unwrap_or_else(|| panic!("no {measure}"));
    (s.value, s.std_error)
}

/// `mc` (with its SE) against the analytic Greek: within 4 SE plus the finite-difference
/// error, which is the closed form's own finite difference minus the analytic value, and
/// must itself be small (under 2% of the Greek).
fn check(what: &str, mc: (f64, f64), analytic: f64, closed_form_difference: f64) {
    let fd_error = (closed_form_difference - analytic).abs();
    assert!(fd_error <= 0.02 * analytic.abs(), "{what}: finite-difference error {fd_error} vs {analytic}");
    let (v, se) = mc;
    assert!(se > 0.0, "{what}: no standard error");
    assert!((v - analytic).abs() <= 4.0 * se + fd_error, "{what}: {v} ± {se} vs {analytic} (fd error {fd_error})");
}

#[test]
fn greeks_of_hulls_call_agree_with_black_scholes() {
    greeks_of_hulls_call(false, Sampler::Random);
}

#[test]
fn greeks_of_hulls_call_on_sobol_points_agree_with_black_scholes() {
    // The same references with every scenario on the same 16 randomisations of Sobol
    // points (plain, so the points do the work): each Greek's error is the spread of its
    // 16 estimates.
    let r = greeks_of_hulls_call(false, Sampler::Sobol);
    assert_eq!(r.sampler, Sampler::Sobol);
    assert_eq!(r.paths, 200_704, "16 randomisations of whole blocks");
}

#[test]
fn greeks_of_hulls_call_with_control_variates_agree_with_black_scholes() {
    // Each scenario's samples less its own controls (the forward and the call of the
    // bumped market), with coefficients from a pilot on streams of its own: the same
    // references, and a price error far below the plain one's on the same paths.
    let r = greeks_of_hulls_call(true, Sampler::Random);
    let plain = risk("tests/risk/hull_call.payoff", 200_000, 3);
    assert!(r.control_variates && !plain.control_variates);
    assert!(r.price_std_error < 0.1 * plain.price_std_error, "{} vs {}", r.price_std_error, plain.price_std_error);
}

fn greeks_of_hulls_call(control_variates: bool, sampler: Sampler) -> Risk {
    // Reference: black_scholes_greeks (Hull's example S=49, K=50, r=5%, σ=20%, T=20 weeks:
    // delta 0.522, gamma 0.066, vega 12.1, theta −4.31/yr, rho 8.91; from memory).
    let r = risk_sampled("tests/risk/hull_call.payoff", 200_000, 3, control_variates, sampler);
    let g = black_scholes_greeks(OptionKind::Call, S, K, T, R, R, SIGMA);
    let b = Bumps::default();
    assert_within("price", r.price, r.price_std_error, bs(S, T, R, 0.0, SIGMA), 4.0);

    let (d, dse) = get(&r, "delta_units");
    let cf = (bs(S * (1.0 + b.spot), T, R, 0.0, SIGMA) - bs(S * (1.0 - b.spot), T, R, 0.0, SIGMA)) / (2.0 * b.spot * S);
    check("delta", (d, dse), g.delta, cf);

    // Gamma per 1% move → per unit: divide by (1% of S)².
    let (gm, gse) = get(&r, "gamma");
    let unit = (0.01 * S).powi(2);
    let cf = (bs(S * (1.0 + b.spot), T, R, 0.0, SIGMA) - 2.0 * bs(S, T, R, 0.0, SIGMA)
        + bs(S * (1.0 - b.spot), T, R, 0.0, SIGMA))
        / (b.spot * S).powi(2);
    check("gamma", (gm / unit, gse / unit), g.gamma, cf);

    // Vega per volatility point → per unit of volatility.
    let (v, vse) = get(&r, "vega");
    let cf = (bs(S, T, R, 0.0, SIGMA + b.vol) - bs(S, T, R, 0.0, SIGMA - b.vol)) / (2.0 * b.vol);
    check("vega", (v / 0.01, vse / 0.01), g.vega, cf);

    // Rho per basis point → per unit of rate (the dividend yield held, so the carry moves).
    let (rho, rse) = get(&r, "rho");
    let cf = (bs(S, T, R + b.rate, 0.0, SIGMA) - bs(S, T, R - b.rate, 0.0, SIGMA)) / (2.0 * b.rate);
    check("rho", (rho / 1e-4, rse / 1e-4), g.rho, cf);

    // Dividend sensitivity per basis point: ∂V/∂q = −S·T·e^{−qT}·N(d1) (the carry term
    // of black_scholes_greeks' rho formula, written out).
    let (dv, dvse) = get(&r, "dividend");
    let analytic = -S * T * g.delta;
    let cf = (bs(S, T, R, b.dividend, SIGMA) - bs(S, T, R, -b.dividend, SIGMA)) / (2.0 * b.dividend);
    check("dividend", (dv / 1e-4, dvse / 1e-4), analytic, cf);

    // Theta over one calendar day → per year (the year offset shortens by 1/365).
    let (th, tse) = get(&r, "theta");
    let day = 1.0 / 365.0;
    let cf = (bs(S, T - day, R, 0.0, SIGMA) - bs(S, T, R, 0.0, SIGMA)) / day;
    check("theta", (th / day, tse / day), g.theta, cf);
    r
}

#[test]
fn the_autocallables_greeks_with_control_variates_agree_with_the_plain_ones_and_are_sharper() {
    // Reference: the plain estimates of the same Greeks (--no-control, the same seed and
    // paths); every controlled Greek within 4 of the two standard errors combined, and
    // the deltas' errors at most half the plain ones (about a third on this product).
    let controlled = risk_with("payoffs/worst_of_autocall.payoff", 40_000, 11, true);
    let plain = risk_with("payoffs/worst_of_autocall.payoff", 40_000, 11, false);
    agree_within_4_combined_errors("payoffs/worst_of_autocall.payoff", &controlled, &plain);
    for (c, p) in controlled.sensitivities.iter().zip(&plain.sensitivities) {
        if c.measure == "delta" {
            assert!(c.std_error < 0.5 * p.std_error, "{:?}: {} vs {}", c.subject, c.std_error, p.std_error);
        }
    }
}

#[test]
fn a_perf_call_struck_today_has_the_delta_of_the_level_call() {
    // Fact of the trade (common practice): a call on performance struck today at 49 is
    // 49 calls on the level; bumping today's spot must not move the strike level.
    let level = risk("tests/risk/hull_call.payoff", 20_000, 5);
    let perf = risk("tests/risk/perf_call.payoff", 20_000, 5);
    for m in ["delta", "delta_units", "gamma", "vega", "rho", "theta"] {
        let (a, b) = (get(&level, m).0, get(&perf, m).0);
        assert!(a.abs() > 0.0, "{m} is zero");
        assert!((a - b).abs() <= 1e-9 * a.abs().max(1e-6), "{m}: level {a} vs perf {b}");
    }
}

#[test]
fn common_random_numbers_make_the_delta_precise() {
    // The delta's SE from paired differences, against the SE of the same difference of
    // two prices on independent seeds: common practice says far smaller; we ask for 10×.
    let r = risk("tests/risk/hull_call.payoff", 20_000, 7);
    let (_, paired) = get(&r, "delta");
    let h = Bumps::default().spot;
    // Each price's SE is about the base price's; independent seeds add the variances.
    let independent = (2.0 * r.price_std_error.powi(2)).sqrt() * 0.01 / (2.0 * h);
    assert!(paired * 10.0 < independent, "paired {paired} vs independent {independent}");
}

#[test]
fn risk_writes_json_with_the_sensitivities_and_the_caution() {
    let (out, err, code) =
        run(&["risk", "tests/risk/hull_call.payoff", "--paths", "2000", "--format", "json", "--bump", "vol=0.5"]);
    assert_eq!(code, Some(0), "{err}");
    let v: serde_json::Value = serde_json::from_str(&out).expect("json");
    let list = v["sensitivities"].as_array().expect("a list");
    let measures: Vec<&str> = list.iter().map(|s| s["measure"].as_str().unwrap()).collect();
    for m in ["delta", "gamma", "vega", "dividend", "rho", "theta"] {
        assert!(measures.contains(&m), "{m} missing from {measures:?}");
    }
    let vega = list.iter().find(|s| s["measure"] == "vega").unwrap();
    assert_eq!(vega["underlying"], "ZPHX");
    assert!(vega["bump"].as_str().unwrap().contains("0.5"));
    assert!(vega["std_error"].as_f64().unwrap() > 0.0);
    assert!(v["caution"].as_str().unwrap().starts_with("Caution"));
    let (_, err, code) = run(&["risk", "tests/risk/hull_call.payoff", "--bump", "vega=1"]);
    assert_eq!(code, Some(2));
    assert!(err.contains("unknown bump"), "{err}");
}

#[test]
fn correlation_sensitivity_of_the_demo_is_reported_per_pair() {
    let r = risk("payoffs/worst_of_autocall.payoff", 4_000, 1);
    let pairs: Vec<&Subject> =
        r.sensitivities.iter().filter(|s| s.measure == "correlation").map(|s| &s.subject).collect();
    assert_eq!(pairs.len(), 3, "{pairs:?}");
    // A worst-of pays more when the names move together (common practice): the
    // correlation sensitivity of each pair is not negative beyond noise.
    for s in r.sensitivities.iter().filter(|s| s.measure == "correlation") {
        assert!(s.value > -4.0 * s.std_error, "{s:?}");
    }
}

#[test]
fn same_seed_same_bits_on_one_thread_or_two() {
    for sampler in ["random", "sobol"] {
        let args = |t: &'static str| {
            let file = "payoffs/worst_of_autocall.payoff";
            ["risk", file, "--paths", "3000", "--format", "json", "--sampler", sampler, "--threads", t]
        };
        let (one, err, code) = run(&args("1"));
        assert_eq!(code, Some(0), "{err}");
        let (two, _, _) = run(&args("2"));
        assert_eq!(one, two, "{sampler}");
    }
}

#[test]
fn theta_that_cannot_share_the_paths_is_left_out_with_a_note() {
    // Daily fixings from tomorrow: one day later the first fixing is today, the grid has
    // one date fewer, so theta is named as left out and the rest is still reported.
    let r = risk("payoffs/up_and_out_call.payoff", 2_000, 1);
    assert!(r.sensitivities.iter().all(|s| s.measure != "theta"));
    assert!(r.notes.iter().any(|n| n.starts_with("theta: a fixing falls on 2026-12-02")), "{:?}", r.notes);
    assert!(r.sensitivities.iter().any(|s| s.measure == "delta"));
}

#[test]
fn common_random_numbers_hold_for_paths_that_end_early_without_pairs() {
    // An autocallable without antithetic pairs: the base and the bumped paths end on
    // different dates, and each path must still see the same normals in every scenario
    // (the paths of a joint run are simulated whole, never packed by which have ended).
    // The delta's paired SE against independent seeds', as above: 5× smaller (the
    // autocall's digital features leave a bumped difference noisier than a call's; paths
    // packed by which have ended gave about 1.1×).
    let settings =
        Settings { paths: 20_000, seed: 7, antithetic: false, control_variates: false, ..Settings::default() };
    let r = risk_file(Path::new("payoffs/worst_of_autocall.payoff"), None, &[], &settings, &Bumps::default())
        .expect("risk runs");
    let h = Bumps::default().spot;
    let independent = (2.0 * r.price_std_error.powi(2)).sqrt() * 0.01 / (2.0 * h);
    for s in r.sensitivities.iter().filter(|s| s.measure == "delta") {
        assert!(
            s.std_error * 5.0 < independent,
            "{:?}: paired {} vs independent {independent}",
            s.subject,
            s.std_error
        );
    }
}

#[test]
fn greeks_with_and_without_control_variates_agree_across_the_demo_library() {
    // Two writings of one computation: each scenario less its controls (coefficients from
    // a pilot), or plain. Reference: the plain Greeks on the same seed; every Greek of
    // products of every kind (averages, windows, continuous barriers, accruals, a seasoned
    // autocallable, curves, a quanto) within 4 of the two errors combined. Greeks that
    // are exactly zero (a gamma of a payoff homogeneous in spot) stay within rounding.
    for file in [
        "payoffs/asian_call.payoff",
        "payoffs/lookback.payoff",
        "payoffs/up_and_out_call.payoff",
        "payoffs/range_accrual.payoff",
        "payoffs/seasoned_worst_of_autocall.payoff",
        "payoffs/worst_of_autocall_on_curves.payoff",
        "payoffs/quanto_call.payoff",
        "payoffs/forward_start_call.payoff",
    ] {
        let controlled = risk_with(file, 10_000, 21, true);
        let plain = risk_with(file, 10_000, 21, false);
        agree_within_4_combined_errors(file, &controlled, &plain);
    }
}

/// Every sensitivity of `controlled` within 4 of the two standard errors combined of the
/// same one in `plain` (plus rounding, for Greeks that are exactly zero).
fn agree_within_4_combined_errors(file: &str, controlled: &Risk, plain: &Risk) {
    assert_eq!(controlled.sensitivities.len(), plain.sensitivities.len(), "{file}");
    let rounding = 1e-9 * controlled.price.abs();
    for (c, p) in controlled.sensitivities.iter().zip(&plain.sensitivities) {
        assert_eq!((c.measure, &c.subject), (p.measure, &p.subject), "{file}");
        let combined = c.std_error.hypot(p.std_error);
        assert!(
            (c.value - p.value).abs() <= 4.0 * combined + rounding,
            "{file} {} {:?}: {} ± {} vs plain {} ± {}",
            c.measure,
            c.subject,
            c.value,
            c.std_error,
            p.value,
            p.std_error
        );
    }
}

#[test]
fn greeks_of_a_down_and_out_call_with_control_variates_agree_with_its_closed_form() {
    // Reference: the Reiner–Rubinstein closed form (standard_barrier_with_rebate, checked
    // against Haug's barrier table in src/closed_form/barrier.rs) under the same bumps,
    // central differences of the closed form itself: a non-trivial product for the
    // controls (the forward and the call do not replicate it), the barrier continuously
    // monitored (S = 100, K = 100, H = 95, rebate 3 at expiry, r = 8%, q = 4%, σ = 25%,
    // six months).
    use pathfold::closed_form::{standard_barrier_with_rebate, BarrierKind, RebateTiming};
    let r = risk_with("payoffs/validation/down_and_out_call.payoff", 100_000, 13, true);
    let b = Bumps::default();
    let value = |s: f64, rate: f64, q: f64, sigma: f64| {
        let (kind, out, at) = (OptionKind::Call, BarrierKind::DownAndOut, RebateTiming::AtExpiry);
        standard_barrier_with_rebate(kind, out, s, 100.0, 95.0, 3.0, at, 0.5, rate, rate - q, sigma)
    };
    let (s, rate, q, sigma) = (100.0, 0.08, 0.04, 0.25);
    assert_within("down-and-out call", r.price, r.price_std_error, value(s, rate, q, sigma), 4.0);
    let expected = [
        (
            "delta",
            (value(s * (1.0 + b.spot), rate, q, sigma) - value(s * (1.0 - b.spot), rate, q, sigma)) * 0.01
                / (2.0 * b.spot),
        ),
        ("vega", (value(s, rate, q, sigma + b.vol) - value(s, rate, q, sigma - b.vol)) * 0.01 / (2.0 * b.vol)),
        ("rho", (value(s, rate + b.rate, q, sigma) - value(s, rate - b.rate, q, sigma)) * 1e-4 / (2.0 * b.rate)),
        (
            "dividend",
            (value(s, rate, q + b.dividend, sigma) - value(s, rate, q - b.dividend, sigma)) * 1e-4 / (2.0 * b.dividend),
        ),
    ];
    for (measure, reference) in expected {
        let (v, se) = get(&r, measure);
        assert_within(&format!("down-and-out call {measure}"), v, se, reference, 4.0);
    }
}
