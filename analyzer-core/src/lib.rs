//! Frequency response of linear networks by the phasor method.
//!
//! Each resistor, capacitor and inductor becomes an impedance (R, jωL, 1/(jωC)); Kirchhoff's
//! laws hold for phasors, so at every frequency the network is a complex linear system
//! `(G + jωC)·x = b`. This crate reads a design, assembles `G`, `C` and `b` once
//! ([`stamp`]), solves at each point of a frequency grid in parallel ([`sweep`], [`solve`]),
//! reads out the chosen ratios ([`response`]), finds the figures a review asks for
//! ([`metrics`]) and writes CSV and SVG ([`export`]).
//!
//! The main types, in the order data flows through them:
//!
//! * [`design::Design`] — a parsed design file: [`network::Network`], sweep, responses.
//! * [`response::Analysis`] — the assembled [`stamp::System`] with resolved responses.
//! * [`response::Evaluator`] — evaluates every response at any frequency, with derivatives.
//! * [`sweep::Sweep`] — the columnar result over a [`sweep::Grid`].
//!
//! ```
//! use analyzer_core::{design, response::Analysis, sweep};
//! let text = r#"
//! title = "RC low-pass"
//! [sweep]
//! from = "10 Hz"
//! to = "100 kHz"
//! per_decade = 20
//! [parts]
//! V1 = { voltage = "1 V", between = ["in", "gnd"] }
//! R1 = { resistor = "1k", between = ["in", "out"] }
//! C1 = { capacitor = "100n", between = ["out", "gnd"] }
//! [responses]
//! gain = { ratio = ["out", "in"] }
//! "#;
//! let d = design::parse(text)?;
//! let analysis = Analysis::new(d.network, d.responses)?;
//! let ev = analysis.evaluator()?;
//! let grid = d.sweep.grid()?;
//! let result = sweep::run(&ev, &grid, &sweep::SweepOptions::default())?;
//! // At f = 1/(2πRC) ≈ 1591.5 Hz the gain is 1/(1 + j): −3.01 dB, −45°.
//! let mut ws = ev.workspace();
//! let h = ev.at(&mut ws, 1.0 / (2.0 * std::f64::consts::PI * 1e-4), false)?[0].value;
//! assert!((h.norm() - 0.5f64.sqrt()).abs() < 1e-12);
//! assert_eq!(result.freqs.len(), 81);
//! # Ok::<(), Box<dyn std::error::Error>>(())
//! ```
#![deny(missing_docs)]
// No unwrap, expect or explicit panic in library code: failures are values (tests may unwrap).
#![cfg_attr(
    not(test),
    deny(clippy::unwrap_used, clippy::expect_used, clippy::panic)
)]

pub mod bode;
pub mod corners;
pub mod design;
pub mod export;
#[doc(hidden)]
pub mod fuzz_targets;
pub mod ladders;
pub mod metrics;
pub mod names;
pub mod network;
pub mod noise;
pub mod poles;
pub mod ports;
pub mod preferred;
pub mod response;
pub mod review;
pub mod sensitivity;
pub mod solve;
pub mod spread;
pub mod stamp;
pub mod sweep;
pub mod topology;
pub mod touchstone;
pub mod units;
pub mod variants;
