//! Frequency grids and the parallel evaluation that fills a columnar result.
//!
//! A log grid from `f₁` to `f₂` at `d` points per decade has `m = ⌈d·log10(f₂/f₁)⌉` intervals
//! and point `k = 0..=m` at `f₁·(f₂/f₁)^(k/m)`, so both ends are exact and no error builds up
//! from adding steps. A linear grid of `N` points has point `k` at `f₁ + (f₂ − f₁)·k/(N − 1)`.
//!
//! The sweep cuts the grid into fixed chunks and evaluates them on rayon's pool, one
//! workspace per worker; results are stored by index, so the output never depends on the
//! number of threads or the order in which chunks finish.

use crate::response::{AnalysisError, Evaluator, Workspace};
use crate::units::{format_eng, Hertz};
use rayon::prelude::*;
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::Mutex;

/// Largest number of points a grid may have.
pub const MAX_POINTS: usize = 100_000_000;

/// A frequency grid, validated when built.
#[derive(Clone, Debug, PartialEq)]
pub enum Grid {
    /// Log-spaced with both ends exact.
    Log {
        /// First frequency (Hz, > 0).
        from: Hertz,
        /// Last frequency (Hz).
        to: Hertz,
        /// Number of intervals.
        intervals: usize,
        /// ln(to/from)/intervals, kept so point k costs one exp.
        ln_step: f64,
    },
    /// Linearly spaced.
    Linear {
        /// First frequency (Hz, ≥ 0).
        from: Hertz,
        /// Last frequency (Hz).
        to: Hertz,
        /// Number of points.
        points: usize,
    },
    /// An explicit list, ascending.
    List(Vec<Hertz>),
}

/// Why a grid is not usable.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
#[non_exhaustive]
pub enum GridError {
    /// A log grid must start above 0 Hz.
    #[error("a log-spaced sweep must start above 0 Hz (got {from} Hz); use a list or a linear sweep to include 0 Hz")]
    LogFromZero {
        /// The start given.
        from: Hertz,
    },
    /// Negative or non-finite frequency.
    #[error("frequency {value} Hz is not a finite number ≥ 0")]
    BadFrequency {
        /// The value.
        value: Hertz,
    },
    /// End below start.
    #[error("the sweep ends ({to} Hz) below where it starts ({from} Hz)")]
    Reversed {
        /// Start.
        from: Hertz,
        /// End.
        to: Hertz,
    },
    /// Zero points or density.
    #[error("the sweep needs at least {min} {what}, got {got}")]
    TooFew {
        /// What is counted.
        what: &'static str,
        /// The least allowed.
        min: usize,
        /// What was given.
        got: f64,
    },
    /// More points than the cap.
    #[error("the sweep would have {points} points, more than the limit of {MAX_POINTS}; lower the density or narrow the range")]
    TooMany {
        /// Points requested.
        points: f64,
    },
    /// A list not in ascending order.
    #[error("the frequency list is not in ascending order at {value} Hz")]
    NotAscending {
        /// The first value out of order.
        value: Hertz,
    },
}

fn check_freq(value: Hertz) -> Result<Hertz, GridError> {
    if value.is_finite() && value >= 0.0 {
        Ok(value)
    } else {
        Err(GridError::BadFrequency { value })
    }
}

impl Grid {
    /// A log grid with at least `per_decade` points per decade.
    pub fn log(from: Hertz, to: Hertz, per_decade: f64) -> Result<Grid, GridError> {
        let (from, to) = (check_freq(from)?, check_freq(to)?);
        if from <= 0.0 {
            return Err(GridError::LogFromZero { from });
        }
        if to < from {
            return Err(GridError::Reversed { from, to });
        }
        if !(per_decade.is_finite() && per_decade >= 1.0) {
            return Err(GridError::TooFew {
                what: "point per decade",
                min: 1,
                got: per_decade,
            });
        }
        let decades = (to / from).log10();
        // A tiny tolerance so 5 decades at 100/decade is 500 intervals, not 501.
        let intervals = (decades * per_decade - 1e-9)
            .ceil()
            .max(if to > from { 1.0 } else { 0.0 });
        if intervals + 1.0 > MAX_POINTS as f64 {
            return Err(GridError::TooMany {
                points: intervals + 1.0,
            });
        }
        let intervals = intervals as usize;
        Ok(Grid::Log {
            from,
            to,
            intervals,
            ln_step: if intervals == 0 {
                0.0
            } else {
                (to / from).ln() / intervals as f64
            },
        })
    }

