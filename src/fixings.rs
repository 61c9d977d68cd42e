//! An input beside the stages: the fixings of a running trade — the levels already observed,
//! by date and underlying — read from a CSV file the market file names.
//!
//! The format (one fixing a line, so a middle office appends to it day by day):
//!
//! ```text
//! # comments and blank lines are skipped
//! date,underlying,level,low,high
//! 2026-06-01,OSMP,104.30,,
//! 2026-09-14,OSMP,79.95,71.80,80.40
//! ```
//!
//! `level` is the closing level; `low` and `high` (optional, may be left empty) are the
//! day's extremes, read for continuously monitored barriers over past dates. Every problem
//! is reported with its line and column.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use crate::date::Date;
use crate::diagnostic::{Diagnostic, Span};
use crate::files::read_regular_file;

/// One day's observation of one underlying.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Fixing {
    pub level: f64,
    pub low: Option<f64>,
    pub high: Option<f64>,
}

/// The fixings of a file, by underlying and date.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Fixings {
    /// The file they were read from.
    pub file: PathBuf,
    by: BTreeMap<(String, Date), Fixing>,
}

const HEADER: &str = "date,underlying,level,low,high";

impl Fixings {
    /// Reads and checks a fixings file.
    pub fn load(path: &Path) -> Result<Fixings, Vec<Diagnostic>> {
        let text = read_regular_file(path).map_err(|err| {
            vec![Diagnostic::new(format!("cannot read the fixings file: {err}"))
                .with_fix(
                    "check the `fixings = \"...\"` line of the market file: the path is relative to the market file",
                )
                .in_file(path)]
        })?;
        Fixings::parse(&text, path)
    }

    /// Checks fixings given as text; `file` labels errors.
    pub fn parse(text: &str, file: &Path) -> Result<Fixings, Vec<Diagnostic>> {
        let mut errors = Vec::new();
        let mut by: BTreeMap<(String, Date), (Fixing, usize)> = BTreeMap::new();
        let mut header_seen = false;
        let mut offset = 0;
        for (number, line) in text.split_inclusive('\n').enumerate() {
            let start = offset;
            offset += line.len();
            let body = line.trim_end_matches(['\n', '\r']);
            if body.trim().is_empty() || body.trim_start().starts_with('#') {
                continue;
            }
            // Fields with their spans.
            let mut fields = Vec::new();
            let mut at = start;
            for f in body.split(',') {
                let lead = f.len() - f.trim_start().len();
                let trimmed = f.trim();
                fields.push((trimmed, Span::new(at + lead, at + lead + trimmed.len())));
                at += f.len() + 1;
            }
            let whole = Span::new(start, start + body.len());
            if !header_seen {
                header_seen = true;
                let names: Vec<&str> = fields.iter().map(|(f, _)| *f).collect();
                if names != ["date", "underlying", "level"] && names != ["date", "underlying", "level", "low", "high"] {
                    errors.push(
                        Diagnostic::at(whole, "the first line of a fixings file must name its columns")
                            .with_fix(format!("write `{HEADER}` (low and high may be left out)")),
                    );
                    break;
                }
                continue;
            }
            if fields.len() != 3 && fields.len() != 5 {
                errors.push(
                    Diagnostic::at(whole, format!("a fixing has 3 or 5 fields, not {}", fields.len()))
                        .with_fix("write `date,underlying,level` or `date,underlying,level,low,high`"),
                );
                continue;
            }
            let (date_text, date_span) = fields[0];
            let Some(date) = Date::parse(date_text) else {
                errors.push(
                    Diagnostic::at(date_span, format!("`{date_text}` is not a date"))
                        .with_fix("write the date as YYYY-MM-DD, e.g. 2026-06-01"),
                );
                continue;
            };
            let (name, name_span) = fields[1];
            if name.is_empty() || !name.chars().all(|c| c.is_ascii_alphanumeric() || c == '_') {
                errors.push(
                    Diagnostic::at(name_span, format!("`{name}` is not an underlying name"))
                        .with_fix("write the name as the market file and the payoff do, e.g. ZPHX"),
                );
                continue;
            }
            let mut number_at = |i: usize, what: &str, required: bool| -> Result<Option<f64>, ()> {
                let (text, span) = fields[i];
                if text.is_empty() && !required {
                    return Ok(None);
                }
                match text.replace('_', "").parse::<f64>() {
                    Ok(x) if x.is_finite() && x > 0.0 => Ok(Some(x)),
                    _ => {
                        errors.push(
                            Diagnostic::at(
                                span,
                                format!("the {what} of {name} on {date} must be a positive number (got `{text}`)"),
                            )
                            .with_fix("write the level as a plain number, e.g. 4012.5"),
                        );
                        Err(())
                    }
                }
            };
            let Ok(Some(level)) = number_at(2, "level", true) else { continue };
            let (low, high) = if fields.len() == 5 {
                let (Ok(low), Ok(high)) = (number_at(3, "low", false), number_at(4, "high", false)) else { continue };
                (low, high)
            } else {
                (None, None)
            };
            if low.is_some_and(|l| l > level) || high.is_some_and(|h| h < level) {
                errors.push(
                    Diagnostic::at(
                        whole,
                        format!("the low and high of {name} on {date} must hold the level {level} between them"),
                    )
                    .with_fix("check the columns: date,underlying,level,low,high"),
                );
                continue;
            }
            let key = (name.to_string(), date);
            if let Some((_, first)) = by.get(&key) {
                errors.push(
                    Diagnostic::at(date_span, format!("{name} is fixed twice on {date} (first on line {first})"))
                        .with_fix("keep one line per underlying and date"),
                );
                continue;
            }
            by.insert(key, (Fixing { level, low, high }, number + 1));
        }
        if !header_seen {
            errors.push(
                Diagnostic::at(Span::new(0, 0), "the fixings file is empty")
                    .with_fix(format!("start it with the line `{HEADER}`, then one fixing a line")),
            );
        }
        if errors.is_empty() {
            Ok(Fixings { file: file.to_path_buf(), by: by.into_iter().map(|(k, (f, _))| (k, f)).collect() })
        } else {
            Err(errors.into_iter().map(|d| d.in_file(file)).collect())
        }
    }

