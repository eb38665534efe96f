//! Tolerance studies: what the boards built from a design will do.
//!
//! Each value with a tolerance is drawn per sample — uniform over ±tolerance, or normal with
//! σ = tolerance/3 truncated at ±tolerance — from a counter-based generator: sample i's
//! values depend on (seed, i) alone (ChaCha8 seeded with the seed, on stream i), so any subset
//! of samples reproduces exactly, on any number of threads. Each sample re-stamps `G` and `C`
//! and reuses the nominal evaluator's symbolic work ([`Analysis::evaluator_like`]); its
//! figures and limit checks are those a sweep computes ([`metrics::assess`]).
//!
//! The results stream into a [`SpreadState`] whose statistics merge exactly
//! ([`stats`]): a study split into shards (samples i ≡ K mod M) and merged gives what one
//! run gives, bit for bit.
//!
//! [`Analysis::evaluator_like`]: crate::response::Analysis::evaluator_like

pub mod stats;

use crate::export::{Polar, Unwrapper};
use crate::metrics::{self, Assessment, Figures, Limit, MetricOptions};
use crate::network::{Distribution, Param, Tolerance, Varied};
use crate::response::{AnalysisError, Evaluator};
use crate::sweep::Grid;
use multiversion::multiversion;
use rand::{RngExt, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution as _, StandardNormal};
use rayon::prelude::*;
use serde::{Deserialize, Serialize};
use stats::{wilson95, Scale, Stat};
use std::io::{self, Write};

/// Why a study cannot run or its parts cannot be merged.
#[derive(Debug, thiserror::Error)]
pub enum SpreadError {
    /// Nothing varies.
    #[error("no part has a tolerance: give parts one (tolerance = \"1%\") or set defaults per kind in a [tolerances] table")]
    NoTolerances,
    /// The nominal design fails to solve.
    #[error("the nominal design: {0}")]
    Nominal(#[from] AnalysisError),
    /// Partial results that are not parts of one study.
    #[error("{0}")]
    Mismatch(String),
}

/// Draws the relative deviation of one value: uniform over ±tolerance, or normal with
/// σ = tolerance/3 truncated at ±tolerance (redrawn until inside).
pub fn draw_deviation<R: rand::Rng>(t: &Tolerance, rng: &mut R) -> f64 {
    match t.distribution {
        Distribution::Uniform => {
            let u: f64 = rng.random();
            t.fraction * (2.0 * u - 1.0)
        }
        Distribution::Normal => loop {
            let z: f64 = StandardNormal.sample(rng);
            if z.abs() <= 3.0 {
                return t.fraction * z / 3.0;
            }
        },
    }
}

/// The values of sample `i`: one per entry of `varied` (each must have a tolerance; one
/// without keeps its nominal), drawn in that order from ChaCha8 seeded with `seed` on stream
/// `i`.
pub fn sample_values(varied: &[Varied], seed: u64, i: u64) -> Vec<f64> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    rng.set_stream(i);
    varied
        .iter()
        .map(|v| match &v.tolerance {
            Some(t) => v.nominal * (1.0 + draw_deviation(t, &mut rng)),
            None => v.nominal,
        })
        .collect()
}

/// Which number of a response's figures a scalar is.
#[derive(Clone, Copy, Debug, PartialEq)]
enum Pick {
    Dc,
    Hf,
    Lower,
    Upper,
    Bandwidth,
    Centre,
    BandQ,
    Delay,
    PeakHz(f64),
    PeakDb(f64),
    PeakQ(f64),
    NotchHz(f64),
    NotchDb(f64),
    ResonanceHz(f64),
    ResonanceQ(f64),
    PairF0(f64),
    PairQ(f64),
    RealPole(f64),
    GainCrossover,
    PhaseMargin,
    PhaseCrossover,
    GainMargin,
    NoiseRms,
}

/// A scalar figure followed over the samples: a response's figure or a limit's margin.
#[derive(Clone, Debug)]
struct Key {
    name: String,
    unit: &'static str,
    /// Response index, or None for a limit margin.
    response: Option<usize>,
    pick: Option<Pick>,
    /// Limit index for a margin.
    limit: usize,
}

/// Most peaks, notches, resonances and poles followed per response.
const MAX_FOLLOWED: usize = 6;

fn nearest<T>(items: impl Iterator<Item = (f64, T)>, near: f64) -> Option<T> {
    items
        .filter(|(f, _)| *f > 0.0 && f.is_finite())
        .map(|(f, t)| ((f / near).ln().abs(), t))
        .min_by(|a, b| a.0.total_cmp(&b.0))
        .map(|x| x.1)
}