    /// A linear grid of `points` points (two or more, or one when from == to).
    pub fn linear(from: Hertz, to: Hertz, points: usize) -> Result<Grid, GridError> {
        let (from, to) = (check_freq(from)?, check_freq(to)?);
        if to < from {
            return Err(GridError::Reversed { from, to });
        }
        let min = if to > from { 2 } else { 1 };
        if points < min {
            return Err(GridError::TooFew {
                what: "points",
                min,
                got: points as f64,
            });
        }
        if points > MAX_POINTS {
            return Err(GridError::TooMany {
                points: points as f64,
            });
        }
        Ok(Grid::Linear { from, to, points })
    }

    /// An explicit ascending list of frequencies.
    pub fn list(values: Vec<Hertz>) -> Result<Grid, GridError> {
        if values.is_empty() {
            return Err(GridError::TooFew {
                what: "frequency",
                min: 1,
                got: 0.0,
            });
        }
        if values.len() > MAX_POINTS {
            return Err(GridError::TooMany {
                points: values.len() as f64,
            });
        }
        for w in values.windows(2) {
            if w[1] <= w[0] {
                return Err(GridError::NotAscending { value: w[1] });
            }
        }
        for &v in &values {
            check_freq(v)?;
        }
        Ok(Grid::List(values))
    }

    /// Number of points.
    pub fn len(&self) -> usize {
        match self {
            Grid::Log { intervals, .. } => intervals + 1,
            Grid::Linear { points, .. } => *points,
            Grid::List(v) => v.len(),
        }
    }

    /// Whether the grid has no points (never true for a validated grid).
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// Point k, computed from its index.
    pub fn at(&self, k: usize) -> Hertz {
        match *self {
            Grid::Log {
                from,
                to,
                intervals,
                ln_step,
            } => {
                if k == 0 {
                    from
                } else if k >= intervals {
                    to
                } else {
                    from * (ln_step * k as f64).exp()
                }
            }
            Grid::Linear { from, to, points } => {
                if points <= 1 || k == 0 {
                    from
                } else if k + 1 >= points {
                    to
                } else {
                    from + (to - from) * (k as f64 / (points - 1) as f64)
                }
            }
            Grid::List(ref v) => v.get(k).copied().unwrap_or(f64::NAN),
        }
    }

    /// The first and last frequency.
    pub fn bounds(&self) -> (Hertz, Hertz) {
        (self.at(0), self.at(self.len().saturating_sub(1)))
    }

    /// Whether 0 Hz is on the grid.
    pub fn has_dc(&self) -> bool {
        self.at(0) == 0.0
    }

    /// All points.
    pub fn points(&self) -> Vec<Hertz> {
        (0..self.len()).map(|k| self.at(k)).collect()
    }

    /// A short description, e.g. "10 Hz … 1 MHz, 501 points, log".
    pub fn describe(&self) -> String {
        let (a, b) = self.bounds();
        let kind = match self {
            Grid::Log { .. } => "log",
            Grid::Linear { .. } => "linear",
            Grid::List(_) => "list",
        };
        format!(
            "{} … {}, {} points, {kind}",
            format_eng(a, 5, "Hz"),
            format_eng(b, 5, "Hz"),
            self.len()
        )
    }
}

