//! Touchstone files (the IBIS Open Forum's open format for N-port data), versions 1.1 and
//! 2.0: a writer for S-parameters and a reader that reads them back.
//!
//! Written as we read the specification's rules (from memory): `!` starts a comment; the
//! option line `# <freq unit> <parameter> <format> R <z0>`; data lines of a frequency then
//! the matrix, real/imaginary (`RI`), magnitude/angle (`MA`) or dB/angle (`DB`) pairs. Two-port
//! data in version 1.1 are in the order S11 S21 S12 S22; other sizes row by row, each row on
//! a new line, at most four pairs per line. Version 2.0 adds keywords: `[Version] 2.0`,
//! `[Number of Ports]`, `[Two-Port Data Order]` (required for two ports; we write `21_12`,
//! the 1.1 order), `[Number of Frequencies]`, `[Reference]` (one z0 per port, which 1.1
//! cannot express), `[Network Data]` and `[End]`.

use crate::ports::{Port, SPoint};
use num_complex::Complex64;
use std::io::{self, Write};

/// Which version of the format.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Version {
    /// 1.1: one reference impedance for every port.
    V1,
    /// 2.0: keywords, a reference impedance per port.
    V2,
}

/// The order the matrix entries are written in: (row, column) pairs.
fn order(n: usize, two_port_21_12: bool) -> Vec<(usize, usize)> {
    if n == 2 && two_port_21_12 {
        return vec![(0, 0), (1, 0), (0, 1), (1, 1)];
    }
    (0..n).flat_map(|i| (0..n).map(move |j| (i, j))).collect()
}

/// Writes S-parameters (RI format, frequencies in Hz).
pub fn write<W: Write>(
    out: &mut W,
    version: Version,
    title: &str,
    ports: &[Port],
    points: &[SPoint],
) -> io::Result<()> {
    let n = ports.len();
    if n == 0 {
        return Err(io::Error::new(io::ErrorKind::InvalidInput, "no ports"));
    }
    let z0 = ports[0].z0;
    if version == Version::V1 && ports.iter().any(|p| p.z0 != z0) {
        return Err(io::Error::new(
            io::ErrorKind::InvalidInput,
            "Touchstone 1.1 has one reference impedance for all ports; these ports differ (write version 2.0)",
        ));
    }
    for line in title.lines() {
        writeln!(out, "! {line}")?;
    }
    writeln!(
        out,
        "! S-parameters (power waves, real reference impedances), written by analyzer {}",
        env!("CARGO_PKG_VERSION")
    )?;
    let names: Vec<String> = ports
        .iter()
        .enumerate()
        .map(|(i, p)| format!("{} = {}", i + 1, p.name))
        .collect();
    writeln!(out, "! ports: {}", names.join(", "))?;
    if version == Version::V2 {
        writeln!(out, "[Version] 2.0")?;
    }
    writeln!(out, "# HZ S RI R {z0}")?;
    if version == Version::V2 {
        writeln!(out, "[Number of Ports] {n}")?;
        if n == 2 {
            writeln!(out, "[Two-Port Data Order] 21_12")?;
        }
        writeln!(out, "[Number of Frequencies] {}", points.len())?;
        let refs: Vec<String> = ports.iter().map(|p| format!("{}", p.z0)).collect();
        writeln!(out, "[Reference] {}", refs.join(" "))?;
        writeln!(out, "[Network Data]")?;
    }
    let ord = order(n, true);
    for p in points {
        write!(out, "{}", p.freq)?;
        if n <= 2 {
            for &(i, j) in &ord {
                let z = p.s[i * n + j];
                write!(out, " {} {}", z.re, z.im)?;
            }
            writeln!(out)?;
            continue;
        }
        for i in 0..n {
            for (k, j) in (0..n).enumerate() {
                if k > 0 && k % 4 == 0 {
                    writeln!(out)?;
                }
                let z = p.s[i * n + j];
                write!(out, " {} {}", z.re, z.im)?;
            }
            writeln!(out)?;
        }
    }
    if version == Version::V2 {
        writeln!(out, "[End]")?;
    }
    Ok(())
}

/// S-parameters read from a Touchstone file.
#[derive(Clone, Debug, PartialEq)]
pub struct Data {
    /// The version found.
    pub version: Version,
    /// Reference impedance per port.
    pub z0: Vec<f64>,
    /// Frequencies (Hz).
    pub freqs: Vec<f64>,
    /// S per frequency, row-major.
    pub s: Vec<Vec<Complex64>>,
}

fn bad(line: usize, msg: impl Into<String>) -> io::Error {
    io::Error::new(
        io::ErrorKind::InvalidData,
        format!("line {line}: {}", msg.into()),
    )
}

