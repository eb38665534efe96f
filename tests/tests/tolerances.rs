//! Tolerance studies against closed forms: the distribution of an RC low-pass's cut-off under
//! uniform tolerances, the yield of a limit set at the nominal response, and the study's own
//! guarantees (reproducible per sample, the same on any number of threads, shards merge to
//! one run, a re-stamped evaluator equals a fresh one on every solver path).

use analyzer_core::design;
use analyzer_core::metrics::{Limit, MetricOptions};
use analyzer_core::network::{Distribution, Param, Tolerance, Varied};
use analyzer_core::response::Analysis;
use analyzer_core::solve::SolverKind;
use analyzer_core::spread::{self, stats::wilson95, Outcome, SpreadState, Study};
use analyzer_core::sweep::Grid;

fn rc(tol_r: &str, tol_c: &str) -> (Analysis, Grid) {
    let d = design::parse(&format!(
        r#"
[sweep]
from = "10 Hz"
to = "1 MHz"
per_decade = 40
[parts]
V1 = {{ voltage = "1", between = ["in", "gnd"] }}
R1 = {{ resistor = "4.7k", between = ["in", "out"], tolerance = "{tol_r}" }}
C1 = {{ capacitor = "22n", between = ["out", "gnd"], tolerance = "{tol_c}" }}
[responses]
gain = {{ ratio = ["out", "in"] }}
"#
    ))
    .unwrap();
    let grid = d.sweep.grid().unwrap();
    (Analysis::new(d.network, d.responses).unwrap(), grid)
}

fn run_all(study: &Study<'_, '_>, samples: u64) -> (SpreadState, Vec<Outcome>) {
    let mut state = study.state("test", samples, 0, 1);
    let mut all = Vec::new();
    study
        .run(&mut state, |b: &[Outcome]| {
            all.extend_from_slice(b);
            Ok::<(), ()>(())
        })
        .unwrap();
    (state, all)
}

/// E[ln(1+δ)] for δ uniform on [−a, a] (closed form: ∫ln u du / 2a over [1−a, 1+a]).
fn mean_ln(a: f64) -> f64 {
    ((1.0 + a) * (1.0 + a).ln() - (1.0 - a) * (1.0 - a).ln()) / (2.0 * a) - 1.0
}

/// E[ln²(1+δ)] likewise (∫ln²u du = u·ln²u − 2u·ln u + 2u).
fn mean_ln2(a: f64) -> f64 {
    let prim = |u: f64| u * u.ln() * u.ln() - 2.0 * u * u.ln() + 2.0 * u;
    (prim(1.0 + a) - prim(1.0 - a)) / (2.0 * a)
}

/// P(ln(1+δR) + ln(1+δC) ≥ t) for independent uniforms on ±a and ±b: the exact CDF of
/// ln(1+δC) integrated against the density of ln(1+δR) (closed-form integrand, Simpson's
/// rule on 20,000 panels — far below the sampling error checked against).
fn tail_sum_ln(a: f64, b: f64, t: f64) -> f64 {
    // X = ln(1+δR) has density e^x/(2a) on [ln(1−a), ln(1+a)]; P(Y ≥ y) for Y = ln(1+δC) is
    // ((1+b) − e^y)/(2b) clamped to [0, 1].
    let tail_y = |y: f64| (((1.0 + b) - y.exp()) / (2.0 * b)).clamp(0.0, 1.0);
    let (x0, x1) = ((1.0 - a).ln(), (1.0 + a).ln());
    let n = 20_000;
    let h = (x1 - x0) / n as f64;
    let g = |x: f64| x.exp() / (2.0 * a) * tail_y(t - x);
    let mut s = g(x0) + g(x1);
    for k in 1..n {
        let x = x0 + k as f64 * h;
        s += if k % 2 == 1 { 4.0 } else { 2.0 } * g(x);
    }
    s * h / 3.0
}

