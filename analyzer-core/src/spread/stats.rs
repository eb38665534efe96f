//! Streaming statistics that merge exactly: sums kept as exact expansions, a binned quantile
//! sketch whose bins depend on the data set and not on the order it arrived in, counts,
//! extremes. A study split into shards and merged gives the numbers one run would give, bit
//! for bit.

use serde::{Deserialize, Serialize};

/// A sum of doubles kept exactly, as a list of non-overlapping partial sums (Shewchuk's
/// algorithm, "Adaptive precision floating-point arithmetic", 1997; the one Python's
/// `math.fsum` uses). The value read out is the exact sum correctly rounded, so it does not
/// depend on the order of the terms.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct ExactSum {
    #[serde(with = "bits_vec")]
    partials: Vec<f64>,
    /// Non-finite terms are kept aside (their sum is not exact arithmetic anyway).
    #[serde(with = "bits")]
    special: f64,
}

impl ExactSum {
    /// Adds one term.
    pub fn add(&mut self, x: f64) {
        if !x.is_finite() {
            self.special += x;
            return;
        }
        let mut x = x;
        let mut i = 0;
        for j in 0..self.partials.len() {
            let mut y = self.partials[j];
            if x.abs() < y.abs() {
                std::mem::swap(&mut x, &mut y);
            }
            let hi = x + y;
            let lo = y - (hi - x);
            if lo != 0.0 {
                self.partials[i] = lo;
                i += 1;
            }
            x = hi;
            if !x.is_finite() {
                // Overflow of the partials: give up exactness for this (absurd) sum.
                self.partials.clear();
                self.special += x;
                return;
            }
        }
        self.partials.truncate(i);
        self.partials.push(x);
    }

    /// Adds every term of another sum.
    pub fn merge(&mut self, other: &ExactSum) {
        for &p in &other.partials {
            self.add(p);
        }
        self.special += other.special;
    }

    /// The exact sum, correctly rounded to a double (round half to even).
    pub fn value(&self) -> f64 {
        if self.special != 0.0 || self.special.is_nan() {
            return self.special;
        }
        let p = &self.partials;
        let Some(mut n) = p.len().checked_sub(1) else {
            return 0.0;
        };
        let mut hi = p[n];
        let mut lo = 0.0;
        while n > 0 {
            let x = hi;
            n -= 1;
            let y = p[n];
            hi = x + y;
            let yr = hi - x;
            lo = y - yr;
            if lo != 0.0 {
                break;
            }
        }
        // Half-way case: the rest of the partials decide the rounding direction.
        if n > 0 && ((lo < 0.0 && p[n - 1] < 0.0) || (lo > 0.0 && p[n - 1] > 0.0)) {
            let y = lo * 2.0;
            let x = hi + y;
            let yr = x - hi;
            if y == yr {
                hi = x;
            }
        }
        hi
    }
}

/// Base bin width of a sketch, in the sketch's own scale.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub enum Scale {
    /// Bins of `width` in the value itself (dB, degrees).
    Linear(f64),
    /// Bins of `width` in the natural log of the value (frequencies, Q: relative width).
    Log(f64),
}

/// Most bins a sketch keeps; beyond this its bins double in width.
pub const MAX_BINS: usize = 2048;

/// A quantile sketch: counts in bins of a fixed base width anchored at the nominal value,
/// doubled in width (pairs merged, indices floor-aligned) while the occupied span exceeds
/// [`MAX_BINS`]. The final width is the smallest doubling at which the whole data set fits,
/// whatever the order of insertion or merging, so merged shards give the very same bins.
/// A quantile is reported at the midpoint of its bin, clamped to the exact extremes: its
/// error is at most half a bin ([`Sketch::error_bound`]).
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(into = "SketchWire", from = "SketchWire")]
pub struct Sketch {
    scale: Scale,
    anchor: f64,
    /// Doublings of the base width.
    level: u32,
    /// Index of `counts[0]` at the current level (the buffer keeps empty slack on both
    /// sides, so a sketch grows without shifting its counts at every new extreme).
    offset: i64,
    counts: Vec<u64>,
    /// The lowest and highest occupied index (lo > hi when empty).
    lo: i64,
    hi: i64,
}