impl Pick {
    fn get(self, f: &Figures) -> Option<f64> {
        let pairs = || {
            f.poles
                .rows
                .iter()
                .filter(|r| r.what == "pole" && r.pair)
                .map(|r| (r.f0_hz, r))
        };
        match self {
            Pick::Dc => f.dc_db,
            Pick::Hf => f.hf_db,
            Pick::Lower => f.lower_cutoff_hz,
            Pick::Upper => f.upper_cutoff_hz,
            Pick::Bandwidth => f.bandwidth_hz,
            Pick::Centre => f.centre_hz,
            Pick::BandQ => f.q,
            Pick::Delay => f.group_delay_s,
            Pick::PeakHz(n) => nearest(f.peaks.iter().map(|e| (e.freq_hz, e.freq_hz)), n),
            Pick::PeakDb(n) => nearest(f.peaks.iter().map(|e| (e.freq_hz, e.magnitude_db)), n),
            Pick::PeakQ(n) => nearest(f.peaks.iter().map(|e| (e.freq_hz, e.q)), n).flatten(),
            Pick::NotchHz(n) => nearest(f.notches.iter().map(|e| (e.freq_hz, e.freq_hz)), n),
            Pick::NotchDb(n) => nearest(f.notches.iter().map(|e| (e.freq_hz, e.magnitude_db)), n),
            Pick::ResonanceHz(n) => nearest(f.resonances.iter().map(|e| (e.freq_hz, e.freq_hz)), n),
            Pick::ResonanceQ(n) => nearest(f.resonances.iter().map(|e| (e.freq_hz, e.q)), n),
            Pick::PairF0(n) => nearest(pairs(), n).map(|r| r.f0_hz),
            Pick::PairQ(n) => nearest(pairs(), n).and_then(|r| r.q),
            Pick::RealPole(n) => nearest(
                f.poles
                    .rows
                    .iter()
                    .filter(|r| r.what == "pole" && !r.pair && !r.origin)
                    .map(|r| (r.f0_hz, r.f0_hz)),
                n,
            ),
            Pick::GainCrossover => f.margins.as_ref().and_then(|m| m.gain_crossover_hz),
            Pick::PhaseMargin => f.margins.as_ref().and_then(|m| m.phase_margin_deg),
            Pick::PhaseCrossover => f.margins.as_ref().and_then(|m| m.phase_crossover_hz),
            Pick::GainMargin => f.margins.as_ref().and_then(|m| m.gain_margin_db),
            Pick::NoiseRms => f.noise.as_ref().map(|n| n.rms),
        }
    }

    fn scale(self) -> Scale {
        match self {
            Pick::Dc
            | Pick::Hf
            | Pick::PeakDb(_)
            | Pick::NotchDb(_)
            | Pick::GainMargin
            | Pick::PhaseMargin => Scale::Linear(DB_BIN),
            _ => Scale::Log(REL_BIN),
        }
    }
}

/// The scalar figures of a design followed from one network to another (samples, variants,
/// a snapped design): every figure the reference network has, each found again in another
/// network by kind and, for peaks, notches, resonances and poles, by the nearest frequency;
/// and each limit's worst margin.
#[derive(Clone, Debug)]
pub struct Followed {
    keys: Vec<Key>,
}

impl Followed {
    /// What to follow, from the reference network's assessment.
    pub fn of(reference: &Assessment) -> Self {
        let mut keys = Vec::new();
        for (r, f) in reference.figures.iter().enumerate() {
            keys.extend(keys_of(r, f));
        }
        for (k, c) in reference.checks.iter().enumerate() {
            keys.push(Key {
                name: format!("limit.{}.margin_db", c.limit.name),
                unit: "dB",
                response: None,
                pick: None,
                limit: k,
            });
        }
        Followed { keys }
    }

    /// The names (`response.figure`, `limit.NAME.margin_db`).
    pub fn names(&self) -> Vec<&str> {
        self.keys.iter().map(|k| k.name.as_str()).collect()
    }

    /// The unit symbols.
    pub fn units(&self) -> Vec<&'static str> {
        self.keys.iter().map(|k| k.unit).collect()
    }

    /// The values in another assessment of the same design (NaN where absent).
    pub fn values(&self, a: &Assessment) -> Vec<f64> {
        self.keys
            .iter()
            .map(|k| match (k.response, k.pick) {
                (Some(r), Some(p)) => a.figures.get(r).and_then(|f| p.get(f)),
                _ => a.checks.get(k.limit).map(|c| c.worst_margin_db),
            })
            .map(|v| v.filter(|x| !x.is_nan()).unwrap_or(f64::NAN))
            .collect()
    }
}

