//! Holiday calendars (`tests/calendar/holidays.csv`, named by `tests/calendar/market.toml`):
//! business-day schedules skip the holidays, rolled schedules move dates by the convention.

mod common;

use common::*;
use pathfold::date::Date;

#[test]
fn a_business_day_schedule_skips_the_listed_holidays() {
    // Pays 1 per date of `business days from 2026-12-02 to 2027-01-29 calendar ZEX` on the
    // last one: the price is the count of those days, discounted (a fact of the trade).
    // The count: Monday to Friday, less the holidays of the file that fall in the range.
    let holidays = ["2026-12-25", "2027-01-01", "2027-01-18"].map(|d| Date::parse(d).unwrap());
    let mut count = 0;
    let mut d = Date::parse("2026-12-02").unwrap();
    let last = Date::parse("2027-01-29").unwrap();
    while d <= last {
        if d.is_weekday() && !holidays.contains(&d) {
            count += 1;
        }
        d = d.add_days(1).unwrap();
    }
    assert_eq!(count, 40);
    let reference = f64::from(count) * (-0.038 * years("2027-01-29")).exp();
    let (p, _) = price_se(&price("tests/calendar/business_days.payoff", &["--paths", "2000"]));
    assert!((p - reference).abs() < 1e-9, "{p} against {reference}");
}

#[test]
fn modified_following_stays_in_the_month() {
    // Month ends of 2027 rolled by modified following on ZEX (common practice: the next
    // business day, unless that is in the next month, then the business day before).
    // Sundays 2027-01-31, 2027-02-28 and 2027-10-31, Saturday 2027-07-31, the holidays
    // 2027-05-31 and 2027-12-31: each goes back within its month.
    let v = price("tests/calendar/rolled.payoff", &["--paths", "2000"]);
    let dates: Vec<&str> = v["profile"].as_array().unwrap().iter().map(|r| r["date"].as_str().unwrap()).collect();
    assert_eq!(
        dates,
        [
            "2027-01-29",
            "2027-02-26",
            "2027-03-31",
            "2027-04-30",
            "2027-05-28",
            "2027-06-30",
            "2027-07-30",
            "2027-08-31",
            "2027-09-30",
            "2027-10-29",
            "2027-11-30",
            "2027-12-30"
        ]
    );
}
