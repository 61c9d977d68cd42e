//! `pathfold price`: one payoff file gives the full report; several, or folders, one row
//! per file. Exit status: 0 every file priced, 2 bad input (any row that failed, or a bad
//! option), 1 an internal failure.

use std::path::PathBuf;
use std::process::ExitCode;

use clap::Args;

use super::{checked_output, checked_request, emit, output_after_pricing, price_inputs, PricingArgs};
use crate::batch::{self, Row};
use crate::output::{self, rows, Format};

#[derive(Debug, Args)]
pub struct PriceArgs {
    /// Payoff files, or folders to search for `.payoff` files. One file gives the full
    /// report; several, or a folder, give one row per file.
    #[arg(required = true, value_name = "FILE_OR_FOLDER")]
    pub files: Vec<PathBuf>,
    #[command(flatten)]
    pub pricing: PricingArgs,
}

pub fn run(args: &PriceArgs) -> ExitCode {
    let p = &args.pricing;
    let request = match checked_request(p) {
        Ok(r) => r,
        Err(code) => return code,
    };
    let single = args.files.len() == 1 && !args.files[0].is_dir();
    let files = batch::collect_files(&args.files);
    if let Err(code) = checked_output(p.output.as_deref(), &files, &[p.market.as_deref()]) {
        return code;
    }
    let rows = match price_inputs(files, &request, p.threads, !single) {
        Ok(rows) => rows,
        Err(code) => return code,
    };
    let output = output_after_pricing(p.output.as_deref(), &rows);
    let written = if single && p.format != Format::Csv {
        match &rows[0].outcome {
            Ok(priced) => emit(output.unwrap_or(None), |w| output::write_one(w, priced, p.format)),
            Err(_) => Ok(()),
        }
    } else {
        emit(output.unwrap_or(None), |w| rows::write_rows(w, &rows, p.format))
    };
    if let Err(code) = written {
        return code;
    }
    if output.is_err() {
        return ExitCode::from(2);
    }
    exit_status(&rows)
}

/// 0 if every row priced, 2 if any failed on its input, 1 if any failed on our side.
pub fn exit_status(rows: &[Row]) -> ExitCode {
    let internal = rows.iter().any(|r| r.outcome.as_ref().is_err_and(|f| f.internal));
    let failed = rows.iter().any(|r| r.outcome.is_err());
    ExitCode::from(if internal {
        1
    } else if failed {
        2
    } else {
        0
    })
}
