//! The commands, one module each; `main.rs` parses the command line and calls the one
//! asked for. Everything they share lives here: the pricing options, threads, where the
//! output goes, and how failures reach stderr. Only commands print diagnostics and pick
//! exit codes.

pub mod check;
pub mod compare;
pub mod ladder;
pub mod merge;
pub mod price;
pub mod risk;
pub mod solve;

use std::fs;
use std::io::{self, IsTerminal, Write};
use std::path::{Path, PathBuf};
use std::process::ExitCode;

use clap::Args;
use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};

use crate::batch::{self, Request};
use crate::diagnostic::Diagnostic;
use crate::output::{atomic, Format};
use crate::pricing::{self, Failure, Target};
use crate::sim::{self, Sampler, Settings};
use crate::typing::Override;

/// The `--sampler` choices.
#[derive(Clone, Copy, Debug, PartialEq, Eq, clap::ValueEnum)]
pub enum SamplerArg {
    /// Pseudo-random numbers (the default).
    Random,
    /// Randomised quasi-Monte Carlo: Sobol points, 16 random digital shifts, Brownian bridge.
    Sobol,
}

impl SamplerArg {
    /// The engine's sampler of this choice.
    pub fn sampler(self) -> Sampler {
        match self {
            SamplerArg::Random => Sampler::Random,
            SamplerArg::Sobol => Sampler::Sobol,
        }
    }
}

/// The options every command that prices one or more files shares.
#[derive(Debug, Args)]
pub struct SharedArgs {
    /// Market data (TOML); default: the file each payoff names with `market "..."`.
    #[arg(long, value_name = "FILE")]
    pub market: Option<PathBuf>,
    /// Random seed.
    #[arg(long, default_value_t = sim::DEFAULT_SEED)]
    pub seed: u64,
    /// Override a parameter: `--set coupon=2.5%` (repeatable).
    #[arg(long = "set", value_name = "NAME=VALUE")]
    pub set: Vec<String>,
    /// Do not pair each path with its antithetic mirror.
    #[arg(long)]
    pub no_antithetic: bool,
    /// Worker threads, 1 to 1024 (default: all cores).
    #[arg(long, value_name = "N")]
    pub threads: Option<usize>,
    /// Output format.
    #[arg(long, value_enum, default_value_t = Format::Table)]
    pub format: Format,
    /// Write the result to this file (replaced whole, never left half-written).
    #[arg(long, value_name = "FILE")]
    pub output: Option<PathBuf>,
}

impl SharedArgs {
    /// The `--set` overrides, or the message for a bad one.
    pub fn overrides(&self) -> Result<Vec<Override>, String> {
        self.set.iter().map(|s| Override::parse(s)).collect::<Result<_, Diagnostic>>().map_err(|d| d.render(None))
    }

    /// The settings of a run of `paths` paths on these options (no control variates, the
    /// default sampler: the pricing options add theirs).
    pub fn settings(&self, paths: u64) -> Settings {
        Settings {
            paths,
            seed: self.seed,
            antithetic: !self.no_antithetic,
            control_variates: false,
            ..Settings::default()
        }
    }
}