/// Options of a sweep run.
#[derive(Clone, Debug, Default)]
pub struct SweepOptions {
    /// Also compute ω-derivatives (for group delay).
    pub derivatives: bool,
    /// Run on the calling thread only.
    pub sequential: bool,
}

/// A sweep's result, by column: `values[r][k]` is response r at frequency k.
#[derive(Clone, Debug, PartialEq)]
pub struct Sweep {
    /// The frequencies (Hz).
    pub freqs: Vec<Hertz>,
    /// Response values, one column per response.
    pub values: Vec<Vec<num_complex::Complex64>>,
    /// Group delays (s), one column per response, when derivatives were requested.
    pub delays: Option<Vec<Vec<f64>>>,
}

/// Points per task handed to a worker: many for tiny systems (so scheduling costs nothing),
/// one for large ones (so both workers are busy even on a short sweep).
fn task_points(unknowns: usize) -> usize {
    (4096 / unknowns.max(1)).clamp(1, 512)
}

/// Points per chunk of [`run_chunks`]: large enough to keep both cores busy, small enough to
/// keep memory flat (about 2 MB of results per response).
pub const CHUNK_POINTS: usize = 1 << 16;

/// One chunk of a sweep: points `offset .. offset + freqs.len()`, by column.
#[derive(Clone, Copy, Debug)]
pub struct Chunk<'s> {
    /// Index of the chunk's first point in the grid.
    pub offset: usize,
    /// The chunk's frequencies (Hz).
    pub freqs: &'s [Hertz],
    /// One column per response.
    pub values: &'s [Vec<num_complex::Complex64>],
    /// One column of group delays (s) per response, when derivatives were requested.
    pub delays: Option<&'s [Vec<f64>]>,
}

/// A solved chunk, by column; its buffers are reused from chunk to chunk.
#[derive(Default)]
struct Solved {
    offset: usize,
    freqs: Vec<Hertz>,
    values: Vec<Vec<num_complex::Complex64>>,
    delays: Option<Vec<Vec<f64>>>,
}

impl Solved {
    fn view(&self) -> Chunk<'_> {
        Chunk {
            offset: self.offset,
            freqs: &self.freqs,
            values: &self.values,
            delays: self.delays.as_deref(),
        }
    }
}

/// One task's share of a chunk's columns, written by whichever worker takes the task.
struct TaskOut<'o> {
    freqs: &'o mut [Hertz],
    values: Vec<&'o mut [num_complex::Complex64]>,
    delays: Vec<&'o mut [f64]>,
}

