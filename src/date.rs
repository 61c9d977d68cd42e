//! Calendar dates (ISO 8601, proleptic Gregorian) and the ACT/365 fixed year fraction.
//!
//! Small on purpose: schedules need parsing, month arithmetic with end-of-month clamping,
//! weekdays and day counts, nothing more.

use std::fmt;

/// The first and last years a payoff may name (both included): far enough for any trade,
/// near enough that every date sum below stays small.
pub const FIRST_YEAR: i32 = 1900;
pub const LAST_YEAR: i32 = 2200;

/// A calendar day, stored as days since 1970-01-01.
#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub struct Date(i32);

impl Date {
    /// The date for a year, month (1–12) and day, or `None` if there is no such day.
    pub fn from_ymd(year: i32, month: u32, day: u32) -> Option<Date> {
        if !(1..=12).contains(&month) || day == 0 || day > days_in_month(year, month) {
            return None;
        }
        Some(Date(days_from_civil(year, month, day)))
    }

    /// Parses `YYYY-MM-DD`.
    pub fn parse(text: &str) -> Option<Date> {
        let bytes = text.as_bytes();
        if bytes.len() != 10 || bytes[4] != b'-' || bytes[7] != b'-' {
            return None;
        }
        let year = text[0..4].parse().ok()?;
        let month = text[5..7].parse().ok()?;
        let day = text[8..10].parse().ok()?;
        Date::from_ymd(year, month, day)
    }

    pub fn ymd(self) -> (i32, u32, u32) {
        civil_from_days(self.0)
    }

    /// Whether the date lies in the supported years [`FIRST_YEAR`]..=[`LAST_YEAR`].
    pub fn in_range(self) -> bool {
        (FIRST_YEAR..=LAST_YEAR).contains(&self.ymd().0)
    }

    /// The date `days` later, or `None` outside the supported years.
    pub fn add_days(self, days: i64) -> Option<Date> {
        let d = Date(i32::try_from(i64::from(self.0).checked_add(days)?).ok()?);
        d.in_range().then_some(d)
    }

    /// Adds calendar months, clamping to the end of a shorter month (Jan 31 + 1m = Feb 28);
    /// `None` outside the supported years.
    pub fn add_months(self, months: i64) -> Option<Date> {
        let (y, m, d) = self.ymd();
        let total = (i64::from(y) * 12 + i64::from(m) - 1).checked_add(months)?;
        let year = i32::try_from(total.div_euclid(12)).ok()?;
        if !(FIRST_YEAR..=LAST_YEAR).contains(&year) {
            return None;
        }
        let month = total.rem_euclid(12) as u32 + 1;
        Some(Date(days_from_civil(year, month, d.min(days_in_month(year, month)))))
    }

    /// Monday to Friday.
    pub fn is_weekday(self) -> bool {
        // 1970-01-01 was a Thursday (index 3 with Monday = 0).
        (self.0 + 3).rem_euclid(7) < 5
    }

    /// Days from `self` to `later` (negative if `later` is earlier).
    pub fn days_until(self, later: Date) -> i32 {
        later.0 - self.0
    }

    /// ACT/365 fixed year fraction from `self` to `later`.
    pub fn years_until(self, later: Date) -> f64 {
        f64::from(self.days_until(later)) / 365.0
    }
}

impl fmt::Display for Date {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let (y, m, d) = self.ymd();
        write!(f, "{y:04}-{m:02}-{d:02}")
    }
}

fn is_leap(year: i32) -> bool {
    (year % 4 == 0 && year % 100 != 0) || year % 400 == 0
}

fn days_in_month(year: i32, month: u32) -> u32 {
    match month {
        2 if is_leap(year) => 29,
        2 => 28,
        4 | 6 | 9 | 11 => 30,
        _ => 31,
    }
}

// Howard Hinnant's days-from-civil algorithm.
fn days_from_civil(year: i32, month: u32, day: u32) -> i32 {
    let y = if month <= 2 { year - 1 } else { year };
    let era = y.div_euclid(400);
    let yoe = y - era * 400;
    let m = month as i32;
    let doy = (153 * (if m > 2 { m - 3 } else { m + 9 }) + 2) / 5 + day as i32 - 1;
    let doe = yoe * 365 + yoe / 4 - yoe / 100 + doy;
    era * 146_097 + doe - 719_468
}

fn civil_from_days(days: i32) -> (i32, u32, u32) {
    let z = days + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z - era * 146_097;
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let day = (doy - (153 * mp + 2) / 5 + 1) as u32;
    let month = if mp < 10 { mp + 3 } else { mp - 9 } as u32;
    let year = yoe + era * 400 + i32::from(month <= 2);
    (year, month, day)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn round_trips_and_counts_days() {
        let d = Date::parse("2026-12-01").unwrap();
        assert_eq!(d.to_string(), "2026-12-01");
        assert_eq!(Date::parse("1970-01-01").unwrap(), Date(0));
        assert_eq!(d.days_until(Date::parse("2027-12-01").unwrap()), 365);
        assert_eq!(Date::parse("2028-03-01").unwrap().days_until(Date::parse("2029-03-01").unwrap()), 365);
        assert_eq!(Date::parse("2028-02-01").unwrap().days_until(Date::parse("2028-03-01").unwrap()), 29);
        assert!(Date::parse("2027-02-29").is_none());
        assert!(Date::parse("2027-13-01").is_none());
    }

    #[test]
    fn month_arithmetic_clamps_to_month_end() {
        let d = Date::parse("2027-01-31").unwrap();
        assert_eq!(d.add_months(1).unwrap().to_string(), "2027-02-28");
        assert_eq!(d.add_months(13).unwrap().to_string(), "2028-02-29");
        assert_eq!(d.add_months(-2).unwrap().to_string(), "2026-11-30");
    }

    #[test]
    fn arithmetic_stays_in_the_supported_years() {
        let d = Date::parse("2026-12-01").unwrap();
        assert_eq!(d.add_days(1).unwrap().to_string(), "2026-12-02");
        assert_eq!(d.add_days(i64::MAX), None);
        assert_eq!(d.add_days(2_147_483_648), None);
        assert_eq!(d.add_months(i64::MAX), None);
        assert_eq!(d.add_months(12 * 175), None);
        assert_eq!(d.add_months(12 * 174).unwrap().to_string(), "2200-12-01");
        assert!(!Date::parse("9999-12-31").unwrap().in_range());
        assert!(Date::parse("1900-01-01").unwrap().in_range());
    }

    #[test]
    fn weekdays() {
        // 2026-12-01 is a Tuesday; 2026-12-05 a Saturday.
        assert!(Date::parse("2026-12-01").unwrap().is_weekday());
        assert!(!Date::parse("2026-12-05").unwrap().is_weekday());
        assert!(!Date::parse("2026-12-06").unwrap().is_weekday());
        assert!(Date::parse("2026-12-07").unwrap().is_weekday());
    }
}
