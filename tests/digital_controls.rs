//! Comparisons of levels on the last date get digital control variates whose expectations
//! are normal orthant probabilities (src/sim/digital.rs). These tests check the controls'
//! expectations through prices with exact references, and that a controlled price agrees
//! with the plain one on a product the controls only approximate.

mod common;

use common::{assert_within, controls, price_se, years, MarketArg};
use pathfold::closed_form::bivariate_norm_cdf;

/// Three invented underlyings with equal correlations, valued on the date `years` counts from.
const MARKET: &str = "valuation_date = 2026-12-01\n\n[rates]\nUSD = 0.05\n\n\
[underlyings.TRIA]\ncurrency = \"USD\"\nspot = 100.0\nvolatility = 0.20\ndividend_yield = 0.02\n\n\
[underlyings.TRIB]\ncurrency = \"USD\"\nspot = 80.0\nvolatility = 0.25\ndividend_yield = 0.01\n\n\
[underlyings.TRIC]\ncurrency = \"USD\"\nspot = 120.0\nvolatility = 0.30\ndividend_yield = 0.0\n\n\
[correlations]\nTRIA = { TRIB = 0.5, TRIC = 0.5 }\nTRIB = { TRIC = 0.5 }\n";
const R: f64 = 0.05;
/// (volatility, dividend yield) of TRIA, TRIB, TRIC.
const ASSETS: [(f64, f64); 3] = [(0.20, 0.02), (0.25, 0.01), (0.30, 0.0)];

fn price_with(tag: &str, underlyings: &str, body: &str, market: Option<&str>, extra: &[&str]) -> serde_json::Value {
    price_seeded(tag, underlyings, body, market, "17", extra)
}

fn price_seeded(
    tag: &str,
    underlyings: &str,
    body: &str,
    market: Option<&str>,
    seed: &str,
    extra: &[&str],
) -> serde_json::Value {
    let market = market.map_or(MarketArg::File("payoffs/validation/market.toml"), MarketArg::Text);
    common::price_body(&format!("digital-{tag}"), underlyings, body, market, seed, extra)
}

#[test]
fn a_worst_of_digital_struck_at_the_medians_is_worth_a_quarter() {
    // Pays 100 at 1y if every asset ends at or above its median level
    // S₀·exp((r − q − σ²/2)T). The log levels are then centred normals with correlation
    // 0.5, and P(all three above the centre) = 1/8 + 3·asin(0.5)/(4π) = 1/4 (the orthant
    // probability of three equicorrelated normals; Tong, "The Multivariate Normal
    // Distribution" (1990), from memory): the price is 25·e^{−rT}, whatever the
    // volatilities.
    let t = years("2027-12-01");
    let median = |(sigma, q): (f64, f64)| ((R - q - 0.5 * sigma * sigma) * t).exp();
    let k: Vec<String> = ASSETS.iter().map(|&a| format!("{:.17}", median(a))).collect();
    let body = format!(
        "dates obs = 1y\nfor each t in obs {{\n pay if min(perf(TRIA) / {}, perf(TRIB) / {}, perf(TRIC) / {}) >= 1 then 100 else 0\n}}\n",
        k[0], k[1], k[2]
    );
    let exact = 25.0 * (-R * t).exp();
    let plain = price_with("median", "TRIA, TRIB, TRIC", &body, Some(MARKET), &["--paths", "400000", "--no-control"]);
    let (p0, se0) = price_se(&plain);
    assert_within("worst-of digital at the medians, plain", p0, se0, exact, 4.0);
    // With controls the payoff is its own digital control: the estimate is the control's
    // closed-form mean, exact to the trivariate function's accuracy.
    let v = price_with("median", "TRIA, TRIB, TRIC", &body, Some(MARKET), &["--paths", "20000"]);
    let (p, se) = price_se(&v);
    assert!(controls(&v).iter().any(|c| c.starts_with("TRIA, TRIB, TRIC all at or above")), "{v}");
    assert!((p - exact).abs() < 1e-6, "{p} ± {se} vs {exact}");
}