/// A sketch as stored and compared: only its occupied bins.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
struct SketchWire {
    scale: Scale,
    #[serde(with = "bits")]
    anchor: f64,
    level: u32,
    offset: i64,
    counts: Vec<u64>,
}

impl From<Sketch> for SketchWire {
    fn from(s: Sketch) -> Self {
        SketchWire {
            scale: s.scale,
            anchor: s.anchor,
            level: s.level,
            offset: if s.is_empty() { 0 } else { s.lo },
            counts: s.occupied().to_vec(),
        }
    }
}

impl From<SketchWire> for Sketch {
    fn from(w: SketchWire) -> Self {
        let n = w.counts.len() as i64;
        Sketch {
            scale: w.scale,
            anchor: w.anchor,
            level: w.level,
            offset: w.offset,
            counts: w.counts,
            lo: w.offset,
            hi: w.offset + n - 1,
        }
    }
}

impl PartialEq for Sketch {
    fn eq(&self, other: &Self) -> bool {
        SketchWire::from(self.clone()) == SketchWire::from(other.clone())
    }
}

/// Empty bins kept on each side when a sketch's buffer is (re)made.
const SLACK: i64 = 32;

/// The base-level bins of `xs` that the sketch can hold, into `out` (cleared first). Also
/// compiled for AVX2 (picked at run time, as the stack kernel is): `floor` is one instruction
/// there and a call into libm on the baseline; same bits on either.
#[multiversion::multiversion(targets("x86_64+avx2+fma"))]
fn base_indices(sketch: &Sketch, xs: &[f64], out: &mut Vec<i64>) {
    out.clear();
    for &x in xs {
        if let Some(k) = sketch.base_index(x) {
            out.push(k);
        }
    }
}

impl Sketch {
    /// An empty sketch of the given scale, anchored at `anchor` (the nominal value).
    pub fn new(scale: Scale, anchor: f64) -> Self {
        let anchor = match scale {
            Scale::Log(_) if anchor > 0.0 && anchor.is_finite() => anchor.ln(),
            Scale::Log(_) => 0.0,
            Scale::Linear(_) if anchor.is_finite() => anchor,
            Scale::Linear(_) => 0.0,
        };
        Sketch {
            scale,
            anchor,
            level: 0,
            offset: 0,
            counts: Vec::new(),
            lo: 0,
            hi: -1,
        }
    }

    fn is_empty(&self) -> bool {
        self.lo > self.hi
    }

    /// The counts from the lowest to the highest occupied bin.
    fn occupied(&self) -> &[u64] {
        if self.is_empty() {
            return &[];
        }
        let a = (self.lo - self.offset) as usize;
        let b = (self.hi - self.offset) as usize;
        self.counts.get(a..=b).unwrap_or_default()
    }

    /// Rebuilds the buffer around the occupied span `[lo, hi]` with slack on both sides;
    /// `put(index, count)` is called for each old occupied bin, mapped by `map`.
    fn rebuild(&mut self, lo: i64, hi: i64, map: impl Fn(i64) -> i64) {
        let span = hi - lo + 1;
        let slack = SLACK.max(span.min(MAX_BINS as i64));
        let offset = lo - slack;
        // Filled rather than allocated zeroed: a zeroed allocation may take fresh pages from
        // the system (which the kernel must clear) where a freed buffer would serve.
        // (Measured: 10,000 samples of the fifth-order ladder took 0.3 s more with `vec![0; n]`,
        // most of it in the kernel clearing pages; `cargo bench --bench spread`.)
        #[allow(clippy::slow_vector_initialization)]
        let mut counts = {
            let mut v = Vec::with_capacity((span + 2 * slack) as usize);
            v.resize((span + 2 * slack) as usize, 0u64);
            v
        };
        if !self.is_empty() {
            for (i, &c) in self.occupied().iter().enumerate() {
                if c > 0 {
                    let j = map(self.lo + i as i64) - offset;
                    counts[j as usize] += c;
                }
            }
        }
        self.counts = counts;
        self.offset = offset;
        self.lo = lo;
        self.hi = hi;
    }

