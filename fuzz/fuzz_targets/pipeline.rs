//! Any text through parse → check → compile, and a small program on to a price with a few
//! paths. Errors are the expected outcome for most inputs; a panic, an abort, a hang or
//! a price that is not finite is a bug.
#![no_main]

use std::path::Path;

use libfuzzer_sys::fuzz_target;
use pathfold::compile;
use pathfold::market::Market;
use pathfold::sim::{self, Settings};
use pathfold::{syntax, typing};

/// The demo market (payoffs/market.toml) with every name the seed corpus uses.
const MARKET: &str = include_str!("../../payoffs/market.toml");

/// Programs with more grid dates than this are not priced: schedule sizes get limits with
/// issue 8 item 9, and until then a year of daily dates is already plenty for the fuzzer.
const MAX_GRID: usize = 2_000;

fuzz_target!(|data: &[u8]| {
    let Ok(text) = std::str::from_utf8(data) else { return };
    let Ok(tree) = syntax::parse(text) else { return };
    let Ok(product) = typing::check(&tree, &[]) else { return };
    let market_file = Path::new("market.toml");
    let market = Market::from_toml(MARKET, market_file).expect("the demo market is valid");
    let Ok(program) = compile::compile(&product, &market, market_file) else { return };
    if program.grid.len() > MAX_GRID {
        return;
    }
    // Early exercise fits its rule on 102,400 paths, one pass per `may end` date: only
    // small ones are priced here.
    if program.choices.len() * program.grid.len() > 100 {
        return;
    }
    // One block, the fewest paths a run may use (fewer is refused before simulating);
    // every other input without antithetic pairs, so paths that end early stop too.
    let settings = Settings { paths: sim::MIN_PATHS, antithetic: data.len() % 2 == 0, ..Settings::default() };
    if let Ok(e) = sim::simulate(&program, &settings) {
        assert!(e.price.is_finite() && e.std_error.is_finite(), "price {} ± {}", e.price, e.std_error);
    }
});