/// Solves points `offset .. offset + len` of the grid into `out` on the workspaces in `pool`
/// (in parallel when there are several). Tasks of `task` points are taken from a shared
/// counter and each writes its own slice of the columns, so the result never depends on
/// timing. Fails with the error of the lowest failing frequency.
fn solve_chunk<'a>(
    ev: &Evaluator<'a>,
    grid: &Grid,
    derivatives: bool,
    pool: &mut [Option<Workspace<'a>>],
    (offset, len): (usize, usize),
    task: usize,
    out: &mut Solved,
) -> Result<(), AnalysisError> {
    let nr = ev.analysis().responses().len();
    out.offset = offset;
    out.freqs.resize(len, 0.0);
    out.values.resize_with(nr, Vec::new);
    for col in &mut out.values {
        col.resize(len, num_complex::Complex64::default());
    }
    match (&mut out.delays, derivatives) {
        (Some(d), true) => {
            d.resize_with(nr, Vec::new);
            d.iter_mut().for_each(|col| col.resize(len, 0.0));
        }
        (d, true) => *d = Some(vec![vec![0.0; len]; nr]),
        (d, false) => *d = None,
    }
    // Cut every column at the task boundaries; task t takes slot t.
    let freqs = out.freqs.chunks_mut(task);
    let mut values: Vec<_> = out.values.iter_mut().map(|c| c.chunks_mut(task)).collect();
    let mut delays: Vec<_> = out
        .delays
        .iter_mut()
        .flatten()
        .map(|c| c.chunks_mut(task))
        .collect();
    let mut slots = Vec::new();
    for f in freqs {
        let task_out = TaskOut {
            freqs: f,
            values: values.iter_mut().filter_map(Iterator::next).collect(),
            delays: delays.iter_mut().filter_map(Iterator::next).collect(),
        };
        slots.push(Mutex::new(Some(task_out)));
    }
    let next = AtomicUsize::new(0);
    // A worker's first failure, or None once the counter has passed the last slot.
    let worker = |ws: &mut Option<Workspace<'a>>| -> Option<(usize, AnalysisError)> {
        // Made on the worker's own thread, so its buffers come from that thread's heap and
        // share no cache line with another worker's (two workspaces made one after the
        // other on one thread sat side by side, and 2 threads ran barely faster than 1).
        let ws = ws.get_or_insert_with(|| ev.workspace());
        loop {
            let t = next.fetch_add(1, Ordering::Relaxed);
            let slot = slots.get(t)?;
            // Each slot is taken once, by one worker: the lock is never contended.
            let taken = match slot.lock() {
                Ok(mut g) => g.take(),
                Err(poisoned) => poisoned.into_inner().take(),
            };
            let Some(o) = taken else { continue };
            let first = offset + t * task;
            for (k, f) in o.freqs.iter_mut().enumerate() {
                *f = grid.at(first + k);
            }
            let points = match ev.at_many(ws, o.freqs, derivatives) {
                Ok(p) => p,
                Err(e) => return Some((t, e)),
            };
            for (r, col) in o.values.into_iter().enumerate() {
                let rows = points.iter().skip(r).step_by(nr.max(1));
                for (dst, p) in col.iter_mut().zip(rows) {
                    *dst = p.value;
                }
            }
            for (r, col) in o.delays.into_iter().enumerate() {
                let rows = points.iter().skip(r).step_by(nr.max(1));
                for (dst, p) in col.iter_mut().zip(rows) {
                    *dst = p.group_delay();
                }
            }
        }
    };
    let errors: Vec<_> = if pool.len() == 1 {
        pool.iter_mut().map(worker).collect()
    } else {
        pool.par_iter_mut().map(worker).collect()
    };
    // Every task below the lowest failing one was handed out before it, so the lowest
    // failing task is the lowest failing frequency whatever the timing.
    match errors.into_iter().flatten().min_by_key(|(t, _)| *t) {
        Some((_, e)) => Err(e),
        None => Ok(()),
    }
}

/// Evaluates the grid chunk by chunk (each chunk in parallel) and hands every chunk, in
/// order, to `sink`. While the sink takes chunk k, chunk k + 1 is solved beside it
/// (`rayon::join` on the current pool), so writing the output overlaps with solving and
/// memory stays bounded by two chunks whatever the grid's size. With
/// [`SweepOptions::sequential`] everything runs on the calling thread, one chunk after the
/// other. Stops at the first failure: the sink's error for a chunk, or else the lowest
/// failing frequency's error (after every chunk before it went to the sink).
pub fn run_chunks<'a, E: From<AnalysisError> + Send>(
    ev: &Evaluator<'a>,
    grid: &Grid,
    opts: &SweepOptions,
    chunk_points: usize,
    mut sink: impl FnMut(Chunk<'_>) -> Result<(), E> + Send,
) -> Result<(), E> {
    let n = grid.len();
    if grid.has_dc() {
        ev.analysis().check_dc()?;
    }
    let chunk_points = chunk_points.max(1);
    let mut spans = (0..n)
        .step_by(chunk_points)
        .map(|o| (o, chunk_points.min(n - o)));
    let task = task_points(ev.analysis().system().n);
    // One workspace per worker for the whole run (a large system's workspace is costly to
    // make); workers take tasks from a shared counter, so the load balances itself.
    let workers = if opts.sequential {
        1
    } else {
        rayon::current_num_threads().max(1)
    };
    let mut pool: Vec<Option<Workspace<'a>>> = (0..workers).map(|_| None).collect();
    let derivatives = opts.derivatives;
    let mut solve =
        |span, out: &mut Solved| solve_chunk(ev, grid, derivatives, &mut pool, span, task, out);
    let Some(first) = spans.next() else {
        return Ok(());
    };
    // Two chunks' buffers in turn: the sink reads one while the next is solved into the
    // other.
    let (mut ready, mut spare) = (Solved::default(), Solved::default());
    solve(first, &mut ready)?;
    for span in spans {
        let (sunk, next) = if opts.sequential {
            (sink(ready.view()), solve(span, &mut spare))
        } else {
            rayon::join(|| sink(ready.view()), || solve(span, &mut spare))
        };
        sunk?;
        next?;
        std::mem::swap(&mut ready, &mut spare);
    }
    sink(ready.view())
}

