//! `pathfold price` against independent references: closed forms that are themselves
//! checked against published examples in `src/closed_form/` (Hull's and Haug's worked
//! examples, named there), and facts of the trade. Fixed seeds throughout.

mod common;

use common::*;
use pathfold::closed_form::{
    black_scholes, cash_or_nothing, forward_start, geometric_asian_discrete, margrabe, standard_barrier, BarrierKind,
    OptionKind,
};

const NOTIONAL: f64 = 1_000_000.0;

/// Black–Scholes on unit spot and strike 1 (the payoffs are in performance terms).
fn bs(kind: OptionKind, t: f64, a: &Asset) -> f64 {
    black_scholes(kind, 1.0, 1.0, t, RATE, RATE - a.q, a.vol)
}

#[test]
fn european_call_and_put_agree_with_black_scholes() {
    // Reference: Black–Scholes–Merton, src/closed_form (checked there against Hull's
    // example S=42, K=40, r=10%, σ=20%, T=0.5: call 4.76, put 0.81, from memory).
    let t = years("2027-12-01");
    for (file, kind) in
        [("payoffs/european_call.payoff", OptionKind::Call), ("payoffs/european_put.payoff", OptionKind::Put)]
    {
        let reference = NOTIONAL * bs(kind, t, &ZPHX);
        let (p, se) = price_se(&price(file, &["--paths", "100000", "--seed", "11"]));
        assert_within(file, p, se, reference, 3.5);
        // Plain Monte Carlo, no variance reduction: same reference, wider error.
        let (p, se) = price_se(&price(file, &["--paths", "100000", "--seed", "12", "--no-control", "--no-antithetic"]));
        assert_within(file, p, se, reference, 3.5);
    }
}

#[test]
fn put_call_parity_holds_on_the_same_paths() {
    // C − P = S·e^{−qT} − K·e^{−rT} (put–call parity, common practice), per unit of notional.
    let t = years("2027-12-01");
    let parity = NOTIONAL * ((-ZPHX.q * t).exp() - (-RATE * t).exp());
    let args = ["--paths", "50000", "--seed", "5", "--no-control"];
    let (c, se_c) = price_se(&price("payoffs/european_call.payoff", &args));
    let (p, se_p) = price_se(&price("payoffs/european_put.payoff", &args));
    assert_within("call − put", c - p, se_c + se_p, parity, 3.5);
}

#[test]
fn control_variates_cut_the_variance_of_the_call_more_than_tenfold() {
    let v = price("payoffs/european_call.payoff", &["--paths", "50000", "--no-antithetic"]);
    let cut = v["variance_reduction"].as_f64().expect("a measured reduction");
    assert!(cut > 10.0, "control variates alone cut the variance {cut:.1} times");
    assert_eq!(v["controls"][1], "ZPHX call");
}

#[test]
fn antithetic_pairs_reduce_the_variance_of_a_monotone_payoff() {
    let v = price("payoffs/european_call.payoff", &["--paths", "50000", "--no-control"]);
    let cut = v["variance_reduction"].as_f64().expect("a measured reduction");
    assert!(cut > 1.2, "antithetic pairs alone cut the variance {cut:.2} times");
}

#[test]
fn one_thread_and_two_threads_give_the_same_bits() {
    for file in ["payoffs/worst_of_autocall.payoff", "payoffs/barrier_reverse_convertible.payoff"] {
        let strip = |mut v: serde_json::Value| {
            v.as_object_mut().unwrap().remove("elapsed_seconds");
            v
        };
        let one = strip(price(file, &["--paths", "30000", "--seed", "9", "--threads", "1"]));
        let two = strip(price(file, &["--paths", "30000", "--seed", "9", "--threads", "2"]));
        assert_eq!(one, two, "{file}");
        let other_seed = strip(price(file, &["--paths", "30000", "--seed", "10", "--threads", "2"]));
        assert_ne!(one["price"], other_seed["price"], "{file}: the seed matters");
    }
}

