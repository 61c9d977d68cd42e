//! Pricing on a market with term structures (`tests/market/curves.toml`): rate curves,
//! dividend-yield curves, volatility term structures, discrete dividends and a quanto
//! underlying. Each Monte Carlo check names its reference; fixed seeds throughout. The
//! references integrate the curves by hand from the pillars written in the file (zero
//! rates linear in log discount factor, total variance linear between pillars).

mod common;

use common::*;
use pathfold::closed_form::{black_scholes, norm_cdf, OptionKind};

const MARKET: &str = "tests/market/curves.toml";

/// Piecewise-linear interpolation of `(t, y)` nodes, with the first slope from 0 before
/// the first node and the last segment's slope after the last.
fn interpolate(nodes: &[(f64, f64)], t: f64) -> f64 {
    let (t0, y0) = nodes[0];
    if t <= t0 {
        return y0 * t / t0;
    }
    for w in nodes.windows(2) {
        let ((ta, ya), (tb, yb)) = (w[0], w[1]);
        if t <= tb {
            return ya + (yb - ya) * (t - ta) / (tb - ta);
        }
    }
    let n = nodes.len();
    let ((ta, ya), (tb, yb)) = (nodes[n - 2], nodes[n - 1]);
    yb + (yb - ya) / (tb - ta) * (t - tb)
}

/// `∫₀ᵗ r` on the USD curve of the test market.
fn usd(t: f64) -> f64 {
    let nodes: Vec<(f64, f64)> =
        [("2027-06-01", 0.036), ("2027-12-01", 0.038), ("2028-12-01", 0.040), ("2031-12-01", 0.042)]
            .iter()
            .map(|&(d, z)| (years(d), z * years(d)))
            .collect();
    interpolate(&nodes, t)
}

/// ZPHX's integrated dividend yield and total variance.
fn zphx_yield(t: f64) -> f64 {
    let nodes: Vec<(f64, f64)> =
        [("2027-12-01", 0.018), ("2029-12-01", 0.021)].iter().map(|&(d, q)| (years(d), q * years(d))).collect();
    interpolate(&nodes, t)
}

fn zphx_variance(t: f64) -> f64 {
    let nodes: Vec<(f64, f64)> =
        [("2027-06-01", 0.20), ("2027-12-01", 0.19), ("2028-12-01", 0.185), ("2029-12-01", 0.18)]
            .iter()
            .map(|&(d, s)| (years(d), s * s * years(d)))
            .collect();
    interpolate(&nodes, t)
}

fn priced(file: &str, args: &[&str]) -> (f64, f64) {
    let mut all = vec!["--market", MARKET];
    all.extend_from_slice(args);
    price_se(&price(file, &all))
}

#[test]
fn a_vanilla_on_curves_is_black_scholes_with_the_integrated_variance_and_the_curve_forward() {
    // Identity (common practice): under deterministic rates, yields and volatilities the
    // terminal level is lognormal with forward S₀e^{R(T)−Q(T)} and variance V(T), so the
    // call is Black–Scholes with r = R(T)/T, b = (R(T) − Q(T))/T and σ² = V(T)/T
    // (Black–Scholes itself checked in src/closed_form against Hull's example).
    // 2028-06-01 lies between pillars of all three curves.
    let t = years("2028-06-01");
    let (r, q, v) = (usd(t), zphx_yield(t), zphx_variance(t));
    let reference = 100.0 * black_scholes(OptionKind::Call, 1.0, 1.0, t, r / t, (r - q) / t, (v / t).sqrt());
    let file = "tests/market/zphx_call_18m.payoff";
    let (p, se) = priced(file, &["--paths", "200000", "--seed", "3", "--no-control"]);
    assert_within("18-month call on curves, plain", p, se, reference, 4.0);
    // With control variates: the call control's mean must be this same exact value.
    let (p, se) = priced(file, &["--paths", "50000", "--seed", "4"]);
    assert_within("18-month call on curves, controlled", p, se, reference, 4.0);
}

