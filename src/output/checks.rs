//! The validation set's outcomes (`pathfold check`) → table, CSV or JSON.

use std::io::{self, Write};

use serde_json::json;

use super::{Format, CAUTION};
use crate::pricing::one_line;
use crate::validation::{Outcome, MAX_Z};

/// Writes the outcome of `pathfold check`: one row per case.
pub fn write_checks(out: &mut dyn Write, outcomes: &[Outcome], format: Format) -> io::Result<()> {
    let passed = outcomes.iter().filter(|o| o.passed()).count();
    match format {
        Format::Csv => {
            let mut w = csv::Writer::from_writer(out);
            w.write_record([
                "file",
                "closed_form",
                "reference",
                "price",
                "std_error",
                "z",
                "passed",
                "error",
                "caution",
            ])?;
            for o in outcomes {
                let p = o.result.as_ref().ok();
                let num = |x: Option<f64>| x.map(|x| x.to_string()).unwrap_or_default();
                w.write_record([
                    o.case.file.clone(),
                    o.case.reference.name().to_string(),
                    o.reference_value.to_string(),
                    num(p.map(|p| p.estimate.price)),
                    num(p.map(|p| p.estimate.std_error)),
                    num(o.z().filter(|z| z.is_finite())),
                    o.passed().to_string(),
                    o.result.as_ref().err().map(one_line).unwrap_or_default(),
                    CAUTION.to_string(),
                ])?;
            }
            w.flush()
        }
        Format::Json => {
            let cases: Vec<serde_json::Value> = outcomes
                .iter()
                .map(|o| {
                    let p = o.result.as_ref().ok();
                    json!({
                        "file": o.case.file,
                        "reference": o.case.reference.name(),
                        "closed_form": o.reference_value,
                        "price": p.map(|p| p.estimate.price),
                        "std_error": p.map(|p| p.estimate.std_error),
                        "approximation": o.case.approximation,
                        "z": o.z().filter(|z| z.is_finite()),
                        "passed": o.passed(),
                        "error": o.result.as_ref().err().map(|f| f.render()),
                    })
                })
                .collect();
            let paths =
                outcomes.iter().find_map(|o| o.result.as_ref().ok()).map(|p| (p.estimate.paths, p.estimate.seed));
            let v = json!({
                "cases": cases,
                "passed": passed,
                "failed": outcomes.len() - passed,
                "max_abs_z": MAX_Z,
                "paths": paths.map(|p| p.0),
                "seed": paths.map(|p| p.1),
                "caution": CAUTION,
            });
            serde_json::to_writer_pretty(&mut *out, &v)?;
            writeln!(out)
        }
        Format::Table => {
            writeln!(
                out,
                "{:<30} {:<28} {:>12} {:>12} {:>10} {:>8} {:>7}  result",
                "case", "closed form", "reference", "Monte Carlo", "std error", "budget", "z"
            )?;
            for o in outcomes {
                let name = o.case.file.trim_end_matches(".payoff");
                match &o.result {
                    Ok(p) => {
                        let z = o.z().unwrap_or(f64::NAN);
                        let verdict = if o.passed() { "pass" } else { "FAIL" };
                        writeln!(
                            out,
                            "{:<30} {:<28} {:>12.4} {:>12.4} {:>10.4} {:>8} {:>7.2}  {}",
                            name,
                            o.case.reference.name(),
                            o.reference_value,
                            p.estimate.price,
                            p.estimate.std_error,
                            if o.case.approximation > 0.0 {
                                format!("{:.4}", o.case.approximation * o.reference_value.abs())
                            } else {
                                "-".to_string()
                            },
                            z,
                            verdict
                        )?;
                    }
                    Err(_) => writeln!(
                        out,
                        "{:<30} {:<28} {:>12.4} {:>12} {:>10} {:>8} {:>7}  FAIL (not priced, see above)",
                        name,
                        o.case.reference.name(),
                        o.reference_value,
                        "-",
                        "-",
                        "-",
                        "-"
                    )?,
                }
            }
            writeln!(out)?;
            writeln!(
                out,
                "{passed} of {} cases within {} errors of their closed form; z divides the difference by the standard error and, for BGK-corrected references and the early-exercise case, their error budget in quadrature.",
                outcomes.len(),
                MAX_Z
            )?;
            writeln!(out, "{CAUTION}")
        }
    }
}