#[test]
fn overrides_change_the_price_as_the_term_sheet_says() {
    // A higher strike lowers a call (common practice).
    let (base, _) = price_se(&price("payoffs/european_call.payoff", &["--paths", "20000"]));
    let (higher, _) = price_se(&price("payoffs/european_call.payoff", &["--paths", "20000", "--set", "strike=110%"]));
    assert!(higher < base, "strike 110%: {higher} not below {base}");
    let reference = NOTIONAL * black_scholes(OptionKind::Call, 1.0, 1.1, 1.0, RATE, RATE - ZPHX.q, ZPHX.vol);
    let (p, se) = price_se(&price("payoffs/european_call.payoff", &["--paths", "50000", "--set", "strike=110%"]));
    assert_within("110% call", p, se, reference, 3.5);
}

/// Catalogue files with an exact closed-form reference.
#[test]
fn catalogue_products_with_closed_forms_agree_with_them() {
    let args = ["--paths", "100000", "--seed", "3"];
    // Digital: cash-or-nothing call (src/closed_form, checked against Haug's example,
    // from memory), 10% of notional if QMEN ≥ 105% at six months.
    let t = years("2027-06-01");
    let reference = cash_or_nothing(OptionKind::Call, 1.0, 1.05, 0.10 * NOTIONAL, t, RATE, RATE - QMEN.q, QMEN.vol);
    let (p, se) = price_se(&price("payoffs/digital.payoff", &args));
    assert_within("digital", p, se, reference, 3.5);

    // Outperformance: Margrabe's exchange option on unit performances (src/closed_form,
    // checked there against an independent numerical integration).
    let t = years("2027-12-01");
    let reference = NOTIONAL * margrabe(1.0, 1.0, t, RATE, RATE - QMEN.q, RATE - OSMP.q, QMEN.vol, OSMP.vol, 0.40);
    let (p, se) = price_se(&price("payoffs/outperformance.payoff", &args));
    assert_within("outperformance", p, se, reference, 3.5);

    // Forward start: Rubinstein's formula on unit spot (src/closed_form, checked against
    // Haug's example, from memory). Our payoff is in units of the reset level, so divide
    // by the expected discounted reset level e^{(b−r)t1} and discount over t1 instead.
    let (t1, t2) = (years("2027-06-01"), years("2028-06-01"));
    let b = RATE - ZPHX.q;
    let reference = NOTIONAL * forward_start(OptionKind::Call, 1.0, 1.0, t1, t2, RATE, b, ZPHX.vol) * (-b * t1).exp();
    let (p, se) = price_se(&price("payoffs/forward_start_call.payoff", &args));
    assert_within("forward start", p, se, reference, 3.5);

    // Barrier reverse convertible = quarterly coupons + notional at maturity − a
    // down-and-in put struck at 100% with a continuously monitored barrier at 65%
    // (Reiner–Rubinstein, src/closed_form, checked there against Haug's barrier table).
    let b = RATE - OSMP.q;
    let coupons: f64 = ["2027-03-01", "2027-06-01", "2027-09-01", "2027-12-01"]
        .iter()
        .map(|d| NOTIONAL * 0.09 / 4.0 * (-RATE * years(d)).exp())
        .sum();
    let dip = standard_barrier(OptionKind::Put, BarrierKind::DownAndIn, 1.0, 1.0, 0.65, 0.0, t, RATE, b, OSMP.vol);
    let reference = coupons + NOTIONAL * ((-RATE * t).exp() - dip);
    let (p, se) = price_se(&price("payoffs/barrier_reverse_convertible.payoff", &args));
    assert_within("barrier reverse convertible", p, se, reference, 3.5);
}