/// The scalars followed for one response: every figure its nominal has.
fn keys_of(r: usize, f: &Figures) -> Vec<Key> {
    let mut out = Vec::new();
    let mut add = |suffix: String, unit: &'static str, pick: Pick| {
        if pick.get(f).is_some_and(f64::is_finite) {
            out.push(Key {
                name: format!("{}.{suffix}", f.response),
                unit,
                response: Some(r),
                pick: Some(pick),
                limit: 0,
            });
        }
    };
    add("dc_db".into(), "dB", Pick::Dc);
    add("hf_db".into(), "dB", Pick::Hf);
    add("lower_cutoff_hz".into(), "Hz", Pick::Lower);
    add("upper_cutoff_hz".into(), "Hz", Pick::Upper);
    add("bandwidth_hz".into(), "Hz", Pick::Bandwidth);
    add("centre_hz".into(), "Hz", Pick::Centre);
    add("q".into(), "", Pick::BandQ);
    add("group_delay_s".into(), "s", Pick::Delay);
    for (k, e) in f.peaks.iter().take(MAX_FOLLOWED).enumerate() {
        add(format!("peak{}_hz", k + 1), "Hz", Pick::PeakHz(e.freq_hz));
        add(format!("peak{}_db", k + 1), "dB", Pick::PeakDb(e.freq_hz));
        add(format!("peak{}_q", k + 1), "", Pick::PeakQ(e.freq_hz));
    }
    for (k, e) in f.notches.iter().take(MAX_FOLLOWED).enumerate() {
        add(format!("notch{}_hz", k + 1), "Hz", Pick::NotchHz(e.freq_hz));
        add(format!("notch{}_db", k + 1), "dB", Pick::NotchDb(e.freq_hz));
    }
    for (k, e) in f.resonances.iter().take(MAX_FOLLOWED).enumerate() {
        add(
            format!("resonance{}_hz", k + 1),
            "Hz",
            Pick::ResonanceHz(e.freq_hz),
        );
        add(
            format!("resonance{}_q", k + 1),
            "",
            Pick::ResonanceQ(e.freq_hz),
        );
    }
    let poles = f
        .poles
        .rows
        .iter()
        .filter(|r| r.what == "pole" && !r.origin);
    let (mut pairs, mut reals) = (0, 0);
    for row in poles {
        if row.pair && pairs < MAX_FOLLOWED {
            pairs += 1;
            add(
                format!("pole_pair{pairs}_f0_hz"),
                "Hz",
                Pick::PairF0(row.f0_hz),
            );
            add(format!("pole_pair{pairs}_q"), "", Pick::PairQ(row.f0_hz));
        } else if !row.pair && reals < MAX_FOLLOWED {
            reals += 1;
            add(format!("pole{reals}_hz"), "Hz", Pick::RealPole(row.f0_hz));
        }
    }
    add("gain_crossover_hz".into(), "Hz", Pick::GainCrossover);
    add("phase_margin_deg".into(), "°", Pick::PhaseMargin);
    add("phase_crossover_hz".into(), "Hz", Pick::PhaseCrossover);
    add("gain_margin_db".into(), "dB", Pick::GainMargin);
    add("noise_rms".into(), f.unit_rms(), Pick::NoiseRms);
    out
}

impl Figures {
    fn unit_rms(&self) -> &'static str {
        if self.unit == "V/√Hz" {
            "V"
        } else {
            ""
        }
    }
}

/// One sample's result.
#[derive(Clone, Debug)]
pub struct Outcome {
    /// Sample index.
    pub index: u64,
    /// The drawn values, in the order of [`Study::varied`].
    pub values: Vec<f64>,
    /// The followed scalars (NaN where a figure is absent), in the order of
    /// [`SpreadState::figure_names`].
    pub scalars: Vec<f64>,
    /// Per limit, whether it passed.
    pub passes: Vec<bool>,
    /// Why the sample could not be solved, if it could not (it then fails every limit).
    pub error: Option<String>,
    /// Per response, |H| in dB at each grid point.
    db: Vec<Vec<f64>>,
    /// Per response, the phase in degrees, within 180° of the nominal's unwrapped phase.
    phase: Vec<Vec<f64>>,
}

impl Outcome {
    /// Whether every limit passed.
    pub fn pass(&self) -> bool {
        self.error.is_none() && self.passes.iter().all(|p| *p)
    }
}

/// A prepared tolerance study of one design.
pub struct Study<'e, 'a> {
    ev: &'e Evaluator<'a>,
    /// The sweep's grid as the table of its points.
    grid: Grid,
    opts: Vec<MetricOptions>,
    limits: Vec<Limit>,
    varied: Vec<Varied>,
    followed: Followed,
    seed: u64,
    nominal: Assessment,
    nominal_phase: Vec<Vec<f64>>,
}

