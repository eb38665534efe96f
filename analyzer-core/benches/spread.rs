//! Tolerance studies: samples per second with figures and limits included.
//!
//!     cargo bench -p analyzer-core --bench spread
//!
//! 1. The fifth-order Butterworth ladder (9 unknowns), 1 % resistors, 5 % L and C, two limits,
//!    10,000 samples × 501 log points — the case `benches/reference/spread_numpy.py` repeats
//!    with numpy's batched solves (no figures) for the ratio.
//! 2. A 10,000-section RC ladder (10,002 unknowns), 1,000 samples × 50 points: time per
//!    solve inside the study against a single nominal sweep's.
//!
//! Set SPREAD_BENCH_SAMPLES to scale the sample counts (a fraction, e.g. 0.1), and
//! SPREAD_BENCH_CASE=ladder5 or rc to run one case only.

use analyzer_core::design;
use analyzer_core::metrics::MetricOptions;
use analyzer_core::response::Analysis;
use analyzer_core::spread::{Outcome, Study};
use analyzer_core::sweep::{self, SweepOptions};
use std::f64::consts::PI;
use std::fmt::Write;
use std::time::Instant;

#[global_allocator]
static GLOBAL: mimalloc::MiMalloc = mimalloc::MiMalloc;

fn ladder5() -> String {
    let (r0, fc) = (50.0, 1e6);
    let wc = 2.0 * PI * fc;
    let mut s = String::from(
        "title = \"fifth-order ladder\"\n[sweep]\nfrom = \"10 kHz\"\nto = \"100 MHz\"\nper_decade = 125\n\
         [tolerances]\nresistor = \"1%\"\ncapacitor = \"5%\"\ninductor = \"5%\"\n[parts]\n\
         V1 = { voltage = \"1\", between = [\"src\", \"gnd\"] }\nRs = { resistor = \"50\", between = [\"src\", \"n0\"] }\n",
    );
    let mut node = 0;
    for k in 1..=5 {
        let g = 2.0 * ((2 * k - 1) as f64 * PI / 10.0).sin();
        if k % 2 == 1 {
            let _ = writeln!(
                s,
                "L{k} = {{ inductor = \"{:e}\", between = [\"n{node}\", \"n{}\"] }}",
                g * r0 / wc,
                node + 1
            );
            node += 1;
        } else {
            let _ = writeln!(
                s,
                "C{k} = {{ capacitor = \"{:e}\", between = [\"n{node}\", \"gnd\"] }}",
                g / (r0 * wc)
            );
        }
    }
    let _ = write!(
        s,
        "RL = {{ resistor = \"50\", between = [\"n{node}\", \"gnd\"] }}\n[responses]\ngain = {{ ratio = [\"n{node}\", \"src\"] }}\n\
         [limits]\npass = {{ response = \"gain\", from = \"10 kHz\", to = \"500 kHz\", min_db = -6.5, max_db = -5.5 }}\n\
         stop = {{ response = \"gain\", from = \"3 MHz\", to = \"100 MHz\", max_db = -45 }}\n"
    );
    s
}

fn rc_ladder(sections: usize) -> String {
    let mut s = String::from(
        "title = \"RC line\"\n[sweep]\nfrom = \"1 Hz\"\nto = \"100 kHz\"\npoints = 50\n\
         [tolerances]\nresistor = \"1%\"\ncapacitor = \"5%\"\n[parts]\n\
         V1 = { voltage = \"1\", between = [\"n0\", \"gnd\"] }\n",
    );
    for k in 0..sections {
        let _ = writeln!(
            s,
            "R{k} = {{ resistor = \"10\", between = [\"n{k}\", \"n{}\"] }}\nC{k} = {{ capacitor = \"1n\", between = [\"n{}\", \"gnd\"] }}",
            k + 1,
            k + 1
        );
    }
    let _ = write!(
        s,
        "[responses]\ngain = {{ ratio = [\"n{sections}\", \"n0\"] }}\n"
    );
    s
}

fn study(text: &str, samples: u64, label: &str) {
    let d = design::parse(text).expect("design");
    let grid = d.sweep.grid().expect("grid");
    let limits = d.limits.clone();
    let a = Analysis::new(d.network, d.responses).expect("analysis");
    let ev = a.evaluator().expect("evaluator");
    // A nominal sweep, for the time per solve.
    let t = Instant::now();
    let reps = 5;
    for _ in 0..reps {
        sweep::run(&ev, &grid, &SweepOptions::default()).expect("sweep");
    }
    let nominal = t.elapsed().as_secs_f64() / reps as f64 / grid.len() as f64;
    let opts = vec![MetricOptions::default(); a.responses().len()];
    let t = Instant::now();
    let st = Study::new(&ev, &grid, opts, &limits, 1).expect("study");
    let mut state = st.state("bench", samples, 0, 1);
    st.run(&mut state, |_: &[Outcome]| Ok::<(), ()>(()))
        .expect("run");
    let secs = t.elapsed().as_secs_f64();
    let solves = samples as f64 * grid.len() as f64;
    println!(
        "{label}: {} unknowns, {samples} samples × {} points: {secs:.2} s on {} threads \
         ({:.0} samples/s; {:.2} µs per grid point in the study, figures included, against \
         {:.2} µs per point of a nominal sweep); yield {} of {}",
        a.system().n,
        grid.len(),
        rayon::current_num_threads(),
        samples as f64 / secs,
        secs / solves * 1e6,
        nominal * 1e6,
        state.all_passed,
        state.done
    );
}

fn main() {
    let scale: f64 = std::env::var("SPREAD_BENCH_SAMPLES")
        .ok()
        .and_then(|s| s.parse().ok())
        .unwrap_or(1.0);
    let n = |k: f64| ((k * scale).round() as u64).max(1);
    let case = std::env::var("SPREAD_BENCH_CASE").unwrap_or_default();
    if case.is_empty() || case == "ladder5" {
        study(&ladder5(), n(10_000.0), "fifth-order ladder");
    }
    if case.is_empty() || case == "rc" {
        study(&rc_ladder(10_000), n(1_000.0), "10,000-section RC ladder");
    }
}
