//! Per-point cost of whole sweeps on the very systems `examples/dump_systems` writes, for
//! the side-by-side run in `benches/reference/compare.py` (which also times numpy and scipy
//! on the same matrices). Prints one line per system:
//! `SYSTEM UNKNOWNS PATH NS_PER_POINT_1_THREAD NS_PER_POINT_2_THREADS`, each the median of
//! several runs of a solve-only sweep (no derivatives, no output).
//! Run: `cargo bench -p analyzer-core --bench per_point`.

use analyzer_core::ladders::{butterworth_ladder, ladder_gain, rlc_ladder};
use analyzer_core::network::Network;
use analyzer_core::response::{Analysis, ResponseSpec};
use analyzer_core::sweep::{self, Grid, SweepOptions};
use std::time::Instant;

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

/// Median ns per point of `runs` sweeps of `grid` on a pool of `threads` threads.
fn ns_per_point(a: &Analysis, grid: &Grid, threads: usize, runs: usize) -> f64 {
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(threads)
        .build()
        .expect("pool");
    let ev = a.evaluator().expect("evaluator");
    let mut t: Vec<f64> = (0..runs)
        .map(|_| {
            let start = Instant::now();
            pool.install(|| {
                let s = sweep::run(&ev, grid, &SweepOptions::default()).expect("sweep");
                std::hint::black_box(&s);
            });
            start.elapsed().as_secs_f64()
        })
        .collect();
    t.sort_by(f64::total_cmp);
    t[t.len() / 2] / grid.len() as f64 * 1e9
}

fn main() {
    for (name, net, spec) in systems() {
        let a = Analysis::new(net, vec![spec]).expect("analysis");
        let n = a.system().n;
        // Enough points for about a second of work per run at the system's size.
        let (points, runs) = match n {
            0..=50 => (200_000, 7),
            51..=5_000 => (400, 5),
            5_001..=50_000 => (64, 5),
            _ => (16, 3),
        };
        let grid = Grid::log(10.0, 1e5, (points - 1) as f64 / 4.0).expect("grid");
        let kind = a.evaluator().expect("evaluator").solver_kind();
        let one = ns_per_point(&a, &grid, 1, runs);
        let two = ns_per_point(&a, &grid, 2, runs);
        println!("{name} {n} {kind:?} {one:.1} {two:.1}");
    }
}
