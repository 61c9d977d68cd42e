//! The driver: command-line arguments → pipeline → report and exit status.
//!
//! Only this module prints diagnostics and picks exit codes: 0 priced, 2 bad input
//! (payoff, market or arguments), 1 internal failure.

use std::fs;
use std::io::{self, Write};
use std::path::{Path, PathBuf};
use std::process::ExitCode;

use clap::{Args, Parser, Subcommand};

use crate::check::{self, Override};
use crate::compile;
use crate::diagnostic::{render_all, Diagnostic};
use crate::report::{self, Format, Priced};
use crate::sim::{self, market::Market, Settings};
use crate::syntax;

/// Prices exotic equity payoffs written in pathfold's payoff language, by Monte Carlo.
#[derive(Debug, Parser)]
#[command(name = "pathfold", version, about, after_help = report::CAUTION)]
pub struct Cli {
    #[command(subcommand)]
    pub command: Command,
}

#[derive(Debug, Subcommand)]
pub enum Command {
    /// Price a payoff file.
    Price(PriceArgs),
    /// Price the validation set and compare each case with its closed form.
    Check(CheckArgs),
}

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
    /// Worker threads (default: all cores).
    #[arg(long, value_name = "N")]
    pub threads: Option<usize>,
    /// Output format.
    #[arg(long, value_enum, default_value_t = Format::Table)]
    pub format: Format,
}

#[derive(Debug, Args)]
pub struct PriceArgs {
    /// The payoff file.
    pub file: PathBuf,
    /// Market data (TOML); default: the file the payoff names with `market "..."`.
    #[arg(long, value_name = "FILE")]
    pub market: Option<PathBuf>,
    /// Number of paths.
    #[arg(long, default_value_t = sim::DEFAULT_PATHS)]
    pub paths: u64,
    /// Random seed; the same seed gives the same result on any number of threads.
    #[arg(long, default_value_t = sim::DEFAULT_SEED)]
    pub seed: u64,
    /// Override a parameter: `--set coupon=2.5%` (repeatable).
    #[arg(long = "set", value_name = "NAME=VALUE")]
    pub set: Vec<String>,
    /// Do not pair each path with its antithetic mirror.
    #[arg(long)]
    pub no_antithetic: bool,
    /// Do not use control variates.
    #[arg(long)]
    pub no_control: bool,
    /// Worker threads (default: all cores).
    #[arg(long, value_name = "N")]
    pub threads: Option<usize>,
    /// Output format.
    #[arg(long, value_enum, default_value_t = Format::Table)]
    pub format: Format,
}

/// Why a file could not be priced.
#[derive(Debug)]
pub struct Failure {
    pub diagnostics: Vec<Diagnostic>,
    /// The text of the file the diagnostics point into, for drawing the caret.
    pub source: Option<String>,
    /// True for our own failure rather than bad input.
    pub internal: bool,
}

impl Failure {
    fn input(diagnostics: Vec<Diagnostic>, source: Option<String>) -> Self {
        Failure { diagnostics, source, internal: false }
    }

    pub fn render(&self) -> String {
        render_all(&self.diagnostics, self.source.as_deref())
    }
}

/// Runs the command line; returns the process exit status.
pub fn run(cli: Cli) -> ExitCode {
    match cli.command {
        Command::Price(args) => price_command(&args),
        Command::Check(args) => check_command(&args),
    }
}