    #[inline(always)]
    fn width0(&self) -> f64 {
        match self.scale {
            Scale::Linear(w) | Scale::Log(w) => w,
        }
    }

    #[inline(always)]
    fn coordinate(&self, x: f64) -> Option<f64> {
        let u = match self.scale {
            Scale::Linear(_) => x,
            Scale::Log(_) if x > 0.0 => x.ln(),
            Scale::Log(_) => return None,
        };
        u.is_finite().then_some(u)
    }

    /// The base-level bin of a value (None for values the scale cannot hold: non-finite,
    /// or not positive on a log scale).
    #[inline(always)]
    fn base_index(&self, x: f64) -> Option<i64> {
        let u = self.coordinate(x)?;
        let k = ((u - self.anchor) / self.width0()).floor();
        // Far outliers share the outermost bins rather than overflow an index.
        Some(k.clamp(-(1i64 << 52) as f64, (1i64 << 52) as f64) as i64)
    }

    /// Adds one value; returns false if the scale cannot hold it.
    pub fn add(&mut self, x: f64) -> bool {
        match self.base_index(x) {
            Some(k) => {
                self.add_at(k >> self.level, 1);
                true
            }
            None => false,
        }
    }

    /// Adds several values, leaving the very state adding them one at a time would (the
    /// final width and span depend only on the values): the span is set once from the
    /// extremes, then the counters are incremented in one tight pass, so the cache misses
    /// of many scattered bins overlap instead of waiting on each other's branches.
    /// `scratch` is a buffer the caller keeps between calls.
    pub fn add_all(&mut self, xs: &[f64], scratch: &mut Vec<i64>) {
        base_indices(self, xs, scratch);
        let (Some(&low), Some(&high)) = (scratch.iter().min(), scratch.iter().max()) else {
            return;
        };
        // The extremes with no count: coarsening and the buffer as the values would make
        // them (the lowest and highest bins then receive their counts below).
        self.add_at(low >> self.level, 0);
        self.add_at(high >> self.level, 0);
        let (level, offset) = (self.level, self.offset);
        for &b in scratch.iter() {
            if let Some(c) = self.counts.get_mut(((b >> level) - offset) as usize) {
                *c += 1;
            }
        }
    }

    fn add_at(&mut self, mut k: i64, n: u64) {
        if self.is_empty() {
            self.rebuild(k, k, |i| i);
            self.counts[(k - self.offset) as usize] += n;
            return;
        }
        while self.hi.max(k) - self.lo.min(k) >= MAX_BINS as i64 {
            self.coarsen();
            k >>= 1;
        }
        if k < self.offset || k >= self.offset + self.counts.len() as i64 {
            let (lo, hi) = (self.lo.min(k), self.hi.max(k));
            self.rebuild(lo, hi, |i| i);
        }
        self.lo = self.lo.min(k);
        self.hi = self.hi.max(k);
        self.counts[(k - self.offset) as usize] += n;
    }

    /// Doubles the bin width: bins 2j and 2j+1 become bin j.
    fn coarsen(&mut self) {
        if !self.is_empty() {
            let (lo, hi) = (self.lo >> 1, self.hi >> 1);
            self.rebuild(lo, hi, |i| i >> 1);
        }
        self.level += 1;
    }

    /// Total count held.
    pub fn count(&self) -> u64 {
        self.counts.iter().sum()
    }

    /// The current bin width, in the scale's units (dB, degrees, or relative for a log
    /// scale: a width w means a factor e^w).
    pub fn bin_width(&self) -> f64 {
        self.width0() * f64::from(1u32 << self.level.min(31))
    }

    /// The error bound of a quantile: half a bin, in the value's units (for a log scale, as
    /// a relative error e^(w/2) − 1).
    pub fn error_bound(&self) -> f64 {
        let w = self.bin_width();
        match self.scale {
            Scale::Linear(_) => 0.5 * w,
            Scale::Log(_) => (0.5 * w).exp_m1(),
        }
    }

