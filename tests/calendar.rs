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

/// The dates of a priced file's payments (the profile's rows that pay).
fn payment_dates(v: &serde_json::Value) -> Vec<String> {
    v["profile"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|r| r["expected_pv"].as_f64().unwrap() != 0.0)
        .map(|r| r["date"].as_str().unwrap().to_string())
        .collect()
}

#[test]
fn a_lagged_payment_is_paid_business_days_later_and_discounted_from_then() {
    // `pay 250 on 2 business days after t calendar ZEX`: the second business day after
    // each date, weekends and ZEX holidays skipped (common practice for "payment date: 2
    // business days after the observation date").
    // - Wednesday 2026-12-23: Thursday 24th is one; Friday 25th is a ZEX holiday, then the
    //   weekend, so Monday 2026-12-28 is two.
    // - Wednesday 2026-12-30: Thursday 31st; Friday 2027-01-01 a holiday, the weekend;
    //   Monday 2027-01-04.
    // - Friday 2027-01-15: the weekend, Monday 18th a holiday; Tuesday 19th, Wednesday 20th.
    let v = price("tests/calendar/lagged.payoff", &["--paths", "2000"]);
    let paid = ["2026-12-28", "2027-01-04", "2027-01-20"];
    assert_eq!(payment_dates(&v), paid);
    // A fixed amount is worth the amount times the discount factor of its payment date
    // (identity: a deterministic payment), here on the market's flat 3.8% (ACT/365).
    let reference: f64 = paid.iter().map(|d| 250.0 * (-0.038 * years(d)).exp()).sum();
    let (p, se) = price_se(&v);
    assert!(se < 1e-9, "a fixed amount has no standard error: {se}");
    assert!((p - reference).abs() < 1e-9, "{p} against {reference}");
}

#[test]
fn a_lag_of_zero_business_days_is_the_date_rolled_following() {
    // Two writings of one product: paying 0 business days after each date, and paying on
    // the dates rolled following (common practice: a lag of 0 pays on the date itself, or
    // the next business day). Friday 2026-12-25 (holiday) → Monday 28th; Saturday
    // 2027-01-02 → Monday 4th; Monday 2027-01-18 (holiday) → Tuesday 19th.
    let lag = price("tests/calendar/lag_zero.payoff", &["--paths", "2000"]);
    let rolled = price("tests/calendar/rolled_following.payoff", &["--paths", "2000"]);
    assert_eq!(payment_dates(&lag), ["2026-12-28", "2027-01-04", "2027-01-19"]);
    assert_eq!(payment_dates(&rolled), payment_dates(&lag));
    assert_eq!(price_se(&lag).0.to_bits(), price_se(&rolled).0.to_bits());
}

#[test]
fn a_lagged_payment_of_a_past_observation_is_owed_until_its_payment_date() {
    // Observed Tuesday 2026-09-01, valued 2026-12-01 (common practice: a payment is owed
    // until its payment date). 2 business days later (2026-09-03) is paid already; 65 later
    // (weekends only: 21 in September after the 1st, 22 in October, 21 in November, then
    // Tuesday 2026-12-01) falls on the valuation date, discounted by 1.
    let v = price("tests/calendar/lagged_seasoned.payoff", &["--paths", "2000"]);
    assert_eq!(payment_dates(&v), ["2026-12-01"]);
    assert_eq!(price_se(&v).0, 1.0);
}
