//! `analyzer review`: the sweep's outputs plus one self-contained HTML page (review.html)
//! built by `analyzer_core::review`; this module holds its arguments and the provenance.

use crate::Failure;
use analyzer_core::review::Provenance;
use clap::Args;
use sha2::{Digest, Sha256};
use std::path::Path;

#[derive(Args, Debug)]
pub struct ReviewArgs {
    /// Everything `sweep` takes (the output directory defaults to DESIGN-review/).
    #[command(flatten)]
    pub sweep: crate::SweepArgs,
    /// Samples of the tolerance study shown on the page when the design has tolerances
    /// (0: not computed).
    #[arg(long, value_name = "N", default_value_t = 500)]
    pub samples: u64,
    /// Seed of the tolerance study.
    #[arg(long, value_name = "S", default_value_t = 1)]
    pub seed: u64,
}

/// Tool, design file and its SHA-256, the command line and the time of the run.
pub fn provenance(design: &Path, files: Vec<String>) -> Result<Provenance, Failure> {
    let bytes =
        std::fs::read(design).map_err(|e| Failure::input(format!("{}: {e}", design.display())))?;
    let digest = Sha256::digest(&bytes);
    let hex: String = digest.iter().map(|b| format!("{b:02x}")).collect();
    let command: Vec<String> = std::env::args().collect();
    Ok(Provenance {
        tool: format!("analyzer {}", env!("CARGO_PKG_VERSION")),
        design_path: design.display().to_string(),
        design_sha256: hex,
        command: command.join(" "),
        generated: humantime::format_rfc3339_seconds(std::time::SystemTime::now()).to_string(),
        files,
    })
}
