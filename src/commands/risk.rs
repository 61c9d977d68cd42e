//! `pathfold risk FILE`: sensitivities by central finite differences on common random
//! numbers. Exit status: 0 done, 2 bad input or option, 1 an internal failure.

use std::path::PathBuf;
use std::process::ExitCode;

use clap::Args;

use super::{checked_output, emit, with_threads, SamplerArg, SharedArgs};
use crate::output::{risk, Format};
use crate::risk::{risk_file, Bumps};
use crate::sim::Settings;
use crate::typing::Override;

/// The options of `risk`, `solve` and `ladder`: one file priced on common paths.
#[derive(Debug, Args)]
pub struct ScenarioArgs {
    /// The payoff file.
    #[arg(value_name = "FILE")]
    pub file: PathBuf,
    /// Number of paths (every scenario runs on these same paths).
    #[arg(long, default_value_t = 100_000)]
    pub paths: u64,
    /// Do not use control variates (every scenario plain Monte Carlo).
    #[arg(long)]
    pub no_control: bool,
    /// Where the paths' random numbers come from: `random` (pseudo-random) or `sobol`
    /// (Sobol points, randomised 16 times, through a Brownian bridge; the errors are the
    /// spread of the 16 estimates).
    #[arg(long, value_enum, default_value_t = SamplerArg::Random)]
    pub sampler: SamplerArg,
    #[command(flatten)]
    pub shared: SharedArgs,
}

impl ScenarioArgs {
    /// The overrides and settings, or the message for a bad option.
    pub fn checked(&self) -> Result<(Vec<Override>, Settings), String> {
        let overrides = self.shared.overrides()?;
        let settings = Settings {
            control_variates: !self.no_control,
            sampler: self.sampler.sampler(),
            ..self.shared.settings(self.paths)
        };
        settings.validate().map_err(|e| e + "\n")?;
        Ok((overrides, settings))
    }

    /// Checks the options and `--output`; the exit code on failure.
    pub fn prepare(&self) -> Result<(Vec<Override>, Settings), ExitCode> {
        let checked = self.checked().map_err(|e| {
            eprint!("{e}");
            ExitCode::from(2)
        })?;
        checked_output(self.shared.output.as_deref(), &[Ok(self.file.clone())], &[self.shared.market.as_deref()])?;
        Ok(checked)
    }

    /// Runs `f` on the thread pool asked for.
    pub fn on_threads<T: Send>(&self, f: impl FnOnce() -> T + Send) -> Result<T, ExitCode> {
        with_threads(self.shared.threads, f).map_err(|e| {
            eprintln!("{e}");
            ExitCode::from(2)
        })
    }
}

#[derive(Debug, Args)]
pub struct RiskArgs {
    #[command(flatten)]
    pub scenario: ScenarioArgs,
    /// A bump size: `spot=1%`, `vol=1` (points), `dividend=10` (bp), `rate=10` (bp),
    /// `correlation=1` (points), `theta=1` (days). Repeatable.
    #[arg(long = "bump", value_name = "NAME=SIZE")]
    pub bump: Vec<String>,
}

pub fn run(args: &RiskArgs) -> ExitCode {
    let a = &args.scenario;
    let mut bumps = Bumps::default();
    for b in &args.bump {
        if let Err(e) = bumps.set(b) {
            eprintln!("{e}");
            return ExitCode::from(2);
        }
    }
    let (overrides, settings) = match a.prepare() {
        Ok(x) => x,
        Err(code) => return code,
    };
    let result = match a.on_threads(|| risk_file(&a.file, a.shared.market.as_deref(), &overrides, &settings, &bumps)) {
        Ok(r) => r,
        Err(code) => return code,
    };
    match result {
        Ok(r) => {
            // The table lists them; CSV has no place for them, JSON has `notes`.
            if a.shared.format != Format::Table {
                for n in &r.notes {
                    eprintln!("note: {n}");
                }
            }
            match emit(a.shared.output.as_deref(), |w| risk::write_risk(w, &r, a.shared.format)) {
                Ok(()) => ExitCode::SUCCESS,
                Err(code) => code,
            }
        }
        Err(f) => {
            eprint!("{}", f.render());
            ExitCode::from(if f.internal { 1 } else { 2 })
        }
    }
}