#[test]
fn rc_cutoff_spreads_as_the_sum_of_two_uniforms_in_log() {
    // f_c = 1/(2πRC) (closed form), so ln(f_c/f_c0) = −ln(1+δR) − ln(1+δC): its mean and
    // variance follow from the closed forms above, and its median from the exact CDF.
    let (a_r, a_c) = (0.05, 0.10);
    let (analysis, grid) = rc("5%", "10%");
    let ev = analysis.evaluator().unwrap();
    let study = Study::new(&ev, &grid, vec![MetricOptions::default()], &[], 42).unwrap();
    let n = 4000u64;
    let (state, outcomes) = run_all(&study, n);
    let fc0 = 1.0 / (2.0 * std::f64::consts::PI * 4.7e3 * 22e-9);
    let k = state
        .figure_names()
        .iter()
        .position(|s| *s == "gain.upper_cutoff_hz")
        .unwrap();
    let logs: Vec<f64> = outcomes.iter().map(|o| (o.scalars[k] / fc0).ln()).collect();
    let nf = n as f64;
    let mean = logs.iter().sum::<f64>() / nf;
    let var = logs.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (nf - 1.0);
    let want_mean = -(mean_ln(a_r) + mean_ln(a_c));
    let want_var = mean_ln2(a_r) - mean_ln(a_r).powi(2) + mean_ln2(a_c) - mean_ln(a_c).powi(2);
    // Sampling error of a mean: σ/√N; of a variance: about σ²·√(2/N) (looser for these
    // flat-topped distributions); checked at 4 standard errors.
    assert!(
        (mean - want_mean).abs() < 4.0 * (want_var / nf).sqrt(),
        "mean {mean} against {want_mean}"
    );
    assert!(
        (var - want_var).abs() < 4.0 * want_var * (2.0 / nf).sqrt(),
        "variance {var} against {want_var}"
    );
    // The study's own median of f_c: the exact probability of lying below it must be 1/2
    // within the sampling error of a proportion (and the sketch's stated bound).
    let summary = state.summary();
    let fig = &summary.figures[k];
    let p50 = fig.p50.unwrap();
    // The sketch's stated bound: half a bin, the bin at most the spread over 1024 (a
    // power-of-two multiple of the finest bin, at least span/2048).
    let span = (fig.max.unwrap() / fig.min.unwrap()).ln();
    assert!(fig.quantile_error_relative && fig.quantile_error <= (0.5 * span / 1024.0).exp_m1());
    let below = tail_sum_ln(a_r, a_c, -(p50 / fc0).ln());
    assert!(
        (below - 0.5).abs() < 4.0 * 0.5 / nf.sqrt(),
        "P(f_c ≤ median) = {below}"
    );
    // Each sample's cut-off is the closed form of its own values.
    for o in outcomes.iter().take(50) {
        let want = 1.0 / (2.0 * std::f64::consts::PI * o.values[0] * o.values[1]);
        assert!(((o.scalars[k] - want) / want).abs() < 1e-9);
    }
    // The summary's mean is the mean of the samples (exact sums, one rounding).
    let direct = outcomes.iter().map(|o| o.scalars[k]).sum::<f64>() / nf;
    assert!(((fig.mean.unwrap() - direct) / direct).abs() < 1e-12);
}

