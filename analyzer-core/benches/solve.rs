//! Criterion benches: assembly, factorisation, solve, one point and a whole sweep, timed
//! apart, at 3 to 43 unknowns and at 1,000 / 10,000 / 100,000 ladder sections; and the
//! families the automatic solver choice was measured on (RC meshes of growing width, fully
//! connected networks).
//! Run: `cargo bench -p analyzer-core --bench solve` (add a filter, e.g. `-- small/9`).

use analyzer_core::ladders::{butterworth_ladder, full_mesh, ladder_gain, rc_mesh, rlc_ladder};
use analyzer_core::network::Network;
use analyzer_core::response::{Analysis, ResponseSpec};
use analyzer_core::solve::{SolverKind, SolverPlan};
use analyzer_core::stamp::System;
use analyzer_core::sweep::{self, Grid, SweepOptions};
use criterion::{criterion_group, criterion_main, BatchSize, BenchmarkId, Criterion};
use std::time::Duration;

// The binaries' allocator (see analyzer-cli): benches measure what users run.
#[global_allocator]
static GLOBAL: mimalloc::MiMalloc = mimalloc::MiMalloc;

/// The small networks: unknown counts 3, 5, 9, 13, 15, 17, 33.
pub fn small_networks() -> Vec<(usize, Network, ResponseSpec)> {
    let mut v = Vec::new();
    let net = rlc_ladder(0, 1.0, 1.0, 1.0, 50.0, 50.0).unwrap();
    let spec = ladder_gain(&net, 0).unwrap();
    v.push((3, net, spec));
    // Orders 9 and 11 (13 and 15 unknowns) straddle the small-kernel threshold.
    for order in [1, 5, 9, 11, 13, 29] {
        let (net, spec) = butterworth_ladder(order, 50.0, 1e3).unwrap();
        let n = System::assemble(&net).n;
        v.push((n, net, spec));
    }
    v
}

fn small(c: &mut Criterion) {
    let mut g = c.benchmark_group("small");
    g.measurement_time(Duration::from_secs(2))
        .warm_up_time(Duration::from_millis(500));
    let omega = 2.0 * std::f64::consts::PI * 1234.5;
    for (n, net, spec) in small_networks() {
        g.bench_with_input(BenchmarkId::new("assemble", n), &net, |b, net| {
            b.iter(|| System::assemble(net))
        });
        let sys = System::assemble(&net);
        for kind in [
            SolverKind::Small,
            SolverKind::Band,
            SolverKind::Dense,
            SolverKind::Sparse,
        ] {
            let plan = SolverPlan::new(&sys, kind).unwrap();
            if plan.kind() != kind {
                continue; // the stack kernel above its sizes
            }
            let mut s = plan.make();
            g.bench_function(BenchmarkId::new(format!("factor-{kind:?}"), n), |b| {
                b.iter(|| s.factor(omega).unwrap())
            });
            s.factor(omega).unwrap();
            g.bench_function(BenchmarkId::new(format!("solve-{kind:?}"), n), |b| {
                b.iter_batched(
                    || sys.b.clone(),
                    |mut x| s.solve(&mut x),
                    BatchSize::SmallInput,
                )
            });
        }
        let a = Analysis::new(net.clone(), vec![spec.clone()]).unwrap();
        let ev = a.evaluator().unwrap();
        let mut ws = ev.workspace();
        g.bench_function(BenchmarkId::new("point", n), |b| {
            b.iter(|| ev.at(&mut ws, 1234.5, false).map(|p| p[0]))
        });
        let grid = Grid::log(10.0, 1e5, 2499.75).unwrap();
        g.bench_function(BenchmarkId::new("sweep-10k", n), |b| {
            b.iter(|| sweep::run(&ev, &grid, &SweepOptions::default()).unwrap())
        });
    }
    g.finish();
}

