//! Batch rows → table, CSV or JSON.

use std::io::{self, Write};

use serde_json::json;

use super::priced::to_json;
use super::{decimals, group, Format, CAUTION};
use crate::batch::Row;

/// The CSV columns of a batch, in order. The caution rides in the last column of every
/// row, so the file stays plain CSV that any reader takes.
pub const CSV_COLUMNS: [&str; 23] = [
    "file",
    "product",
    "currency",
    "price",
    "percent_of_notional",
    "std_error",
    "paths",
    "seed",
    "seconds",
    "status",
    "error",
    "target_std_error",
    "target_met",
    "antithetic",
    "control_variates",
    "controls_used",
    "overrides",
    "pathfold_version",
    "payoff_sha256",
    "market_file",
    "market_sha256",
    "notional",
    "caution",
];

/// Writes batch rows.
pub fn write_rows(out: &mut dyn Write, rows: &[Row], format: Format) -> io::Result<()> {
    match format {
        Format::Table => write_table(out, rows),
        Format::Csv => write_csv(out, rows),
        Format::Json => {
            let value = json!({
                "pathfold_version": env!("CARGO_PKG_VERSION"),
                "results": rows.iter().map(row_json).collect::<Vec<_>>(),
                "caution": CAUTION,
            });
            serde_json::to_writer_pretty(&mut *out, &value)?;
            writeln!(out)
        }
    }
}

fn row_json(row: &Row) -> serde_json::Value {
    match &row.outcome {
        Ok(p) => {
            let mut v = to_json(p);
            if let Some(map) = v.as_object_mut() {
                map.remove("caution");
                map.insert("status".into(), json!("ok"));
            }
            v
        }
        Err(_) => json!({ "file": row.file, "status": "error", "error": row.error_message() }),
    }
}

fn write_csv(out: &mut dyn Write, rows: &[Row]) -> io::Result<()> {
    let mut w = csv::Writer::from_writer(out);
    w.write_record(CSV_COLUMNS)?;
    for row in rows {
        let fields: Vec<String> = match &row.outcome {
            Ok(p) => {
                let (e, r) = (&p.estimate, &p.record);
                vec![
                    p.file.clone(),
                    p.product.clone(),
                    p.currency.clone(),
                    e.price.to_string(),
                    p.percent_of_notional().to_string(),
                    e.std_error.to_string(),
                    e.paths.to_string(),
                    e.seed.to_string(),
                    format!("{:.3}", e.elapsed.as_secs_f64()),
                    "ok".into(),
                    String::new(),
                    r.target.as_ref().map(|t| t.std_error.to_string()).unwrap_or_default(),
                    r.target.as_ref().map(|t| t.met.to_string()).unwrap_or_default(),
                    e.antithetic.to_string(),
                    r.control_variates.to_string(),
                    e.controls.join("; "),
                    r.overrides.join("; "),
                    r.version.into(),
                    r.payoff_sha256.clone(),
                    p.market_file.clone(),
                    r.market_sha256.clone(),
                    p.notional.to_string(),
                    CAUTION.into(),
                ]
            }
            Err(_) => {
                let mut f = vec![String::new(); CSV_COLUMNS.len()];
                f[0] = row.file.clone();
                f[9] = "error".into();
                f[10] = row.error_message().unwrap_or_default();
                f[17] = env!("CARGO_PKG_VERSION").into();
                f[22] = CAUTION.into();
                f
            }
        };
        w.write_record(&fields)?;
    }
    w.flush()
}

fn write_table(out: &mut dyn Write, rows: &[Row]) -> io::Result<()> {
    let width = rows.iter().map(|r| r.file.chars().count()).max().unwrap_or(4).max(4);
    writeln!(
        out,
        "{:<width$}  {:<36} {:>16} {:>10} {:>12} {:>11} {:>6}  status",
        "file", "product", "price", "% notional", "std error", "paths", "s"
    )?;
    for row in rows {
        match &row.outcome {
            Ok(p) => {
                let e = &p.estimate;
                let d = decimals(e.std_error);
                let mut status = "ok".to_string();
                if let Some(t) = &p.record.target {
                    if !t.met {
                        status = format!("ok, error target {} not met", group(t.std_error, d));
                    }
                }
                writeln!(
                    out,
                    "{:<width$}  {:<36} {:>16} {:>9.4}% {:>12} {:>11} {:>6.2}  {status}",
                    row.file,
                    clip(&p.product, 36),
                    format!("{} {}", group(e.price, d), p.currency),
                    p.percent_of_notional(),
                    group(e.std_error, d),
                    group(e.paths as f64, 0),
                    e.elapsed.as_secs_f64(),
                )?;
            }
            Err(_) => {
                writeln!(out, "{:<width$}  error: {}", row.file, row.error_message().unwrap_or_default())?;
            }
        }
    }
    let failed = rows.iter().filter(|r| r.outcome.is_err()).count();
    let seed = rows.iter().find_map(|r| r.outcome.as_ref().ok()).map(|p| p.estimate.seed);
    writeln!(out)?;
    write!(out, "{} files: {} priced, {failed} failed", rows.len(), rows.len() - failed)?;
    match seed {
        Some(s) => writeln!(out, "; seed {s}, pathfold {}", env!("CARGO_PKG_VERSION"))?,
        None => writeln!(out)?,
    }
    writeln!(out, "{CAUTION}")
}

fn clip(s: &str, n: usize) -> String {
    if s.chars().count() <= n {
        s.to_string()
    } else {
        let mut t: String = s.chars().take(n - 1).collect();
        t.push('…');
        t
    }
}