    /// The p-quantile (0 ≤ p ≤ 1) by the nearest-rank definition, as its bin's midpoint
    /// clamped to [min, max]; None when empty.
    pub fn quantile(&self, p: f64, min: f64, max: f64) -> Option<f64> {
        let n = self.count();
        if n == 0 {
            return None;
        }
        let rank = ((p * n as f64).ceil() as u64).clamp(1, n);
        let mut seen = 0u64;
        for (i, &c) in self.occupied().iter().enumerate() {
            seen += c;
            if seen >= rank {
                let k = self.lo + i as i64;
                let w = self.bin_width();
                let u = self.anchor + (k as f64 + 0.5) * w;
                let v = match self.scale {
                    Scale::Linear(_) => u,
                    Scale::Log(_) => u.exp(),
                };
                return Some(v.clamp(min.min(max), max.max(min)));
            }
        }
        None
    }
}

/// Counts, extremes, exact sums and a quantile sketch of one scalar.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Stat {
    /// Samples with a value.
    pub count: u64,
    /// Samples without one (the figure did not exist, or was not finite).
    pub missing: u64,
    #[serde(with = "bits")]
    nominal: f64,
    #[serde(with = "bits")]
    min: f64,
    #[serde(with = "bits")]
    max: f64,
    /// Σ(x − nominal), exactly.
    sum: ExactSum,
    /// Σ(x − nominal)², exactly (each square rounded once).
    sum_sq: ExactSum,
    sketch: Sketch,
    /// Whether the sums are kept (no mean or σ without them).
    moments: bool,
}

impl Stat {
    /// An empty statistic of a value whose nominal is `nominal`.
    pub fn new(nominal: f64, scale: Scale) -> Self {
        Stat {
            count: 0,
            missing: 0,
            nominal,
            min: f64::INFINITY,
            max: f64::NEG_INFINITY,
            sum: ExactSum::default(),
            sum_sq: ExactSum::default(),
            sketch: Sketch::new(scale, nominal),
            moments: true,
        }
    }

    /// A statistic of extremes and percentiles only (no mean or σ): cheaper per value, for
    /// the envelope's many frequencies.
    pub fn band(nominal: f64, scale: Scale) -> Self {
        Stat {
            moments: false,
            ..Stat::new(nominal, scale)
        }
    }

    /// Adds several samples' values in order, as [`Stat::add`] on each would (`scratch`: a
    /// buffer the caller keeps between calls).
    pub fn add_all(&mut self, xs: &[f64], scratch: &mut Vec<i64>) {
        for &x in xs {
            self.tally(x);
        }
        self.sketch.add_all(xs, scratch);
    }

    /// Adds one sample's value (NaN: missing).
    pub fn add(&mut self, x: f64) {
        if self.tally(x) {
            self.sketch.add(x);
        }
    }

    /// Counts `x` in everything but the sketch; false for a missing value (NaN).
    fn tally(&mut self, x: f64) -> bool {
        if x.is_nan() {
            self.missing += 1;
            return false;
        }
        self.count += 1;
        self.min = self.min.min(x);
        self.max = self.max.max(x);
        if self.moments {
            let d = x - if self.nominal.is_finite() {
                self.nominal
            } else {
                0.0
            };
            self.sum.add(d);
            self.sum_sq.add(d * d);
        }
        true
    }

    /// Adds every sample of another statistic of the same value.
    pub fn merge(&mut self, o: &Stat) {
        self.count += o.count;
        self.missing += o.missing;
        self.min = self.min.min(o.min);
        self.max = self.max.max(o.max);
        self.sum.merge(&o.sum);
        self.sum_sq.merge(&o.sum_sq);
        self.sketch.merge(&o.sketch);
    }

