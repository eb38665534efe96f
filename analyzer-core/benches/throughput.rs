//! Sweep throughput of a fifth-order Butterworth ladder (9 unknowns) over 1,000,000
//! log-spaced points: solve-only points per second on 1 and 2 threads, and the CSV writer's
//! cost per row. Run: `cargo bench -p analyzer-core --bench throughput`.
//! (A plain bench binary: criterion's sampling would take minutes at this size.)

use analyzer_core::export::{self, Columns};
use analyzer_core::ladders::butterworth_ladder;
use analyzer_core::response::Analysis;
use analyzer_core::solve::SolverKind;
use analyzer_core::sweep::{self, Grid, SweepOptions};
use std::time::Instant;

// The binaries' allocator (see analyzer-cli): benches measure what users run.
#[global_allocator]
static GLOBAL: mimalloc::MiMalloc = mimalloc::MiMalloc;

/// Median wall time in seconds of `runs` runs of `f` on a pool of `threads` threads.
fn median_secs(runs: usize, threads: usize, mut f: impl FnMut() + Send) -> f64 {
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(threads)
        .build()
        .expect("pool");
    let mut v: Vec<f64> = (0..runs)
        .map(|_| {
            let t = Instant::now();
            pool.install(&mut f);
            t.elapsed().as_secs_f64()
        })
        .collect();
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}

fn main() {
    let points: usize = std::env::var("POINTS")
        .ok()
        .and_then(|s| s.parse().ok())
        .unwrap_or(1_000_000);
    let runs = 5;
    let (net, spec) = butterworth_ladder(5, 50.0, 1e3).expect("ladder");
    let grid = Grid::log(10.0, 1e5, (points - 1) as f64 / 4.0).expect("grid");
    assert_eq!(grid.len(), points);
    for kind in [SolverKind::Small, SolverKind::Dense] {
        let analysis = Analysis::new(net.clone(), vec![spec.clone()])
            .expect("analysis")
            .with_solver(kind);
        let ev = analysis.evaluator().expect("evaluator");
        println!(
            "fifth-order ladder, {} unknowns, {points} points, {kind:?} path",
            analysis.system().n
        );
        for threads in [1, 2] {
            let t = median_secs(runs, threads, || {
                let s = sweep::run(&ev, &grid, &SweepOptions::default()).expect("sweep");
                std::hint::black_box(&s);
            });
            println!(
                "  solve, {threads} thread(s): {:.3} s median of {runs}, {:.2} M points/s, {:.0} ns/point",
                t,
                points as f64 / t / 1e6,
                t / points as f64 * 1e9
            );
        }
    }
    let analysis = Analysis::new(net, vec![spec]).expect("analysis");
    let ev = analysis.evaluator().expect("evaluator");
    let s = sweep::run(&ev, &grid, &SweepOptions::default()).expect("sweep");
    let mut out = Vec::with_capacity(points * 100);
    for threads in [1, 2] {
        let t = median_secs(runs, threads, || {
            out.clear();
            export::write_csv(
                &mut out,
                &s.freqs,
                &[Columns {
                    name: "gain",
                    unit: analysis.responses()[0].kind.unit(),
                    values: &s.values[0],
                    delay: None,
                    unwrap: true,
                }],
            )
            .expect("csv");
            std::hint::black_box(&out);
        });
        println!(
            "  CSV, {threads} thread(s): {:.0} ns/row ({:.3} s for {points} rows)",
            t / points as f64 * 1e9,
            t
        );
    }
}
