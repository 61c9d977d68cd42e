//! The benchmark workloads priced through the engine agree with their hand-written twins
//! (`benches/reference/`) and, where one exists, with a closed form.
//!
//! The hand-written loops are a cross-check of the engine (compiler, executor, path
//! generation, statistics): they share nothing with it but the RNG of each block. With the
//! same seed both forms price the same paths, so they must agree far inside one standard
//! error; with different seeds they are independent estimates and must agree within 3
//! combined standard errors. Path counts are a tenth of the benchmarks' or less.

#[path = "../benches/reference/mod.rs"]
mod reference;

use std::path::Path;

use pathfold::closed_form::{black_scholes, geometric_asian_discrete, OptionKind};
use pathfold::pricing::price_file;
use pathfold::sim::Settings;

fn engine(file: &str, paths: u64, seed: u64) -> (f64, f64) {
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("benches").join(file);
    let settings = Settings { paths, seed, antithetic: true, control_variates: false, ..Settings::default() };
    let priced = price_file(&path, None, &[], &settings).unwrap_or_else(|f| panic!("{}", f.render()));
    (priced.estimate.price, priced.estimate.std_error)
}

/// Same seed: the same paths, so the prices differ only by rounding.
fn same_paths(what: &str, a: (f64, f64), b: (f64, f64)) {
    assert!(a.1 > 0.0 && b.1 > 0.0, "{what}: standard errors {a:?} {b:?}");
    assert!((a.0 - b.0).abs() < 0.01 * a.1, "{what}: engine {a:?} vs hand-written {b:?} on the same paths");
    assert!((a.1 - b.1).abs() < 0.01 * a.1, "{what}: standard errors differ: {a:?} vs {b:?}");
}

/// Independent estimates: within 3 combined standard errors.
fn within_3se(what: &str, a: (f64, f64), b: (f64, f64)) {
    let se = (a.1 * a.1 + b.1 * b.1).sqrt();
    assert!((a.0 - b.0).abs() <= 3.0 * se, "{what}: {a:?} vs {b:?}, {:.2} combined SE", (a.0 - b.0).abs() / se);
}

#[test]
fn w1_call_agrees_with_hand_written_loop_and_black_scholes() {
    let paths = 400_000;
    let e = engine("w1_call.payoff", paths, 11);
    same_paths("W1", e, reference::w1_call(paths, 11));
    within_3se("W1 (independent seeds)", e, reference::w1_call(paths, 12));
    // Black–Scholes with dividend yield (src/closed_form, itself checked against Hull's
    // worked example, from memory); within 3 SE.
    let bs = black_scholes(OptionKind::Call, 100.0, 105.0, 1.0, 0.03, 0.03 - 0.01, 0.20);
    assert!((e.0 - bs).abs() <= 3.0 * e.1, "W1 engine {e:?} vs Black–Scholes {bs}");
}

#[test]
fn w2_asian_agrees_with_hand_written_loop_and_is_bracketed() {
    let paths = 40_000;
    let e = engine("w2_asian.payoff", paths, 21);
    same_paths("W2", e, reference::w2_asian(paths, 21));
    within_3se("W2 (independent seeds)", e, reference::w2_asian(paths, 22));
    // Bracket (common practice): the arithmetic mean is at least the geometric mean, so the
    // call is worth at least the discrete geometric-average call (closed form in
    // src/closed_form); and max(mean − K, 0) ≤ mean of max(Sᵢ − K, 0), so it is worth at
    // most the discounted average of the calls on each fixing, each paid at maturity.
    let times: Vec<f64> = (1..=252).map(|i| f64::from(i) / 252.0).collect();
    let lower = geometric_asian_discrete(OptionKind::Call, 100.0, 100.0, &times, 1.0, 0.03, 0.03, 0.30);
    let upper = times
        .iter()
        .map(|&t| black_scholes(OptionKind::Call, 100.0, 100.0, t, 0.03, 0.03, 0.30) * (-0.03 * (1.0 - t)).exp())
        .sum::<f64>()
        / 252.0;
    assert!(e.0 >= lower - 3.0 * e.1, "W2 engine {e:?} below the geometric-average call {lower}");
    assert!(e.0 <= upper + 3.0 * e.1, "W2 engine {e:?} above the average of the fixing calls {upper}");
}

#[test]
fn w3_autocall_agrees_with_hand_written_loop() {
    // No closed form for a worst-of autocallable on three names: the hand-written loop is
    // the reference.
    let paths = 100_000;
    let e = engine("w3_autocall.payoff", paths, 31);
    same_paths("W3", e, reference::w3_autocall(paths, 31));
    within_3se("W3 (independent seeds)", e, reference::w3_autocall(paths, 32));
}

#[test]
fn results_are_bit_identical_on_any_thread_count() {
    // The seed defines the result (blocks of 256 paths, PCG stream per block, merged in
    // block order): the thread count must not change a bit. 20,000 paths is 79 blocks, the
    // last one short, so uneven splits between threads are exercised.
    let run = |threads: usize| {
        let pool = rayon::ThreadPoolBuilder::new().num_threads(threads).build().expect("a thread pool");
        pool.install(|| engine("w3_autocall.payoff", 20_000, 5))
    };
    let one = run(1);
    for threads in [2, 3, 5] {
        let many = run(threads);
        assert_eq!(one.0.to_bits(), many.0.to_bits(), "price on {threads} threads: {one:?} vs {many:?}");
        assert_eq!(one.1.to_bits(), many.1.to_bits(), "standard error on {threads} threads");
    }
}

#[test]
fn w1_call_without_antithetic_pairs_and_with_controls_matches_black_scholes() {
    // Exercises the engine's other settings (independent paths, control variates reading
    // the terminal levels) against Black–Scholes with dividend yield (src/closed_form,
    // checked against Hull's worked example, from memory); within 3.5 SE.
    let bs = black_scholes(OptionKind::Call, 100.0, 105.0, 1.0, 0.03, 0.03 - 0.01, 0.20);
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("benches").join("w1_call.payoff");
    for (antithetic, control_variates) in [(false, false), (false, true), (true, true)] {
        let settings = Settings { paths: 200_001, seed: 41, antithetic, control_variates, ..Settings::default() };
        let e = price_file(&path, None, &[], &settings).unwrap_or_else(|f| panic!("{}", f.render())).estimate;
        assert!(e.std_error > 0.0, "{settings:?}: {e:?}");
        assert!(
            (e.price - bs).abs() <= 3.5 * e.std_error,
            "{settings:?}: {} ± {} vs Black–Scholes {bs}",
            e.price,
            e.std_error
        );
    }
}