    /// The fixing of `name` on `date`.
    pub fn get(&self, name: &str, date: Date) -> Option<Fixing> {
        self.by.get(&(name.to_string(), date)).copied()
    }

    /// Every fixing of `name` on dates from `from` to `to`, both included, in date order.
    pub fn between(&self, name: &str, from: Date, to: Date) -> Vec<(Date, Fixing)> {
        self.by.range((name.to_string(), from)..=(name.to_string(), to)).map(|((_, d), f)| (*d, *f)).collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn file() -> &'static Path {
        Path::new("fixings.csv")
    }

    fn d(s: &str) -> Date {
        Date::parse(s).unwrap()
    }

    #[test]
    fn reads_levels_and_extremes() {
        let text = "# past fixings\ndate,underlying,level,low,high\n2026-06-01,OSMP,104.30,,\n\n2026-09-14, OSMP ,79.95,71.80,80.40\n2026-06-01,ZPHX,4_012.5,,\n";
        let f = Fixings::parse(text, file()).unwrap();
        assert_eq!(f.get("OSMP", d("2026-06-01")), Some(Fixing { level: 104.30, low: None, high: None }));
        assert_eq!(f.get("OSMP", d("2026-09-14")), Some(Fixing { level: 79.95, low: Some(71.80), high: Some(80.40) }));
        assert_eq!(f.get("ZPHX", d("2026-06-01")).map(|x| x.level), Some(4012.5));
        assert_eq!(f.get("ZPHX", d("2026-06-02")), None);
        assert_eq!(f.between("OSMP", d("2026-01-01"), d("2026-12-01")).len(), 2);
        let three = Fixings::parse("date,underlying,level\n2026-06-01,OSMP,104.3\n", file()).unwrap();
        assert_eq!(three.get("OSMP", d("2026-06-01")).map(|x| x.level), Some(104.3));
    }

    fn only_error(text: &str) -> (String, String) {
        let errs = Fixings::parse(text, file()).unwrap_err();
        assert_eq!(errs.len(), 1, "{errs:#?}");
        let span = errs[0].span.unwrap();
        (errs[0].message.clone(), text[span.start..span.end].to_string())
    }

    #[test]
    fn refuses_bad_lines_at_their_place() {
        let h = "date,underlying,level\n";
        assert_eq!(
            only_error(&format!("{h}2026-06-31,OSMP,104.3\n")),
            ("`2026-06-31` is not a date".into(), "2026-06-31".into())
        );
        assert_eq!(
            only_error(&format!("{h}2026-06-01,OSMP,-3\n")),
            ("the level of OSMP on 2026-06-01 must be a positive number (got `-3`)".into(), "-3".into())
        );
        assert_eq!(
            only_error(&format!("{h}2026-06-01,OSMP,104.3\n2026-06-01,OSMP,104.4\n")),
            ("OSMP is fixed twice on 2026-06-01 (first on line 2)".into(), "2026-06-01".into())
        );
        assert_eq!(only_error(&format!("{h}2026-06-01,OSMP\n")).0, "a fixing has 3 or 5 fields, not 2");
        assert_eq!(only_error("when,what,level\n").0, "the first line of a fixings file must name its columns");
        assert_eq!(only_error("# nothing\n").0, "the fixings file is empty");
        let (m, _) = only_error("date,underlying,level,low,high\n2026-06-01,OSMP,104.3,105,106\n");
        assert_eq!(m, "the low and high of OSMP on 2026-06-01 must hold the level 104.3 between them");
    }
}