#[test]
fn a_limit_at_the_nominal_response_passes_half_the_boards() {
    // Closed reasoning: |H(f)| of the RC low-pass falls as R rises, so a ceiling set at the
    // nominal |H(f)| passes exactly the samples with R ≥ R0, probability 1/2 under a
    // symmetric distribution (C held exact here).
    let (analysis, _) = rc("2%", "0%");
    let grid = Grid::list(vec![3.3e3]).unwrap();
    let ev = analysis.evaluator().unwrap();
    let mut ws = ev.workspace();
    let db = 20.0
        * ev.at(&mut ws, 3.3e3, false).unwrap()[0]
            .value
            .norm()
            .log10();
    let limit = Limit {
        name: "ceiling".into(),
        response: "gain".into(),
        from: 3.3e3,
        to: 3.3e3,
        min_db: Some(db - 1.0),
        max_db: Some(db),
    };
    let study = Study::new(&ev, &grid, vec![MetricOptions::default()], &[limit], 7).unwrap();
    let n = 2000u64;
    let (state, outcomes) = run_all(&study, n);
    let y = &state.summary().limits[0];
    assert_eq!(y.samples, n);
    assert!(
        y.wilson_low <= 0.5 && 0.5 <= y.wilson_high,
        "yield {} [{}, {}]",
        y.fraction,
        y.wilson_low,
        y.wilson_high
    );
    // Every pass is a sample with R ≥ R0, every failure one below.
    for o in &outcomes {
        assert_eq!(o.passes[0], o.values[0] >= 4.7e3, "sample {}", o.index);
    }
}

#[test]
fn wilson_interval_matches_published_examples() {
    // Wilson (1927) score interval at 95 %; values from memory of the usual worked case
    // 81 of 263 → [0.2553, 0.3662] (as in Newcombe, Stat. Med. 1998, table I, from memory).
    let (lo, hi) = wilson95(81, 263);
    assert!(
        (lo - 0.2553).abs() < 5e-4 && (hi - 0.3662).abs() < 5e-4,
        "{lo} {hi}"
    );
    // All pass: the upper end is 1 and the lower end n/(n + z²).
    let (lo, hi) = wilson95(100, 100);
    let z2 = 1.959_963_984_540_054_f64.powi(2);
    assert!((lo - 100.0 / (100.0 + z2)).abs() < 1e-12 && hi == 1.0);
}

#[test]
fn sample_values_depend_on_seed_and_index_alone_and_stay_inside() {
    let t = |f: f64, d| {
        Some(Tolerance {
            fraction: f,
            distribution: d,
        })
    };
    let varied = vec![
        Varied {
            part: analyzer_core::network::PartId(0),
            param: Param::Main,
            nominal: 1e3,
            tolerance: t(0.01, Distribution::Uniform),
        },
        Varied {
            part: analyzer_core::network::PartId(1),
            param: Param::Main,
            nominal: 1e-9,
            tolerance: t(0.05, Distribution::Normal),
        },
    ];
    let a = spread::sample_values(&varied, 9, 12345);
    let b = spread::sample_values(&varied, 9, 12345);
    assert_eq!(a, b);
    assert_ne!(a, spread::sample_values(&varied, 9, 12346));
    assert_ne!(a, spread::sample_values(&varied, 10, 12345));
    let (mut inner, n) = (0, 20_000);
    for i in 0..n {
        let v = spread::sample_values(&varied, 1, i);
        assert!((v[0] / 1e3 - 1.0).abs() <= 0.01);
        let d = v[1] / 1e-9 - 1.0;
        assert!(d.abs() <= 0.05);
        inner += usize::from(d.abs() <= 0.05 / 3.0);
    }
    // Normal with σ = tol/3 truncated at 3σ: P(|z| ≤ 1 | |z| ≤ 3) = 0.6827/0.9973 (common
    // practice values of the normal distribution).
    let p = inner as f64 / n as f64;
    assert!(
        (p - 0.682_689 / 0.997_300).abs() < 4.0 * (0.25 / n as f64).sqrt(),
        "{p}"
    );
}