/// The pricing options `compare` shares with `price`.
#[derive(Debug, Args)]
pub struct PricingArgs {
    /// Number of paths.
    #[arg(long, default_value_t = sim::DEFAULT_PATHS)]
    pub paths: u64,
    /// Do not use control variates.
    #[arg(long)]
    pub no_control: bool,
    /// Where the paths' random numbers come from: `random` (pseudo-random) or `sobol`
    /// (Sobol points, randomised 16 times, through a Brownian bridge).
    #[arg(long, value_enum, default_value_t = SamplerArg::Random)]
    pub sampler: SamplerArg,
    /// Add paths until the standard error is at most this (amount or `X%` of notional).
    #[arg(long, value_name = "SE")]
    pub target_se: Option<String>,
    /// The most paths an error-bounded run may use.
    #[arg(long, value_name = "N", default_value_t = pricing::DEFAULT_MAX_PATHS)]
    pub max_paths: u64,
    #[command(flatten)]
    pub shared: SharedArgs,
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

fn with_threads<T: Send>(threads: Option<usize>, f: impl FnOnce() -> T + Send) -> Result<T, String> {
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
fn checked_request(args: &PricingArgs) -> Result<Request, ExitCode> {
    request(args).map_err(|e| {
        eprint!("{e}");
        ExitCode::from(2)
    })
}

fn request(args: &PricingArgs) -> Result<Request, String> {
    let overrides = args.shared.overrides()?;
    let settings = Settings {
        control_variates: !args.no_control,
        sampler: args.sampler.sampler(),
        ..args.shared.settings(args.paths)
    };
    settings.validate().map_err(|e| e + "\n")?;
    check_threads(args.shared.threads).map_err(|e| e + "\n")?;
    let target = match &args.target_se {
        Some(t) => Some(Target::parse(t).map_err(|e| format!("--target-se {t}: {e}\n"))?),
        None => None,
    };
    if target.is_some() && settings.sampler == Sampler::Sobol {
        return Err("--target-se does not combine with --sampler sobol: a Sobol run's error comes from 16 randomisations of a point set fixed in advance, so it cannot grow path by path\n  fix: give --paths (the error falls about as 1/paths or faster), or use the default sampler with --target-se\n".into());
    }
    if target.is_some() || args.max_paths != pricing::DEFAULT_MAX_PATHS {
        sim::validate_max_paths(args.max_paths, settings.paths).map_err(|e| e + "\n")?;
    }
    Ok(Request { market: args.shared.market.clone(), overrides, settings, target, max_paths: args.max_paths })
}

/// Writes a report to stdout, or atomically to `--output`; returns the exit status on failure.
/// A report that cannot go to `--output` goes to stdout instead, so the priced results are
/// never lost.
fn emit(output: Option<&Path>, write: impl Fn(&mut dyn Write) -> io::Result<()>) -> Result<(), ExitCode> {
    let to_stdout = || {
        let stdout = io::stdout();
        let mut out = stdout.lock();
        write(&mut out).and_then(|()| out.flush())
    };
    let result = match output {
        Some(path) => atomic::write_atomically(path, |w| write(w)),
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
    atomic::check_writable(output).map_err(|e| {
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
fn checked_output(
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
    atomic::clean_up_on_signal();
    Ok(())
}

/// After pricing: the market files the payoffs named are inputs too. If `--output` is one of
/// them the report goes to stdout instead, and the exit status is 2.
fn output_after_pricing<'a>(output: Option<&'a Path>, rows: &[batch::Row]) -> Result<Option<&'a Path>, ()> {
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

/// Prices the payoff files found in the inputs on the thread pool, with a progress bar when
/// `progress` (and stderr is a terminal); the diagnostics of failed files go to stderr.
fn price_inputs(
    files: Vec<Result<PathBuf, Failure>>,
    request: &batch::Request,
    threads: Option<usize>,
    progress: bool,
) -> Result<Vec<batch::Row>, ExitCode> {
    let rows = with_threads(threads, || {
        let bar = Progress::new(files.len(), progress);
        let rows = batch::price_all(files, request, &|file: &str| bar.tick(file));
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
fn report_failures(rows: &[batch::Row]) {
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

/// A progress bar on stderr, drawn only when stderr is a terminal.
pub struct Progress(ProgressBar);

impl Progress {
    pub fn new(files: usize, wanted: bool) -> Progress {
        let target = if wanted && io::stderr().is_terminal() {
            ProgressDrawTarget::stderr()
        } else {
            ProgressDrawTarget::hidden()
        };
        let bar = ProgressBar::with_draw_target(Some(files as u64), target);
        if let Ok(style) = ProgressStyle::with_template("{bar:30} {pos}/{len} files  {elapsed}  {msg}") {
            bar.set_style(style);
        }
        Progress(bar)
    }

    fn tick(&self, file: &str) {
        self.0.set_message(file.to_string());
        self.0.inc(1);
    }

    pub fn done(&self) {
        self.0.finish_and_clear();
    }
}