#[test]
fn proportional_dividends_give_the_exact_forward() {
    // Forward = S₀·e^{(r−q)T}·Π(1 − δᵢ) exactly (common practice); discounted on the same
    // curve and with q = 0, the present value is S₀·Π(1 − δᵢ) = 112 × 0.992 × 0.991.
    let reference = 112.0 * (1.0 - 0.008) * (1.0 - 0.009);
    let (p, se) = priced("tests/market/osmp_forward.payoff", &["--paths", "200000", "--seed", "7", "--no-control"]);
    assert_within("OSMP forward across proportional dividends", p, se, reference, 4.0);
}

#[test]
fn cash_dividends_drop_the_forward_by_their_amounts() {
    // The model (README, "Dividends"): a cash dividend D is the fraction D/F(t⁻) of the
    // level, so the forward drops by exactly D; the present value of the forward is then
    // S₀ − Σ Dᵢ·DF(tᵢ) (common practice: spot less the present value of the dividends).
    let (t1, t2) = (years("2027-02-10"), years("2027-08-10"));
    let reference = 38.40 - 0.30 * (-usd(t1)).exp() - 0.32 * (-usd(t2)).exp();
    let (p, se) = priced("tests/market/qmen_forward.payoff", &["--paths", "200000", "--seed", "8", "--no-control"]);
    assert_within("QMEN forward across cash dividends", p, se, reference, 4.0);
}

#[test]
fn a_quanto_drifts_by_minus_rho_sigma_sigma_fx_and_discounts_on_the_payoff_curve() {
    // Hull, the quanto adjustment (from memory): in the payoff currency's measure
    // E[S_T] = S₀·e^{(r_S − q − ρσ_Sσ_FX)T}, r_S the rate of the stock's own currency.
    // KRVL: EUR zero rate 2.4% to one year (a pillar), q = 1.5%, σ = 24%, σ_FX = 9%,
    // ρ = −0.35; discounted on the USD curve (3.8% to one year, a pillar).
    let t = years("2027-12-01");
    let carry = 0.024 - 0.015 - (-0.35 * 0.24 * 0.09);
    let forward = 64.0 * (carry * t).exp() * (-0.038 * t).exp();
    let (p, se) =
        priced("tests/market/krvl_quanto_forward.payoff", &["--paths", "200000", "--seed", "9", "--no-control"]);
    assert_within("KRVL quanto forward", p, se, forward, 4.0);
    // The quanto call: Black–Scholes with that carry, discounted at the USD rate.
    let reference = 100.0 * black_scholes(OptionKind::Call, 1.0, 1.0, t, 0.038, carry, 0.24);
    let file = "tests/market/krvl_quanto_call.payoff";
    let (p, se) = priced(file, &["--paths", "200000", "--seed", "10", "--no-control"]);
    assert_within("KRVL quanto call, plain", p, se, reference, 4.0);
    let (p, se) = priced(file, &["--paths", "50000", "--seed", "11"]);
    assert_within("KRVL quanto call, controlled", p, se, reference, 4.0);
}

#[test]
fn a_geometric_asian_on_curves_matches_its_lognormal_moments() {
    // The geometric average of lognormal levels is lognormal (Kemna and Vorst's argument,
    // common practice): ln G has mean mean(R(tᵢ) − Q(tᵢ) − V(tᵢ)/2) (per unit spot) and
    // variance Σᵢⱼ V(min(tᵢ, tⱼ))/n², and the call on G is Black's formula on them.
    let dates: Vec<f64> = (0..8)
        .map(|i| {
            let d = pathfold::date::Date::parse("2027-03-01").unwrap().add_months(3 * i).unwrap();
            years(&d.to_string())
        })
        .collect();
    let n = dates.len() as f64;
    let mean = dates.iter().map(|&t| usd(t) - zphx_yield(t) - 0.5 * zphx_variance(t)).sum::<f64>() / n;
    let var: f64 =
        dates.iter().flat_map(|&a| dates.iter().map(move |&b| zphx_variance(a.min(b)))).sum::<f64>() / (n * n);
    let big_t = *dates.last().unwrap();
    let discount = (-usd(big_t)).exp();
    let expected_g = (mean + 0.5 * var).exp();
    let d1 = (expected_g.ln() + 0.5 * var) / var.sqrt();
    let reference = 100.0 * discount * (expected_g * norm_cdf(d1) - norm_cdf(d1 - var.sqrt()));
    let file = "tests/market/zphx_geometric_asian.payoff";
    let (p, se) = priced(file, &["--paths", "200000", "--seed", "12", "--no-control"]);
    assert_within("geometric Asian on curves", p, se, reference, 4.0);
}