/// Finest bin of a quantile sketch of a level (dB); bins double while the spread needs more
/// than [`stats::MAX_BINS`], so the final bin is about spread/2048 or this, whichever is
/// larger.
pub const DB_BIN: f64 = 1e-6;
/// Finest bin of a phase (degrees).
pub const DEG_BIN: f64 = 1e-5;
/// Finest bin of a frequency, Q or time, in the natural log (a relative width).
pub const REL_BIN: f64 = 1e-7;

/// Samples evaluated in parallel per block; results are folded in index order.
const BLOCK: usize = 256;

#[inline(always)]
fn wrap180(d: f64) -> f64 {
    d - 360.0 * (d / 360.0).round()
}

impl<'e, 'a> Study<'e, 'a> {
    /// Prepares a study: the nominal figures (which decide what is followed), the values
    /// that vary. `opts[r]` are response r's figure settings; limits on responses the
    /// analysis lacks are ignored.
    pub fn new(
        ev: &'e Evaluator<'a>,
        grid: &Grid,
        opts: Vec<MetricOptions>,
        limits: &[Limit],
        seed: u64,
    ) -> Result<Self, SpreadError> {
        let specs = ev.analysis().responses();
        let limits: Vec<Limit> = limits
            .iter()
            .filter(|l| specs.iter().any(|s| s.name == l.response))
            .cloned()
            .collect();
        let varied: Vec<Varied> = ev
            .analysis()
            .network()
            .varied()
            .into_iter()
            .filter(|v| v.tolerance.is_some_and(|t| t.fraction > 0.0))
            .collect();
        if varied.is_empty() {
            return Err(SpreadError::NoTolerances);
        }
        // The grid as a table of its points: the figures read grid frequencies many times
        // per sample, and a log grid computes each with an exponential (same values).
        let grid = Grid::List(grid.points());
        let nominal = metrics::assess(ev, &grid, &opts, &limits)?;
        let followed = Followed::of(&nominal);
        let nominal_phase = nominal
            .values
            .iter()
            .map(|v| Polar::compute(v, &mut Unwrapper::default()).unwrapped_deg)
            .collect();
        Ok(Study {
            ev,
            grid,
            opts,
            limits,
            varied,
            followed,
            seed,
            nominal,
            nominal_phase,
        })
    }

    /// The values that vary, in the order samples draw them.
    pub fn varied(&self) -> &[Varied] {
        &self.varied
    }

    /// The nominal design's response, figures and checks.
    pub fn nominal(&self) -> &Assessment {
        &self.nominal
    }

    /// Names of the varied values: the part's name, with `.gbw` for an op-amp's
    /// gain-bandwidth product.
    pub fn varied_names(&self) -> Vec<String> {
        let net = self.ev.analysis().network();
        self.varied
            .iter()
            .map(|v| {
                let name = net.part(v.part).map_or("?", |p| p.name.as_str());
                match v.param {
                    Param::Main => name.to_string(),
                    Param::Gbw => format!("{name}.gbw"),
                }
            })
            .collect()
    }

    fn scalars(&self, a: &Assessment) -> Vec<f64> {
        self.followed.values(a)
    }

    /// Evaluates sample `i`.
    pub fn evaluate(&self, i: u64) -> Outcome {
        let values = sample_values(&self.varied, self.seed, i);
        let changes: Vec<_> = self
            .varied
            .iter()
            .zip(&values)
            .map(|(v, &x)| (v.part, v.param, x))
            .collect();
        let assessed = (|| {
            let a = self.ev.analysis().with_values(&changes)?;
            let ev = a.evaluator_like(self.ev)?;
            metrics::assess(&ev, &self.grid, &self.opts, &self.limits)
        })();
        match assessed {
            Ok(a) => {
                let phase = a
                    .principal_deg
                    .iter()
                    .zip(&self.nominal_phase)
                    .map(|(v, nom)| near_nominal(v, nom))
                    .collect();
                Outcome {
                    index: i,
                    scalars: self.scalars(&a),
                    passes: a.checks.iter().map(|c| c.pass).collect(),
                    error: None,
                    db: a.traces.into_iter().map(|t| t.db).collect(),
                    phase,
                    values,
                }
            }
            Err(e) => Outcome {
                index: i,
                values,
                scalars: vec![f64::NAN; self.followed.keys.len()],
                passes: vec![false; self.limits.len()],
                error: Some(e.to_string()),
                db: Vec::new(),
                phase: Vec::new(),
            },
        }
    }

