//! Preferred values: the IEC 60063 series E6 … E192, and moving a design's parts onto them.
//!
//! E6, E12 and E24 are tabulated (two significant figures; several of their members are not
//! the rounded geometric values — 2.7, 3.3, 4.7 … — so they cannot be computed). E48, E96
//! and E192 are the geometric sequences 10^(i/N) rounded to three significant figures, with
//! the one exception the standard makes (E192's 9.20 where the rounding gives 9.19).

use crate::network::{Network, Param, PartId, PartKind};
use std::str::FromStr;

/// A series of preferred values.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Series {
    /// 6 values per decade (±20 % parts).
    E6,
    /// 12 per decade (±10 %).
    E12,
    /// 24 per decade (±5 %).
    E24,
    /// 48 per decade (±2 %).
    E48,
    /// 96 per decade (±1 %).
    E96,
    /// 192 per decade (±0.5 % and better).
    E192,
}

const E24: [f64; 24] = [
    1.0, 1.1, 1.2, 1.3, 1.5, 1.6, 1.8, 2.0, 2.2, 2.4, 2.7, 3.0, 3.3, 3.6, 3.9, 4.3, 4.7, 5.1, 5.6,
    6.2, 6.8, 7.5, 8.2, 9.1,
];

impl FromStr for Series {
    type Err = String;
    fn from_str(s: &str) -> Result<Self, String> {
        match s.trim().to_ascii_uppercase().as_str() {
            "E6" => Ok(Series::E6),
            "E12" => Ok(Series::E12),
            "E24" => Ok(Series::E24),
            "E48" => Ok(Series::E48),
            "E96" => Ok(Series::E96),
            "E192" => Ok(Series::E192),
            _ => Err(format!(
                "unknown series {s:?}; the IEC 60063 series are E6, E12, E24, E48, E96 and E192"
            )),
        }
    }
}

impl Series {
    /// Members per decade.
    pub fn per_decade(self) -> usize {
        match self {
            Series::E6 => 6,
            Series::E12 => 12,
            Series::E24 => 24,
            Series::E48 => 48,
            Series::E96 => 96,
            Series::E192 => 192,
        }
    }

    /// The members in [1, 10), ascending.
    pub fn mantissas(self) -> Vec<f64> {
        let n = self.per_decade();
        match self {
            Series::E6 | Series::E12 | Series::E24 => E24.iter().step_by(24 / n).copied().collect(),
            _ => (0..n)
                .map(|i| {
                    if self == Series::E192 && i == 185 {
                        return 9.20;
                    }
                    let v = 10f64.powf(i as f64 / n as f64);
                    (v * 100.0).round() / 100.0
                })
                .collect(),
        }
    }

    /// The member nearest to `x` (> 0) in log distance (ties to the larger).
    pub fn nearest(self, x: f64) -> f64 {
        if !(x > 0.0 && x.is_finite()) {
            return x;
        }
        let decade = x.log10().floor();
        let scale = 10f64.powf(decade);
        let m = x / scale;
        let mut best = (f64::INFINITY, x);
        let mut list = self.mantissas();
        list.push(10.0);
        for v in list {
            let d = (m / v).ln().abs();
            if d <= best.0 {
                best = (d, v);
            }
        }
        // Exact decimal: the mantissa times the decade, rounded to the mantissa's digits.
        let v = best.1 * scale;
        let digits = 3 - v.log10().floor() as i32;
        let p = 10f64.powi(digits.clamp(-300, 300));
        if digits >= 0 {
            (v * p).round() / p
        } else {
            (v / 10f64.powi(-digits)).round() * 10f64.powi(-digits)
        }
    }
}

/// One part moved onto a series.
#[derive(Clone, Debug, PartialEq)]
pub struct Snapped {
    /// The part.
    pub part: PartId,
    /// Its name.
    pub name: String,
    /// The value before.
    pub from: f64,
    /// The preferred value.
    pub to: f64,
    /// Its unit symbol.
    pub unit: &'static str,
}

/// Every resistor, capacitor and inductor of `net` whose value is not already in `series`,
/// with the nearest preferred value.
pub fn snap(net: &Network, series: Series) -> Vec<Snapped> {
    net.parts()
        .iter()
        .enumerate()
        .filter_map(|(i, p)| {
            let v = match p.kind {
                PartKind::Resistor { ohms, .. } => ohms,
                PartKind::Capacitor { farads, .. } => farads,
                PartKind::Inductor { henries, .. } => henries,
                _ => return None,
            };
            let to = series.nearest(v);
            ((to / v - 1.0).abs() > 1e-9).then(|| Snapped {
                part: PartId(i),
                name: p.name.clone(),
                from: v,
                to,
                unit: p.kind.unit(Param::Main),
            })
        })
        .collect()
}
