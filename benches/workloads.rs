//! The speed benchmarks: each workload priced from its `.payoff` file exactly as
//! `pathfold price` does it (parse, check, compile, simulate; antithetic pairs, control
//! variates off) and by the hand-written loop in `reference/`, side by side.
//!
//! Criterion times each form on one thread. A summary follows that times each form again
//! (median of several runs) and prints the ratios the performance targets are stated in:
//! payoff time / hand-written time on one thread (target ≤ 1.3), and the payoff's speed-up
//! from one thread to two (target ≥ 1.8 for runs of 0.5 s or more).

mod reference;

use std::hint::black_box;
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

use criterion::{criterion_group, BenchmarkId, Criterion, SamplingMode};
use pathfold::pricing::price_file;
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
    let settings = Settings { paths, seed: SEED, antithetic: true, control_variates: false, ..Settings::default() };
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

/// Median wall time of each of several closures, called in turn `runs` times so that load
/// from other processes on a shared machine falls on all of them alike.
fn interleaved_medians(runs: usize, fs: &mut [&mut dyn FnMut()]) -> Vec<f64> {
    let mut times = vec![Vec::with_capacity(runs); fs.len()];
    for _ in 0..runs {
        for (f, t) in fs.iter_mut().zip(&mut times) {
            let started = Instant::now();
            f();
            t.push(started.elapsed().as_secs_f64());
        }
    }
    times
        .into_iter()
        .map(|mut t| {
            t.sort_by(f64::total_cmp);
            t[runs / 2]
        })
        .collect()
}

/// Times both forms again and prints the ratios with the targets.
fn summary() {
    const RUNS: usize = 7;
    let (one, two) = (pool(1), pool(2));
    println!("\nSummary (median of {RUNS} interleaved runs; seed {SEED}, antithetic, no control variates)");
    println!(
        "{:<26} {:>10} {:>10} {:>8}   {:>20} {:>20}",
        "workload", "payoff 1t", "hand 1t", "ratio", "payoff price (SE)", "hand price (SE)"
    );
    let mut met = true;
    for w in &WORKLOADS {
        let file = path_of(w.file);
        let payoff = one.install(|| price_payoff(&file, w.paths));
        let hand = (w.hand)(w.paths, SEED);
        let t = interleaved_medians(
            RUNS,
            &mut [
                &mut || {
                    black_box(one.install(|| price_payoff(&file, w.paths)));
                },
                &mut || {
                    black_box((w.hand)(w.paths, SEED));
                },
            ],
        );
        let ratio = t[0] / t[1];
        met &= ratio <= 1.3;
        println!(
            "{:<26} {:>9.3}s {:>9.3}s {:>7.2}x   {:>11.4} ({:.4}) {:>11.4} ({:.4})",
            w.name, t[0], t[1], ratio, payoff.0, payoff.1, hand.0, hand.1
        );
    }
    // Threads: W2 with enough paths that one thread takes half a second or more.
    let file = path_of(WORKLOADS[1].file);
    let paths = 1_000_000;
    let t = interleaved_medians(
        RUNS,
        &mut [
            &mut || {
                black_box(one.install(|| price_payoff(&file, paths)));
            },
            &mut || {
                black_box(two.install(|| price_payoff(&file, paths)));
            },
        ],
    );
    let speedup = t[0] / t[1];
    met &= t[0] < 0.5 || speedup >= 1.8;
    println!("threads: W2 at {paths} paths: 1 thread {:.3}s, 2 threads {:.3}s, speed-up {speedup:.2}x", t[0], t[1]);
    println!("targets: ratio <= 1.30 on one thread; speed-up >= 1.80 on two threads for runs of 0.5 s or more");
    println!("targets {}", if met { "met" } else { "NOT met on this run (the machine is shared: re-run for medians)" });
}

fn main() {
    benches();
    Criterion::default().configure_from_args().final_summary();
    summary();
}