    /// An empty state for this study: `samples` in all, of which this run takes the
    /// indices i ≡ `shard` (mod `shards`). `fingerprint` identifies the design and settings
    /// (merging refuses states whose fingerprints differ).
    pub fn state(&self, fingerprint: &str, samples: u64, shard: u64, shards: u64) -> SpreadState {
        let specs = self.ev.analysis().responses();
        let responses = specs
            .iter()
            .enumerate()
            .map(|(r, s)| {
                let db = &self.nominal.traces[r].db;
                let ph = &self.nominal_phase[r];
                EnvelopeState {
                    name: s.name.clone(),
                    unit: s.kind.unit().symbol().to_string(),
                    nominal_db: db.clone(),
                    nominal_phase: ph.clone(),
                    db: db
                        .iter()
                        .map(|&d| Stat::band(d, Scale::Linear(DB_BIN)))
                        .collect(),
                    phase: ph
                        .iter()
                        .map(|&p| Stat::band(p, Scale::Linear(DEG_BIN)))
                        .collect(),
                }
            })
            .collect();
        let nominal_scalars = self.scalars(&self.nominal);
        SpreadState {
            fingerprint: fingerprint.to_string(),
            title: self.ev.analysis().network().title.clone(),
            seed: self.seed,
            samples,
            shards,
            shard_ids: vec![shard],
            freqs: self.grid.points(),
            parts: self.varied_names(),
            responses,
            figures: self
                .followed
                .keys
                .iter()
                .zip(nominal_scalars)
                .map(|(k, nom)| FigureState {
                    name: k.name.clone(),
                    unit: k.unit.to_string(),
                    stat: Stat::new(nom, k.pick.map_or(Scale::Linear(DB_BIN), Pick::scale)),
                })
                .collect(),
            limits: self
                .limits
                .iter()
                .zip(&self.nominal.checks)
                .map(|(l, c)| LimitState {
                    limit: l.clone(),
                    nominal_pass: c.pass,
                    passed: 0,
                })
                .collect(),
            done: 0,
            unsolved: 0,
            all_passed: 0,
        }
    }

    /// Runs the samples of `state`'s shard, in blocks evaluated in parallel and folded into
    /// the state in index order; `sink` sees each block's outcomes (for a samples file and a
    /// progress bar) and may stop the run with an error.
    pub fn run<E>(
        &self,
        state: &mut SpreadState,
        mut sink: impl FnMut(&[Outcome]) -> Result<(), E>,
    ) -> Result<(), E> {
        let shard = state.shard_ids.first().copied().unwrap_or(0);
        let m = state.shards.max(1);
        let indices: Vec<u64> = (shard..state.samples).step_by(m as usize).collect();
        let evaluate = |block: &[u64]| -> Vec<Outcome> {
            block.par_iter().map(|&i| self.evaluate(i)).collect()
        };
        // A pipeline: block b is folded into the state (in index order, on this thread)
        // while block b + 1 is evaluated on the others, so the fold costs no wall time.
        let mut blocks = indices.chunks(BLOCK);
        let mut ready = blocks.next().map(evaluate);
        while let Some(outcomes) = ready.take() {
            let next = blocks.next();
            let ((), evaluated) = rayon::join(|| state.add_block(&outcomes), || next.map(evaluate));
            sink(&outcomes)?;
            ready = evaluated;
        }
        Ok(())
    }
}

/// Each principal phase moved by whole turns to lie within 180° of the nominal phase. Also
/// compiled for AVX2 (picked at run time, as the stack kernel is): the round per value is a
/// few instructions there and a call into libm on the baseline; same bits on either.
#[multiversion(targets("x86_64+avx2+fma"))]
fn near_nominal(principal: &[f64], nominal: &[f64]) -> Vec<f64> {
    principal
        .iter()
        .zip(nominal)
        .map(|(&z, &p)| p + wrap180(z - p))
        .collect()
}

/// The spread of one response at each grid frequency.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct EnvelopeState {
    /// Response name.
    pub name: String,
    /// Unit symbol ("" for a ratio).
    pub unit: String,
    #[serde(with = "stats::bits_vec")]
    nominal_db: Vec<f64>,
    #[serde(with = "stats::bits_vec")]
    nominal_phase: Vec<f64>,
    db: Vec<Stat>,
    phase: Vec<Stat>,
}

/// One followed figure's statistics.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct FigureState {
    /// Its name (`response.figure`, or `limit.NAME.margin_db`).
    pub name: String,
    /// Unit symbol.
    pub unit: String,
    /// The statistics.
    pub stat: Stat,
}

