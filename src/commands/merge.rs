//! `pathfold merge PARTS...`: the partial results of `price FILE --part K/N` combined into
//! the full run's result, bit for bit. Exit status: 0 merged, 2 the parts do not make one
//! run (or the payoff cannot be priced), 1 the result could not be written.

use std::path::{Path, PathBuf};
use std::process::ExitCode;

use clap::Args;

use super::price::refused;
use super::{checked_output, emit};
use crate::output::{self, Format};
use crate::partial::{merge_parts, read_part};

/// Combine the partial results of `pathfold price FILE --part K/N` into the result of the
/// full run: bit for bit what `pathfold price FILE` gives with the same paths and seed.
#[derive(Debug, Args)]
pub struct MergeArgs {
    /// The partial results, all N parts of one run, in any order.
    #[arg(required = true, value_name = "PART")]
    pub parts: Vec<PathBuf>,
    /// Output format.
    #[arg(long, value_enum, default_value_t = Format::Table)]
    pub format: Format,
    /// Write the result to this file (replaced whole, never left half-written).
    #[arg(long, value_name = "FILE")]
    pub output: Option<PathBuf>,
}

/// `pathfold merge PARTS...`: 0 merged, 2 the parts do not make one run (or the payoff
/// cannot be priced), 1 the result could not be written.
pub fn run(args: &MergeArgs) -> ExitCode {
    merge(args).unwrap_or_else(refused)
}

fn merge(args: &MergeArgs) -> Result<ExitCode, String> {
    let load = |i: usize| read_part(&args.parts[i]);
    // The output is checked before the work: it must not be one of the inputs.
    let check = |payoff: &Path, market: &Path| {
        let mut inputs: Vec<Option<&Path>> = args.parts.iter().map(|p| Some(p.as_path())).collect();
        inputs.extend([Some(payoff), Some(market)]);
        checked_output(args.output.as_deref(), &[], &inputs).map_err(|_| String::new())
    };
    let priced = match merge_parts(&args.parts, &load, &check)? {
        Ok(p) => p,
        Err(f) => {
            eprint!("{}", f.render());
            return Ok(ExitCode::from(if f.internal { 1 } else { 2 }));
        }
    };
    eprint!("{}", priced.warnings);
    match emit(args.output.as_deref(), |w| output::write_one(w, &priced, args.format)) {
        Ok(()) => Ok(ExitCode::SUCCESS),
        Err(code) => Ok(code),
    }
}
