//! An input beside the stages: holiday calendars, read from a CSV file the market file
//! names (`calendars = "holidays.csv"`), and the business-day rolls of the payoff language.
//!
//! The format, one holiday a line:
//!
//! ```text
//! # comments and blank lines are skipped
//! calendar,date
//! ZEX,2026-12-25
//! ZEX,2027-01-01
//! ```
//!
//! A business day is a Monday to Friday that is not a holiday of the calendar.

use std::collections::{BTreeMap, BTreeSet};
use std::path::{Path, PathBuf};

use crate::date::Date;
use crate::diagnostic::{Diagnostic, Span};
use crate::files::read_regular_file;

/// A business-day convention for a date that is not a business day.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Roll {
    /// `following`: the next business day.
    Following,
    /// `modified following`: the next business day, unless it is in the next month; then
    /// the business day before.
    ModifiedFollowing,
    /// `preceding`: the business day before.
    Preceding,
}

/// Holidays by calendar name.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Calendars {
    /// The file they were read from.
    pub file: PathBuf,
    by: BTreeMap<String, BTreeSet<Date>>,
}

impl Calendars {
    /// Reads and checks a calendars file.
    pub fn load(path: &Path) -> Result<Calendars, Vec<Diagnostic>> {
        let text = read_regular_file(path).map_err(|err| {
            vec![Diagnostic::new(format!("cannot read the calendars file: {err}"))
                .with_fix(
                    "check the `calendars = \"...\"` line of the market file: the path is relative to the market file",
                )
                .in_file(path)]
        })?;
        Calendars::parse(&text, path)
    }

    /// Checks calendars given as text; `file` labels errors.
    pub fn parse(text: &str, file: &Path) -> Result<Calendars, Vec<Diagnostic>> {
        let mut errors = Vec::new();
        let mut by: BTreeMap<String, BTreeSet<Date>> = BTreeMap::new();
        let mut header_seen = false;
        let mut offset = 0;
        for line in text.split_inclusive('\n') {
            let start = offset;
            offset += line.len();
            let body = line.trim_end_matches(['\n', '\r']);
            if body.trim().is_empty() || body.trim_start().starts_with('#') {
                continue;
            }
            let whole = Span::new(start, start + body.len());
            let fields: Vec<&str> = body.split(',').map(str::trim).collect();
            if !header_seen {
                header_seen = true;
                if fields != ["calendar", "date"] {
                    errors.push(
                        Diagnostic::at(whole, "the first line of a calendars file must name its columns")
                            .with_fix("write `calendar,date`, then one holiday a line"),
                    );
                    break;
                }
                continue;
            }
            let [name, date] = fields[..] else {
                errors.push(
                    Diagnostic::at(whole, format!("a holiday has 2 fields, not {}", fields.len()))
                        .with_fix("write `CALENDAR,YYYY-MM-DD`, e.g. ZEX,2026-12-25"),
                );
                continue;
            };
            let date_at = start + body.rfind(date).unwrap_or(0);
            if name.is_empty() || !name.chars().all(|c| c.is_ascii_alphanumeric() || c == '_') {
                errors.push(
                    Diagnostic::at(whole, format!("`{name}` is not a calendar name"))
                        .with_fix("use letters, digits and _, e.g. ZEX"),
                );
                continue;
            }
            match Date::parse(date) {
                Some(d) => {
                    by.entry(name.to_string()).or_default().insert(d);
                }
                None => errors.push(
                    Diagnostic::at(Span::new(date_at, date_at + date.len()), format!("`{date}` is not a date"))
                        .with_fix("write the date as YYYY-MM-DD, e.g. 2026-12-25"),
                ),
            }
        }
        if !header_seen {
            errors.push(
                Diagnostic::at(Span::new(0, 0), "the calendars file is empty")
                    .with_fix("start it with the line `calendar,date`, then one holiday a line"),
            );
        }
        if errors.is_empty() {
            Ok(Calendars { file: file.to_path_buf(), by })
        } else {
            Err(errors.into_iter().map(|d| d.in_file(file)).collect())
        }
    }

    /// The holidays of a calendar.
    pub fn holidays(&self, name: &str) -> Option<&BTreeSet<Date>> {
        self.by.get(name)
    }

    /// The calendars' names.
    pub fn names(&self) -> Vec<&str> {
        self.by.keys().map(String::as_str).collect()
    }
}

/// Monday to Friday, and not a holiday.
pub fn is_business_day(d: Date, holidays: &BTreeSet<Date>) -> bool {
    d.is_weekday() && !holidays.contains(&d)
}

/// `d` moved to a business day by `roll`; `None` past the supported years.
pub fn roll(d: Date, roll: Roll, holidays: &BTreeSet<Date>) -> Option<Date> {
    let step = |from: Date, by: i64| {
        let mut x = from;
        while !is_business_day(x, holidays) {
            x = x.add_days(by)?;
        }
        Some(x)
    };
    match roll {
        Roll::Following => step(d, 1),
        Roll::Preceding => step(d, -1),
        Roll::ModifiedFollowing => {
            let next = step(d, 1)?;
            if next.ymd().1 == d.ymd().1 {
                Some(next)
            } else {
                step(d, -1)
            }
        }
    }
}