/// One limit's pass count.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct LimitState {
    /// The limit.
    pub limit: Limit,
    /// Whether the nominal design passes it.
    pub nominal_pass: bool,
    /// Samples that passed it.
    pub passed: u64,
}

/// Everything a tolerance study has accumulated: mergeable, serialisable (a shard's partial
/// result), and the source of every output.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct SpreadState {
    /// Identifies the design and settings.
    pub fingerprint: String,
    /// The design's title.
    pub title: String,
    /// The generator's seed.
    pub seed: u64,
    /// Samples in the whole study.
    pub samples: u64,
    /// Shards the study is split into (1: one run).
    pub shards: u64,
    /// The shards accumulated here.
    pub shard_ids: Vec<u64>,
    /// The grid (Hz).
    #[serde(with = "stats::bits_vec")]
    pub freqs: Vec<f64>,
    /// Names of the varied values.
    pub parts: Vec<String>,
    /// Per response, the envelope.
    pub responses: Vec<EnvelopeState>,
    /// The followed figures.
    pub figures: Vec<FigureState>,
    /// The limits.
    pub limits: Vec<LimitState>,
    /// Samples accumulated.
    pub done: u64,
    /// Samples that could not be solved.
    pub unsolved: u64,
    /// Samples that passed every limit.
    pub all_passed: u64,
}

impl SpreadState {
    /// The followed figures' names, in the order of [`Outcome::scalars`].
    pub fn figure_names(&self) -> Vec<&str> {
        self.figures.iter().map(|f| f.name.as_str()).collect()
    }

    /// Adds one sample.
    pub fn add(&mut self, o: &Outcome) {
        self.add_block(std::slice::from_ref(o));
    }

    /// Adds samples in the order given, frequency by frequency (each statistic sees them in
    /// that order, so the state is the same as adding them one at a time), so that each
    /// statistic's bins stay in cache for the whole block.
    pub fn add_block(&mut self, block: &[Outcome]) {
        for o in block {
            self.done += 1;
            if o.error.is_some() {
                self.unsolved += 1;
            }
            if o.pass() {
                self.all_passed += 1;
            }
            for (l, &p) in self.limits.iter_mut().zip(&o.passes) {
                l.passed += u64::from(p && o.error.is_none());
            }
        }
        // Each statistic takes the block's values in one call (see `Stat::add_all`): the
        // k-th statistic of a column gets element k of each outcome's vector `of(o)` (the
        // outcomes without one skipped), gathered from the rows found once per column.
        let (mut xs, mut scratch) = (Vec::with_capacity(block.len()), Vec::new());
        let mut rows: Vec<&[f64]> = Vec::with_capacity(block.len());
        let mut column = |stats: &mut dyn Iterator<Item = &mut Stat>,
                          of: &dyn Fn(&Outcome) -> Option<&Vec<f64>>| {
            rows.clear();
            rows.extend(block.iter().filter_map(|o| of(o).map(Vec::as_slice)));
            for (k, s) in stats.enumerate() {
                xs.clear();
                xs.extend(rows.iter().filter_map(|v| v.get(k)));
                s.add_all(&xs, &mut scratch);
            }
        };
        column(&mut self.figures.iter_mut().map(|f| &mut f.stat), &|o| {
            Some(&o.scalars)
        });
        for (r, env) in self.responses.iter_mut().enumerate() {
            column(&mut env.db.iter_mut(), &|o| o.db.get(r));
            column(&mut env.phase.iter_mut(), &|o| o.phase.get(r));
        }
    }

    /// Adds another part of the same study. Refuses parts of another study (a different
    /// fingerprint, seed, sample count or shard count) and a shard given twice.
    pub fn merge(&mut self, o: &SpreadState) -> Result<(), SpreadError> {
        let same = self.fingerprint == o.fingerprint
            && self.seed == o.seed
            && self.samples == o.samples
            && self.shards == o.shards
            && self.figure_names() == o.figure_names()
            && self.freqs == o.freqs;
        if !same {
            return Err(SpreadError::Mismatch(format!(
                "not parts of one study: seed {} / {} samples / {} shards against seed {} / {} samples / {} shards, or a different design or sweep",
                self.seed, self.samples, self.shards, o.seed, o.samples, o.shards
            )));
        }
        if let Some(dup) = o.shard_ids.iter().find(|s| self.shard_ids.contains(s)) {
            return Err(SpreadError::Mismatch(format!(
                "shard {dup}/{} is given twice",
                self.shards
            )));
        }
        self.shard_ids.extend(&o.shard_ids);
        self.shard_ids.sort_unstable();
        self.done += o.done;
        self.unsolved += o.unsolved;
        self.all_passed += o.all_passed;
        for (a, b) in self.limits.iter_mut().zip(&o.limits) {
            a.passed += b.passed;
        }
        for (a, b) in self.figures.iter_mut().zip(&o.figures) {
            a.stat.merge(&b.stat);
        }
        for (a, b) in self.responses.iter_mut().zip(&o.responses) {
            for (x, y) in a.db.iter_mut().zip(&b.db) {
                x.merge(y);
            }
            for (x, y) in a.phase.iter_mut().zip(&b.phase) {
                x.merge(y);
            }
        }
        Ok(())
    }

