//! `pathfold solve FILE --for PARAM --target PRICE`: the parameter value at which the price
//! is the target. Exit status: 0 solved, 2 bad input, an option, or no root in the bracket.

use std::process::ExitCode;

use clap::Args;

use super::emit;
use super::risk::ScenarioArgs;
use crate::output::solve::write_solved;
use crate::pricing::Target;
use crate::solve::{parse_between, solve_file};

#[derive(Debug, Args)]
pub struct SolveArgs {
    #[command(flatten)]
    pub scenario: ScenarioArgs,
    /// The parameter to solve for (a numeric `param` of the payoff).
    #[arg(long = "for", value_name = "PARAM")]
    pub parameter: String,
    /// The price to reach: an amount in the payoff's currency, or `98%` of notional.
    #[arg(long, value_name = "PRICE")]
    pub target: String,
    /// Search between these values, `LO..HI` (`1%..6%` or `0.01..0.06`); default from 0
    /// to four times the parameter's value.
    #[arg(long, value_name = "LO..HI")]
    pub between: Option<String>,
}

pub fn run(args: &SolveArgs) -> ExitCode {
    let a = &args.scenario;
    let target = match Target::parse(&args.target) {
        Ok(t) => t,
        Err(e) => {
            eprintln!("--target {}: {e}", args.target);
            return ExitCode::from(2);
        }
    };
    let between = match args.between.as_deref().map(parse_between).transpose() {
        Ok(b) => b,
        Err(e) => {
            eprintln!("{e}");
            return ExitCode::from(2);
        }
    };
    let (overrides, settings) = match a.prepare() {
        Ok(x) => x,
        Err(code) => return code,
    };
    let result = match a.on_threads(|| {
        solve_file(&a.file, a.shared.market.as_deref(), &overrides, &settings, &args.parameter, target, between)
    }) {
        Ok(r) => r,
        Err(code) => return code,
    };
    match result {
        Ok(s) => match emit(a.shared.output.as_deref(), |w| write_solved(w, &s, a.shared.format)) {
            Ok(()) => ExitCode::SUCCESS,
            Err(code) => code,
        },
        Err(f) => {
            eprint!("{}", f.render());
            ExitCode::from(if f.internal { 1 } else { 2 })
        }
    }
}