#[test]
fn geometric_controls_stay_unbiased_on_curves() {
    // The arithmetic Asian with its four controls (forward, call, geometric average and
    // its call) against the same payoff priced plainly on other paths: the controls'
    // means are exact only if the curve dynamics are, and all four must be used.
    let file = "tests/market/zphx_asian.payoff";
    let v = price(file, &["--market", MARKET, "--paths", "50000", "--seed", "13"]);
    assert_eq!(v["controls"].as_array().map(Vec::len), Some(4), "{}", v["controls"]);
    let (a, se_a) = price_se(&v);
    let (b, se_b) = priced(file, &["--paths", "200000", "--seed", "14", "--no-control"]);
    let se = (se_a * se_a + se_b * se_b).sqrt();
    assert_within("Asian: controlled against plain", a, se, b, 4.0);
}

#[test]
fn a_flat_curve_written_as_one_far_pillar_prices_as_the_flat_number() {
    // Equivalence: before its first pillar a curve holds its first value, so a single
    // pillar beyond the maturity is the flat curve. Same seed: the same paths up to
    // rounding in the drift (the curve route adds integrals instead of multiplying).
    let flat = "valuation_date = 2026-12-01\n[rates]\nUSD = 0.038\n[underlyings.ZPHX]\ncurrency = \"USD\"\nspot = 4250.0\nvolatility = 0.18\ndividend_yield = 0.019\n";
    let pillar = flat
        .replace("USD = 0.038", "USD = { 10y = 0.038 }")
        .replace("volatility = 0.18", "volatility = { 2040-01-01 = 0.18 }")
        .replace("dividend_yield = 0.019", "dividend_yield = { 10y = 0.019 }");
    let dir = Scratch::dir("flat-pillar");
    let (a, b) = (dir.join("flat.toml"), dir.join("pillar.toml"));
    std::fs::write(&a, flat).unwrap();
    std::fs::write(&b, pillar).unwrap();
    let run = |m: &std::path::Path| {
        let v = price("tests/market/zphx_call_18m.payoff", &["--market", m.to_str().unwrap(), "--paths", "20000"]);
        price_se(&v).0
    };
    let (x, y) = (run(&a), run(&b));
    assert!((x - y).abs() <= 1e-9 * x.abs(), "flat {x} against one far pillar {y}");
}

#[test]
fn a_barrier_bridge_ends_before_a_dividend_drop() {
    // Regression: a dividend going ex on a grid date drops the level at that date; the
    // path before it is the path without the dividend. So a down barrier watched up to the
    // ex-date is touched exactly when the undivided path touches it, or its last level
    // after the 30% drop is at or below it. Two writings of one event, on the same paths
    // (both markets take the curve route, through a volatility pillar past the maturity):
    // the bridge must run to the level before the drop, not after it.
    let base = "valuation_date = 2026-12-01\n[rates]\nUSD = 0.03\n[underlyings.OSMP]\ncurrency = \"USD\"\nspot = 100.0\nvolatility = { 10y = 0.25 }\n";
    let with_dividend = format!("{base}proportional_dividends = {{ 2027-12-01 = 0.30 }}\n");
    let dir = Scratch::dir("dividend-bridge");
    let (a, b) = (dir.join("dividend.toml"), dir.join("none.toml"));
    std::fs::write(&a, with_dividend).unwrap();
    std::fs::write(&b, base).unwrap();
    let head = "product \"Touch\"\ncurrency USD\nnotional 1\nunderlyings OSMP\nat 2027-12-01 {\n";
    let touched = format!("{head}    if touched(level(OSMP) <= 80 from start to 2027-12-01) {{ pay 1 }}\n}}\n");
    let written_out = format!(
        "{head}    if touched(level(OSMP) <= 80 from start to 2027-12-01) or level(OSMP) * 0.7 <= 80 {{ pay 1 }}\n}}\n"
    );
    let (pa, pb) = (dir.join("touched.payoff"), dir.join("written_out.payoff"));
    std::fs::write(&pa, touched).unwrap();
    std::fs::write(&pb, written_out).unwrap();
    let args = |m: &std::path::Path| {
        vec!["--market".to_string(), m.display().to_string(), "--paths".into(), "100000".into(), "--no-control".into()]
    };
    let run = |p: &std::path::Path, m: &std::path::Path| {
        let a = args(m);
        let a: Vec<&str> = a.iter().map(String::as_str).collect();
        price_se(&price(p.to_str().unwrap(), &a))
    };
    let (x, se) = run(&pa, &a);
    let (y, _) = run(&pb, &b);
    assert!((x - y).abs() <= 0.05 * se, "with the dividend {x} ± {se}, written out {y}");
}