    /// Shards missing from a study split into `shards` (empty when complete).
    pub fn missing_shards(&self) -> Vec<u64> {
        (0..self.shards)
            .filter(|s| !self.shard_ids.contains(s))
            .collect()
    }

    /// The summary: per figure its statistics, per limit and overall the yield.
    pub fn summary(&self) -> SpreadSummary {
        let figures = self
            .figures
            .iter()
            .map(|f| {
                let s = &f.stat;
                FigureSummary {
                    name: f.name.clone(),
                    unit: f.unit.clone(),
                    nominal: finite(s.nominal()),
                    mean: s.mean().and_then(finite),
                    std_dev: s.std_dev().and_then(finite),
                    min: s.min().and_then(finite),
                    max: s.max().and_then(finite),
                    p1: s.quantile(0.01).and_then(finite),
                    p50: s.quantile(0.5).and_then(finite),
                    p99: s.quantile(0.99).and_then(finite),
                    quantile_error: s.quantile_error(),
                    quantile_error_relative: s.log_scale(),
                    samples: s.count,
                    missing: s.missing,
                }
            })
            .collect();
        let yield_of = |name: String, passed: u64, nominal_pass: bool| {
            let (lo, hi) = wilson95(passed, self.done);
            YieldSummary {
                name,
                passed,
                samples: self.done,
                fraction: if self.done > 0 {
                    passed as f64 / self.done as f64
                } else {
                    0.0
                },
                wilson_low: lo,
                wilson_high: hi,
                nominal_pass,
            }
        };
        let limits: Vec<YieldSummary> = self
            .limits
            .iter()
            .map(|l| yield_of(l.limit.name.clone(), l.passed, l.nominal_pass))
            .collect();
        let overall = (!self.limits.is_empty()).then(|| {
            yield_of(
                "all limits".into(),
                self.all_passed,
                self.limits.iter().all(|l| l.nominal_pass),
            )
        });
        SpreadSummary {
            title: self.title.clone(),
            seed: self.seed,
            samples: self.done,
            unsolved: self.unsolved,
            varied: self.parts.clone(),
            figures,
            limits,
            overall,
        }
    }

    /// Writes response `r`'s envelope as CSV: per frequency the nominal, min, 5th
    /// percentile, median, 95th percentile and max of |H| (dB) and of the phase (degrees,
    /// within 180° of the nominal's unwrapped phase).
    pub fn write_envelope_csv<W: Write>(&self, out: &mut W, r: usize) -> io::Result<()> {
        let Some(env) = self.responses.get(r) else {
            return Ok(());
        };
        let mut w = csv::Writer::from_writer(out);
        let mut head = vec!["frequency_hz".to_string()];
        for q in ["db", "phase_deg"] {
            for s in ["nominal", "min", "p5", "median", "p95", "max"] {
                head.push(format!("{s}_{q}"));
            }
        }
        w.write_record(&head)?;
        let num = |v: Option<f64>| v.map_or(String::new(), |x| format!("{x}"));
        for (k, &f) in self.freqs.iter().enumerate() {
            let mut row = vec![format!("{f}")];
            for (nom, stat) in [(&env.nominal_db, &env.db), (&env.nominal_phase, &env.phase)] {
                let s = &stat[k];
                row.push(format!("{}", nom[k]));
                row.push(num(s.min()));
                row.push(num(s.quantile(0.05)));
                row.push(num(s.quantile(0.5)));
                row.push(num(s.quantile(0.95)));
                row.push(num(s.max()));
            }
            w.write_record(&row)?;
        }
        w.flush()
    }

    /// Response `r`'s envelope as traces for a plot: (nominal, min, p5, median, p95, max)
    /// of |H| in dB per grid frequency.
    pub fn envelope_db(&self, r: usize) -> Option<EnvelopeTraces> {
        let env = self.responses.get(r)?;
        let pick = |q: Option<f64>| q.unwrap_or(f64::NAN);
        Some(EnvelopeTraces {
            freqs: self.freqs.clone(),
            nominal: env.nominal_db.clone(),
            min: env.db.iter().map(|s| pick(s.min())).collect(),
            p5: env.db.iter().map(|s| pick(s.quantile(0.05))).collect(),
            p95: env.db.iter().map(|s| pick(s.quantile(0.95))).collect(),
            max: env.db.iter().map(|s| pick(s.max())).collect(),
        })
    }
}