/// Reads S-parameters. `ports` is the port count for a version 1.1 file (from its `.sNp`
/// extension); version 2.0 files say it themselves.
pub fn read(text: &str, ports: Option<usize>) -> io::Result<Data> {
    let mut version = Version::V1;
    let mut n = ports;
    let mut unit = 1.0;
    let mut format = "MA".to_string();
    let mut z0: Option<f64> = None;
    let mut refs: Option<Vec<f64>> = None;
    let mut order_21_12 = true;
    let mut numbers: Vec<f64> = Vec::new();
    let mut in_data = false;
    let mut option_seen = false;
    for (k, raw) in text.lines().enumerate() {
        let line_no = k + 1;
        let line = raw.split('!').next().unwrap_or("").trim();
        if line.is_empty() {
            continue;
        }
        if let Some(rest) = line.strip_prefix('[') {
            let (key, value) = rest
                .split_once(']')
                .ok_or_else(|| bad(line_no, "unclosed keyword"))?;
            let value = value.trim();
            match key.trim().to_ascii_lowercase().as_str() {
                "version" => {
                    version = if value.starts_with('2') {
                        Version::V2
                    } else {
                        return Err(bad(line_no, format!("unknown version {value}")));
                    }
                }
                "number of ports" => {
                    n = Some(value.parse().map_err(|_| bad(line_no, "bad port count"))?)
                }
                "two-port data order" => order_21_12 = value == "21_12",
                "reference" => {
                    refs = Some(
                        value
                            .split_whitespace()
                            .map(|x| x.parse::<f64>())
                            .collect::<Result<_, _>>()
                            .map_err(|_| bad(line_no, "bad reference impedance"))?,
                    )
                }
                "network data" => in_data = true,
                "end" => in_data = false,
                _ => {}
            }
            continue;
        }
        if let Some(rest) = line.strip_prefix('#') {
            option_seen = true;
            let words: Vec<String> = rest
                .split_whitespace()
                .map(str::to_ascii_uppercase)
                .collect();
            let mut i = 0;
            while i < words.len() {
                match words[i].as_str() {
                    "HZ" => unit = 1.0,
                    "KHZ" => unit = 1e3,
                    "MHZ" => unit = 1e6,
                    "GHZ" => unit = 1e9,
                    "S" => {}
                    "Y" | "Z" | "H" | "G" => {
                        return Err(bad(line_no, "only S-parameters are read"));
                    }
                    "RI" | "MA" | "DB" => format = words[i].clone(),
                    "R" => {
                        i += 1;
                        z0 = Some(
                            words
                                .get(i)
                                .and_then(|w| w.parse().ok())
                                .ok_or_else(|| bad(line_no, "R needs a number"))?,
                        );
                    }
                    w => return Err(bad(line_no, format!("unknown option {w}"))),
                }
                i += 1;
            }
            continue;
        }
        if version == Version::V2 && !in_data {
            continue;
        }
        if !option_seen {
            return Err(bad(line_no, "data before the option line"));
        }
        for w in line.split_whitespace() {
            numbers.push(
                w.parse()
                    .map_err(|_| bad(line_no, format!("not a number: {w}")))?,
            );
        }
    }
    let n = n.ok_or_else(|| {
        bad(
            0,
            "the port count is unknown (a 1.1 file's is in its .sNp name)",
        )
    })?;
    let per = 1 + 2 * n * n;
    if numbers.len() % per != 0 {
        return Err(bad(
            0,
            format!(
                "{} numbers do not make whole frequencies of {per}",
                numbers.len()
            ),
        ));
    }
    let ord = order(n, order_21_12);
    let mut freqs = Vec::new();
    let mut s = Vec::new();
    for chunk in numbers.chunks(per) {
        freqs.push(chunk[0] * unit);
        let mut m = vec![Complex64::default(); n * n];
        for (k, &(i, j)) in ord.iter().enumerate() {
            let (a, b) = (chunk[1 + 2 * k], chunk[2 + 2 * k]);
            m[i * n + j] = match format.as_str() {
                "RI" => Complex64::new(a, b),
                "MA" => Complex64::from_polar(a, b.to_radians()),
                _ => Complex64::from_polar(10f64.powf(a / 20.0), b.to_radians()),
            };
        }
        s.push(m);
    }
    let z0 = match refs {
        Some(r) if r.len() == n => r,
        Some(_) => return Err(bad(0, "[Reference] must give one impedance per port")),
        None => vec![z0.unwrap_or(50.0); n],
    };
    Ok(Data {
        version,
        z0,
        freqs,
        s,
    })
}