fn ladder_study_outputs(shards: u64, threads: usize) -> (String, Vec<u8>, Vec<u8>) {
    let d = design::parse(reference_suite::LADDER_WITH_LIMITS).unwrap();
    let grid = d.sweep.grid().unwrap();
    let limits = d.limits.clone();
    let analysis = Analysis::new(d.network, d.responses).unwrap();
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(threads)
        .build()
        .unwrap();
    pool.install(|| {
        let ev = analysis.evaluator().unwrap();
        let opts = vec![MetricOptions::default(); 2];
        let study = Study::new(&ev, &grid, opts, &limits, 2024).unwrap();
        let n = 300;
        let mut merged: Option<SpreadState> = None;
        let mut rows: Vec<(u64, Vec<u8>)> = Vec::new();
        for k in 0..shards {
            let mut state = study.state("ladder", n, k, shards);
            study
                .run(&mut state, |b: &[Outcome]| {
                    for o in b {
                        let mut line = Vec::new();
                        spread::write_sample_rows(&mut line, std::slice::from_ref(o)).unwrap();
                        rows.push((o.index, line));
                    }
                    Ok::<(), ()>(())
                })
                .unwrap();
            // Through the partial file's form, as `merge` reads it.
            let state: SpreadState =
                serde_json::from_str(&serde_json::to_string(&state).unwrap()).unwrap();
            match merged.as_mut() {
                None => merged = Some(state),
                Some(m) => m.merge(&state).unwrap(),
            }
        }
        let state = merged.unwrap();
        assert!(state.missing_shards().is_empty());
        rows.sort_by_key(|r| r.0);
        let samples: Vec<u8> = rows.into_iter().flat_map(|r| r.1).collect();
        let mut env = Vec::new();
        for r in 0..2 {
            state.write_envelope_csv(&mut env, r).unwrap();
        }
        (
            serde_json::to_string(&state.summary()).unwrap(),
            env,
            samples,
        )
    })
}

#[test]
fn same_seed_same_bytes_on_one_and_two_threads_and_shards_merge_to_one_run() {
    let one = ladder_study_outputs(1, 1);
    let two = ladder_study_outputs(1, 2);
    assert!(one == two, "1 and 2 threads differ");
    let four = ladder_study_outputs(4, 2);
    assert!(
        one.0 == four.0,
        "summary of 4 merged shards differs from one run"
    );
    assert!(one.1 == four.1, "envelope of 4 merged shards differs");
    assert!(one.2 == four.2, "sample rows of 4 shards differ");
    // The study found something to say.
    assert!(one.0.contains("gain.upper_cutoff_hz") && one.0.contains("limit.stop.margin_db"));
}

#[test]
fn a_restamped_evaluator_equals_a_fresh_one_on_every_solver_path() {
    let d = design::parse(reference_suite::LADDER_WITH_LIMITS).unwrap();
    let base = Analysis::new(d.network, d.responses).unwrap();
    let varied = base.network().varied();
    let changes: Vec<_> = varied
        .iter()
        .enumerate()
        .map(|(k, v)| (v.part, v.param, v.nominal * (1.0 + 0.01 * (k as f64 - 2.0))))
        .collect();
    for kind in [
        SolverKind::Small,
        SolverKind::Band,
        SolverKind::Dense,
        SolverKind::Sparse,
    ] {
        let nominal = base.clone().with_solver(kind);
        let ev0 = nominal.evaluator().unwrap();
        let changed = nominal.with_values(&changes).unwrap();
        let like = changed.evaluator_like(&ev0).unwrap();
        let fresh = changed.evaluator().unwrap();
        assert_eq!(like.solver_kind(), fresh.solver_kind());
        let (mut w1, mut w2) = (like.workspace(), fresh.workspace());
        for f in [1e3, 1.234e5, 1e6, 9.9e6] {
            let a = like.at(&mut w1, f, true).unwrap().to_vec();
            let b = fresh.at(&mut w2, f, true).unwrap().to_vec();
            assert_eq!(a, b, "{kind:?} at {f} Hz");
        }
        // And it is the changed network, not the nominal one.
        let mut w0 = ev0.workspace();
        assert_ne!(
            ev0.at(&mut w0, 1e6, false).unwrap()[0].value,
            like.at(&mut w1, 1e6, false).unwrap()[0].value
        );
    }
}

