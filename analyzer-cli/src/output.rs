//! The one place that touches output files. CSVs stream into temporary files beside their
//! targets while the sweep runs; plots and JSON are rendered in memory; only when everything
//! has succeeded are all the temporaries renamed into place, so a failed or killed run leaves
//! the previous files intact (or none), never a half-written one.

use crate::Failure;
use analyzer_core::bode::{self, Bode, MagnitudeScale, Mark, PanelKind, Series};
use analyzer_core::export;
use analyzer_core::metrics::{Figures, Limit, Trace};
use analyzer_core::noise::{self, NoisePlan};
use analyzer_core::ports::Complex;
use analyzer_core::response::{AnalysisError, Evaluator, ResponseSpec};
use analyzer_core::review::plots::{self, Drawn, PlotOptions};
use analyzer_core::sweep::Grid;
use analyzer_core::units::format_eng;
use std::io::{BufWriter, Write};
use std::path::{Path, PathBuf};
use tempfile::NamedTempFile;

/// Output files being written, not yet in place.
#[derive(Default)]
pub struct Staging {
    files: Vec<(BufWriter<NamedTempFile>, PathBuf)>,
    /// Directories this run created, removed again if it fails.
    created: Vec<PathBuf>,
}

impl Drop for Staging {
    fn drop(&mut self) {
        // Not committed: the temporaries go first, then the directories made for them.
        self.files.clear();
        for d in self.created.iter().rev() {
            let _ = std::fs::remove_dir(d);
        }
    }
}

impl Staging {
    /// Starts a file that will end up at `path`; returns its handle for [`Staging::writer`].
    pub fn create(&mut self, path: &Path) -> Result<usize, Failure> {
        let dir = match path.parent() {
            Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
            _ => PathBuf::from("."),
        };
        let mut missing = Vec::new();
        let mut d = dir.as_path();
        while !d.as_os_str().is_empty() && !d.exists() {
            missing.push(d.to_path_buf());
            d = d.parent().unwrap_or(Path::new(""));
        }
        std::fs::create_dir_all(&dir)
            .map_err(|e| Failure::output(format!("{}: {e}", dir.display())))?;
        self.created.extend(missing.into_iter().rev());
        let tmp = tempfile::Builder::new()
            .prefix(".analyzer-")
            .suffix(".part")
            .tempfile_in(&dir)
            .map_err(|e| Failure::output(format!("{}: {e}", dir.display())))?;
        self.files
            .push((BufWriter::with_capacity(1 << 20, tmp), path.to_path_buf()));
        Ok(self.files.len() - 1)
    }

    /// The writer of a started file.
    pub fn writer(&mut self, handle: usize) -> Option<&mut BufWriter<NamedTempFile>> {
        self.files.get_mut(handle).map(|f| &mut f.0)
    }

    /// The target path of a started file (for messages).
    pub fn target(&self, handle: usize) -> String {
        self.files
            .get(handle)
            .map_or_else(String::new, |f| f.1.display().to_string())
    }

    /// The target paths of the files started so far.
    pub fn targets(&self) -> Vec<PathBuf> {
        self.files.iter().map(|f| f.1.clone()).collect()
    }

    /// A whole file from bytes.
    pub fn bytes(&mut self, path: &Path, bytes: &[u8]) -> Result<(), Failure> {
        let h = self.create(path)?;
        let w = self
            .writer(h)
            .ok_or_else(|| Failure::output("internal: no such output"))?;
        w.write_all(bytes)
            .map_err(|e| Failure::output(format!("{}: {e}", path.display())))
    }

    /// Flushes every file and renames them all into place; returns their paths. Dropping the
    /// staging instead removes every temporary.
    pub fn commit(mut self) -> Result<Vec<PathBuf>, Failure> {
        let mut ready = Vec::with_capacity(self.files.len());
        for (w, path) in std::mem::take(&mut self.files) {
            let tmp = w
                .into_inner()
                .map_err(|e| Failure::output(format!("{}: {}", path.display(), e.error())))?;
            keep_or_default_mode(tmp.as_file(), &path)
                .and_then(|_| tmp.as_file().sync_all())
                .map_err(|e| Failure::output(format!("{}: {e}", path.display())))?;
            ready.push((tmp, path));
        }
        let mut done = Vec::with_capacity(ready.len());
        for (tmp, path) in ready {
            tmp.persist(&path)
                .map_err(|e| Failure::output(format!("{}: {}", path.display(), e.error)))?;
            done.push(path);
        }
        self.created.clear();
        Ok(done)
    }
}

/// Temporary files are created private (0600); give the output the mode the file it replaces
/// had, or the usual 0644.
#[cfg(unix)]
fn keep_or_default_mode(file: &std::fs::File, target: &Path) -> std::io::Result<()> {
    use std::os::unix::fs::PermissionsExt;
    let mode = std::fs::metadata(target).map_or(0o644, |m| m.permissions().mode() & 0o7777);
    file.set_permissions(std::fs::Permissions::from_mode(mode))
}

#[cfg(not(unix))]
fn keep_or_default_mode(_file: &std::fs::File, _target: &Path) -> std::io::Result<()> {
    Ok(())
}

/// Keeps a response name usable as a file name on every system.
pub fn safe_file_name(name: &str) -> String {
    name.chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || c == '-' || c == '_' || c == '.' {
                c
            } else {
                '_'
            }
        })
        .collect()
}