#[test]
fn a_best_of_digital_below_a_barrier_matches_the_bivariate_closed_form() {
    // Pays 100 at 1y if both PAIRA and PAIRB end below 90% of their spots, i.e. unless
    // the better one is at or above 90%: P = M(b_A, b_B; ρ) with b = (ln 0.9 − μT)/(σ√T),
    // μ = r − q − σ²/2 (common practice: the joint law of two correlated log-levels; M is
    // checked against published values in src/closed_form).
    let t = years("2027-12-01");
    let b = |sigma: f64, q: f64| ((0.9f64).ln() - (0.08 - q - 0.5 * sigma * sigma) * t) / (sigma * t.sqrt());
    let exact = 100.0 * (-0.08 * t).exp() * bivariate_norm_cdf(b(0.20, 0.01), b(0.30, 0.03), 0.5);
    let body = "dates obs = 1y\nfor each t in obs {\n if max(perf(PAIRA), perf(PAIRB)) < 0.9 {\n  pay 100\n }\n}\n";
    let plain = price_with("best", "PAIRA, PAIRB", body, None, &["--paths", "400000", "--no-control"]);
    let (p0, se0) = price_se(&plain);
    assert_within("best-of digital below 90%, plain", p0, se0, exact, 4.0);
    let v = price_with("best", "PAIRA, PAIRB", body, None, &["--paths", "20000"]);
    let (p, se) = price_se(&v);
    assert!(controls(&v).iter().any(|c| c == "PAIRA, PAIRB all below 90% of spot"), "{v}");
    assert!((p - exact).abs() < 1e-6, "{p} ± {se} vs {exact}");
}

#[test]
fn a_worst_of_autocall_prices_alike_with_and_without_its_digitals() {
    // A three-asset worst-of autocall with a 60% barrier at maturity: no closed form, so
    // the controlled estimate (digitals at 100% and 60% on the last date among them) is
    // checked against the plain estimate on other paths, within 4 combined standard
    // errors: a wrong digital expectation would shift it (an equivalence, common
    // practice for control variates).
    let body = "dates obs = 4 steps from start to 1y\nfor each t in obs {\n let worst = min(perf(TRIA), perf(TRIB), perf(TRIC))\n if worst >= 1 {\n  pay 100 + 2 * position(t)\n  end\n }\n if t == last(obs) {\n  pay if worst >= 0.6 then 100 else 100 * worst\n }\n}\n";
    let v = price_with("autocall", "TRIA, TRIB, TRIC", body, Some(MARKET), &["--paths", "200000"]);
    let names = controls(&v);
    for want in [
        "TRIA, TRIB, TRIC all at or above 100% of spot, valued when the product ends",
        "TRIA, TRIB, TRIC all at or above 60% of spot, valued when the product ends",
    ] {
        assert!(names.iter().any(|c| c == want), "{want} missing: {names:?}");
    }
    // Each underlying's own digital at those thresholds is read by the joint ones: left out.
    assert!(!names.iter().any(|c| c == "TRIC at or above 60% of spot, valued when the product ends"), "{names:?}");
    let plain =
        price_seeded("autocall", "TRIA, TRIB, TRIC", body, Some(MARKET), "18", &["--paths", "400000", "--no-control"]);
    let ((p, se), (p0, se0)) = (price_se(&v), price_se(&plain));
    assert_within("worst-of autocall, controlled vs plain", p, (se * se + se0 * se0).sqrt(), p0, 4.0);
    assert!(se < se0, "controlled {se} vs plain {se0}");
}

#[test]
fn only_last_date_comparisons_of_fixed_thresholds_become_digitals() {
    // An early date's comparison, a comparison of two levels and a forward-starting
    // performance (divided by a level still to come) give no digital; the last date's
    // comparison of a level with a constant does.
    let body = "dates obs = 0.5y, 1y\nfor each t in obs {\n if t == first(obs) {\n  if perf(BOOKA) >= 1.1 {\n   pay 5\n  }\n }\n if t == last(obs) and level(BOOKA) > level(BOOKB) {\n  pay 3\n }\n if t == last(obs) and level(BOOKB) / level(BOOKB, first(obs)) >= 1 {\n  pay 2\n }\n}\n";
    let v = price_with("only-last", "BOOKA, BOOKB", body, None, &["--paths", "2000"]);
    assert!(!controls(&v).iter().any(|c| c.contains("of spot")), "{:?}", controls(&v));
    let body =
        "dates obs = 0.5y, 1y\nfor each t in obs {\n if t == last(obs) and level(BOOKB) < 95 {\n  pay 2\n }\n}\n";
    let v = price_with("level", "BOOKA, BOOKB", body, None, &["--paths", "2000"]);
    assert!(controls(&v).iter().any(|c| c == "BOOKB at or above 95% of spot"), "{:?}", controls(&v));
}