fn check_command(args: &CheckArgs) -> ExitCode {
    let settings = Settings { paths: args.paths.max(2), seed: args.seed, ..Settings::default() };
    let outcomes = match with_threads(args.threads, || crate::validate::run(&args.folder, &settings)) {
        Ok(Ok(o)) => o,
        Ok(Err(d)) => {
            let text = d.file.as_ref().and_then(|f| fs::read_to_string(f).ok());
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
    match report::write_checks(&mut out, &outcomes, args.format).and_then(|()| out.flush()) {
        Ok(()) | Err(_) if outcomes.iter().all(crate::validate::Outcome::passed) => ExitCode::SUCCESS,
        _ => ExitCode::from(1),
    }
}

fn with_threads<T: Send>(threads: Option<usize>, f: impl FnOnce() -> T + Send) -> Result<T, String> {
    match threads {
        None => Ok(f()),
        Some(0) => Err("--threads must be at least 1".into()),
        Some(n) => rayon::ThreadPoolBuilder::new()
            .num_threads(n)
            .build()
            .map(|pool| pool.install(f))
            .map_err(|e| format!("could not start {n} threads: {e}")),
    }
}

fn price_command(args: &PriceArgs) -> ExitCode {
    let overrides: Result<Vec<Override>, Diagnostic> = args.set.iter().map(|s| Override::parse(s)).collect();
    let overrides = match overrides {
        Ok(o) => o,
        Err(d) => {
            eprint!("{}", d.render(None));
            return ExitCode::from(2);
        }
    };
    let settings = Settings {
        paths: args.paths,
        seed: args.seed,
        antithetic: !args.no_antithetic,
        control_variates: !args.no_control,
    };
    if settings.paths < 2 {
        eprintln!("--paths must be at least 2");
        return ExitCode::from(2);
    }
    let result = with_threads(args.threads, || price_file(&args.file, args.market.as_deref(), &overrides, &settings));
    let result = match result {
        Ok(r) => r,
        Err(e) => {
            eprintln!("{e}");
            return ExitCode::from(2);
        }
    };
    match result {
        Ok(priced) => {
            let stdout = io::stdout();
            let mut out = stdout.lock();
            match report::write_one(&mut out, &priced, args.format).and_then(|()| out.flush()) {
                Ok(()) => ExitCode::SUCCESS,
                Err(e) if e.kind() == io::ErrorKind::BrokenPipe => ExitCode::SUCCESS,
                Err(e) => {
                    eprintln!("could not write the report: {e}");
                    ExitCode::from(1)
                }
            }
        }
        Err(f) => {
            eprint!("{}", f.render());
            ExitCode::from(if f.internal { 1 } else { 2 })
        }
    }
}

/// Parses, checks, compiles and prices one payoff file.
pub fn price_file(
    file: &Path,
    market: Option<&Path>,
    overrides: &[Override],
    settings: &Settings,
) -> Result<Priced, Failure> {
    let source = fs::read_to_string(file).map_err(|e| {
        Failure::input(vec![Diagnostic::new(format!("cannot read the payoff file: {e}")).in_file(file)], None)
    })?;
    let in_file = |ds: Vec<Diagnostic>| ds.into_iter().map(|d| d.in_file(file)).collect::<Vec<_>>();
    let tree = syntax::parse(&source).map_err(|d| Failure::input(in_file(vec![d]), Some(source.clone())))?;
    let product = check::check(&tree, overrides).map_err(|ds| Failure::input(in_file(ds), Some(source.clone())))?;
    let market_path = match (market, &product.market) {
        (Some(m), _) => m.to_path_buf(),
        (None, Some((name, _))) => file.parent().unwrap_or(Path::new(".")).join(name),
        (None, None) => {
            let d = Diagnostic::new("no market data: the payoff names no market file and none was given")
                .with_fix("pass `--market FILE`, or add a line `market \"market.toml\"` to the payoff");
            return Err(Failure::input(in_file(vec![d]), Some(source)));
        }
    };
    let market_data = match Market::load(&market_path) {
        Ok(m) => m,
        Err(ds) => {
            let text = fs::read_to_string(&market_path).ok();
            let ds = ds.into_iter().map(|d| d.in_file(&market_path)).collect();
            return Err(Failure::input(ds, text));
        }
    };
    let program = compile::compile(&product, &market_data, &market_path).map_err(|ds| {
        // Errors in the market (a correlation pair) name the market file; the rest point into the payoff.
        let market_side = ds.iter().any(|d| d.file.as_deref() == Some(market_path.as_path()));
        if market_side {
            Failure::input(ds, fs::read_to_string(&market_path).ok())
        } else {
            Failure::input(in_file(ds), Some(source.clone()))
        }
    })?;
    let estimate =
        sim::simulate(&program, settings).map_err(|d| Failure::input(in_file(vec![d]), Some(source.clone())))?;
    Ok(Priced {
        file: file.display().to_string(),
        market_file: market_path.display().to_string(),
        product: program.name.clone(),
        currency: program.currency.clone(),
        notional: program.notional,
        params: product.params.clone(),
        estimate,
    })
}
