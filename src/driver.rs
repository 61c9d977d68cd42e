//! The driver: command-line arguments → pipeline → report and exit status.
//!
//! Only this module prints diagnostics and picks exit codes. `price`: 0 all priced, 2 bad
//! input (a payoff, market or argument; in a batch, any row that failed), 1 internal
//! failure. `compare`: 0 all agree, 1 anything disagrees, is missing or failed, 2 the
//! price list or an argument is unusable.

use std::fs;
use std::io::{self, Write};
use std::path::{Path, PathBuf};
use std::process::ExitCode;

use clap::{Args, Parser, Subcommand};

use crate::batch::{self, Request, Target};
use crate::check::{self, Override};
use crate::compare;
use crate::compile;
use crate::diagnostic::{render_all, Diagnostic};
use crate::report::{self, Format, Priced, Record, TargetOutcome};
use crate::sim::market::{read_regular_bytes, read_regular_file, Market};
use crate::sim::{self, Settings};
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
    /// Price payoff files.
    Price(PriceArgs),
    /// Compare an external price list (CSV) with pathfold's prices.
    Compare(CompareArgs),
    /// Price the validation set and compare each case with its closed form.
    Check(CheckArgs),
    /// Combine the partial results of `price FILE --part K/N` into the full run's result.
    Merge(crate::partial::MergeArgs),
}

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

/// The pricing options `compare` shares with `price`.
#[derive(Debug, Args)]
pub struct PricingArgs {
    /// Market data (TOML); default: the file each payoff names with `market "..."`.
    #[arg(long, value_name = "FILE")]
    pub market: Option<PathBuf>,
    /// Number of paths.
    #[arg(long, default_value_t = sim::DEFAULT_PATHS)]
    pub paths: u64,
    /// Random seed.
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
    /// Worker threads, 1 to 1024 (default: all cores).
    #[arg(long, value_name = "N")]
    pub threads: Option<usize>,
    /// Output format.
    #[arg(long, value_enum, default_value_t = Format::Table)]
    pub format: Format,
    /// Add paths until the standard error is at most this (amount or `X%` of notional).
    #[arg(long, value_name = "SE")]
    pub target_se: Option<String>,
    /// The most paths an error-bounded run may use.
    #[arg(long, value_name = "N", default_value_t = batch::DEFAULT_MAX_PATHS)]
    pub max_paths: u64,
    /// Write the result to this file (replaced whole, never left half-written).
    #[arg(long, value_name = "FILE")]
    pub output: Option<PathBuf>,
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
    pub(crate) fn input(diagnostics: Vec<Diagnostic>, source: Option<String>) -> Self {
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
        Command::Compare(args) => compare_command(&args),
        Command::Check(args) => check_command(&args),
        Command::Merge(args) => crate::partial::merge_command(&args),
    }
}

