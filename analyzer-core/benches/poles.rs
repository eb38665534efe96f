//! Dense QZ on a response's bordered pencils (two per response), by system size, to place
//! `poles::MAX_UNKNOWNS` where one response's poles and zeros take about a second.
//!
//!     cargo bench -p analyzer-core --bench poles
//!
//! The systems are RLC ladders of growing length (3 unknowns per section), read out as the
//! voltage ratio across the whole ladder (fastest of three runs).

use analyzer_core::ladders::{ladder_gain, rlc_ladder};
use analyzer_core::poles::pole_zero;
use analyzer_core::response::Analysis;
use std::time::{Duration, Instant};

#[global_allocator]
static GLOBAL: mimalloc::MiMalloc = mimalloc::MiMalloc;

fn main() {
    println!("{:>10} {:>12} {:>8}", "unknowns", "poles+zeros", "roots");
    for sections in [10, 30, 60, 100, 150, 200, 250] {
        let net = rlc_ladder(sections, 1.0, 1e-6, 1e-9, 50.0, 50.0).expect("ladder");
        let spec = ladder_gain(&net, sections).expect("gain");
        let a = Analysis::new(net, vec![spec]).expect("analysis");
        let mut best = Duration::MAX;
        let mut roots = 0;
        for _ in 0..3 {
            let t = Instant::now();
            let pz = pole_zero(&a, 0, Some(2.0 * std::f64::consts::PI * 1e5));
            best = best.min(t.elapsed());
            roots = pz.map_or(0, |p| p.poles.len() + p.zeros.len());
        }
        println!(
            "{:>10} {:>10.3} s {:>8}",
            a.system().n,
            best.as_secs_f64(),
            roots
        );
        if best > Duration::from_secs(3) {
            break;
        }
    }
}