#[test]
fn preferred_series_are_those_of_iec_60063() {
    use analyzer_core::preferred::Series;
    // IEC 60063 (from memory): E6, E12 and E24 are tabulated two-figure series; E48 is the
    // three-figure series below.
    let e6 = [1.0, 1.5, 2.2, 3.3, 4.7, 6.8];
    let e12 = [1.0, 1.2, 1.5, 1.8, 2.2, 2.7, 3.3, 3.9, 4.7, 5.6, 6.8, 8.2];
    let e24 = [
        1.0, 1.1, 1.2, 1.3, 1.5, 1.6, 1.8, 2.0, 2.2, 2.4, 2.7, 3.0, 3.3, 3.6, 3.9, 4.3, 4.7, 5.1,
        5.6, 6.2, 6.8, 7.5, 8.2, 9.1,
    ];
    let e48 = [
        1.00, 1.05, 1.10, 1.15, 1.21, 1.27, 1.33, 1.40, 1.47, 1.54, 1.62, 1.69, 1.78, 1.87, 1.96,
        2.05, 2.15, 2.26, 2.37, 2.49, 2.61, 2.74, 2.87, 3.01, 3.16, 3.32, 3.48, 3.65, 3.83, 4.02,
        4.22, 4.42, 4.64, 4.87, 5.11, 5.36, 5.62, 5.90, 6.19, 6.49, 6.81, 7.15, 7.50, 7.87, 8.25,
        8.66, 9.09, 9.53,
    ];
    assert_eq!(Series::E6.mantissas(), e6);
    assert_eq!(Series::E12.mantissas(), e12);
    assert_eq!(Series::E24.mantissas(), e24);
    assert_eq!(Series::E48.mantissas(), e48);
    // Familiar E96 members (from memory) and E192's one exception, 9.20 (the rounding gives
    // 9.19).
    let e96 = Series::E96.mantissas();
    for v in [1.02, 1.24, 2.49, 3.32, 4.99, 6.04, 8.06, 9.76] {
        assert!(e96.contains(&v), "{v} not in E96");
    }
    let e192 = Series::E192.mantissas();
    assert_eq!(e192[185], 9.20);
    assert!(e192.contains(&9.31) && e192.len() == 192);
    // Each finer three-figure series contains the coarser; the two-figure ones are not
    // rounded geometric values (10^(10/24) = 2.61, the series has 2.7).
    assert!(e48.iter().all(|v| e96.contains(v)) && e96.iter().all(|v| e192.contains(v)));
    assert!((10f64.powf(10.0 / 24.0) * 10.0).round() / 10.0 != e24[10]);
    // Nearest in log distance: the geometric midpoint of 1.0 and 1.5 is 1.2247.
    assert_eq!(Series::E6.nearest(1.22e3), 1.0e3);
    assert_eq!(Series::E6.nearest(1.23e3), 1.5e3);
    assert_eq!(Series::E12.nearest(4.6e-9), 4.7e-9);
    assert_eq!(Series::E24.nearest(9.6), 10.0);
    assert_eq!(Series::E96.nearest(49.5e3), 49.9e3);
    assert!("E7".parse::<Series>().is_err());
}

