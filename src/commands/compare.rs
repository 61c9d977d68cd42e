//! `pathfold compare`: an external price list (CSV) against pathfold's prices. Exit
//! status: 0 every line agrees, 1 anything disagrees, is missing or failed, 2 the price
//! list or an option is unusable.

use std::path::{Path, PathBuf};
use std::process::ExitCode;

use clap::Args;

use super::{checked_output, checked_request, emit, output_after_pricing, price_inputs, PricingArgs};
use crate::batch;
use crate::comparison::{self, Line, Verdict};
use crate::files::read_regular_file;
use crate::output;

#[derive(Debug, Args)]
pub struct CompareArgs {
    /// The price list: CSV with a header row naming `file` and/or `product`, `price`, and
    /// optionally `tolerance`.
    pub prices: PathBuf,
    /// Payoff files or folders (default: the folder holding the price list).
    #[arg(value_name = "FILE_OR_FOLDER")]
    pub files: Vec<PathBuf>,
    /// Largest difference, in standard errors, that still agrees.
    #[arg(long, default_value_t = 3.0, value_name = "Z")]
    pub max_z: f64,
    #[command(flatten)]
    pub pricing: PricingArgs,
}

pub fn run(args: &CompareArgs) -> ExitCode {
    let p = &args.pricing;
    let request = match checked_request(p) {
        Ok(r) => r,
        Err(code) => return code,
    };
    if !(args.max_z.is_finite() && args.max_z > 0.0) {
        eprintln!("--max-z must be a positive number, not {}", args.max_z);
        return ExitCode::from(2);
    }
    let list = match comparison::read_list(&args.prices) {
        Ok(l) => l,
        Err(d) => {
            eprint!("{}", d.render(read_regular_file(&args.prices).ok().as_deref()));
            return ExitCode::from(2);
        }
    };
    let inputs = if args.files.is_empty() {
        vec![args.prices.parent().filter(|d| !d.as_os_str().is_empty()).unwrap_or(Path::new(".")).to_path_buf()]
    } else {
        args.files.clone()
    };
    let files = batch::collect_files(&inputs);
    if let Err(code) =
        checked_output(p.shared.output.as_deref(), &files, &[p.shared.market.as_deref(), Some(&args.prices)])
    {
        return code;
    }
    let rows = match price_inputs(files, &request, p.shared.threads, true) {
        Ok(rows) => rows,
        Err(code) => return code,
    };
    let output = output_after_pricing(p.shared.output.as_deref(), &rows);
    let lines = comparison::compare(&list, &rows, args.max_z);
    if let Err(code) = emit(output.unwrap_or(None), |w| output::comparison::write(w, &lines, p.shared.format)) {
        return code;
    }
    if output.is_err() {
        return ExitCode::from(2);
    }
    exit_status(&lines)
}

/// 0 if every line agrees, 1 otherwise.
pub fn exit_status(lines: &[Line]) -> ExitCode {
    ExitCode::from(if lines.iter().all(|l| l.verdict == Verdict::Agree) { 0 } else { 1 })
}
