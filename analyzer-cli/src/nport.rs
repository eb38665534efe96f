//! `analyzer ports`: the design's `[ports]` as an N-port: S-parameters over the sweep as CSV
//! and Touchstone, reflection figures per port, insertion loss, reciprocity and passivity.

use crate::output::Staging;
use crate::whatif::Common;
use crate::Failure;
use analyzer_core::ports::{self, NPort, SPoint};
use analyzer_core::touchstone::{self, Version};
use analyzer_core::units::format_eng;
use clap::Args;
use std::fmt::Write as _;

#[derive(Args, Debug)]
pub struct PortsArgs {
    #[command(flatten)]
    common: Common,
    /// Touchstone version of the .sNp file: 1 (1.1; needs one z0 for all ports) or 2 (2.0).
    #[arg(long, value_name = "1|2", default_value_t = 2)]
    touchstone: u8,
    /// Return loss (dB) whose band is reported per port.
    #[arg(long, value_name = "DB", default_value_t = 10.0)]
    return_loss: f64,
    /// Draw this VSWR's circle on each port's Smith chart (e.g. 2).
    #[arg(long, value_name = "S")]
    vswr: Option<f64>,
}

fn db(z: analyzer_core::ports::Complex) -> f64 {
    20.0 * z.norm().log10()
}