#[test]
fn a_comparison_nothing_pays_on_makes_no_digital() {
    // A fold kept in a state that no payment reads compares PAIRA with 100% on the last
    // date: it is no part of the payoff, and the same payoff without it must get the same
    // controls (found by the aggregate-as-fold property: the two writings priced apart).
    let unused = "state g = 0\ndates obs = 0.5y, 1y\nfor each t in obs {\n g = max(g, if perf(PAIRA) < 100% then 1 else 0)\n if t == last(obs) {\n  pay 100\n }\n}\n";
    let without = "dates obs = 0.5y, 1y\nfor each t in obs {\n if t == last(obs) {\n  pay 100\n }\n}\n";
    let a = price_with("unused", "PAIRA", unused, None, &["--paths", "2000"]);
    let b = price_with("without", "PAIRA", without, None, &["--paths", "2000"]);
    assert_eq!(controls(&a), controls(&b));
    assert!(!controls(&a).iter().any(|c| c.contains("of spot")), "{:?}", controls(&a));
}

#[test]
fn a_one_asset_autocall_with_a_barrier_at_maturity_matches_its_bivariate_closed_form() {
    // At 0.5y it pays 100 and ends if BOOKA is at or above 110% of its initial level;
    // else at 1y it pays 100 if BOOKA is at or above 90%. With x(t) = ln S(t)/S(0) ~
    // N(μt, σ²t), μ = r − q − σ²/2: price = 100·e^{−0.5r}·P(x(0.5) ≥ ln 1.1)
    // + 100·e^{−r}·P(x(0.5) < ln 1.1, x(1) ≥ ln 0.9), the second a bivariate normal
    // probability with correlation √0.5 (common practice: the joint law of a Brownian
    // motion at two dates). The controls include the digital at 90% at 1y and the same
    // digital valued when the product ends: a wrong mean for either would show here.
    let (r, q, sigma) = (0.08, 0.04, 0.25);
    let mu = r - q - 0.5 * sigma * sigma;
    let z = |level: f64, t: f64| (level.ln() - mu * t) / (sigma * t.sqrt());
    let early = 1.0 - pathfold::closed_form::norm_cdf(z(1.1, 0.5));
    // P(x(0.5) < ln 1.1, x(1) ≥ ln 0.9) = M(z₁, −z₂; −√0.5).
    let late = bivariate_norm_cdf(z(1.1, 0.5), -z(0.9, 1.0), -(0.5f64).sqrt());
    let exact = 100.0 * (-0.5 * r).exp() * early + 100.0 * (-r).exp() * late;
    let body = "dates obs = 0.5y, 1y\nfor each t in obs {\n if t == first(obs) and perf(BOOKA) >= 110% {\n  pay 100\n  end\n }\n if t == last(obs) and perf(BOOKA) >= 90% {\n  pay 100\n }\n}\n";
    let wants = ["BOOKA at or above 90% of spot", "BOOKA at or above 90% of spot, valued when the product ends"];
    with_and_without_controls("one-asset", "BOOKA", body, "200000", &wants, exact);
}

/// Prices `body` on the validation market with controls and without (same seed), checks
/// that the controls include each of `wants`, that both prices are within 4 standard
/// errors of `exact`, and that the controls at least halve the standard error.
/// Prices `body` with and without controls against `exact` (4 SE each), checks the
/// controls named in `wants` are used and halve the SE at least; returns both SEs.
fn with_and_without_controls(
    tag: &str,
    underlyings: &str,
    body: &str,
    paths: &str,
    wants: &[&str],
    exact: f64,
) -> (f64, f64) {
    let v = price_with(tag, underlyings, body, None, &["--paths", paths]);
    let names = controls(&v);
    for want in wants {
        assert!(names.iter().any(|c| c == want), "{want} missing: {names:?}");
    }
    let (p, se) = price_se(&v);
    assert_within(&format!("{tag}, with controls"), p, se, exact, 4.0);
    let plain = price_with(tag, underlyings, body, None, &["--paths", paths, "--no-control"]);
    let (p0, se0) = price_se(&plain);
    assert_within(&format!("{tag}, no controls"), p0, se0, exact, 4.0);
    assert!(se < 0.5 * se0, "{tag}: controlled {se} vs plain {se0}");
    (se, se0)
}