/// Evaluates every response at every grid point in parallel (or on this thread) and keeps
/// the whole result. Stops at the lowest frequency that fails and returns its error; no
/// partial result is returned. For very large grids prefer [`run_chunks`].
pub fn run<'a>(
    ev: &Evaluator<'a>,
    grid: &Grid,
    opts: &SweepOptions,
) -> Result<Sweep, AnalysisError> {
    let nr = ev.analysis().responses().len();
    let n = grid.len();
    let mut out = Sweep {
        freqs: Vec::with_capacity(n),
        values: vec![Vec::with_capacity(n); nr],
        delays: opts.derivatives.then(|| vec![Vec::with_capacity(n); nr]),
    };
    run_chunks(ev, grid, opts, CHUNK_POINTS, |c: Chunk<'_>| {
        out.freqs.extend_from_slice(c.freqs);
        for (dst, src) in out.values.iter_mut().zip(c.values) {
            dst.extend_from_slice(src);
        }
        if let (Some(dst), Some(src)) = (out.delays.as_mut(), c.delays) {
            for (d, s) in dst.iter_mut().zip(src) {
                d.extend_from_slice(s);
            }
        }
        Ok::<(), AnalysisError>(())
    })?;
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::network::{NetworkBuilder, NodeId};
    use crate::response::{Analysis, Probe, ResponseKind, ResponseSpec};

    #[test]
    fn log_grid_has_exact_ends_and_density() {
        let g = Grid::log(10.0, 1e6, 100.0).unwrap();
        assert_eq!(g.len(), 501);
        assert_eq!(g.at(0), 10.0);
        assert_eq!(g.at(500), 1e6);
        assert!((g.at(100) - 100.0).abs() < 1e-9);
        let g = Grid::log(1.0, 3.0, 10.0).unwrap();
        assert_eq!(g.len(), 6); // ⌈10·0.477⌉ = 5 intervals
        assert_eq!(g.at(5), 3.0);
    }

    #[test]
    fn refuses_bad_grids() {
        assert_eq!(
            Grid::log(0.0, 1e3, 10.0).unwrap_err().to_string(),
            "a log-spaced sweep must start above 0 Hz (got 0 Hz); use a list or a linear sweep to include 0 Hz"
        );
        assert!(matches!(
            Grid::log(1e3, 10.0, 10.0),
            Err(GridError::Reversed { .. })
        ));
        assert!(matches!(
            Grid::log(1.0, 10.0, 0.0),
            Err(GridError::TooFew { .. })
        ));
        assert!(matches!(
            Grid::log(1e-3, 1e12, 1e7),
            Err(GridError::TooMany { .. })
        ));
        assert!(matches!(
            Grid::linear(0.0, 10.0, 1),
            Err(GridError::TooFew { .. })
        ));
        assert!(matches!(
            Grid::list(vec![1.0, 1.0]),
            Err(GridError::NotAscending { .. })
        ));
        assert!(matches!(
            Grid::list(vec![f64::NAN]),
            Err(GridError::BadFrequency { .. })
        ));
    }

    /// An RC low-pass with a capacitor of `farads` from `out` to ground.
    fn rc(farads: f64) -> Analysis {
        let mut b = NetworkBuilder::new("rc");
        b.voltage_source("V1", "in", "gnd", 1.0.into()).unwrap();
        b.resistor("R1", "in", "out", 1e3).unwrap();
        b.capacitor("C1", "out", "gnd", farads).unwrap();
        let net = b.build().unwrap();
        let (i, o) = (net.node("in").unwrap(), net.node("out").unwrap());
        let spec = ResponseSpec::new(
            "gain",
            ResponseKind::Ratio {
                numerator: Probe::Voltage(o, NodeId::GROUND),
                denominator: Probe::Voltage(i, NodeId::GROUND),
            },
        );
        Analysis::new(net, vec![spec]).unwrap()
    }

    /// Chunks reach the sink in order, contiguous, each point as a single evaluation
    /// gives it, whether the chunks are pipelined (several) or not (one, or sequential).
    #[test]
    fn chunks_arrive_in_order_with_the_values_of_single_points() {
        let a = rc(1e-7);
        let ev = a.evaluator().unwrap();
        let grid = Grid::log(10.0, 1e5, 25.0).unwrap();
        let mut ws = ev.workspace();
        let expect: Vec<_> = (0..grid.len())
            .map(|k| ev.at(&mut ws, grid.at(k), true).unwrap()[0])
            .collect();
        for (chunk, sequential) in [(7, false), (7, true), (1000, false), (1, false)] {
            let opts = SweepOptions {
                derivatives: true,
                sequential,
            };
            let mut next = 0;
            run_chunks(&ev, &grid, &opts, chunk, |c: Chunk<'_>| {
                assert_eq!(c.offset, next);
                for (k, &f) in c.freqs.iter().enumerate() {
                    assert_eq!(f, grid.at(next + k));
                    assert_eq!(c.values[0][k], expect[next + k].value);
                    let delays = c.delays.unwrap();
                    assert_eq!(delays[0][k], expect[next + k].group_delay());
                }
                next += c.freqs.len();
                Ok::<(), AnalysisError>(())
            })
            .unwrap();
            assert_eq!(next, grid.len(), "chunk {chunk}, sequential {sequential}");
        }
    }

    /// A frequency that fails in a later chunk: the chunks before it reach the sink, then
    /// its error is returned; a sink that fails stops the run with its own error.
    #[test]
    fn failures_stop_the_stream() {
        // ω·C overflows to infinity at 1e300 Hz: no usable pivot there.
        let a = rc(1e10);
        let ev = a.evaluator().unwrap();
        let mut freqs: Vec<f64> = (1..=41).map(f64::from).collect();
        freqs.extend([1e300, 1e301]);
        let grid = Grid::list(freqs).unwrap();
        let opts = SweepOptions::default();
        let mut seen = Vec::new();
        let err = run_chunks(&ev, &grid, &opts, 8, |c: Chunk<'_>| {
            seen.push(c.offset);
            Ok::<(), AnalysisError>(())
        })
        .unwrap_err();
        assert_eq!(seen, [0, 8, 16, 24, 32]);
        match err {
            AnalysisError::Singular { frequency, .. } => assert_eq!(frequency, 1e300),
            other => panic!("{other:?}"),
        }
        let mut calls = 0;
        let err = run_chunks(&ev, &grid, &opts, 8, |_c: Chunk<'_>| {
            calls += 1;
            if calls == 2 {
                Err(AnalysisError::BadResponse {
                    response: "sink".into(),
                    reason: "full".into(),
                })
            } else {
                Ok(())
            }
        })
        .unwrap_err();
        assert_eq!(calls, 2);
        assert!(matches!(err, AnalysisError::BadResponse { .. }));
    }
}
