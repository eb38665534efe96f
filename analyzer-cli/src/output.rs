//! The one place that touches output files: everything is rendered in memory first, written
//! to temporary files beside the targets, and renamed into place only when all succeeded, so
//! a failed or killed run leaves the previous files intact or none.

use crate::Failure;
use analyzer_core::export::{self, Columns, Marker, PlotInput};
use analyzer_core::metrics::Figures;
use analyzer_core::response::{Analysis, ResponseUnit};
use analyzer_core::sweep::Sweep;
use std::io::Write;
use std::path::{Path, PathBuf};

/// What to write.
pub struct Plan<'a> {
    pub analysis: &'a Analysis,
    pub sweep: &'a Sweep,
    pub figures: &'a [Figures],
    pub unwrap: bool,
    pub plots: bool,
}

impl Plan<'_> {
    fn columns(&self, i: usize) -> Columns<'_> {
        let spec = &self.analysis.responses()[i];
        Columns {
            name: &spec.name,
            unit: spec.kind.unit(),
            values: &self.sweep.values[i],
            delay: self.sweep.delays.as_ref().map(|d| d[i].as_slice()),
            unwrap: self.unwrap,
        }
    }

    /// All responses in one CSV on stdout.
    pub fn csv_to_stdout(&self) -> Result<(), Failure> {
        let cols: Vec<Columns<'_>> = (0..self.sweep.values.len())
            .map(|i| self.columns(i))
            .collect();
        let mut buf = Vec::new();
        export::write_csv(&mut buf, &self.sweep.freqs, &cols)
            .map_err(|e| Failure::output(format!("stdout: {e}")))?;
        let stdout = std::io::stdout();
        let mut lock = stdout.lock();
        lock.write_all(&buf)
            .and_then(|_| lock.flush())
            .map_err(|e| Failure::output(format!("stdout: {e}")))
    }

    /// RESPONSE.csv and RESPONSE.svg per response into `dir`.
    pub fn write_dir(&self, dir: &Path) -> Result<Vec<PathBuf>, Failure> {
        let mut files = Vec::new();
        let title = &self.analysis.network().title;
        for i in 0..self.sweep.values.len() {
            let cols = self.columns(i);
            let mut csv = Vec::new();
            export::write_csv(&mut csv, &self.sweep.freqs, std::slice::from_ref(&cols))
                .map_err(|e| Failure::output(e.to_string()))?;
            let name = safe_file_name(cols.name);
            files.push((dir.join(format!("{name}.csv")), csv));
            if self.plots {
                let svg = self.svg(i, title)?;
                files.push((dir.join(format!("{name}.svg")), svg.into_bytes()));
            }
        }
        write_files(&files)?;
        Ok(files.into_iter().map(|(p, _)| p).collect())
    }

    fn svg(&self, i: usize, title: &str) -> Result<String, Failure> {
        let cols = self.columns(i);
        let mag = export::magnitudes_db(cols.values);
        let phase = export::phases_deg(cols.values, self.unwrap);
        let f = &self.figures[i];
        let mut markers = Vec::new();
        let db_at = |freq: f64| -> f64 {
            // Markers sit on the curve: the figure's own value where it has one.
            let k = self
                .sweep
                .freqs
                .partition_point(|x| *x < freq)
                .min(mag.len().saturating_sub(1));
            mag.get(k).copied().unwrap_or(0.0)
        };
        for (label, freq) in [("lower", f.lower_cutoff_hz), ("upper", f.upper_cutoff_hz)] {
            if let Some(freq) = freq {
                markers.push(Marker {
                    freq,
                    panel: 0,
                    value: f.level_db,
                    label: format!("{label} {}", short(freq)),
                });
            }
        }
        for p in &f.peaks {
            markers.push(Marker {
                freq: p.freq_hz,
                panel: 0,
                value: p.magnitude_db,
                label: format!("peak {}", short(p.freq_hz)),
            });
        }
        for n in &f.notches {
            let shown = if n.magnitude_db.is_finite() {
                n.magnitude_db
            } else {
                db_at(n.freq_hz)
            };
            markers.push(Marker {
                freq: n.freq_hz,
                panel: 0,
                value: shown,
                label: format!("notch {}", short(n.freq_hz)),
            });
        }
        for r in &f.resonances {
            markers.push(Marker {
                freq: r.freq_hz,
                panel: 1,
                value: 0.0,
                label: format!("{} {}", r.kind, short(r.freq_hz)),
            });
        }
        if let Some(m) = &f.margins {
            if let (Some(fc), Some(pm)) = (m.gain_crossover_hz, m.phase_margin_deg) {
                markers.push(Marker {
                    freq: fc,
                    panel: 1,
                    value: pm - 180.0,
                    label: format!("PM {pm:.1}°"),
                });
            }
        }
        let unit = cols.unit;
        let magnitude_label = match unit {
            ResponseUnit::Ratio => "magnitude (dB)".to_string(),
            ResponseUnit::Ohms => "magnitude (dB re 1 Ω)".to_string(),
            ResponseUnit::Siemens => "magnitude (dB re 1 S)".to_string(),
        };
        let input = PlotInput {
            title: format!("{title} — {}", cols.name),
            freqs: &self.sweep.freqs,
            magnitude_db: &mag,
            magnitude_label,
            phase_deg: &phase,
            delay_s: cols.delay,
            markers: &markers,
        };
        export::render_svg(&input)
            .map_err(|e| Failure::input(format!("response {}: {e}", cols.name)))
    }
}

fn short(f: f64) -> String {
    analyzer_core::units::format_eng(f, 4, "Hz")
}

/// Keeps a response name usable as a file name on every system.
fn safe_file_name(name: &str) -> String {
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

/// Writes every file to a temporary beside its target, then renames them all into place.
pub fn write_files(files: &[(PathBuf, Vec<u8>)]) -> Result<(), Failure> {
    let mut staged = Vec::with_capacity(files.len());
    for (path, bytes) in files {
        let dir = match path.parent() {
            Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
            _ => PathBuf::from("."),
        };
        std::fs::create_dir_all(&dir)
            .map_err(|e| Failure::output(format!("{}: {e}", dir.display())))?;
        let mut tmp = tempfile::Builder::new()
            .prefix(".analyzer-")
            .suffix(".part")
            .tempfile_in(&dir)
            .map_err(|e| Failure::output(format!("{}: {e}", dir.display())))?;
        tmp.write_all(bytes)
            .and_then(|_| keep_or_default_mode(tmp.as_file(), path))
            .and_then(|_| tmp.as_file().sync_all())
            .map_err(|e| Failure::output(format!("{}: {e}", path.display())))?;
        staged.push((tmp, path));
    }
    // Dropping an unpersisted temporary removes it, so an error here leaves no debris.
    for (tmp, path) in staged {
        tmp.persist(path)
            .map_err(|e| Failure::output(format!("{}: {}", path.display(), e.error)))?;
    }
    Ok(())
}