/// The knock-out note with its rebate paid at the touch, against Reiner–Rubinstein
/// (Haug, The Complete Guide to Option Pricing Formulas, ch. 4): the quarterly windows
/// `from previous(t) to t` cover the whole life, so the note is continuously monitored:
/// 120% of an up-and-out call struck at 100% (barrier 140%, no rebate), plus 106% paid at
/// the touch (the rebate term of an up-and-out call struck above its barrier), plus 100% at
/// maturity if never touched (the rebate term of an up-and-in struck above its barrier).
#[test]
fn the_knock_out_note_is_worth_its_reiner_rubinstein_parts() {
    let t = years("2028-06-01");
    let b = RATE - QMEN.q;
    let barrier =
        |kind, k: f64, rebate: f64| standard_barrier(OptionKind::Call, kind, 1.0, k, 1.4, rebate, t, RATE, b, QMEN.vol);
    let reference = NOTIONAL
        * (1.2 * barrier(BarrierKind::UpAndOut, 1.0, 0.0)
            + barrier(BarrierKind::UpAndOut, 1e6, 1.06)
            + barrier(BarrierKind::UpAndIn, 1e6, 1.0));
    let v = price("payoffs/knock_out_note.payoff", &["--paths", "200000", "--seed", "3"]);
    let (p, se) = price_se(&v);
    assert_within("knock-out note with the rebate at the touch", p, se, reference, 4.0);
}

