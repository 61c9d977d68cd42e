//! The `pathfold` command: parses the command line and hands it to the command asked for.
//! Adding a command means a module under `src/commands/` and one arm here.

use std::process::ExitCode;

use clap::{Parser, Subcommand};
use pathfold::commands::{check, compare, ladder, merge, price, risk, solve};
use pathfold::output::CAUTION;

/// Prices exotic equity payoffs written in pathfold's payoff language, by Monte Carlo.
#[derive(Debug, Parser)]
#[command(name = "pathfold", version, about, after_help = CAUTION)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, Subcommand)]
enum Command {
    /// Price payoff files.
    Price(price::PriceArgs),
    /// Compare an external price list (CSV) with pathfold's prices.
    Compare(compare::CompareArgs),
    /// Price the validation set and compare each case with its closed form.
    Check(check::CheckArgs),
    /// Combine the partial results of `price FILE --part K/N` into the full run's result.
    Merge(merge::MergeArgs),
    /// Sensitivities (delta, gamma, vega, dividend, rho, correlation, theta) on common paths.
    Risk(risk::RiskArgs),
    /// Solve for a parameter (a coupon) at which the price equals a target.
    Solve(solve::SolveArgs),
    /// Prices on a grid of spot, volatility or rate shifts, with an SVG chart.
    Ladder(ladder::LadderArgs),
}

fn main() -> ExitCode {
    match Cli::parse().command {
        Command::Price(args) => price::run(&args),
        Command::Compare(args) => compare::run(&args),
        Command::Check(args) => check::run(&args),
        Command::Merge(args) => merge::run(&args),
        Command::Risk(args) => risk::run(&args),
        Command::Solve(args) => solve::run(&args),
        Command::Ladder(args) => ladder::run(&args),
    }
}
