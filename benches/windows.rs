//! Windows re-asked on every date of a loop: a knock-out watched continuously and checked
//! on each of n loop dates, written three ways, priced as `pathfold price --no-control`
//! does it (parse, check, compile, simulate) on one thread:
//!
//! - `since previous`: `touched(... from previous(t) to t)` on each date;
//! - `from start`: `touched(... from start to t)` on each date, which the compiler keeps
//!   running between the loop's dates (each run watches only the new steps);
//! - `single window`: one `touched(... from start to last(days))` at the end.
//!
//! All three give the same bits (tests/language_v2.rs). Before windows ran on, `from
//! start` cost grew with n² (n windows of up to n steps). The summary prints each form's
//! time per loop date for n = 63 to 504: flat when the cost is linear in n.
//!
//! `cargo bench --bench windows` (criterion groups, then the summary);
//! `cargo bench --bench windows -- nomatch` for the summary alone.

use std::hint::black_box;
use std::path::{Path, PathBuf};
use std::time::Instant;

use criterion::{criterion_group, BenchmarkId, Criterion, SamplingMode};
use pathfold::pricing::price_file;
use pathfold::sim::Settings;

const PATHS: u64 = 4_000;
const DATES: [u32; 4] = [63, 126, 252, 504];
const FORMS: [&str; 3] = ["since previous", "from start", "single window"];

/// The payoff text of `form` over `n` loop dates in one year.
fn payoff(form: &str, n: u32) -> String {
    let head = format!(
        "product \"windowed knock-out\"\ncurrency BEN\nnotional 1\nunderlyings BENCHV\nmarket \"market.toml\"\n\
         dates days = {n} steps from start to 1y\n"
    );
    let body = match form {
        "single window" => "at last(days) {
    if touched(level(BENCHV) >= 125 from start to last(days)) {
        pay 5 on first touch(level(BENCHV) >= 125 from start to last(days))
    } else {
        pay max(level(BENCHV) - 100, 0)
    }
}
"
        .to_string(),
        _ => {
            let from = if form == "since previous" { "previous(t)" } else { "start" };
            format!(
                "for each t in days {{
    if touched(level(BENCHV) >= 125 from {from} to t) {{
        pay 5 on first touch(level(BENCHV) >= 125 from {from} to t)
        end
    }}
    if t == last(days) {{ pay max(level(BENCHV) - 100, 0) }}
}}
"
            )
        }
    };
    head + &body
}

/// Writes every payoff beside a copy of the benchmark market; returns its folder.
fn write_payoffs() -> PathBuf {
    let dir = std::env::temp_dir().join(format!("pathfold-bench-windows-{}", std::process::id()));
    std::fs::create_dir_all(&dir).expect("a writable temporary folder");
    let market = Path::new(env!("CARGO_MANIFEST_DIR")).join("benches").join("market.toml");
    std::fs::copy(market, dir.join("market.toml")).expect("the benchmark market");
    for form in FORMS {
        for n in DATES {
            std::fs::write(dir.join(file_name(form, n)), payoff(form, n)).expect("a writable payoff");
        }
    }
    dir
}

fn file_name(form: &str, n: u32) -> String {
    format!("{}_{n}.payoff", form.replace(' ', "_"))
}

fn price(file: &Path) -> f64 {
    let settings = Settings { paths: PATHS, seed: 1, antithetic: true, control_variates: false, ..Settings::default() };
    price_file(file, None, &[], &settings).expect("the benchmark payoff prices").estimate.price
}

fn one_thread() -> rayon::ThreadPool {
    rayon::ThreadPoolBuilder::new().num_threads(1).build().expect("a thread pool")
}

fn bench_windows(c: &mut Criterion) {
    let dir = write_payoffs();
    let pool = one_thread();
    let mut group = c.benchmark_group("windows");
    group.sampling_mode(SamplingMode::Flat).sample_size(10);
    for form in FORMS {
        for n in DATES {
            let file = dir.join(file_name(form, n));
            group.bench_with_input(BenchmarkId::new(form, n), &file, |b, file| {
                b.iter(|| pool.install(|| black_box(price(file))));
            });
        }
    }
    group.finish();
}

criterion_group!(benches, bench_windows);

/// Time per loop date of each form, median of 5 runs: flat in n when the cost is linear.
fn summary() {
    let dir = write_payoffs();
    let pool = one_thread();
    println!("\nwindows re-asked on each loop date, {PATHS} paths, one thread: milliseconds per loop date");
    print!("{:<16}", "form");
    for n in DATES {
        print!("{:>12}", format!("n = {n}"));
    }
    println!("{:>16}", "t(504)/t(63)");
    for form in FORMS {
        print!("{form:<16}");
        let mut totals = Vec::new();
        for n in DATES {
            let file = dir.join(file_name(form, n));
            let mut times: Vec<f64> = (0..5)
                .map(|_| {
                    let started = Instant::now();
                    pool.install(|| black_box(price(&file)));
                    started.elapsed().as_secs_f64()
                })
                .collect();
            times.sort_by(f64::total_cmp);
            totals.push(times[2]);
            print!("{:>12.4}", 1e3 * times[2] / f64::from(n));
        }
        println!("{:>16.1}", totals[3] / totals[0]);
    }
    println!("(linear cost: the ratio is near 504/63 = 8; quadratic: near 64)");
    let _ = std::fs::remove_dir_all(dir);
}

fn main() {
    benches();
    Criterion::default().configure_from_args().final_summary();
    summary();
}