/// Every catalogue file parses, checks and prices; each price lies in a band that follows
/// from the term sheet alone.
#[test]
fn every_catalogue_file_prices_inside_its_sanity_band() {
    let t1 = years("2027-12-01");
    let df = |t: f64| (-RATE * t).exp();
    let call = |t: f64, a: &Asset| NOTIONAL * bs(OptionKind::Call, t, a);
    let put = |t: f64, a: &Asset| NOTIONAL * bs(OptionKind::Put, t, a);
    let monthly: Vec<f64> = (0..24)
        .map(|i| {
            let (y, m) = (2027 + i / 12, 1 + i % 12);
            years(&format!("{y}-{m:02}-01"))
        })
        .collect();
    let t_asian = *monthly.last().unwrap();
    let geometric = NOTIONAL
        * geometric_asian_discrete(OptionKind::Call, 1.0, 1.0, &monthly, t_asian, RATE, RATE - ZPHX.q, ZPHX.vol);
    let mean_average: f64 =
        monthly.iter().map(|t| ((RATE - ZPHX.q) * t).exp()).sum::<f64>() / 24.0 * NOTIONAL * df(t_asian);
    let t5 = years("2031-12-01");
    let t2 = years("2028-12-01");
    let t3 = years("2029-12-01");
    let bands: Vec<(&str, f64, f64, &str)> = vec![
        (
            "asian_call",
            geometric,
            call(t_asian, &ZPHX),
            "geometric ≤ arithmetic average call ≤ vanilla call on the last fixing (convex order, r > q)",
        ),
        ("average_strike_put", 0.0, mean_average, "0 ≤ payoff ≤ the average itself"),
        ("barrier_reverse_convertible", 0.0, NOTIONAL * (df(t1) + 0.09), "pays at most 100% plus the coupons"),
        (
            "best_of_call",
            call(t1, &ZPHX).max(call(t1, &VNTL)),
            call(t1, &ZPHX) + call(t1, &VNTL),
            "max of the two calls ≤ best-of call ≤ their sum",
        ),
        (
            "callable_autocall",
            0.0,
            NOTIONAL * 1.27,
            "pays at most 100% plus twelve 2.25% coupons; a call only ends it sooner, at 100%",
        ),
        ("cliquet", 0.0, NOTIONAL * 0.15 * df(t3), "pays between 0 and the 15% global cap"),
        ("digital", 0.0, NOTIONAL * 0.10, "pays 0 or 10%"),
        ("european_call", 0.0, NOTIONAL * (-ZPHX.q * t1).exp(), "a call is worth less than the share"),
        ("european_put", 0.0, NOTIONAL * df(t1), "a put is worth less than its discounted strike"),
        (
            "forward_start_call",
            0.0,
            NOTIONAL,
            "max(x − 1, 0) ≤ x = final / reset level, whose discounted expectation is below 1",
        ),
        (
            "knock_out_note",
            NOTIONAL * df(years("2028-06-01")),
            NOTIONAL * 1.06 + 1.2 * call(years("2028-06-01"), &QMEN),
            "at least 100% by maturity; at most 106% now or 100% plus 120% of the call",
        ),
        (
            "lookback",
            call(t1, &VNTL),
            NOTIONAL,
            "≥ the vanilla call (highest ≥ final); ≤ 100% (VNTL would have to double)",
        ),
        (
            "outperformance",
            0.0,
            NOTIONAL * (-QMEN.q * t1).exp(),
            "max(a − b, 0) ≤ a, and QMEN's performance is worth e^{−qT} today",
        ),
        (
            "protected_basket_note",
            NOTIONAL * df(t5),
            NOTIONAL * df(t5) * (1.0 + 0.8 * 0.45),
            "between the discounted floor and the discounted capped maximum",
        ),
        (
            "quanto_call",
            0.0,
            NOTIONAL,
            "a call on a level that grows slower than the USD rate: below its discounted forward, itself below 100%",
        ),
        ("range_accrual", NOTIONAL * df(t1), NOTIONAL * df(t1) * 1.07, "principal plus between 0% and 7% at maturity"),
        ("seasoned_worst_of_autocall", 0.0, NOTIONAL * 1.27, "pays at most 100% plus twelve 2.25% coupons"),
        (
            "twin_win",
            NOTIONAL,
            NOTIONAL * df(t2) + call(t2, &VNTL) + put(t2, &VNTL),
            "≥ the share (payoff ≥ final performance, no dividend) and ≤ 100% plus the straddle",
        ),
        ("up_and_out_call", 0.0, call(t1, &ZPHX) + 0.05 * NOTIONAL, "≤ the vanilla call plus the rebate"),
        ("worst_of_autocall", 0.0, NOTIONAL * 1.27, "pays at most 100% plus twelve 2.25% coupons"),
        ("worst_of_autocall_on_curves", 0.0, NOTIONAL * 1.27, "pays at most 100% plus twelve 2.25% coupons"),
        ("worst_of_autocall_stepdown", 0.0, NOTIONAL * 1.27, "pays at most 100% plus twelve 2.25% coupons"),
    ];
    let mut files: Vec<String> = std::fs::read_dir("payoffs")
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.extension().is_some_and(|e| e == "payoff"))
        .map(|p| p.file_stem().unwrap().to_string_lossy().into_owned())
        .collect();
    files.sort();
    let named: Vec<&str> = bands.iter().map(|b| b.0).collect();
    assert_eq!(files, named, "every demo file has a band, and every band a file");
    for (name, lo, hi, why) in bands {
        let v = price(&format!("payoffs/{name}.payoff"), &["--paths", "20000"]);
        let (p, se) = price_se(&v);
        assert!(p.is_finite() && se.is_finite() && se >= 0.0, "{name}: {p} ± {se}");
        assert!(lo - 4.0 * se <= p && p <= hi + 4.0 * se, "{name}: {p:.2} ± {se:.2} outside [{lo:.2}, {hi:.2}]: {why}");
        assert!(v["caution"].as_str().unwrap().contains("not a quote"));
    }
}

#[test]
fn the_table_report_shows_the_price_profile_and_caution() {
    let (stdout, _, code) = run(&["price", "payoffs/worst_of_autocall.payoff", "--paths", "20000"]);
    assert_eq!(code, Some(0));
    for needle in
        ["price", "standard error", "95% interval", "paths", "variance cut", "ends here", "2029-12-01", "Caution:"]
    {
        assert!(stdout.contains(needle), "missing {needle:?} in\n{stdout}");
    }
    assert!(stdout.trim_end().ends_with("come first."), "the caution is the last line");
}

/// The number after `label` on the report line that starts with it, as written.
fn shown<'a>(report: &'a str, label: &str) -> Vec<&'a str> {
    let line = report.lines().find(|l| l.trim_start().starts_with(label)).unwrap_or_else(|| panic!("{report}"));
    line.trim_start()[label.len()..]
        .split_whitespace()
        .filter(|w| w.starts_with(|c: char| c.is_ascii_digit()))
        .collect()
}

