//! `pathfold ladder FILE --spot -20%..20%/5% [--vol -5..5/1] [--chart FILE.svg]`: prices
//! on a grid of market shifts, one or two axes, all on the same paths. Exit status: 0
//! done, 2 bad input or option, 1 an internal failure.

use std::path::PathBuf;
use std::process::ExitCode;

use clap::Args;

use super::emit;
use super::risk::ScenarioArgs;
use crate::ladder::{ladder_file, parse_range, Axis, Shift};
use crate::output::atomic;
use crate::output::ladder::{chart_svg, write_ladder};

#[derive(Debug, Args)]
pub struct LadderArgs {
    #[command(flatten)]
    pub scenario: ScenarioArgs,
    /// Spot shifts in percent, `LO..HI/STEP`, e.g. `-20%..20%/5%`.
    #[arg(long, value_name = "LO..HI/STEP", allow_hyphen_values = true)]
    pub spot: Option<String>,
    /// Volatility shifts in points, `LO..HI/STEP`, e.g. `-5..5/1`.
    #[arg(long, value_name = "LO..HI/STEP", allow_hyphen_values = true)]
    pub vol: Option<String>,
    /// Rate shifts in basis points, `LO..HI/STEP`, e.g. `-100..100/25`.
    #[arg(long, value_name = "LO..HI/STEP", allow_hyphen_values = true)]
    pub rate: Option<String>,
    /// Shift the spot and volatility of this underlying only (default: all together).
    #[arg(long, value_name = "NAME")]
    pub only: Option<String>,
    /// Also draw the ladder as an SVG chart in this file.
    #[arg(long, value_name = "FILE.svg")]
    pub chart: Option<PathBuf>,
}

/// The axes in the order spot, vol, rate (the first is the chart's x axis).
fn axes(args: &LadderArgs) -> Result<Vec<Axis>, String> {
    let mut axes = Vec::new();
    for (shift, text) in [(Shift::Spot, &args.spot), (Shift::Vol, &args.vol), (Shift::Rate, &args.rate)] {
        if let Some(t) = text {
            axes.push(parse_range(shift, t)?);
        }
    }
    match axes.len() {
        0 => Err("give one or two axes: --spot LO..HI/STEP, --vol LO..HI/STEP, --rate LO..HI/STEP".into()),
        1 | 2 => Ok(axes),
        _ => Err("a ladder has one or two axes; give two of --spot, --vol, --rate".into()),
    }
}

pub fn run(args: &LadderArgs) -> ExitCode {
    let a = &args.scenario;
    let axes = match axes(args) {
        Ok(x) => x,
        Err(e) => {
            eprintln!("{e}");
            return ExitCode::from(2);
        }
    };
    let (overrides, settings) = match a.prepare() {
        Ok(x) => x,
        Err(code) => return code,
    };
    if let Some(chart) = &args.chart {
        if let Err(e) = atomic::check_writable(chart) {
            eprintln!("--chart {}: cannot write there: {e}", chart.display());
            return ExitCode::from(2);
        }
    }
    let result = match a.on_threads(|| {
        ladder_file(&a.file, a.shared.market.as_deref(), &overrides, &settings, axes, args.only.as_deref())
    }) {
        Ok(r) => r,
        Err(code) => return code,
    };
    let ladder = match result {
        Ok(l) => l,
        Err(f) => {
            eprint!("{}", f.render());
            return ExitCode::from(if f.internal { 1 } else { 2 });
        }
    };
    if let Some(chart) = &args.chart {
        let svg = chart_svg(&ladder);
        if let Err(e) = atomic::write_atomically(chart, |w| w.write_all(svg.as_bytes())) {
            eprintln!("could not write the chart {}: {e}", chart.display());
            return ExitCode::from(1);
        }
    }
    match emit(a.shared.output.as_deref(), |w| write_ladder(w, &ladder, a.shared.format)) {
        Ok(()) => ExitCode::SUCCESS,
        Err(code) => code,
    }
}