/// A market where OSMP's path is all but certain (volatility 0.01%) and the rate curve is
/// not flat: zero rates 2% at 1y (365 days) and 6% at 3y (1,096 days, over a 29 February),
/// linear in log discount factor between the pillars ([`rate_integral`]).
fn all_but_certain(dir: &Scratch, extra: &str) -> std::path::PathBuf {
    let text = format!(
        "valuation_date = 2026-12-01\n[rates]\nUSD = {{ 1y = 0.02, 3y = 0.06 }}\n[underlyings.OSMP]\ncurrency = \"USD\"\nspot = 100.0\nvolatility = 0.0001\n{extra}"
    );
    let path = dir.join("certain.toml");
    std::fs::write(&path, text).unwrap();
    path
}

/// `∫₀ᵗ r` of [`all_but_certain`]'s curve, by hand from its two pillars.
fn rate_integral(t: f64) -> f64 {
    let (t1, t3) = (1.0, 1096.0 / 365.0);
    interpolate(&[(t1, 0.02 * t1), (t3, 0.06 * t3)], t)
}

fn price_on(dir: &Scratch, market: &std::path::Path, body: &str) -> (f64, f64) {
    let text = format!(
        "product \"All but certain\"\ncurrency USD\nnotional 1\nunderlyings OSMP\nat 2029-11-30 {{\n    {body}\n}}\n"
    );
    let payoff = dir.join("certain.payoff");
    std::fs::write(&payoff, text).unwrap();
    price_se(&price(payoff.to_str().unwrap(), &["--market", market.to_str().unwrap(), "--paths", "4096"]))
}

#[test]
fn a_rebate_paid_at_the_touch_is_discounted_on_the_curve_from_the_moment_of_the_touch() {
    // Regression (merge of curves with payments at the touch): the hit time's discount
    // must come from the curve. With no dividend the level grows as e^{∫r}, so the
    // barrier 100·e^{0.1} is reached when ∫₀ᵗ r = 0.1 (about two years in), worth e^{−0.1}
    // whenever that is (identity of the deterministic path; discounting at the curve's
    // first-year rate would give about e^{−0.04}).
    let dir = Scratch::dir("touch-on-curve");
    let market = all_but_certain(&dir, "");
    let barrier = 100.0 * 0.1f64.exp();
    let (p, se) =
        price_on(&dir, &market, &format!("pay 1 on first touch(level(OSMP) >= {barrier:.6} from start to 2029-11-30)"));
    let reference = (-0.1f64).exp();
    assert!((p - reference).abs() < 2e-4 + 4.0 * se, "rebate {p} ± {se} against e^-0.1 = {reference}");
}

#[test]
fn a_running_highest_sees_the_level_before_a_dividend_drops_it() {
    // Regression (merge of curves with continuous extremes): the bridge of the step
    // ending on an ex-date runs to the level before the drop. The all-but-certain path
    // peaks just before the 10% dividend goes ex on 2028-11-30: 100·e^{∫₀ r} at that date,
    // and pays it at 3y, discounted by e^{−0.18} (identity of the deterministic path).
    let dir = Scratch::dir("highest-on-curve");
    let market = all_but_certain(&dir, "proportional_dividends = { 2028-11-30 = 0.10 }\n");
    let (p, se) = price_on(&dir, &market, "pay highest(level(OSMP) from start to 2029-11-30)");
    let t_ex = 730.0 / 365.0;
    let peak = 100.0 * rate_integral(t_ex).exp();
    let reference = peak * (-rate_integral(1095.0 / 365.0)).exp();
    assert!((p - reference).abs() < 2e-3 * reference + 4.0 * se, "highest {p} ± {se} against {reference}");
}