fn decimals(number: &str) -> usize {
    number.split_once('.').map_or(0, |(_, f)| f.len())
}

#[test]
fn a_small_standard_error_is_shown_with_two_significant_digits() {
    // A price near 11 with control variates has a standard error well under a cent: the
    // table must not round it to 0.00, and the interval must not collapse to one number.
    // Reference: Black–Scholes–Merton (src/closed_form, checked there against Hull's and
    // Haug's worked examples) for S = K = 100, T = 1, r = 8%, b = 4%, σ = 25%.
    let (stdout, stderr, code) = run(&["price", "payoffs/validation/call_atm.payoff", "--paths", "20000"]);
    assert_eq!(code, Some(0), "{stderr}");
    let se_text = shown(&stdout, "standard error")[0];
    let se: f64 = se_text.parse().unwrap();
    assert!(se > 0.0 && se < 0.01, "{stdout}");
    let significant = se_text.trim_start_matches(['0', '.']).len();
    assert!(significant >= 2, "standard error shown as {se_text}:\n{stdout}");
    let price_text = shown(&stdout, "price")[0];
    let interval = shown(&stdout, "95% interval");
    assert_eq!(decimals(price_text), decimals(se_text), "{stdout}");
    assert!(interval.iter().all(|x| decimals(x) == decimals(se_text)), "{stdout}");
    assert_ne!(interval[0], interval[1], "{stdout}");
    let price: f64 = price_text.parse().unwrap();
    let reference = black_scholes(OptionKind::Call, 100.0, 100.0, 1.0, 0.08, 0.04, 0.25);
    assert_within("call_atm", price, se, reference, 4.0);

    // The batch table shows the same decimals.
    let (stdout, _, code) =
        run(&["price", "payoffs/validation/call_atm.payoff", "payoffs/validation/put_atm.payoff", "--paths", "20000"]);
    assert_eq!(code, Some(0));
    let row = stdout.lines().find(|l| l.starts_with("payoffs/validation/call_atm.payoff")).unwrap();
    assert!(row.contains(&format!(" {price_text} USD ")), "{row}");
    assert!(row.contains(&format!(" {se_text} ")), "{row}");
}

#[test]
fn the_avx512_lane_loops_give_the_bits_of_the_avx2_ones() {
    // Where the CPU has AVX-512 the lane loops (paths, operations, controls) run on it;
    // `PATHFOLD_NO_AVX512` holds them to AVX2. The same IEEE operations either way, so
    // every demo payoff prices to the same bits, in each sampling mode. (On a CPU without
    // AVX-512 both runs take AVX2 and this compares a run with itself.)
    let strip = |out: std::process::Output| -> String {
        assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
        String::from_utf8_lossy(&out.stdout).lines().filter(|l| !l.contains("elapsed")).collect::<Vec<_>>().join("\n")
    };
    let mut priced = 0;
    for entry in
        std::fs::read_dir(std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("payoffs")).expect("the demo library")
    {
        let file = entry.expect("a demo file").path();
        if file.extension().is_none_or(|e| e != "payoff") {
            continue;
        }
        for mode in [&[][..], &["--no-antithetic"], &["--sampler", "sobol"]] {
            let mut args = vec!["price", file.to_str().expect("a UTF-8 path"), "--paths", "3000", "--seed", "9"];
            args.extend_from_slice(&["--threads", "1", "--format", "json"]);
            args.extend_from_slice(mode);
            let run = |narrow: bool| {
                let mut c = std::process::Command::new(env!("CARGO_BIN_EXE_pathfold"));
                c.args(&args).current_dir(env!("CARGO_MANIFEST_DIR"));
                if narrow {
                    c.env("PATHFOLD_NO_AVX512", "1");
                }
                strip(c.output().expect("the binary runs"))
            };
            assert_eq!(run(false), run(true), "{} {mode:?}", file.display());
            priced += 1;
        }
    }
    assert!(priced >= 60, "demo payoffs priced: {priced}");
}
