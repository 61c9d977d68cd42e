//! `pathfold price`: one payoff file gives the full report; several, or folders, one row
//! per file. Exit status: 0 every file priced, 2 bad input (any row that failed, or a bad
//! option), 1 an internal failure.

use std::path::PathBuf;
use std::process::ExitCode;

use clap::Args;

use super::{
    checked_output, checked_request, emit, output_after_pricing, price_inputs, request, with_threads, PricingArgs,
};
use crate::batch::{self, Row};
use crate::output::{self, rows, Format};
use crate::partial::{check_part_count, run_part, Part};
use crate::sim::Sampler;

#[derive(Debug, Args)]
pub struct PriceArgs {
    /// Payoff files, or folders to search for `.payoff` files. One file gives the full
    /// report; several, or a folder, give one row per file.
    #[arg(required = true, value_name = "FILE_OR_FOLDER")]
    pub files: Vec<PathBuf>,
    #[command(flatten)]
    pub pricing: PricingArgs,
    /// Run only part K of N (K from 1 to N): of one payoff's blocks of paths, written as a
    /// partial result for `pathfold merge`; of a library's files, as CSV rows.
    #[arg(long, value_name = "K/N")]
    pub part: Option<String>,
}

pub fn run(args: &PriceArgs) -> ExitCode {
    if let Some(part) = &args.part {
        return price_part(args, part);
    }
    let p = &args.pricing;
    let request = match checked_request(p) {
        Ok(r) => r,
        Err(code) => return code,
    };
    let single = args.files.len() == 1 && !args.files[0].is_dir();
    let files = batch::collect_files(&args.files);
    if let Err(code) = checked_output(p.shared.output.as_deref(), &files, &[p.shared.market.as_deref()]) {
        return code;
    }
    let rows = match price_inputs(files, &request, p.shared.threads, !single) {
        Ok(rows) => rows,
        Err(code) => return code,
    };
    let output = output_after_pricing(p.shared.output.as_deref(), &rows);
    let written = if single && p.shared.format != Format::Csv {
        match &rows[0].outcome {
            Ok(priced) => emit(output.unwrap_or(None), |w| output::write_one(w, priced, p.shared.format)),
            Err(_) => Ok(()),
        }
    } else {
        emit(output.unwrap_or(None), |w| rows::write_rows(w, &rows, p.shared.format))
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

/// `pathfold price ... --part K/N`.
pub fn price_part(args: &PriceArgs, part: &str) -> ExitCode {
    price_part_inner(args, part).unwrap_or_else(refused)
}

/// Prints why a command was refused (unless already printed: an empty message); status 2.
pub(super) fn refused(message: String) -> ExitCode {
    eprint!("{message}");
    if !message.is_empty() && !message.ends_with('\n') {
        eprintln!();
    }
    ExitCode::from(2)
}

fn price_part_inner(args: &PriceArgs, part: &str) -> Result<ExitCode, String> {
    let p = &args.pricing;
    let part = Part::parse(part)?;
    let request = request(p)?;
    if request.settings.sampler == Sampler::Sobol {
        return Err("--sampler sobol cannot be split with --part: its error comes from whole randomisations of the point set, which the parts would cut apart\n  fix: run the Sobol pricing in one piece, or split a pseudo-random run (the default sampler)".into());
    }
    if request.target.is_some() {
        return Err("--target-se cannot be split with --part: an error-bounded run chooses its path count from the error of the paths so far, which no single part sees\n  fix: give every part the same fixed --paths (a quick single run with --target-se at a loose target tells how many)".into());
    }
    let single = args.files.len() == 1 && !args.files[0].is_dir();
    if single {
        price_file_part(args, &request, part)
    } else {
        price_library_part(args, &request, part)
    }
}

/// Part K of N of one payoff's blocks, written as a partial result.
fn price_file_part(args: &PriceArgs, request: &batch::Request, part: Part) -> Result<ExitCode, String> {
    let p = &args.pricing;
    if p.shared.format != Format::Table {
        return Err("--format does not apply to a part of one payoff: it always writes a partial result (JSON) for `pathfold merge`, whose --format applies to the merged result".into());
    }
    let file = &args.files[0];
    let files = batch::collect_files(std::slice::from_ref(file));
    check_part_count(&request.settings, part)?;
    checked_output(p.shared.output.as_deref(), &files, &[p.shared.market.as_deref()]).map_err(|_| String::new())?;
    let result = with_threads(p.shared.threads, || {
        run_part(file, request.market.as_deref(), &request.overrides, &request.settings, part)
    })??;
    let record = match result {
        Ok(r) => r,
        Err(f) => {
            eprint!("{}", f.render());
            return Ok(ExitCode::from(if f.internal { 1 } else { 2 }));
        }
    };
    match emit(p.shared.output.as_deref(), |w| {
        serde_json::to_writer_pretty(&mut *w, &record)?;
        writeln!(w)
    }) {
        Ok(()) => Ok(ExitCode::SUCCESS),
        Err(code) => Ok(code),
    }
}

/// Part K of N of a library's files, written as CSV (the header by part 1 only).
fn price_library_part(args: &PriceArgs, request: &batch::Request, part: Part) -> Result<ExitCode, String> {
    let p = &args.pricing;
    if p.shared.format != Format::Csv {
        return Err("--part on a folder or several files needs --format csv: the parts' CSV outputs, concatenated in part order, are the single batch's CSV (part 1 alone writes the header)".into());
    }
    let files = batch::collect_files(&args.files);
    let share = part.share(files.len());
    let files: Vec<_> = files.into_iter().skip(share.start).take(share.end - share.start).collect();
    checked_output(p.shared.output.as_deref(), &files, &[p.shared.market.as_deref()]).map_err(|_| String::new())?;
    let rows = match price_inputs(files, request, p.shared.threads, true) {
        Ok(rows) => rows,
        Err(code) => return Ok(code),
    };
    let output = output_after_pricing(p.shared.output.as_deref(), &rows);
    let header = part.k == 1;
    let written = emit(output.unwrap_or(None), |w| {
        let mut csv = Vec::new();
        rows::write_rows(&mut csv, &rows, Format::Csv)?;
        // The header is the first line (no column name holds a line break).
        let body =
            if header { &csv[..] } else { &csv[csv.iter().position(|&b| b == b'\n').map_or(csv.len(), |i| i + 1)..] };
        w.write_all(body)
    });
    if let Err(code) = written {
        return Ok(code);
    }
    if output.is_err() {
        return Ok(ExitCode::from(2));
    }
    Ok(exit_status(&rows))
}