/// The SVG Bode plot of one response, or several overlaid, with their figures marked and
/// the limits on them drawn as masks; None when the sweep has no frequency above 0 Hz.
pub fn svg(
    title: &str,
    grid: &Grid,
    drawn: &[Drawn<'_>],
    limits: &[Limit],
    opts: PlotOptions,
) -> Result<Option<String>, Failure> {
    plots::bode_svg(title, grid, drawn, limits, opts).map_err(|e| {
        let names: Vec<&str> = drawn.iter().map(|d| d.spec.name.as_str()).collect();
        Failure::input(format!("response {}: {e}", names.join(", ")))
    })
}

/// The Nyquist chart of a loop gain from its trace (at most about 4,000 points drawn).
pub fn nyquist_svg(
    title: &str,
    spec: &ResponseSpec,
    grid: &Grid,
    t: &Trace,
    figures: &Figures,
) -> Option<String> {
    let step = (t.db.len() / 4000).max(1);
    let pts: Vec<(f64, Complex)> = (0..t.db.len().min(grid.len()))
        .step_by(step)
        .map(|k| {
            let m = 10f64.powf(t.db[k] / 20.0);
            let a = f64::from(t.phase_deg[k]).to_radians();
            (grid.at(k), Complex::from_polar(m, a))
        })
        .filter(|p| p.0 > 0.0)
        .collect();
    let m = figures.margins.as_ref();
    let plot = export::NyquistPlot {
        title: format!("{title} — {}: Nyquist chart", spec.name),
        loop_gain: &pts,
        phase_margin: m.and_then(|m| m.gain_crossover_hz.zip(m.phase_margin_deg)),
        gain_margin: m.and_then(|m| m.phase_crossover_hz.zip(m.gain_margin_db)),
    };
    export::render_nyquist_svg(&plot).ok()
}

/// Each noise source's density at every frequency of the sweep (above 0 Hz), as CSV:
/// `frequency_hz`, then one column per source named after it (`R1_v_per_rthz`).
pub fn contributions_csv(
    ev: &Evaluator<'_>,
    index: usize,
    plan: &NoisePlan,
    grid: &Grid,
) -> Result<Vec<u8>, AnalysisError> {
    let freqs: Vec<f64> = grid.points().into_iter().filter(|f| *f > 0.0).collect();
    let (_, cols) = noise::densities(ev, index, &freqs)?;
    let mut names = vec!["frequency_hz".to_string()];
    names.extend(
        plan.sources
            .iter()
            .map(|s| format!("{}_v_per_rthz", s.name.replace(' ', "_"))),
    );
    let mut out = Vec::new();
    // Writing into memory cannot fail.
    let _ = export::write_columns_csv(&mut out, &names, &freqs, &cols);
    Ok(out)
}

/// Frequencies for a plot: up to 400 log-spaced points over the sweep's range above 0 Hz.
fn plot_freqs(grid: &Grid) -> Vec<f64> {
    let pts: Vec<f64> = grid.points().into_iter().filter(|f| *f > 0.0).collect();
    if pts.len() <= 400 {
        return pts;
    }
    let (a, b) = (pts[0], pts[pts.len() - 1]);
    (0..400)
        .map(|k| a * (b / a).powf(k as f64 / 399.0))
        .collect()
}

/// The noise plot of response `index`: its density and its five largest contributors; None
/// when the sweep has no frequency above 0 Hz.
pub fn noise_svg(
    title: &str,
    ev: &Evaluator<'_>,
    index: usize,
    grid: &Grid,
    figures: &Figures,
) -> Result<Option<String>, AnalysisError> {
    let Some(plan) = ev.noise_plan(index) else {
        return Ok(None);
    };
    let freqs = plot_freqs(grid);
    if freqs.len() < 2 {
        return Ok(None);
    }
    let (total, cols) = noise::densities(ev, index, &freqs)?;
    let density = |name: String, v: &[f64]| Series {
        name,
        magnitude: freqs
            .iter()
            .zip(v)
            .map(|(f, d)| (*f, 20.0 * d.log10()))
            .collect(),
        phase: Vec::new(),
        delay: None,
    };
    let mut series = vec![density("total".into(), &total)];
    let shares = figures
        .noise
        .as_ref()
        .map(|n| n.contributors.iter().take(4).collect::<Vec<_>>())
        .unwrap_or_default();
    for (name, share) in shares {
        if let Some(k) = plan.sources.iter().position(|s| &s.name == name) {
            series.push(density(format!("{name} ({share:.1} %)"), &cols[k]));
        }
    }
    let spec = &ev.analysis().responses()[index];
    let label = match &spec.kind {
        analyzer_core::response::ResponseKind::Noise {
            referred_to: Some(_),
            ..
        } => "noise referred to the input",
        _ => "noise density",
    };
    let marks: Vec<Mark> = figures
        .noise
        .as_ref()
        .map(|n| Mark {
            freq: n.spot_hz,
            panel: PanelKind::Magnitude,
            value: 20.0 * n.spot_density.log10(),
            label: format!(
                "{}/√Hz at {}",
                format_eng(n.spot_density, 3, "V"),
                format_eng(n.spot_hz, 4, "Hz")
            ),
        })
        .into_iter()
        .collect();
    let plot = Bode {
        marks: &marks,
        ..Bode::new(
            format!("{title} — {}", spec.name),
            (freqs[0], freqs[freqs.len() - 1]),
            &series,
            MagnitudeScale::Log("V/√Hz"),
            label.into(),
        )
    };
    Ok(bode::render(&plot).ok())
}