#[test]
fn worst_corner_of_an_rc_ceiling_is_both_values_low_and_matches_the_closed_form() {
    // A ceiling on |H| above the cut-off: |H| = 1/√(1 + (ωRC)²) (closed form) is highest
    // with R and C both at the low end of their tolerances, and the verified margin is the
    // closed form's at that corner.
    let (analysis, grid) = rc("2%", "5%");
    let ev = analysis.evaluator().unwrap();
    let f = 20e3;
    let limit = Limit {
        name: "stop".into(),
        response: "gain".into(),
        from: f,
        to: 1e6,
        min_db: None,
        max_db: Some(-20.0),
    };
    let opts = [MetricOptions::default()];
    let nominal = analyzer_core::metrics::assess(&ev, &grid, &opts, &[limit]).unwrap();
    let values: Vec<_> = analyzer_core::sensitivity::values(&ev);
    let found = analyzer_core::corners::worst_case(&ev, &grid, &opts, &nominal, &values).unwrap();
    let c = &found[0];
    assert_eq!(c.deviations, vec![-0.02, -0.05]);
    let w = 2.0 * std::f64::consts::PI * f;
    let rc_low = 4.7e3 * 0.98 * 22e-9 * 0.95;
    let db = -10.0 * (1.0 + (w * rc_low).powi(2)).log10();
    assert!(
        (c.margin_db - (-20.0 - db)).abs() < 1e-9,
        "{} vs {}",
        c.margin_db,
        -20.0 - db
    );
    assert!((c.worst_hz - f).abs() < 1e-9 * f);
    assert!(
        !c.prediction_off,
        "prediction {} vs {}",
        c.predicted_margin_db, c.margin_db
    );
}

#[test]
fn no_sampled_board_is_worse_than_the_worst_case_corner() {
    // Closed reasoning: where a margin is monotonic in each value over the tolerance box (as
    // this ladder's are), its minimum over the box is at a corner, so no sample inside the
    // box may do worse than the verified worst-case corner.
    let d = design::parse(reference_suite::LADDER_WITH_LIMITS).unwrap();
    let grid = d.sweep.grid().unwrap();
    let limits = d.limits.clone();
    let analysis = Analysis::new(d.network, d.responses).unwrap();
    let ev = analysis.evaluator().unwrap();
    let opts = vec![MetricOptions::default(); 2];
    let nominal = analyzer_core::metrics::assess(&ev, &grid, &opts, &limits).unwrap();
    let values = analyzer_core::sensitivity::values(&ev);
    let corners = analyzer_core::corners::worst_case(&ev, &grid, &opts, &nominal, &values).unwrap();
    let study = Study::new(&ev, &grid, opts, &limits, 99).unwrap();
    let (state, _) = run_all(&study, 400);
    for c in &corners {
        let name = format!("limit.{}.margin_db", c.limit);
        let k = state
            .figure_names()
            .iter()
            .position(|n| *n == name)
            .unwrap();
        let lowest = state.summary().figures[k].min.unwrap();
        assert!(
            c.margin_db <= lowest + 1e-9,
            "{}: corner {} but a sample reached {lowest}",
            c.limit,
            c.margin_db
        );
        assert!(c.margin_db < c.nominal_margin_db);
    }
}

#[test]
fn a_floor_is_checked_at_its_band_edge_on_or_off_the_grid() {
    // |H| = 1/√(1 + (ωRC)²) of the RC low-pass (closed form) falls with frequency, so a
    // floor's worst margin is at the band's upper edge, whether that edge is a grid point
    // (the sweep's end, whose grid value stands for it) or between grid points (probed).
    let (analysis, grid) = rc("1%", "1%");
    let ev = analysis.evaluator().unwrap();
    let opts = [MetricOptions::default()];
    for to in [1e6, 123_456.0] {
        let limit = Limit {
            name: "floor".into(),
            response: "gain".into(),
            from: 100.0,
            to,
            min_db: Some(-60.0),
            max_db: None,
        };
        let a = analyzer_core::metrics::assess(&ev, &grid, &opts, &[limit]).unwrap();
        let c = &a.checks[0];
        let w = 2.0 * std::f64::consts::PI * to;
        let db = -10.0 * (1.0 + (w * 4.7e3 * 22e-9).powi(2)).log10();
        assert_eq!(c.worst_at_hz, to);
        assert!(
            (c.worst_margin_db - (db + 60.0)).abs() < 1e-9,
            "{to}: {} vs {}",
            c.worst_margin_db,
            db + 60.0
        );
    }
}