    /// The nominal value.
    pub fn nominal(&self) -> f64 {
        self.nominal
    }
    /// The smallest value (None when empty).
    pub fn min(&self) -> Option<f64> {
        (self.count > 0).then_some(self.min)
    }
    /// The largest value (None when empty).
    pub fn max(&self) -> Option<f64> {
        (self.count > 0).then_some(self.max)
    }
    /// The mean.
    pub fn mean(&self) -> Option<f64> {
        let base = if self.nominal.is_finite() {
            self.nominal
        } else {
            0.0
        };
        (self.count > 0 && self.moments).then(|| base + self.sum.value() / self.count as f64)
    }
    /// The sample standard deviation (n − 1).
    pub fn std_dev(&self) -> Option<f64> {
        if self.count < 2 || !self.moments {
            return None;
        }
        let n = self.count as f64;
        let s1 = self.sum.value();
        let var = (self.sum_sq.value() - s1 * s1 / n) / (n - 1.0);
        Some(var.max(0.0).sqrt())
    }
    /// The p-quantile from the sketch (see [`Sketch::quantile`]).
    pub fn quantile(&self, p: f64) -> Option<f64> {
        self.sketch.quantile(p, self.min, self.max)
    }
    /// The quantiles' error bound (see [`Sketch::error_bound`]).
    pub fn quantile_error(&self) -> f64 {
        self.sketch.error_bound()
    }
    /// Whether the sketch is on a log scale (its error bound is then relative).
    pub fn log_scale(&self) -> bool {
        matches!(self.sketch.scale, Scale::Log(_))
    }
}

impl Sketch {
    /// Adds every count of `other` (same scale and anchor), giving the sketch the union of
    /// both data sets would have: both are brought to a common level, the union's span is
    /// coarsened until it fits, then the counts are added.
    pub fn merge(&mut self, other: &Sketch) {
        if other.is_empty() {
            return;
        }
        if self.is_empty() {
            let level = self.level.max(other.level);
            *self = other.clone();
            while self.level < level {
                self.coarsen();
            }
            return;
        }
        let mut other = other.clone();
        loop {
            while other.level < self.level {
                other.coarsen();
            }
            while self.level < other.level {
                self.coarsen();
            }
            if self.hi.max(other.hi) - self.lo.min(other.lo) < MAX_BINS as i64 {
                break;
            }
            self.coarsen();
        }
        for (i, &c) in other.occupied().iter().enumerate() {
            if c > 0 {
                self.add_at(other.lo + i as i64, c);
            }
        }
    }
}

/// The 95 % Wilson score interval of a proportion k/n (Wilson, 1927; z = 1.959964, the
/// normal 97.5 % point).
pub fn wilson95(k: u64, n: u64) -> (f64, f64) {
    if n == 0 {
        return (0.0, 1.0);
    }
    let z = 1.959_963_984_540_054_f64;
    let n_f = n as f64;
    let p = k as f64 / n_f;
    let z2n = z * z / n_f;
    let centre = (p + z2n / 2.0) / (1.0 + z2n);
    let half = z / (1.0 + z2n) * (p * (1.0 - p) / n_f + z2n / (4.0 * n_f)).sqrt();
    ((centre - half).max(0.0), (centre + half).min(1.0))
}

/// f64 fields stored as their bit patterns, so a partial result round-trips exactly
/// (JSON has no infinities and text floats need care).
pub(crate) mod bits {
    use serde::{Deserialize, Deserializer, Serializer};
    pub fn serialize<S: Serializer>(v: &f64, s: S) -> Result<S::Ok, S::Error> {
        s.serialize_u64(v.to_bits())
    }
    pub fn deserialize<'de, D: Deserializer<'de>>(d: D) -> Result<f64, D::Error> {
        Ok(f64::from_bits(u64::deserialize(d)?))
    }
}