fn finite(x: f64) -> Option<f64> {
    x.is_finite().then_some(x)
}

/// An envelope ready to draw.
#[derive(Clone, Debug)]
pub struct EnvelopeTraces {
    /// Frequencies (Hz).
    pub freqs: Vec<f64>,
    /// The nominal design's |H| (dB).
    pub nominal: Vec<f64>,
    /// The smallest over the samples.
    pub min: Vec<f64>,
    /// The 5th percentile.
    pub p5: Vec<f64>,
    /// The 95th percentile.
    pub p95: Vec<f64>,
    /// The largest.
    pub max: Vec<f64>,
}

/// One figure's spread.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct FigureSummary {
    /// `response.figure` or `limit.NAME.margin_db`.
    pub name: String,
    /// Unit symbol.
    pub unit: String,
    /// The nominal design's value.
    pub nominal: Option<f64>,
    /// Mean over the samples that have the figure.
    pub mean: Option<f64>,
    /// Sample standard deviation.
    pub std_dev: Option<f64>,
    /// Smallest value.
    pub min: Option<f64>,
    /// Largest value.
    pub max: Option<f64>,
    /// 1st percentile.
    pub p1: Option<f64>,
    /// Median.
    pub p50: Option<f64>,
    /// 99th percentile.
    pub p99: Option<f64>,
    /// The percentiles' error bound: half a bin of the quantile sketch, in the unit, or
    /// relative when `quantile_error_relative`.
    pub quantile_error: f64,
    /// Whether `quantile_error` is relative (frequencies, Q, times: log-scale bins).
    pub quantile_error_relative: bool,
    /// Samples that have the figure.
    pub samples: u64,
    /// Samples where it is absent (e.g. a peak that flattened out).
    pub missing: u64,
}

/// A yield with its 95 % Wilson interval.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct YieldSummary {
    /// The limit's name, or "all limits".
    pub name: String,
    /// Samples that passed.
    pub passed: u64,
    /// Samples in all.
    pub samples: u64,
    /// passed / samples.
    pub fraction: f64,
    /// Lower end of the 95 % Wilson interval.
    pub wilson_low: f64,
    /// Upper end.
    pub wilson_high: f64,
    /// Whether the nominal design passes.
    pub nominal_pass: bool,
}

/// What a tolerance study found.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct SpreadSummary {
    /// The design's title.
    pub title: String,
    /// The generator's seed.
    pub seed: u64,
    /// Samples run.
    pub samples: u64,
    /// Samples that could not be solved (counted as failing every limit).
    pub unsolved: u64,
    /// The varied values.
    pub varied: Vec<String>,
    /// Each followed figure.
    pub figures: Vec<FigureSummary>,
    /// Each limit's yield.
    pub limits: Vec<YieldSummary>,
    /// The yield over all limits together.
    pub overall: Option<YieldSummary>,
}

/// Writes the header of a samples file: sample index, pass (every limit), the varied values
/// and the followed figures, and a note (why a sample could not be solved).
pub fn write_samples_header<W: Write>(out: &mut W, state: &SpreadState) -> io::Result<()> {
    let mut w = csv::Writer::from_writer(out);
    let mut head = vec!["sample".to_string(), "pass".to_string()];
    head.extend(state.parts.iter().cloned());
    head.extend(state.figures.iter().map(|f| f.name.clone()));
    head.push("note".into());
    w.write_record(&head)?;
    w.flush()
}

/// Writes one row of a samples file per outcome.
pub fn write_sample_rows<W: Write>(out: &mut W, outcomes: &[Outcome]) -> io::Result<()> {
    let mut w = csv::Writer::from_writer(out);
    let mut row: Vec<String> = Vec::new();
    for o in outcomes {
        row.clear();
        row.push(o.index.to_string());
        row.push(if o.pass() { "1" } else { "0" }.into());
        row.extend(o.values.iter().map(|v| format!("{v}")));
        row.extend(o.scalars.iter().map(|v| {
            if v.is_nan() {
                String::new()
            } else {
                format!("{v}")
            }
        }));
        row.push(
            o.error
                .as_deref()
                .unwrap_or_default()
                .replace(['\n', '\r'], " "),
        );
        w.write_record(&row)?;
    }
    w.flush()
}
