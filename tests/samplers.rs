//! Each sampler (`--sampler random`, the default, and `--sampler sobol`) prices against
//! closed forms within its own standard error, and gives the same bits on one thread or
//! two. Market: payoffs/validation/market.toml (BOOKA: S = 100, r = 8%, q = 4%, σ = 25%).
//! Control variates are off so that the check is of the sampler alone.

mod common;

use common::{assert_within, price_se, run};
use pathfold::closed_form::{black_scholes, geometric_asian_discrete, OptionKind};

const MARKET: &str = "payoffs/validation/market.toml";
const SAMPLERS: [&str; 2] = ["random", "sobol"];

fn price_text(name: &str, body: &str, extra: &[&str]) -> serde_json::Value {
    let text = format!("product \"{name}\"\ncurrency USD\nnotional 100\nunderlyings BOOKA\n{body}");
    let file = common::Scratch::file(&format!("samplers-{name}-{}", extra.join("-")), name, &text);
    let mut args = vec!["price", file.to_str().unwrap(), "--market", MARKET, "--format", "json"];
    if !extra.contains(&"--seed") {
        args.extend_from_slice(&["--seed", "41"]);
    }
    args.extend_from_slice(extra);
    let (stdout, stderr, code) = run(&args);
    assert_eq!(code, Some(0), "{stderr}");
    serde_json::from_str(&stdout).unwrap()
}

#[test]
fn each_sampler_prices_a_vanilla_call_to_black_scholes() {
    // Black–Scholes with a dividend yield (src/closed_form, checked against Hull's worked
    // example there), K = 95, T = 0.75y, in five steps so that the Sobol run's Brownian
    // bridge has dates to fill.
    let body = "dates steps = 5 steps from start to 0.75y\nat last(steps) {\n pay max(level(BOOKA) - 95, 0)\n}\n";
    let reference = black_scholes(OptionKind::Call, 100.0, 95.0, 0.75, 0.08, 0.04, 0.25);
    for sampler in SAMPLERS {
        let v = price_text("vanilla.payoff", body, &["--paths", "100000", "--no-control", "--sampler", sampler]);
        let (p, se) = price_se(&v);
        assert_within(&format!("call, {sampler}"), p, se, reference, 4.0);
    }
}

#[test]
fn each_sampler_prices_a_geometric_average_call_to_its_closed_form() {
    // The discrete geometric-average call (src/closed_form, checked against Haug's table
    // there): 12 monthly fixings over one year, strike 100, written as the exponential
    // of the average log level.
    let body = "dates fixings = 12 steps from start to 1y\nat last(fixings) {\n pay max(exp(average(log(level(BOOKA)) over fixings)) - 100, 0)\n}\n";
    let times: Vec<f64> = (1..=12).map(|i| f64::from(i) / 12.0).collect();
    let reference = geometric_asian_discrete(OptionKind::Call, 100.0, 100.0, &times, 1.0, 0.08, 0.04, 0.25);
    let mut errors = Vec::new();
    for sampler in SAMPLERS {
        let v = price_text("geometric.payoff", body, &["--paths", "100000", "--no-control", "--sampler", sampler]);
        let (p, se) = price_se(&v);
        assert_within(&format!("geometric-average call, {sampler}"), p, se, reference, 4.0);
        errors.push(se);
    }
    // Twelve smooth dimensions through a bridge: the Sobol error is far below the
    // pseudo-random one on as many paths.
    assert!(errors[1] < 0.25 * errors[0], "standard errors {errors:?}");
}

#[test]
fn a_sobol_run_past_the_embedded_dimensions_still_prices_to_black_scholes() {
    // 5,000 steps: coordinates past the 4,096 of the Joe–Kuo table come from the
    // pseudo-random stream, and the price is still unbiased (Black–Scholes as above).
    let body = "dates days = 5000 steps from start to 1y\nat last(days) {\n pay max(level(BOOKA) - 100, 0)\n}\n";
    let reference = black_scholes(OptionKind::Call, 100.0, 100.0, 1.0, 0.08, 0.04, 0.25);
    let v = price_text("long.payoff", body, &["--paths", "4096", "--no-control", "--sampler", "sobol"]);
    let (p, se) = price_se(&v);
    assert_within("call over 5,000 steps, sobol", p, se, reference, 4.0);
}

#[test]
fn a_sobol_run_gives_the_same_bits_on_one_thread_or_two_and_moves_with_the_seed() {
    let body = "dates steps = 4 steps from start to 1y\nat last(steps) {\n pay max(average(level(BOOKA) over steps) - 100, 0)\n}\n";
    let run_with = |threads: &str, seed: &str| {
        let v = price_text(
            "asian.payoff",
            body,
            &["--paths", "20000", "--sampler", "sobol", "--threads", threads, "--seed", seed],
        );
        (v["price"].as_f64().unwrap(), v["std_error"].as_f64().unwrap())
    };
    let one = run_with("1", "5");
    assert_eq!(one, run_with("2", "5"));
    assert_ne!(one, run_with("2", "6"));
}

#[test]
fn a_sobol_run_refuses_an_error_target() {
    let (_, stderr, code) = run(&["price", "payoffs/european_call.payoff", "--sampler", "sobol", "--target-se", "0.1"]);
    assert_eq!(code, Some(2));
    assert!(stderr.contains("--target-se does not combine with --sampler sobol"), "{stderr}");
}