/// The payment date `days` business days after `d` (the first business day after `d` is
/// one): with 0, `d` itself rolled following. `None` past the supported years.
pub fn business_days_after(d: Date, days: u32, holidays: &BTreeSet<Date>) -> Option<Date> {
    if days == 0 {
        return roll(d, Roll::Following, holidays);
    }
    let mut x = d;
    let mut left = days;
    while left > 0 {
        x = x.add_days(1)?;
        if is_business_day(x, holidays) {
            left -= 1;
        }
    }
    Some(x)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn d(s: &str) -> Date {
        Date::parse(s).unwrap()
    }

    #[test]
    fn rolls_off_weekends_and_holidays() {
        let holidays: BTreeSet<Date> = [d("2027-05-31"), d("2027-12-31")].into_iter().collect();
        // 2027-07-31 is a Saturday: following goes to Monday 2027-08-02, out of July, so
        // modified following stays in the month on Friday 2027-07-30 (common practice).
        assert_eq!(roll(d("2027-07-31"), Roll::Following, &holidays), Some(d("2027-08-02")));
        assert_eq!(roll(d("2027-07-31"), Roll::ModifiedFollowing, &holidays), Some(d("2027-07-30")));
        assert_eq!(roll(d("2027-07-31"), Roll::Preceding, &holidays), Some(d("2027-07-30")));
        // 2027-05-29 is a Saturday and Monday 2027-05-31 a holiday: following is June 1st;
        // modified following goes back to Friday 2027-05-28.
        assert_eq!(roll(d("2027-05-29"), Roll::Following, &holidays), Some(d("2027-06-01")));
        assert_eq!(roll(d("2027-05-29"), Roll::ModifiedFollowing, &holidays), Some(d("2027-05-28")));
        // A business day stays put.
        assert_eq!(roll(d("2027-07-30"), Roll::ModifiedFollowing, &holidays), Some(d("2027-07-30")));
        // Within the month, modified following is following.
        assert_eq!(roll(d("2027-05-15"), Roll::ModifiedFollowing, &holidays), Some(d("2027-05-17")));
    }

    #[test]
    fn payment_lags_count_business_days_after_the_date() {
        // A lag of N business days: the N-th business day after the date, weekends and the
        // calendar's holidays skipped; a lag of 0 is the date rolled following (common
        // practice for "payment date: N business days after the observation date").
        let holidays: BTreeSet<Date> = [d("2026-12-25"), d("2027-01-01")].into_iter().collect();
        // Thursday 2026-12-24: Friday 25th is a holiday, then the weekend; Monday 28th is
        // the first business day after, Tuesday 29th the second.
        assert_eq!(business_days_after(d("2026-12-24"), 1, &holidays), Some(d("2026-12-28")));
        assert_eq!(business_days_after(d("2026-12-24"), 2, &holidays), Some(d("2026-12-29")));
        // Wednesday 2026-12-30, 2 days: Thursday 31st, then (Friday 1st a holiday, the
        // weekend) Monday 2027-01-04.
        assert_eq!(business_days_after(d("2026-12-30"), 2, &holidays), Some(d("2027-01-04")));
        // From a Saturday, the first business day after is the Monday.
        assert_eq!(business_days_after(d("2027-01-02"), 1, &holidays), Some(d("2027-01-04")));
        // 0 days: a business day stays, a holiday or a weekend rolls following.
        assert_eq!(business_days_after(d("2026-12-24"), 0, &holidays), Some(d("2026-12-24")));
        assert_eq!(business_days_after(d("2026-12-25"), 0, &holidays), Some(d("2026-12-28")));
        // Without holidays only weekends skip: Friday 2026-12-25 is then a business day.
        let none = BTreeSet::new();
        assert_eq!(business_days_after(d("2026-12-24"), 1, &none), Some(d("2026-12-25")));
        assert_eq!(business_days_after(d("2026-12-24"), 2, &none), Some(d("2026-12-28")));
    }

    #[test]
    fn reads_holidays_and_refuses_bad_lines_at_their_place() {
        let f = Calendars::parse(
            "# holidays\ncalendar,date\nZEX,2026-12-25\nZEX, 2027-01-01\nQMX,2027-01-01\n",
            Path::new("h.csv"),
        )
        .unwrap();
        assert_eq!(f.names(), ["QMX", "ZEX"]);
        assert!(f.holidays("ZEX").unwrap().contains(&d("2027-01-01")));
        let text = "calendar,date\nZEX,2026-12-32\n";
        let errs = Calendars::parse(text, Path::new("h.csv")).unwrap_err();
        assert_eq!(errs[0].message, "`2026-12-32` is not a date");
        let span = errs[0].span.unwrap();
        assert_eq!(&text[span.start..span.end], "2026-12-32");
        let errs = Calendars::parse("name,day\n", Path::new("h.csv")).unwrap_err();
        assert_eq!(errs[0].message, "the first line of a calendars file must name its columns");
    }
}