fn check_command(args: &CheckArgs) -> ExitCode {
    let settings = Settings { paths: args.paths, seed: args.seed, ..Settings::default() };
    if let Err(e) = settings.validate() {
        eprintln!("{e}");
        return ExitCode::from(2);
    }
    let outcomes = match with_threads(args.threads, || crate::validate::run(&args.folder, &settings)) {
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
    match report::write_checks(&mut out, &outcomes, args.format).and_then(|()| out.flush()) {
        Ok(()) | Err(_) if outcomes.iter().all(crate::validate::Outcome::passed) => ExitCode::SUCCESS,
        _ => ExitCode::from(1),
    }
}

/// The most worker threads `--threads` accepts: far more than any machine pathfold runs on
/// has cores, and few enough to start at once.
pub const MAX_THREADS: usize = 1024;

/// Checks `--threads` before anything is read or priced.
fn check_threads(threads: Option<usize>) -> Result<(), String> {
    match threads {
        Some(n) if !(1..=MAX_THREADS).contains(&n) => {
            Err(format!("--threads must be between 1 and {MAX_THREADS} (got {n}); leave it out to use every core"))
        }
        _ => Ok(()),
    }
}

pub(crate) fn with_threads<T: Send>(threads: Option<usize>, f: impl FnOnce() -> T + Send) -> Result<T, String> {
    check_threads(threads)?;
    match threads {
        None => Ok(f()),
        Some(n) => rayon::ThreadPoolBuilder::new()
            .num_threads(n)
            .build()
            .map(|pool| pool.install(f))
            .map_err(|e| format!("could not start {n} threads: {e}")),
    }
}

/// Turns the pricing options into a request, or the message for a bad option.
/// The request of `price` or `compare`; a bad option is reported here, with exit status 2.
pub(crate) fn checked_request(args: &PricingArgs) -> Result<Request, ExitCode> {
    request(args).map_err(|e| {
        eprint!("{e}");
        ExitCode::from(2)
    })
}

pub(crate) fn request(args: &PricingArgs) -> Result<Request, String> {
    let overrides: Vec<Override> =
        args.set.iter().map(|s| Override::parse(s)).collect::<Result<_, Diagnostic>>().map_err(|d| d.render(None))?;
    let settings = Settings {
        paths: args.paths,
        seed: args.seed,
        antithetic: !args.no_antithetic,
        control_variates: !args.no_control,
    };
    settings.validate().map_err(|e| e + "\n")?;
    check_threads(args.threads).map_err(|e| e + "\n")?;
    let target = match &args.target_se {
        Some(t) => Some(Target::parse(t).map_err(|e| format!("--target-se {t}: {e}\n"))?),
        None => None,
    };
    if target.is_some() || args.max_paths != batch::DEFAULT_MAX_PATHS {
        sim::validate_max_paths(args.max_paths, settings.paths).map_err(|e| e + "\n")?;
    }
    Ok(Request { market: args.market.clone(), overrides, settings, target, max_paths: args.max_paths })
}

/// Writes a report to stdout, or atomically to `--output`; returns the exit status on failure.
/// A report that cannot go to `--output` goes to stdout instead, so the priced results are
/// never lost.
pub(crate) fn emit(output: Option<&Path>, write: impl Fn(&mut dyn Write) -> io::Result<()>) -> Result<(), ExitCode> {
    let to_stdout = || {
        let stdout = io::stdout();
        let mut out = stdout.lock();
        write(&mut out).and_then(|()| out.flush())
    };
    let result = match output {
        Some(path) => batch::write_atomically(path, |w| write(w)),
        None => to_stdout(),
    };
    match result {
        Ok(()) => Ok(()),
        Err(e) if output.is_none() && e.kind() == io::ErrorKind::BrokenPipe => Ok(()),
        Err(e) => {
            match output {
                Some(path) => {
                    eprintln!("could not write {}: {e}; the report follows on stdout", path.display());
                    let _ = to_stdout();
                }
                None => eprintln!("could not write the report: {e}"),
            }
            Err(ExitCode::from(1))
        }
    }
}

/// Checks `--output` before anything is priced: it must not be one of the inputs, must not
/// be anything but a regular file if it exists (a link, a folder or a device is refused,
/// never replaced), and its folder must take a new file. `inputs` are the payoff files, the
/// market file and the price list.
fn check_output(output: &Path, inputs: &[&Path]) -> Result<(), String> {
    let shown = output.display();
    let name = output
        .file_name()
        .ok_or_else(|| format!("--output {shown}: not a file name\n  fix: name a file, e.g. --output prices.csv\n"))?;
    let dir = output.parent().filter(|d| !d.as_os_str().is_empty()).unwrap_or(Path::new("."));
    match fs::symlink_metadata(output) {
        Ok(m) if !m.file_type().is_file() => {
            let what = if m.file_type().is_symlink() {
                "a symbolic link"
            } else if m.is_dir() {
                "a folder"
            } else {
                "not a regular file (a pipe, socket or device)"
            };
            return Err(format!(
                "--output {shown}: it exists and is {what}; pathfold only ever replaces a regular file\n  fix: name a new file, or a regular file to replace\n"
            ));
        }
        Ok(_) => {}
        Err(e) if e.kind() == io::ErrorKind::NotFound => {}
        Err(e) => return Err(format!("--output {shown}: {e}\n  fix: check the path and its permissions\n")),
    }
    let folder = fs::canonicalize(dir).map_err(|e| {
        format!("--output {shown}: the folder {} cannot be used: {e}\n  fix: create the folder first, or name a file in an existing one\n", dir.display())
    })?;
    let target = folder.join(name);
    let same_file =
        |input: &Path| fs::canonicalize(input).is_ok_and(|c| c == target) || same_inode(input, output).unwrap_or(false);
    if let Some(input) = inputs.iter().find(|i| same_file(i)) {
        return Err(format!(
            "--output {shown} is the input {}; writing the report there would destroy it\n  fix: name another file for the report\n",
            input.display()
        ));
    }
    batch::check_writable(output).map_err(|e| {
        format!(
            "--output {shown}: cannot write in the folder {}: {e}\n  fix: name a file in a folder you can write to\n",
            dir.display()
        )
    })
}

/// Whether two existing paths are one file (a hard link has another canonical path).
fn same_inode(a: &Path, b: &Path) -> Option<bool> {
    #[cfg(unix)]
    {
        use std::os::unix::fs::MetadataExt;
        let (a, b) = (fs::metadata(a).ok()?, fs::metadata(b).ok()?);
        Some(a.dev() == b.dev() && a.ino() == b.ino())
    }
    #[cfg(not(unix))]
    {
        let _ = (a, b);
        None
    }
}

/// The `--output` checks of `price` and `compare`, reported with exit status 2.
pub(crate) fn checked_output(
    output: Option<&Path>,
    files: &[Result<PathBuf, Failure>],
    others: &[Option<&Path>],
) -> Result<(), ExitCode> {
    let Some(output) = output else {
        return Ok(());
    };
    let mut inputs: Vec<&Path> = files.iter().filter_map(|f| f.as_ref().ok().map(PathBuf::as_path)).collect();
    inputs.extend(others.iter().flatten());
    check_output(output, &inputs).map_err(|e| {
        eprint!("{e}");
        ExitCode::from(2)
    })?;
    batch::clean_up_on_signal();
    Ok(())
}

/// After pricing: the market files the payoffs named are inputs too. If `--output` is one of
/// them the report goes to stdout instead, and the exit status is 2.
pub(crate) fn output_after_pricing<'a>(output: Option<&'a Path>, rows: &[batch::Row]) -> Result<Option<&'a Path>, ()> {
    let Some(out) = output else {
        return Ok(None);
    };
    let target = fs::canonicalize(out).ok();
    let clash = rows
        .iter()
        .filter_map(|r| r.outcome.as_ref().ok())
        .find(|p| target.is_some() && fs::canonicalize(&p.market_file).ok() == target);
    match clash {
        Some(p) => {
            eprintln!(
                "--output {} is the market file of {}; writing the report there would destroy it: the report follows on stdout\n  fix: name another file for the report",
                out.display(),
                p.file
            );
            Err(())
        }
        None => Ok(Some(out)),
    }
}