pub fn run_ports(args: &PortsArgs) -> Result<u8, Failure> {
    let c = &args.common;
    let (d, grid, shown, out_dir) = crate::whatif::read_design(c, "ports")?;
    let version = match args.touchstone {
        1 => Version::V1,
        2 => Version::V2,
        v => {
            return Err(Failure::input(format!(
                "--touchstone {v}: write 1 (version 1.1) or 2 (version 2.0)"
            )))
        }
    };
    let nport = NPort::new(&d.network, d.ports.clone())
        .map_err(|e| Failure::input(format!("{shown}: {e}")))?;
    let pts: Vec<SPoint> = nport
        .sweep(&grid)
        .map_err(|e| Failure::input(format!("{shown}: {e}")))?;
    let list = nport.ports();
    let ev = nport
        .analysis()
        .evaluator()
        .map_err(|e| Failure::input(format!("{shown}: {e}")))?;
    let mut ws = ev.workspace();
    let n = list.len();
    let z0: Vec<f64> = list.iter().map(|p| p.z0).collect();
    let mut staging = Staging::default();
    let mut ts = Vec::new();
    touchstone::write(&mut ts, version, &d.network.title, list, &pts)
        .map_err(|e| Failure::input(format!("--touchstone: {e}")))?;
    staging.bytes(&out_dir.join(format!("ports.s{n}p")), &ts)?;
    // CSV: every S_ij in dB and degrees, then each port's return loss and VSWR.
    let mut csv = String::from("frequency_hz");
    for i in 1..=n {
        for j in 1..=n {
            let _ = write!(csv, ",s{i}{j}_db,s{i}{j}_deg");
        }
    }
    for p in list {
        let _ = write!(csv, ",{0}_return_loss_db,{0}_vswr", p.name);
    }
    // Transmission group delay, −d(arg Sij)/dω, from the exact derivative.
    for i in 1..=n {
        for j in (1..=n).filter(|&j| j != i) {
            let _ = write!(csv, ",s{i}{j}_delay_s");
        }
    }
    csv.push('\n');
    for p in &pts {
        let _ = write!(csv, "{}", p.freq);
        for z in &p.s {
            let _ = write!(csv, ",{},{}", db(*z), z.arg().to_degrees());
        }
        for i in 0..n {
            let r = ports::reflection(p.s[i * n + i]);
            let _ = write!(csv, ",{},{}", r.return_loss_db, r.vswr);
        }
        for i in 0..n {
            for j in (0..n).filter(|&j| j != i) {
                let _ = write!(
                    csv,
                    ",{}",
                    ports::group_delay(p.s[i * n + j], p.ds[i * n + j])
                );
            }
        }
        csv.push('\n');
    }
    staging.bytes(&out_dir.join("ports.csv"), csv.as_bytes())?;
    if !c.no_plot {
        for (i, p) in list.iter().enumerate() {
            let gamma: Vec<(f64, analyzer_core::ports::Complex)> =
                pts.iter().map(|q| (q.freq, q.s[i * n + i])).collect();
            let svg = analyzer_core::export::render_smith_svg(&analyzer_core::export::SmithPlot {
                title: format!(
                    "{} — port {}: Γ against {}",
                    d.network.title,
                    p.name,
                    format_eng(p.z0, 4, "Ω")
                ),
                gamma: &gamma,
                // The VSWR asked for, or that of a limit on this port.
                vswr_circle: args.vswr.or_else(|| {
                    d.port_limits.iter().find(|l| l.port == p.name).map(|l| {
                        l.max_vswr
                            .unwrap_or_else(|| ports::vswr_of_return_loss(l.min_return_loss_db))
                    })
                }),
            })
            .map_err(|e| Failure::input(format!("{shown}: {e}")))?;
            staging.bytes(
                &out_dir.join(format!(
                    "{}-smith.svg",
                    crate::output::safe_file_name(&p.name)
                )),
                svg.as_bytes(),
            )?;
        }
    }

    let mut text = String::new();
    let _ = writeln!(text, "{}", d.network.title);
    let _ = writeln!(
        text,
        "{n}-port, sweep {}; S with power waves and real reference impedances; return loss as a positive number of dB",
        grid.describe()
    );
    let hz = |f: f64| format_eng(f, 5, "Hz");
    let summary = ports::Summary::of(&pts, n);
    for (i, p) in list.iter().enumerate() {
        let rl: Vec<(f64, f64)> = pts
            .iter()
            .map(|q| (q.freq, ports::reflection(q.s[i * n + i]).return_loss_db))
            .collect();
        let (worst_at, r) = summary
            .worst_match
            .get(i)
            .copied()
            .flatten()
            .unwrap_or((0.0, ports::reflection(Default::default())));
        let _ = writeln!(
            text,
            "\nport {} (z0 {}): worst return loss {} at {} (|Γ| {:.4}, VSWR {}, mismatch loss {:.3} dB)",
            p.name,
            format_eng(p.z0, 4, "Ω"),
            if r.return_loss_db.is_finite() {
                format!("{:.2} dB", r.return_loss_db)
            } else {
                "∞ (matched)".into()
            },
            hz(worst_at),
            r.gamma,
            match r.vswr {
                v if !v.is_finite() => "∞".into(),
                v if v >= 1e4 => format!("{v:.3e}"),
                v => format!("{v:.3}"),
            },
            r.mismatch_loss_db
        );
        // The bands where the return loss is at least the level, each edge refined on the
        // live network between the grid points that bracket it.
        let level = args.return_loss;
        let mut bands = Vec::new();
        let mut start: Option<f64> = rl.first().filter(|p| p.1 >= level).map(|p| p.0);
        for w in rl.windows(2) {
            let (a, b) = (w[0], w[1]);
            if (a.1 >= level) == (b.1 >= level) {
                continue;
            }
            let edge = nport
                .return_loss_crossing(&ev, &mut ws, i, level, a.0, b.0)
                .map_err(|e| Failure::input(format!("{shown}: {e}")))?;
            if b.1 >= level {
                start = Some(edge);
            } else {
                bands.push((start.take().unwrap_or(a.0), edge));
            }
        }
        if let (Some(s), Some(last)) = (start, rl.last()) {
            bands.push((s, last.0));
        }
        if bands.is_empty() {
            let _ = writeln!(
                text,
                "  return loss ≥ {} dB nowhere in the sweep",
                args.return_loss
            );
        }
        for (a, b) in bands {
            let _ = writeln!(
                text,
                "  return loss ≥ {} dB from {} to {}",
                args.return_loss,
                hz(a),
                hz(b)
            );
        }
    }
    for i in 0..n {
        for j in 0..n {
            if i == j {
                continue;
            }
            let il: Vec<(f64, f64)> = pts.iter().map(|q| (q.freq, -db(q.s[i * n + j]))).collect();
            let lo = il.iter().copied().min_by(|a, b| a.1.total_cmp(&b.1));
            let hi = il.iter().copied().max_by(|a, b| a.1.total_cmp(&b.1));
            if let (Some(lo), Some(hi)) = (lo, hi) {
                let _ = writeln!(
                    text,
                    "\ninsertion loss {} → {} (−20·log10|S{}{}|): {:.2} dB at {} … {:.2} dB at {}",
                    list[j].name,
                    list[i].name,
                    i + 1,
                    j + 1,
                    lo.1,
                    hz(lo.0),
                    hi.1,
                    hz(hi.0)
                );
            }
            let delays: Vec<f64> = pts
                .iter()
                .map(|q| ports::group_delay(q.s[i * n + j], q.ds[i * n + j]))
                .collect();
            if let (Some(first), Some(last), Some(q0), Some(q1)) =
                (delays.first(), delays.last(), pts.first(), pts.last())
            {
                let _ = writeln!(
                    text,
                    "  group delay of S{}{}: {} at {} … {} at {}",
                    i + 1,
                    j + 1,
                    format_eng(*first, 4, "s"),
                    hz(q0.freq),
                    format_eng(*last, 4, "s"),
                    hz(q1.freq)
                );
            }
        }
    }
    // An EMI filter's insertion loss between the usual terminations (two ports, one z0).
    if n == 2 && z0[0] == z0[1] {
        let mut emi = String::from("frequency_hz");
        for (zs, zl) in ports::EMI_TERMINATIONS {
            let _ = write!(emi, ",il_{zs}_{zl}_db");
        }
        emi.push('\n');
        let mut rows: Vec<(f64, Vec<f64>)> = Vec::new();
        for p in &pts {
            let Some(abcd) = ports::abcd_from_s(&p.s, z0[0]) else {
                continue;
            };
            let il: Vec<f64> = ports::EMI_TERMINATIONS
                .iter()
                .map(|&(zs, zl)| ports::insertion_loss_db(&abcd, zs, zl))
                .collect();
            let _ = write!(emi, "{}", p.freq);
            for x in &il {
                let _ = write!(emi, ",{x}");
            }
            emi.push('\n');
            rows.push((p.freq, il));
        }
        staging.bytes(&out_dir.join("emi.csv"), emi.as_bytes())?;
        let _ = writeln!(
            text,
            "\ninsertion loss between terminations (source/load; CISPR 17's method, from memory), dB:"
        );
        let _ = writeln!(
            text,
            "  {:>12}{:>12}{:>14}{:>14}",
            "frequency", "50/50 Ω", "0.1/100 Ω", "100/0.1 Ω"
        );
        // At the decades (and the ends) of the sweep.
        let mut shown: Vec<&(f64, Vec<f64>)> = Vec::new();
        for (k, r) in rows.iter().enumerate() {
            let decade = |f: f64| f.log10().floor();
            let starts_decade = k > 0 && decade(r.0) > decade(rows[k - 1].0);
            if k == 0 || k + 1 == rows.len() || starts_decade {
                shown.push(r);
            }
        }
        for (f, il) in shown {
            let _ = writeln!(
                text,
                "  {:>12}{:>12.2}{:>14.2}{:>14.2}",
                hz(*f),
                il[0],
                il[1],
                il[2]
            );
        }
    }
    let (recip, sigma) = (summary.reciprocity_error, summary.largest_singular_value);
    let _ = writeln!(
        text,
        "\nreciprocity: max |Sij − Sji| = {recip:.2e}{}",
        if summary.reciprocal() {
            " (reciprocal)"
        } else {
            ""
        }
    );
    let _ = writeln!(
        text,
        "passivity: largest singular value of S = {sigma:.6}{}",
        if summary.passive() {
            " (passive)"
        } else {
            " (above 1: the network gives out more power than it takes in)"
        }
    );
    if n == 2 {
        if let Some(p) = pts.get(pts.len() / 2) {
            if let Some(z) = ports::z_from_s(&p.s, &z0) {
                if let Some(a) = ports::abcd_from_z(&z) {
                    let _ = writeln!(
                        text,
                        "ABCD at {}: A {}, B {} Ω, C {} S, D {}",
                        hz(p.freq),
                        complex_text(a[0].re, a[0].im, false),
                        complex_text(a[1].re, a[1].im, false),
                        complex_text(a[2].re, a[2].im, true),
                        complex_text(a[3].re, a[3].im, false)
                    );
                }
            }
        }
    }
    // Limits on the ports' match.
    let mut failed = Vec::new();
    if !d.port_limits.is_empty() {
        let _ = writeln!(text, "\nlimits on the ports' match:");
    }
    for l in &d.port_limits {
        let Some(r) = nport
            .check_limit(&ev, &mut ws, &pts, l)
            .map_err(|e| Failure::input(format!("{shown}: limit {}: {e}", l.name)))?
        else {
            continue;
        };
        let bound = match l.max_vswr {
            Some(v) => format!("VSWR ≤ {v} (return loss ≥ {:.2} dB)", l.min_return_loss_db),
            None => format!("return loss ≥ {} dB", l.min_return_loss_db),
        };
        let _ = writeln!(
            text,
            "  {} (port {}, {} … {}, {bound}): {}, worst return loss {:.2} dB at {} (margin {:+.2} dB)",
            l.name,
            l.port,
            hz(l.from),
            hz(l.to),
            if r.pass { "pass" } else { "FAIL" },
            r.worst_return_loss_db,
            hz(r.worst_at_hz),
            r.worst_margin_db
        );
        if !r.pass {
            failed.push(l.name.clone());
        }
    }
    let written = staging.commit()?;
    if !c.quiet {
        print!("{text}");
        if d.caution {
            println!("\n{}", crate::report::CAUTION);
        }
        let files: Vec<String> = written.iter().map(|p| p.display().to_string()).collect();
        println!("wrote {}", files.join(", "));
    }
    if !failed.is_empty() {
        eprintln!("check failed: {}", failed.join(", "));
        return Ok(crate::EXIT_CHECK_FAILED);
    }
    Ok(0)
}

/// `a+bi` or `a-bi` with four decimals (with an exponent if `exp`); the sign of the
/// imaginary part written once, so a negative zero does not print as `+-0`.
fn complex_text(re: f64, im: f64, exp: bool) -> String {
    let sign = if im < 0.0 { '-' } else { '+' };
    let (re, im) = (re + 0.0, im.abs());
    if exp {
        format!("{re:.4e}{sign}{im:.4e}i")
    } else {
        format!("{re:.4}{sign}{im:.4}i")
    }
}
