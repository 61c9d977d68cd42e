//! A solved parameter (`pathfold solve`): a table, one CSV row or a JSON object.

use std::io::{self, Write};

use serde_json::json;

use super::{decimals, group, Format, CAUTION};
use crate::sim::Sampler;
use crate::solve::Solved;

pub fn write_solved(out: &mut dyn Write, s: &Solved, format: Format) -> io::Result<()> {
    match format {
        Format::Json => {
            serde_json::to_writer_pretty(&mut *out, &to_json(s))?;
            writeln!(out)
        }
        Format::Csv => {
            let mut w = csv::Writer::from_writer(out);
            w.write_record([
                "file",
                "parameter",
                "value",
                "std_error",
                "price",
                "price_std_error",
                "target",
                "currency",
                "evaluations",
                "affine",
                "reached",
                "paths",
                "seed",
                "caution",
            ])?;
            w.write_record([
                s.file.clone(),
                s.parameter.clone(),
                s.value.to_string(),
                s.std_error.to_string(),
                s.price.to_string(),
                s.price_std_error.to_string(),
                s.target.to_string(),
                s.currency.clone(),
                s.evaluations.to_string(),
                s.affine.to_string(),
                s.reached.to_string(),
                s.paths.to_string(),
                s.seed.to_string(),
                CAUTION.to_string(),
            ])?;
            w.flush()
        }
        Format::Table => {
            let d = decimals(s.price_std_error);
            writeln!(out, "{} ({})", s.product, s.file)?;
            writeln!(
                out,
                "{} = {} ± {}   ({:.6}% ± {:.6}%)",
                s.parameter,
                s.value,
                s.std_error,
                100.0 * s.value,
                100.0 * s.std_error
            )?;
            writeln!(
                out,
                "price there {} {} ± {} (target {}, {:.4}% of notional)",
                s.currency,
                group(s.price, d),
                group(s.price_std_error, d),
                group(s.target, d),
                100.0 * s.target / s.notional
            )?;
            writeln!(
                out,
                "{} pricings on the same {} paths (seed {}{}{}), searched in [{}, {}]{}",
                s.evaluations,
                s.paths,
                s.seed,
                if s.sampler == Sampler::Sobol { ", Sobol points" } else { "" },
                if s.control_variates { ", control variates" } else { ", plain Monte Carlo" },
                s.bracket.0,
                s.bracket.1,
                if s.affine { "; the price is affine in the parameter: one step" } else { "; Brent's method" }
            )?;
            writeln!(out, "the error of the value is the price's over the slope ({} per unit)", group(s.slope, 2))?;
            if !s.reached {
                writeln!(
                    out,
                    "note: the price jumps across the target on these paths (it is a step function of `{}`): the value is where the jump is, and the price there misses the target",
                    s.parameter
                )?;
            }
            for w in &s.warnings {
                writeln!(out, "warning: {w}")?;
            }
            writeln!(out)?;
            writeln!(out, "{CAUTION}")
        }
    }
}

pub fn to_json(s: &Solved) -> serde_json::Value {
    json!({
        "file": s.file,
        "product": s.product,
        "currency": s.currency,
        "parameter": s.parameter,
        "value": s.value,
        "std_error": s.std_error,
        "price": s.price,
        "price_std_error": s.price_std_error,
        "target": s.target,
        "slope": s.slope,
        "evaluations": s.evaluations,
        "affine": s.affine,
        "reached": s.reached,
        "between": [s.bracket.0, s.bracket.1],
        "paths": s.paths,
        "seed": s.seed,
        "control_variates": s.control_variates,
        "controls": s.controls,
        "warnings": s.warnings,
        "sampler": s.sampler.name(),
        "method": "every trial on the same paths (and the same control variates, if any); affine check then one step, else Brent's method",
        "caution": CAUTION,
    })
}