fn price_command(args: &PriceArgs) -> ExitCode {
    if let Some(part) = &args.part {
        return crate::partial::price_part(args, part);
    }
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
            Ok(priced) => emit(output.unwrap_or(None), |w| report::write_one(w, priced, p.format)),
            Err(_) => Ok(()),
        }
    } else {
        emit(output.unwrap_or(None), |w| batch::write_rows(w, &rows, p.format))
    };
    if let Err(code) = written {
        return code;
    }
    if output.is_err() {
        return ExitCode::from(2);
    }
    batch::exit_status(&rows)
}

/// Prices the payoff files found in the inputs on the thread pool, with a progress bar when
/// `progress` (and stderr is a terminal); the diagnostics of failed files go to stderr.
pub(crate) fn price_inputs(
    files: Vec<Result<PathBuf, Failure>>,
    request: &batch::Request,
    threads: Option<usize>,
    progress: bool,
) -> Result<Vec<batch::Row>, ExitCode> {
    let rows = with_threads(threads, || {
        let bar = batch::Progress::new(files.len(), progress);
        let rows = batch::price_all(files, request, &bar);
        bar.done();
        rows
    })
    .map_err(|e| {
        eprintln!("{e}");
        ExitCode::from(2)
    })?;
    report_failures(&rows);
    Ok(rows)
}