pub(crate) mod bits_vec {
    use serde::{Deserialize, Deserializer, Serializer};
    pub fn serialize<S: Serializer>(v: &[f64], s: S) -> Result<S::Ok, S::Error> {
        s.collect_seq(v.iter().map(|x| x.to_bits()))
    }
    pub fn deserialize<'de, D: Deserializer<'de>>(d: D) -> Result<Vec<f64>, D::Error> {
        Ok(Vec::<u64>::deserialize(d)?
            .into_iter()
            .map(f64::from_bits)
            .collect())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Values added a block at a time leave the very state of adding them one by one: the
    /// same width (the values span a million base bins, so the sketch coarsens many times
    /// over), the same occupied bins and counts, the same extremes and exact sums; missing
    /// and unplaceable values are counted alike.
    #[test]
    fn adding_a_block_equals_adding_one_at_a_time() {
        let xs: Vec<f64> = (0..5000)
            .map(|k| {
                let t = k as f64;
                match k % 997 {
                    0 => f64::NAN,
                    1 => f64::INFINITY,
                    _ => (t * 0.61).sin() * (1.0 + t * 1e-3).powi(2),
                }
            })
            .collect();
        for scale in [Scale::Linear(1e-6), Scale::Log(1e-7)] {
            for moments in [true, false] {
                let fresh = || {
                    if moments {
                        Stat::new(0.1, scale)
                    } else {
                        Stat::band(0.1, scale)
                    }
                };
                let mut one = fresh();
                for &x in &xs {
                    one.add(x);
                }
                for block in [1, 7, 256, 5000] {
                    let (mut all, mut scratch) = (fresh(), Vec::new());
                    for chunk in xs.chunks(block) {
                        all.add_all(chunk, &mut scratch);
                    }
                    assert_eq!(all, one, "{scale:?}, block {block}");
                    assert_eq!(all.quantile(0.37), one.quantile(0.37));
                }
                assert!(one.sketch.level > 8, "{}", one.sketch.level);
            }
        }
    }

    #[test]
    fn exact_sum_is_correctly_rounded_whatever_the_order() {
        // Cases whose exact sums are known by hand (and are the classic fsum examples).
        let mut s = ExactSum::default();
        for x in [1e100, 1.0, -1e100, 1e-100, 1e50, -1.0, -1e50] {
            s.add(x);
        }
        assert_eq!(s.value(), 1e-100);
        let terms: Vec<f64> = (0..1000).map(|k| 0.1 * f64::from(k % 7) - 0.25).collect();
        let mut fwd = ExactSum::default();
        let mut rev = ExactSum::default();
        terms.iter().for_each(|&x| fwd.add(x));
        terms.iter().rev().for_each(|&x| rev.add(x));
        assert_eq!(fwd.value().to_bits(), rev.value().to_bits());
        // Split and merged.
        let (mut a, mut b) = (ExactSum::default(), ExactSum::default());
        terms[..333].iter().for_each(|&x| a.add(x));
        terms[333..].iter().for_each(|&x| b.add(x));
        b.merge(&a);
        assert_eq!(b.value().to_bits(), fwd.value().to_bits());
    }

    #[test]
    fn sketches_merge_to_the_sketch_of_the_union() {
        let data: Vec<f64> = (0..5000)
            .map(|k| (f64::from(k) * 0.618_033_988_749_895).fract() * 3.0 - 1.0)
            .collect();
        let mut whole = Sketch::new(Scale::Linear(1e-6), 0.0);
        data.iter().for_each(|&x| {
            whole.add(x);
        });
        let mut parts: Vec<Sketch> = (0..3)
            .map(|_| Sketch::new(Scale::Linear(1e-6), 0.0))
            .collect();
        for (k, &x) in data.iter().enumerate() {
            parts[k % 3].add(x);
        }
        let mut merged = parts[2].clone();
        merged.merge(&parts[0]);
        merged.merge(&parts[1]);
        assert_eq!(merged, whole);
        assert!(whole.occupied().len() <= MAX_BINS);
        // Quantiles within the stated bound of the exact order statistics.
        let mut sorted = data.clone();
        sorted.sort_by(f64::total_cmp);
        for p in [0.01, 0.05, 0.5, 0.95, 0.99] {
            let exact = sorted[((p * data.len() as f64).ceil() as usize).max(1) - 1];
            let q = whole.quantile(p, -1.0, 2.0).unwrap_or(f64::NAN);
            assert!(
                (q - exact).abs() <= whole.error_bound() + 1e-12,
                "p {p}: {q} vs {exact}"
            );
        }
    }
}