fn ladders(c: &mut Criterion) {
    let mut g = c.benchmark_group("ladder");
    g.sample_size(10)
        .measurement_time(Duration::from_secs(3))
        .warm_up_time(Duration::from_millis(500));
    let omega = 2.0 * std::f64::consts::PI * 1e3;
    for sections in [1_000, 10_000, 100_000] {
        let net = rlc_ladder(sections, 1e-4, 1e-8, 1e-11, 50.0, 50.0).unwrap();
        g.bench_with_input(BenchmarkId::new("assemble", sections), &net, |b, net| {
            b.iter(|| System::assemble(net))
        });
        let sys = System::assemble(&net);
        g.bench_function(BenchmarkId::new("symbolic", sections), |b| {
            b.iter(|| SolverPlan::new(&sys, SolverKind::Sparse).unwrap().kind())
        });
        g.bench_function(BenchmarkId::new("ordering", sections), |b| {
            b.iter(|| SolverPlan::new(&sys, SolverKind::Band).unwrap().kind())
        });
        for kind in [SolverKind::Band, SolverKind::Sparse] {
            let plan = SolverPlan::new(&sys, kind).unwrap();
            let mut s = plan.make();
            g.bench_function(
                BenchmarkId::new(format!("factor-{kind:?}"), sections),
                |b| b.iter(|| s.factor(omega).unwrap()),
            );
            s.factor(omega).unwrap();
            g.bench_function(BenchmarkId::new(format!("solve-{kind:?}"), sections), |b| {
                b.iter_batched(
                    || sys.b.clone(),
                    |mut x| s.solve(&mut x),
                    BatchSize::LargeInput,
                )
            });
        }
        let spec = ladder_gain(&net, sections).unwrap();
        let a = Analysis::new(net, vec![spec]).unwrap();
        let ev = a.evaluator().unwrap();
        let mut ws = ev.workspace();
        g.bench_function(BenchmarkId::new("point", sections), |b| {
            b.iter(|| ev.at(&mut ws, 1e3, false).map(|p| p[0]))
        });
        // A whole (short) sweep: 8 points, so both workers have points to solve.
        let grid = Grid::log(1e3, 1e6, 7.0 / 3.0).unwrap();
        g.bench_function(BenchmarkId::new("sweep-8", sections), |b| {
            b.iter(|| sweep::run(&ev, &grid, &SweepOptions::default()).unwrap())
        });
    }
    g.finish();
}

/// One factorisation and solve of `sys` at `omega` on `kind`'s path, as `KIND/id`.
fn factor_and_solve(
    g: &mut criterion::BenchmarkGroup<'_, criterion::measurement::WallTime>,
    sys: &System,
    kind: SolverKind,
    omega: f64,
    id: usize,
) {
    let plan = SolverPlan::new(sys, kind).unwrap();
    let mut s = plan.make();
    let mut x = sys.b.clone();
    g.bench_function(BenchmarkId::new(format!("{kind:?}"), id), |b| {
        b.iter(|| {
            s.factor(omega).unwrap();
            x.copy_from_slice(&sys.b);
            s.solve(&mut x);
        })
    });
}

/// Band against sparse on RC meshes of growing width (about 20,000 unknowns each): where
/// the automatic choice should switch from the band path to the sparse one.
fn meshes(c: &mut Criterion) {
    let mut g = c.benchmark_group("mesh");
    g.sample_size(10)
        .measurement_time(Duration::from_secs(2))
        .warm_up_time(Duration::from_millis(300));
    let omega = 2.0 * std::f64::consts::PI * 1e4;
    for width in [2, 4, 8, 12, 16, 24, 32, 64] {
        let net = rc_mesh(width, 20_000 / width, 100.0, 1e-9).unwrap();
        let sys = System::assemble(&net);
        for kind in [SolverKind::Band, SolverKind::Sparse] {
            factor_and_solve(&mut g, &sys, kind, omega, width);
        }
    }
    g.finish();
}

/// Dense, band and sparse paths on fully connected networks (a dense matrix): where the
/// automatic choice takes faer's dense LU.
fn full(c: &mut Criterion) {
    let mut g = c.benchmark_group("full");
    g.sample_size(10)
        .measurement_time(Duration::from_secs(1))
        .warm_up_time(Duration::from_millis(200));
    let omega = 2.0 * std::f64::consts::PI * 1e4;
    for nodes in [20, 40, 80, 160, 320] {
        let sys = System::assemble(&full_mesh(nodes, 100.0, 1e-9).unwrap());
        for kind in [SolverKind::Dense, SolverKind::Band, SolverKind::Sparse] {
            factor_and_solve(&mut g, &sys, kind, omega, sys.n);
        }
    }
    g.finish();
}

criterion_group!(benches, small, ladders, meshes, full);
criterion_main!(benches);
