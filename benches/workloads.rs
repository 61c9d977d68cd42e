//! The speed benchmarks: each workload priced from its `.payoff` file exactly as
//! `pathfold price` does it (parse, check, compile, simulate; antithetic pairs, control
//! variates off) and by the hand-written loop in `reference/`, side by side.
//!
//! Criterion times each form on one thread. A summary follows that times each form again
//! (median of several runs) and prints the ratios the performance targets are stated in:
//! payoff time / hand-written time on one thread (target ≤ 1.3), and the payoff's speed-up
//! from one thread to two (target ≥ 1.8 for runs of 0.5 s or more).

mod reference;

use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

use criterion::{criterion_group, BenchmarkId, Criterion, SamplingMode};
use pathfold::driver::price_file;
use pathfold::sim::Settings;
use rayon::ThreadPool;

/// One workload: its payoff file, its path count and its hand-written twin.
struct Workload {
    name: &'static str,
    file: &'static str,
    paths: u64,
    hand: fn(u64, u64) -> (f64, f64),
}

const SEED: u64 = 1;

const WORKLOADS: [Workload; 3] = [
    Workload { name: "W1 European call", file: "w1_call.payoff", paths: 4_000_000, hand: reference::w1_call },
    Workload { name: "W2 arithmetic Asian", file: "w2_asian.payoff", paths: 200_000, hand: reference::w2_asian },
    Workload {
        name: "W3 worst-of autocallable",
        file: "w3_autocall.payoff",
        paths: 500_000,
        hand: reference::w3_autocall,
    },
];

fn path_of(file: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("benches").join(file)
}

fn pool(threads: usize) -> ThreadPool {
    rayon::ThreadPoolBuilder::new().num_threads(threads).build().expect("a thread pool")
}

/// Prices a payoff file the way `pathfold price --no-control` does.
fn price_payoff(file: &Path, paths: u64) -> (f64, f64) {
    let settings = Settings { paths, seed: SEED, antithetic: true, control_variates: false };
    let priced = price_file(file, None, &[], &settings).expect("the benchmark payoff prices");
    (priced.estimate.price, priced.estimate.std_error)
}

fn bench_workloads(c: &mut Criterion) {
    let one = pool(1);
    for w in &WORKLOADS {
        let file = path_of(w.file);
        let mut g = c.benchmark_group(w.name);
        g.sample_size(10).sampling_mode(SamplingMode::Flat);
        g.warm_up_time(Duration::from_millis(500)).measurement_time(Duration::from_secs(4));
        g.bench_function(BenchmarkId::new("payoff", w.paths), |b| {
            b.iter(|| one.install(|| price_payoff(&file, w.paths)))
        });
        g.bench_function(BenchmarkId::new("hand-written", w.paths), |b| b.iter(|| (w.hand)(w.paths, SEED)));
        g.finish();
    }
}

criterion_group!(benches, bench_workloads);

/// Median wall time of `runs` calls of `f`.
fn median_time<T>(runs: usize, mut f: impl FnMut() -> T) -> f64 {
    let mut times: Vec<f64> = (0..runs)
        .map(|_| {
            let t = Instant::now();
            std::hint::black_box(f());
            t.elapsed().as_secs_f64()
        })
        .collect();
    times.sort_by(f64::total_cmp);
    times[runs / 2]
}

/// Times both forms again, interleaved so that load from other processes hits both alike,
/// and prints the ratios with the targets.
fn summary() {
    const RUNS: usize = 5;
    let (one, two) = (pool(1), pool(2));
    println!("\nSummary (median of {RUNS} runs each; seed {SEED}, antithetic, no control variates)");
    println!(
        "{:<26} {:>10} {:>10} {:>8} {:>10} {:>8}   {:>20} {:>20}",
        "workload", "payoff 1t", "hand 1t", "ratio", "payoff 2t", "speedup", "payoff price (SE)", "hand price (SE)"
    );
    let mut met = true;
    for w in &WORKLOADS {
        let file = path_of(w.file);
        let payoff = one.install(|| price_payoff(&file, w.paths));
        let hand = (w.hand)(w.paths, SEED);
        let t_payoff = median_time(RUNS, || one.install(|| price_payoff(&file, w.paths)));
        let t_hand = median_time(RUNS, || (w.hand)(w.paths, SEED));
        let t_two = median_time(RUNS, || two.install(|| price_payoff(&file, w.paths)));
        let ratio = t_payoff / t_hand;
        let speedup = t_payoff / t_two;
        // The thread target applies to runs of half a second or more.
        met &= ratio <= 1.3 && (t_payoff < 0.5 || speedup >= 1.8);
        println!(
            "{:<26} {:>9.3}s {:>9.3}s {:>7.2}x {:>9.3}s {:>7.2}x   {:>11.4} ({:.4}) {:>11.4} ({:.4})",
            w.name, t_payoff, t_hand, ratio, t_two, speedup, payoff.0, payoff.1, hand.0, hand.1
        );
    }
    println!("targets: ratio <= 1.30 on one thread; speed-up >= 1.80 on two threads for runs of 0.5 s or more");
    println!("targets {}", if met { "met" } else { "NOT met on this run (the machine is shared: re-run for medians)" });
}

fn main() {
    benches();
    Criterion::default().configure_from_args().final_summary();
    summary();
}