#[test]
fn a_two_asset_digital_valued_when_the_product_ends_keeps_the_trivariate_price() {
    // At 0.5y it pays 100 and ends if PAIRA is at or above 110% of its initial level;
    // else at 1y it pays 100 if both PAIRA and PAIRB are at or above 90%. With
    // x(t) = ln S(t)/S(0) ~ N(μt, σ²t), μ = r − q − σ²/2:
    //   price = 100·e^{−0.5r}·P(x_A(0.5) ≥ ln 1.1)
    //         + 100·e^{−r}·P(x_A(0.5) < ln 1.1, x_A(1) ≥ ln 0.9, x_B(1) ≥ ln 0.9),
    // the second a trivariate normal probability: corr(x_A(0.5), x_A(1)) = √0.5,
    // corr(x_A(0.5), x_B(1)) = ρ√0.5, corr(x_A(1), x_B(1)) = ρ (common practice: the joint
    // law of correlated Brownian motions at two dates; the trivariate function is checked
    // against the orthant formula in src/closed_form). On a path that ends at 0.5y the
    // two-asset digital is valued from the levels then, by draws of the rest of the path:
    // a wrong law for those draws (drift, variance or correlation) would move the
    // controlled price off the closed form.
    let (r, rho) = (0.08, 0.5);
    let ((sa, qa), (sb, qb)) = ((0.20, 0.01), (0.30, 0.03));
    let (mu_a, mu_b) = (r - qa - 0.5 * sa * sa, r - qb - 0.5 * sb * sb);
    let early = 1.0 - pathfold::closed_form::norm_cdf(((1.1f64).ln() - mu_a * 0.5) / (sa * 0.5f64.sqrt()));
    let bounds = [
        ((1.1f64).ln() - mu_a * 0.5) / (sa * 0.5f64.sqrt()),
        -((0.9f64).ln() - mu_a) / sa,
        -((0.9f64).ln() - mu_b) / sb,
    ];
    let h = 0.5f64.sqrt();
    let late = pathfold::closed_form::trivariate_norm_cdf(bounds, -h, -rho * h, rho).expect("a valid correlation");
    let exact = 100.0 * (-0.5 * r).exp() * early + 100.0 * (-r).exp() * late;
    let body = "dates obs = 0.5y, 1y\nfor each t in obs {\n if t == first(obs) and perf(PAIRA) >= 110% {\n  pay 100\n  end\n }\n if t == last(obs) and min(perf(PAIRA), perf(PAIRB)) >= 90% {\n  pay 100\n }\n}\n";
    let want = "PAIRA, PAIRB all at or above 90% of spot, valued when the product ends";
    with_and_without_controls("two-asset-stopped", "PAIRA, PAIRB", body, "400000", &[want], exact);
}

#[test]
fn digitals_on_four_assets_are_valued_when_the_product_ends_three_assets_at_most() {
    // Multi-asset digitals on the last date reading four assets in all: those that fit in
    // three assets are valued when the product ends, the rest keep their last-date
    // values; either way the controlled price agrees with the plain one on other paths
    // within 4 combined standard errors (an equivalence, common practice for control
    // variates).
    let market = format!(
        "{}\n[underlyings.TRID]\ncurrency = \"USD\"\nspot = 50.0\nvolatility = 0.35\ndividend_yield = 0.0\n",
        MARKET.replace("TRIB = { TRIC = 0.5 }", "TRIB = { TRIC = 0.5 }\nTRID = { TRIA = 0.3, TRIB = 0.2, TRIC = 0.1 }")
    );
    let body = "dates obs = 4 steps from start to 1y\nfor each t in obs {\n if min(perf(TRIA), perf(TRID)) >= 110% {\n  pay 100\n  end\n }\n if t == last(obs) {\n  if min(perf(TRIA), perf(TRID)) >= 80% {\n   pay 30\n  }\n  if max(perf(TRIB), perf(TRIC)) < 95% {\n   pay 10\n  }\n }\n}\n";
    let v = price_with("four", "TRIA, TRIB, TRIC, TRID", body, Some(&market), &["--paths", "200000"]);
    let names = controls(&v);
    let joint = |c: &&String| c.contains(", TRI");
    let stopped = names.iter().filter(joint).filter(|c| c.ends_with("valued when the product ends")).count();
    let kept = names.iter().filter(joint).filter(|c| !c.ends_with("valued when the product ends")).count();
    assert!(stopped >= 1 && kept >= 1, "{names:?}");
    let plain = price_seeded(
        "four",
        "TRIA, TRIB, TRIC, TRID",
        body,
        Some(&market),
        "18",
        &["--paths", "400000", "--no-control"],
    );
    let ((p, se), (p0, se0)) = (price_se(&v), price_se(&plain));
    assert_within("four-asset digitals, controlled vs plain", p, (se * se + se0 * se0).sqrt(), p0, 4.0);
    assert!(se < se0, "controlled {se} vs plain {se0}");
}