/// Full diagnostics with the caret go to stderr; rows carry a one-line summary. A problem
/// found in another file (the market) is introduced, in a batch, by the payoff file it
/// stopped; a single file keeps the plain diagnostic.
pub(crate) fn report_failures(rows: &[batch::Row]) {
    for row in rows {
        if let Ok(p) = &row.outcome {
            eprint!("{}", p.warnings);
        }
        if let Err(f) = &row.outcome {
            let text = f.render();
            if rows.len() > 1 && !text.starts_with(&row.file) {
                eprintln!("{}: could not be priced:", row.file);
            }
            eprint!("{text}");
        }
    }
}

fn compare_command(args: &CompareArgs) -> ExitCode {
    let p = &args.pricing;
    let request = match checked_request(p) {
        Ok(r) => r,
        Err(code) => return code,
    };
    if !(args.max_z.is_finite() && args.max_z > 0.0) {
        eprintln!("--max-z must be a positive number, not {}", args.max_z);
        return ExitCode::from(2);
    }
    let list = match compare::read_list(&args.prices) {
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
    if let Err(code) = checked_output(p.output.as_deref(), &files, &[p.market.as_deref(), Some(&args.prices)]) {
        return code;
    }
    let rows = match price_inputs(files, &request, p.threads, true) {
        Ok(rows) => rows,
        Err(code) => return code,
    };
    let output = output_after_pricing(p.output.as_deref(), &rows);
    let lines = compare::compare(&list, &rows, args.max_z);
    if let Err(code) = emit(output.unwrap_or(None), |w| compare::write(w, &lines, p.format)) {
        return code;
    }
    if output.is_err() {
        return ExitCode::from(2);
    }
    compare::exit_status(&lines)
}

/// Parses, checks, compiles and prices one payoff file.
pub fn price_file(
    file: &Path,
    market: Option<&Path>,
    overrides: &[Override],
    settings: &Settings,
) -> Result<Priced, Failure> {
    price_file_to(file, market, overrides, settings, None)
}

/// [`price_file`], optionally adding paths until the standard error meets a target
/// (`(target, max_paths)`).
pub fn price_file_to(
    file: &Path,
    market: Option<&Path>,
    overrides: &[Override],
    settings: &Settings,
    target: Option<(Target, u64)>,
) -> Result<Priced, Failure> {
    let compiled = compile_file(file, market, overrides)?;
    let program = &compiled.program;
    let (estimate, target) = match target {
        None => (sim::simulate(program, settings), None),
        Some((t, max_paths)) => {
            let se = t.amount(program.notional);
            match sim::simulate_to_target(program, settings, se, max_paths) {
                Ok((e, met)) => (Ok(e), Some(TargetOutcome { std_error: se, max_paths, met })),
                Err(d) => (Err(d), None),
            }
        }
    };
    compiled.priced(estimate, settings, overrides, target)
}

/// A payoff file parsed, checked and compiled against its market, with what the report
/// and the reproducibility record need of both files.
pub struct Compiled {
    pub file: PathBuf,
    pub source: String,
    pub product: check::Product,
    /// The market file used: `--market`, or the one the payoff names.
    pub market_path: PathBuf,
    pub market_bytes: Vec<u8>,
    pub program: compile::Program,
}

/// Parses, checks and compiles one payoff file with its market data.
pub fn compile_file(file: &Path, market: Option<&Path>, overrides: &[Override]) -> Result<Compiled, Failure> {
    let bytes = read_regular_bytes(file).map_err(|e| {
        Failure::input(vec![Diagnostic::new(format!("cannot read the payoff file: {e}")).in_file(file)], None)
    })?;
    let source =
        crate::diagnostic::decode_source(bytes).map_err(|e| Failure::input(vec![e.0.in_file(file)], Some(e.1)))?;
    compile_source(file, source, market, overrides)
}

/// [`compile_file`] for a payoff's text; `file` names it in messages, and a market file
/// the payoff names is looked for beside `file`.
pub fn compile_source(
    file: &Path,
    source: String,
    market: Option<&Path>,
    overrides: &[Override],
) -> Result<Compiled, Failure> {
    let in_file = |ds: Vec<Diagnostic>| ds.into_iter().map(|d| d.in_file(file)).collect::<Vec<_>>();
    // Parsing and checking recurse once per level of nesting: they get a stack of known size.
    let product = syntax::on_deep_stack(|| {
        let tree = syntax::parse(&source).map_err(|d| Failure::input(in_file(vec![d]), Some(source.clone())))?;
        check::check(&tree, overrides).map_err(|ds| Failure::input(in_file(ds), Some(source.clone())))
    })?;
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
            let text = read_regular_file(&market_path).ok();
            let ds = ds.into_iter().map(|d| d.in_file(&market_path)).collect();
            return Err(Failure::input(ds, text));
        }
    };
    let program = syntax::on_deep_stack(|| compile::compile(&product, &market_data, &market_path)).map_err(|ds| {
        // Errors in the market (a correlation pair) name the market file; the rest point into the payoff.
        let market_side = ds.iter().any(|d| d.file.as_deref() == Some(market_path.as_path()));
        if market_side {
            Failure::input(ds, read_regular_file(&market_path).ok())
        } else {
            Failure::input(in_file(ds), Some(source.clone()))
        }
    })?;
    let market_bytes = crate::sim::market::read_regular_bytes(&market_path).map_err(|e| {
        Failure::input(vec![Diagnostic::new(format!("cannot read the market file: {e}")).in_file(&market_path)], None)
    })?;
    Ok(Compiled { file: file.to_path_buf(), source, product, market_path, market_bytes, program })
}

