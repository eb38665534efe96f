//! Per-point cost of whole sweeps on the very systems `examples/dump_systems` writes, for
//! the side-by-side run in `benches/reference/compare.py` (which also times numpy and scipy
//! on the same matrices). Prints one line per system:
//! `SYSTEM UNKNOWNS PATH NS_PER_POINT_1_THREAD NS_PER_POINT_2_THREADS SPEEDUP`: the fastest
//! of several runs of a solve-only sweep (no derivatives, no output) on 1 and on 2 threads,
//! the runs made in pairs, and the ratio of the two.
//! Run: `cargo bench -p analyzer-core --bench per_point` (`SMALL_POINTS=10000` to sweep the
//! small systems over 10,000 points instead of 200,000).

use analyzer_core::ladders::{butterworth_ladder, ladder_gain, rlc_ladder};
use analyzer_core::network::Network;
use analyzer_core::response::{Analysis, ResponseSpec};
use analyzer_core::sweep::{self, Grid, SweepOptions};
use std::time::Instant;

// The binaries' allocator (see analyzer-cli): benches measure what users run.
#[global_allocator]
static GLOBAL: mimalloc::MiMalloc = mimalloc::MiMalloc;

/// The systems, named as `dump_systems` names them: `u{n}` and `ladder{sections}`.
fn systems() -> Vec<(String, Network, ResponseSpec)> {
    let mut v = Vec::new();
    let net = rlc_ladder(0, 1.0, 1.0, 1.0, 50.0, 50.0).expect("ladder");
    let spec = ladder_gain(&net, 0).expect("gain");
    v.push(("u3".to_string(), net, spec));
    for order in [1, 3, 5, 7, 13, 29] {
        let (net, spec) = butterworth_ladder(order, 50.0, 1e3).expect("ladder");
        let n = analyzer_core::stamp::System::assemble(&net).n;
        v.push((format!("u{n}"), net, spec));
    }
    for sections in [1_000, 10_000, 100_000] {
        let net = rlc_ladder(sections, 1e-4, 1e-8, 1e-11, 50.0, 50.0).expect("ladder");
        let spec = ladder_gain(&net, sections).expect("gain");
        v.push((format!("ladder{sections}"), net, spec));
    }
    v
}

/// Wall time in seconds of one sweep of `grid` on `pool`.
fn sweep_secs(a: &Analysis, grid: &Grid, pool: &rayon::ThreadPool) -> f64 {
    let ev = a.evaluator().expect("evaluator");
    let start = Instant::now();
    pool.install(|| {
        let s = sweep::run(&ev, grid, &SweepOptions::default()).expect("sweep");
        std::hint::black_box(&s);
    });
    start.elapsed().as_secs_f64()
}

fn fastest(v: impl Iterator<Item = f64>) -> f64 {
    v.fold(f64::INFINITY, f64::min)
}

/// Fastest ns per point on 1 and on 2 threads over `runs` runs each, made in pairs. On a
/// shared virtual machine the noise only ever adds time, so the fastest run is the least
/// disturbed one; the speed-up is the ratio of the two fastest runs.
fn ns_per_point(a: &Analysis, grid: &Grid, runs: usize) -> (f64, f64) {
    let pool = |threads| {
        rayon::ThreadPoolBuilder::new()
            .num_threads(threads)
            .build()
            .expect("pool")
    };
    let (one, two) = (pool(1), pool(2));
    let pairs: Vec<(f64, f64)> = (0..runs)
        .map(|_| (sweep_secs(a, grid, &one), sweep_secs(a, grid, &two)))
        .collect();
    let per_point = |t: f64| t / grid.len() as f64 * 1e9;
    (
        per_point(fastest(pairs.iter().map(|p| p.0))),
        per_point(fastest(pairs.iter().map(|p| p.1))),
    )
}

fn main() {
    for (name, net, spec) in systems() {
        let a = Analysis::new(net, vec![spec]).expect("analysis");
        let n = a.system().n;
        // Enough points for about a second of work per run at the system's size.
        let (points, runs) = match n {
            0..=50 => (200_000, 9),
            51..=5_000 => (400, 7),
            5_001..=50_000 => (64, 7),
            _ => (16, 5),
        };
        // SMALL_POINTS=10000 (say) sweeps the small systems over fewer points.
        let points = match std::env::var("SMALL_POINTS")
            .ok()
            .and_then(|s| s.parse().ok())
        {
            Some(p) if n <= 50 => p,
            _ => points,
        };
        let grid = Grid::log(10.0, 1e5, (points - 1) as f64 / 4.0).expect("grid");
        let kind = a.evaluator().expect("evaluator").solver_kind();
        let (one, two) = ns_per_point(&a, &grid, runs);
        println!("{name} {n} {kind:?} {one:.1} {two:.1} {:.2}", one / two);
    }
}