#[test]
fn coupons_on_every_date_match_the_sum_of_bivariate_probabilities() {
    // Pays a coupon of 5 on each quarter to 1y while both PAIRA and PAIRB are at or above
    // 90%, plus 10 times a call on PAIRA struck at its spot at 1y; it ends (paying 100)
    // if both reach 500%, which cannot happen here in practice (PAIRA alone has a 7e-15
    // chance at 1y): the price is
    //   Σₖ 5·e^{−r tₖ}·P(x_A(tₖ) ≥ ln 0.9, x_B(tₖ) ≥ ln 0.9) + 10·C_BS(S₀ = K = 1, 1y)
    // with x(t) = ln S(t)/S(0) ~ N(μt, σ²t), μ = r − q − σ²/2, correlation ρ: bivariate
    // normal probabilities (src/closed_form, checked against published tables) and
    // Black–Scholes (Hull's worked examples, in src/closed_form). The product can end
    // early, so the last date's event also gets a control read on each earlier date, the
    // sum of its discounted indicators, whose mean is the same kind of sum: a wrong date,
    // discount or probability in that mean moves the controlled price off the closed form.
    use pathfold::closed_form::{black_scholes, OptionKind};
    let (r, rho) = (0.08, 0.5);
    let ((sa, qa), (sb, qb)) = ((0.20, 0.01), (0.30, 0.03));
    let (mu_a, mu_b) = (r - qa - 0.5 * sa * sa, r - qb - 0.5 * sb * sb);
    let both = |t: f64| {
        let za = ((0.9f64).ln() - mu_a * t) / (sa * t.sqrt());
        let zb = ((0.9f64).ln() - mu_b * t) / (sb * t.sqrt());
        bivariate_norm_cdf(-za, -zb, rho)
    };
    let coupons: f64 = [0.25, 0.5, 0.75, 1.0].iter().map(|&t| 5.0 * (-r * t).exp() * both(t)).sum();
    let call = 10.0 * black_scholes(OptionKind::Call, 1.0, 1.0, 1.0, r, r - qa, sa);
    let exact = coupons + call;
    let body = "dates obs = 0.25y, 0.5y, 0.75y, 1y\nfor each t in obs {\n let worst = min(perf(PAIRA), perf(PAIRB))\n if worst >= 500% {\n  pay 100\n  end\n }\n if worst >= 90% {\n  pay 5\n }\n if t == last(obs) {\n  pay 10 * max(perf(PAIRA) - 1, 0)\n }\n}\n";
    let want = "PAIRA, PAIRB all at or above 90% of spot, summed over 3 earlier dates";
    let (se, se0) = with_and_without_controls("dated", "PAIRA, PAIRB", body, "200000", &[want], exact);
    // The coupons before the last date are what only the dated control follows: with its
    // mean wrong it would be left out (its paths miss the mean) and the error stay large.
    assert!(se < 0.05 * se0, "dated: controlled {se} vs plain {se0}");
    // Without antithetic pairs the paths that end stop being simulated: no control reads
    // the dates after a path's end, and the price still agrees.
    let v = price_with("dated", "PAIRA, PAIRB", body, None, &["--paths", "200000", "--no-antithetic"]);
    assert!(!controls(&v).iter().any(|c| c.contains("earlier dates")), "{v}");
    let (p, se) = price_se(&v);
    assert_within("dated, no pairs", p, se, exact, 4.0);
}