impl Compiled {
    /// The report of a simulation of this payoff (or the failure of the simulation).
    pub fn priced(
        &self,
        estimate: Result<sim::Estimate, Diagnostic>,
        settings: &Settings,
        overrides: &[Override],
        target: Option<TargetOutcome>,
    ) -> Result<Priced, Failure> {
        let (file, source, product, program) = (&self.file, &self.source, &self.product, &self.program);
        let in_file = |ds: Vec<Diagnostic>| ds.into_iter().map(|d| d.in_file(file)).collect::<Vec<_>>();
        let estimate = estimate.map_err(|d| Failure::input(in_file(vec![d]), Some(source.clone())))?;
        let found = product.warnings.iter().chain(&estimate.warnings).cloned().collect();
        let warnings = render_all(&in_file(found), Some(source));
        Ok(Priced {
            warnings,
            file: file.display().to_string(),
            market_file: self.market_path.display().to_string(),
            product: program.name.clone(),
            currency: program.currency.clone(),
            notional: program.notional,
            params: product.params.clone(),
            params_written: product.params_written.iter().map(|w| w.text(source).to_string()).collect(),
            estimate,
            record: Record {
                version: env!("CARGO_PKG_VERSION"),
                payoff_sha256: batch::sha256_hex(source.as_bytes()),
                market_sha256: batch::sha256_hex(&self.market_bytes),
                control_variates: settings.control_variates,
                overrides: overrides.iter().map(|o| format!("{}={}", o.name, o.value)).collect(),
                target,
            },
        })
    }
}
