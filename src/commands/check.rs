//! `pathfold check`: prices the validation set and compares each case with its closed
//! form. Exit status: 0 every case passed, 1 any failed, 2 an unusable folder or option.

use std::io::{self, Write};
use std::path::PathBuf;
use std::process::ExitCode;

use clap::Args;

use super::with_threads;
use crate::files::read_regular_file;
use crate::output::{checks, Format};
use crate::sim::{self, Settings};
use crate::validation::{self, Outcome};

#[derive(Debug, Args)]
pub struct CheckArgs {
    /// Folder holding the validation payoffs and their `references.toml`.
    #[arg(long, value_name = "FOLDER", default_value = "payoffs/validation")]
    pub folder: PathBuf,
    /// Paths per case.
    #[arg(long, default_value_t = sim::DEFAULT_PATHS)]
    pub paths: u64,
    /// Random seed.
    #[arg(long, default_value_t = sim::DEFAULT_SEED)]
    pub seed: u64,
    /// Worker threads, 1 to 1024 (default: all cores).
    #[arg(long, value_name = "N")]
    pub threads: Option<usize>,
    /// Output format.
    #[arg(long, value_enum, default_value_t = Format::Table)]
    pub format: Format,
}

pub fn run(args: &CheckArgs) -> ExitCode {
    let settings = Settings { paths: args.paths, seed: args.seed, ..Settings::default() };
    if let Err(e) = settings.validate() {
        eprintln!("{e}");
        return ExitCode::from(2);
    }
    let outcomes = match with_threads(args.threads, || validation::run(&args.folder, &settings)) {
        Ok(Ok(o)) => o,
        Ok(Err(d)) => {
            let text = d.file.as_ref().and_then(|f| read_regular_file(f).ok());
            eprint!("{}", d.render(text.as_deref()));
            return ExitCode::from(2);
        }
        Err(e) => {
            eprintln!("{e}");
            return ExitCode::from(2);
        }
    };
    for o in &outcomes {
        if let Err(f) = &o.result {
            eprint!("{}", f.render());
        }
    }
    let stdout = io::stdout();
    let mut out = stdout.lock();
    match checks::write_checks(&mut out, &outcomes, args.format).and_then(|()| out.flush()) {
        Ok(()) | Err(_) if outcomes.iter().all(Outcome::passed) => ExitCode::SUCCESS,
        _ => ExitCode::from(1),
    }
}
