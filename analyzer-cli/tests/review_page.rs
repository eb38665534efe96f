//! The review page as a reviewer's browser sees it. Every example in sweeps/ gets a review;
//! each page must be well-formed and self-contained (no URL in any attribute), show the same
//! figures as the JSON beside it, keep markup in user text as text, and — in a real headless
//! Chromium — load with no console error and no request, give every SVG a non-zero box, and
//! print to as many pages as it has sheets on Letter (the browser's default) and on A4.
//! A plot of a straight −20 dB/decade line must show no stair steps.
//!
//! The browser tests need Chromium (Debian's package `chromium`; `.ci/run` installs it). When
//! none can be started they print "SKIPPED: ..." and pass, except under CI=true, where a
//! missing browser fails the test.

use assert_cmd::Command;
use std::path::{Path, PathBuf};

fn root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .parent()
        .expect("workspace root")
        .to_path_buf()
}

fn examples() -> Vec<PathBuf> {
    let mut v: Vec<PathBuf> = std::fs::read_dir(root().join("sweeps"))
        .expect("sweeps/")
        .map(|e| e.expect("entry").path())
        .filter(|p| p.extension().is_some_and(|e| e == "toml"))
        .collect();
    v.sort();
    v
}

/// Runs `analyzer review` on a design into a fresh directory; returns the directory.
fn review(design: &Path, out: &Path) -> PathBuf {
    let _ = std::fs::remove_dir_all(out);
    Command::cargo_bin("analyzer")
        .expect("binary")
        .args(["review", "-q", "--samples", "200"])
        .arg(design)
        .arg("-o")
        .arg(out)
        .assert()
        .code(predicates::ord::lt(2));
    out.to_path_buf()
}

fn scratch(name: &str) -> PathBuf {
    let d = root().join("target").join("review-tests").join(name);
    std::fs::create_dir_all(&d).expect("scratch dir");
    d
}

/// The value at a dotted path ("responses.0.upper_cutoff_hz") of the figures JSON.
fn at_path<'a>(json: &'a serde_json::Value, path: &str) -> Option<&'a serde_json::Value> {
    path.split('.')
        .try_fold(json, |v, k| match k.parse::<usize>() {
            Ok(i) => v.get(i),
            Err(_) => v.get(k),
        })
}

/// A number as the page shows it ("58.932 kHz", "−14.31 dB", "3.8900", "14.40°") and the
/// half-width of its last shown digit, in base units.
fn shown_number(text: &str) -> Option<(f64, f64)> {
    let t = text.trim().replace('−', "-");
    let end = t
        .find(|c: char| !(c.is_ascii_digit() || c == '.' || c == '-' || c == '+' || c == 'e'))
        .unwrap_or(t.len());
    let (num, rest) = t.split_at(end);
    let v: f64 = num.parse().ok()?;
    let (mantissa, exp) = num.split_once('e').unwrap_or((num, "0"));
    let exp: i32 = exp.parse().ok()?;
    let decimals = mantissa.split_once('.').map_or(0, |(_, d)| d.len()) as i32 - exp;
    let word = rest
        .trim_start()
        .split([' ', '(', '/'])
        .next()
        .unwrap_or("");
    let scale = if word.chars().count() > 1 && word != "dB" {
        match word.chars().next() {
            Some('f') => 1e-15,
            Some('p') => 1e-12,
            Some('n') => 1e-9,
            Some('µ') => 1e-6,
            Some('m') => 1e-3,
            Some('k') => 1e3,
            Some('M') => 1e6,
            Some('G') => 1e9,
            Some('T') => 1e12,
            _ => 1.0,
        }
    } else {
        1.0
    };
    Some((v * scale, 0.5 * 10f64.powi(-decimals) * scale))
}

/// Every figure cell of a page against the JSON: (path, text as shown).
fn check_cells(page: &str, cells: &[(String, String)], json: &serde_json::Value) {
    assert!(!cells.is_empty(), "{page}: no figures on the page");
    for (path, text) in cells {
        let want = at_path(json, path).unwrap_or_else(|| panic!("{page}: {path} not in JSON"));
        match want.as_f64() {
            Some(w) => {
                let (got, half) = shown_number(text)
                    .unwrap_or_else(|| panic!("{page}: {path}: cannot read {text:?}"));
                assert!(
                    (got - w).abs() <= half * 1.001 + 1e-12 * w.abs(),
                    "{page}: {path}: page shows {text:?}, JSON has {w}"
                );
            }
            // Non-finite values go to JSON as null; the page says ∞.
            None => assert!(text.contains('∞'), "{page}: {path}: {text:?} vs {want}"),
        }
    }
}

/// The figure cells of a page, read from its DOM.
fn dom_cells(doc: &roxmltree::Document) -> Vec<(String, String)> {
    doc.descendants()
        .filter_map(|n| {
            let path = n.attribute("data-json")?;
            let text: String = n
                .descendants()
                .filter(|d| d.is_text())
                .filter_map(|d| d.text())
                .collect();
            Some((path.to_string(), text))
        })
        .collect()
}

fn assert_self_contained(page: &str, doc: &roxmltree::Document) {
    for n in doc.descendants() {
        assert!(
            n.tag_name().name() != "script",
            "{page}: the page has a script"
        );
        for a in n.attributes() {
            let v = a.value().trim().to_ascii_lowercase();
            assert!(
                !(v.contains("http:")
                    || v.contains("https:")
                    || v.contains("file:")
                    || v.starts_with("//")),
                "{page}: attribute {}={:?} carries a URL",
                a.name(),
                a.value()
            );
        }
    }
}

#[test]
fn every_example_page_is_well_formed_self_contained_and_shows_the_json_figures() {
    for design in examples() {
        let name = design.file_stem().unwrap().to_string_lossy().to_string();
        let dir = review(&design, &scratch(&name));
        let html = std::fs::read_to_string(dir.join("review.html")).expect("review.html");
        let doc = roxmltree::Document::parse_with_options(
            &html,
            roxmltree::ParsingOptions {
                allow_dtd: true,
                ..Default::default()
            },
        )
        .unwrap_or_else(|e| panic!("{name}: review.html is not well-formed: {e}"));
        assert_self_contained(&name, &doc);
        let json: serde_json::Value = serde_json::from_str(
            &std::fs::read_to_string(dir.join("figures.json")).expect("figures.json"),
        )
        .expect("JSON");
        check_cells(&name, &dom_cells(&doc), &json);
        // The verdict says what the limits say.
        let failed = json["limits"]
            .as_array()
            .map_or(0, |l| l.iter().filter(|c| c["pass"] == false).count());
        let verdict: String = doc
            .descendants()
            .find(|n| n.attribute("id") == Some("verdict"))
            .and_then(|n| n.text())
            .unwrap_or_default()
            .to_string();
        if failed > 0 {
            assert!(verdict.contains("failed"), "{name}: {verdict}");
        } else if json["limits"].as_array().is_some_and(|l| !l.is_empty()) {
            assert!(
                verdict.starts_with("Every limit passed"),
                "{name}: {verdict}"
            );
        }
        // A design with the caution shows it.
        if json["caution"].is_string() {
            assert!(
                html.contains("class=\"caution\""),
                "{name}: no caution block"
            );
        }
    }
}

const HOSTILE: &str = r#"
title = "<script>alert(1)</script> & \"><svg onload=alert(2)>"
[sweep]
from = "10 Hz"
to = "100 kHz"
per_decade = 20
[parts]
"<b>V1</b>" = { voltage = "1 V", between = ["<i>in</i>", "gnd"] }
"\"><svg/onload=x>" = { resistor = "1k", between = ["<i>in</i>", "o&ut"], tolerance = "1%" }
C1 = { capacitor = "100n", between = ["o&ut", "gnd"] }
[responses]
"<script>g</script>" = { ratio = ["o&ut", "<i>in</i>"] }
[limits]
"<em>flat</em>" = { response = "<script>g</script>", from = "10 Hz", to = "100 Hz", min_db = -1 }
"#;

#[test]
fn markup_in_user_text_is_shown_as_text() {
    let dir = scratch("hostile");
    let design = dir.join("hostile.toml");
    std::fs::write(&design, HOSTILE).expect("write design");
    let out = review(&design, &dir.join("out"));
    let html = std::fs::read_to_string(out.join("review.html")).expect("review.html");
    let doc = roxmltree::Document::parse_with_options(
        &html,
        roxmltree::ParsingOptions {
            allow_dtd: true,
            ..Default::default()
        },
    )
    .expect("well-formed");
    assert_self_contained("hostile", &doc);
    // No element came from the user's text: only the page's own kinds of element.
    for n in doc.descendants().filter(|n| n.is_element()) {
        let t = n.tag_name().name();
        assert!(
            !["script", "b", "i", "em"].contains(&t),
            "element <{t}> from user text"
        );
        assert!(
            n.attribute("onload").is_none(),
            "an onload attribute from user text"
        );
    }
    // And the text is all there, as text.
    let text: String = doc
        .descendants()
        .filter(|n| n.is_text())
        .filter_map(|n| n.text())
        .collect();
    for s in [
        "<script>alert(1)</script> & \"><svg onload=alert(2)>",
        "<b>V1</b>",
        "\"><svg/onload=x>",
        "<i>in</i>",
        "o&ut",
        "<em>flat</em>",
        "<script>g</script>",
    ] {
        assert!(text.contains(s), "{s:?} is not shown as text");
    }
}

/// A headless Chromium, where one can be started.
fn browser() -> Option<PathBuf> {
    let mut candidates: Vec<PathBuf> = std::env::var_os("CHROMIUM")
        .map(PathBuf::from)
        .into_iter()
        .collect();
    candidates.extend(
        [
            "/usr/bin/chromium",
            "/usr/bin/chromium-browser",
            "/usr/bin/google-chrome",
        ]
        .iter()
        .map(PathBuf::from),
    );
    let found = candidates.into_iter().find(|c| {
        std::process::Command::new(c)
            .arg("--version")
            .output()
            .is_ok_and(|o| o.status.success())
    });
    if found.is_none() {
        assert!(
            std::env::var("CI").is_err(),
            "CI=true but no Chromium could be started: .ci/run installs Debian's chromium"
        );
        eprintln!("SKIPPED: no Chromium could be started (install Debian's chromium, or set CHROMIUM=/path); the browser checks did not run");
    }
    found
}

/// Runs Chromium headless with a fresh profile and the network switched off.
fn chromium(bin: &Path, profile: &Path, args: &[String]) -> std::process::Output {
    let _ = std::fs::remove_dir_all(profile);
    std::process::Command::new(bin)
        .args([
            "--headless",
            "--no-sandbox",
            "--disable-gpu",
            "--disable-quic",
            "--no-first-run",
            "--disable-background-networking",
            "--disable-component-update",
            "--disable-sync",
            "--hide-scrollbars",
            "--force-device-scale-factor=1",
            "--host-resolver-rules=MAP * ~NOTFOUND",
            "--enable-logging=stderr",
            "--v=0",
        ])
        .arg(format!("--user-data-dir={}", profile.display()))
        .args(args)
        .output()
        .expect("chromium runs")
}

fn url(p: &Path) -> String {
    format!("file://{}", p.canonicalize().expect("path").display())
}

/// Pages of a PDF: the largest /Count of its page tree.
fn pdf_pages(pdf: &[u8]) -> usize {
    let text = String::from_utf8_lossy(pdf);
    text.match_indices("/Count ")
        .filter_map(|(i, _)| {
            text[i + 7..]
                .split(|c: char| !c.is_ascii_digit())
                .next()
                .and_then(|n| n.parse().ok())
        })
        .max()
        .unwrap_or(0)
}

const HARNESS: &str = r#"<script>
(function () {
  const r = {
    svgs: Array.from(document.querySelectorAll('svg')).map(s => { const b = s.getBoundingClientRect(); return [b.width, b.height]; }),
    overlaps: Array.from(document.querySelectorAll('svg')).flatMap(s => {
      const ts = Array.from(s.querySelectorAll('text')).filter(t => t.textContent.trim() !== '').map(t => [t.getBoundingClientRect(), t.textContent.trim().slice(0, 40)]);
      const out = [];
      for (let i = 0; i < ts.length; i++) for (let j = i + 1; j < ts.length; j++) {
        const a = ts[i][0], b = ts[j][0];
        const w = Math.min(a.right, b.right) - Math.max(a.left, b.left), h = Math.min(a.bottom, b.bottom) - Math.max(a.top, b.top);
        if (w > 1 && h > 3) out.push([ts[i][1], ts[j][1], w, h]);
      }
      return out;
    }),
    texts: Array.from(document.querySelectorAll('svg text')).filter(t => t.textContent.trim() !== '').map(t => { const b = t.getBoundingClientRect(); return [b.height, t.textContent.trim().slice(0, 40)]; }),
    cells: Array.from(document.querySelectorAll('[data-json]')).map(c => [c.dataset.json, c.textContent]),
    resources: performance.getEntriesByType('resource').map(e => e.name),
    scripts: document.scripts.length,
    overflow: document.documentElement.scrollWidth - document.documentElement.clientWidth
  };
  const hex = Array.from(new TextEncoder().encode(JSON.stringify(r))).map(b => b.toString(16).padStart(2, '0')).join('');
  const p = document.createElement('pre');
  p.textContent = 'HARNESS[' + hex + ']';
  document.body.appendChild(p);
})();
</script>"#;

fn harness_result(dom: &str) -> serde_json::Value {
    let start = dom.rfind("HARNESS[").expect("harness ran") + 8;
    let hex = &dom[start..start + dom[start..].find(']').expect("end")];
    let bytes: Vec<u8> = (0..hex.len() / 2)
        .map(|i| u8::from_str_radix(&hex[2 * i..2 * i + 2], 16).expect("hex"))
        .collect();
    serde_json::from_slice(&bytes).expect("harness JSON")
}

#[test]
fn every_example_page_renders_prints_and_matches_its_json_in_a_real_browser() {
    let Some(bin) = browser() else { return };
    let shots = root().join("target").join("review-screens");
    std::fs::create_dir_all(&shots).expect("screens dir");
    for design in examples() {
        let name = design.file_stem().unwrap().to_string_lossy().to_string();
        let dir = review(&design, &scratch(&format!("browser-{name}")));
        let page = dir.join("review.html");
        let html = std::fs::read_to_string(&page).expect("page");
        let sheets = html.matches("<section class=\"sheet").count();
        let profile = dir.join("profile");

        // The page itself: loads with no console message of any kind (it has no script,
        // so any message is an error: a failed load, a blocked request) and a screenshot.
        let shot = shots.join(format!("{name}.png"));
        let out = chromium(
            &bin,
            &profile,
            &[
                format!("--screenshot={}", shot.display()),
                "--window-size=1000,1400".into(),
                url(&page),
            ],
        );
        let log = String::from_utf8_lossy(&out.stderr);
        for line in log.lines() {
            assert!(
                !(line.contains("CONSOLE")
                    || line.contains("Failed to load resource")
                    || line.contains("ERR_NAME_NOT_RESOLVED")),
                "{name}: browser says: {line}"
            );
        }
        assert!(shot.is_file(), "{name}: no screenshot ({log})");
        if name == "bookshelf-crossover" && std::env::var_os("ANALYZER_WRITE_DOCS").is_some() {
            std::fs::copy(&shot, root().join("docs").join("review-screenshot.png")).expect("docs/");
        }

        // Printed on Letter (the browser's default) and on A4: one page per sheet.
        let pdf = dir.join("review.pdf");
        chromium(
            &bin,
            &profile,
            &[
                format!("--print-to-pdf={}", pdf.display()),
                "--no-pdf-header-footer".into(),
                url(&page),
            ],
        );
        let letter = pdf_pages(&std::fs::read(&pdf).expect("pdf"));
        assert_eq!(letter, sheets, "{name}: Letter PDF pages vs sheets");
        let a4_page = dir.join("review-a4.html");
        std::fs::write(
            &a4_page,
            html.replace("</style>", "@page { size: A4; }\n</style>"),
        )
        .expect("a4 page");
        chromium(
            &bin,
            &profile,
            &[
                format!("--print-to-pdf={}", pdf.display()),
                "--no-pdf-header-footer".into(),
                url(&a4_page),
            ],
        );
        let a4 = pdf_pages(&std::fs::read(&pdf).expect("pdf"));
        assert_eq!(a4, sheets, "{name}: A4 PDF pages vs sheets");

        // A copy with a measuring script: rendered boxes, figures as shown, requests made.
        let probe = dir.join("probe.html");
        std::fs::write(
            &probe,
            html.replace("</body>", &format!("{HARNESS}</body>")),
        )
        .expect("probe page");
        let out = chromium(
            &bin,
            &profile,
            &[
                "--dump-dom".into(),
                "--window-size=1000,1400".into(),
                url(&probe),
            ],
        );
        let r = harness_result(&String::from_utf8_lossy(&out.stdout));
        assert_eq!(r["scripts"], 1, "{name}: the page has a script of its own");
        assert_eq!(
            r["resources"].as_array().map(Vec::len),
            Some(0),
            "{name}: requests {}",
            r["resources"]
        );
        assert!(
            r["overflow"].as_f64().unwrap_or(1.0) <= 0.0,
            "{name}: wider than the window by {}",
            r["overflow"]
        );
        let svgs = r["svgs"].as_array().expect("svgs");
        assert!(!svgs.is_empty(), "{name}: no plots");
        for b in svgs {
            assert!(
                b[0].as_f64().unwrap_or(0.0) > 100.0 && b[1].as_f64().unwrap_or(0.0) > 100.0,
                "{name}: an SVG renders as {b}"
            );
        }
        // Readable at 50 % zoom: every text of every plot renders at least 14 px high at
        // 100 % in this 1000 px window (its box, ascent to descent), so at least 7 px at
        // 50 % — our own rule (common practice puts the smallest legible screen text at
        // 6-7 px).
        let texts = r["texts"].as_array().expect("texts");
        assert!(!texts.is_empty(), "{name}: no text in the plots");
        let smallest = texts
            .iter()
            .min_by(|a, b| {
                a[0].as_f64()
                    .unwrap_or(0.0)
                    .total_cmp(&b[0].as_f64().unwrap_or(0.0))
            })
            .expect("a text");
        assert_eq!(
            r["overlaps"].as_array().map(Vec::len),
            Some(0),
            "{name}: texts that overlap in a plot (first, second, overlap width and height in px): {}",
            r["overlaps"]
        );
        assert!(
            smallest[0].as_f64().unwrap_or(0.0) >= 14.0,
            "{name}: plot text {smallest} renders under 14 px (7 px at 50 % zoom)"
        );
        let cells: Vec<(String, String)> = r["cells"]
            .as_array()
            .expect("cells")
            .iter()
            .map(|c| {
                (
                    c[0].as_str().unwrap_or("").to_string(),
                    c[1].as_str().unwrap_or("").to_string(),
                )
            })
            .collect();
        let json: serde_json::Value =
            serde_json::from_str(&std::fs::read_to_string(dir.join("figures.json")).expect("json"))
                .expect("JSON");
        check_cells(&name, &cells, &json);
    }
}

/// A resistor-capacitor low-pass with its corner at 1.59 Hz, swept from 100 Hz to 100 kHz:
/// −20 dB/decade all the way (closed form: |H| = 1/√(1 + (f/fc)²)).
const SLOPE: &str = r#"
title = "Slope"
[sweep]
from = "100 Hz"
to = "100 kHz"
per_decade = 200
[parts]
V1 = { voltage = "1 V", between = ["in", "gnd"] }
R1 = { resistor = "1k", between = ["in", "out"] }
C1 = { capacitor = "100u", between = ["out", "gnd"] }
[responses]
gain = { ratio = ["out", "in"] }
"#;

#[test]
fn a_straight_slope_has_no_stair_steps_on_screen() {
    let Some(bin) = browser() else { return };
    let dir = scratch("slope");
    let design = dir.join("slope.toml");
    std::fs::write(&design, SLOPE).expect("design");
    let out = dir.join("out");
    let _ = std::fs::remove_dir_all(&out);
    Command::cargo_bin("analyzer")
        .expect("binary")
        .args(["sweep", "-q"])
        .arg(&design)
        .arg("-o")
        .arg(&out)
        .assert()
        .success();
    let shot = dir.join("slope.png");
    chromium(
        &bin,
        &dir.join("profile"),
        &[
            format!("--screenshot={}", shot.display()),
            "--window-size=880,560".into(),
            url(&out.join("gain.svg")),
        ],
    );
    let decoder = png::Decoder::new(std::io::BufReader::new(
        std::fs::File::open(&shot).expect("png"),
    ));
    let mut reader = decoder.read_info().expect("png info");
    let mut buf = vec![0; reader.output_buffer_size()];
    let info = reader.next_frame(&mut buf).expect("frame");
    let (w, h) = (info.width as usize, info.height as usize);
    let channels = info.line_size / w;
    // The trace's colour is the palette's first, #1d4e89: blue well above red. Grid lines are
    // grey and the background white, so (blue − red) picks out the trace, antialiased edges
    // with their coverage as weight.
    let weight = |x: usize, y: usize| {
        let p = &buf[y * info.line_size + x * channels..];
        let (r, b) = (f64::from(p[0]), f64::from(p[2]));
        let v = (b - r) / 108.0;
        if v > 0.3 {
            v.min(1.0)
        } else {
            0.0
        }
    };
    // Columns of the magnitude panel (the top 270 rows), inside the frame.
    let mut centroids = Vec::new();
    for x in 110..w.min(850) {
        let (mut s, mut sy) = (0.0, 0.0);
        for y in 40..h.min(270) {
            let wgt = weight(x, y);
            s += wgt;
            sy += wgt * y as f64;
        }
        if s > 0.5 {
            centroids.push(sy / s);
        }
    }
    assert!(
        centroids.len() > 600,
        "trace not found: {} columns",
        centroids.len()
    );
    // The slope is about a quarter of a pixel per column: the drawn line's centre must move
    // down in every run of three columns, with no flat run (a stair step) longer than 2 px.
    let mut run = 1;
    let mut longest = 1;
    for w in centroids.windows(2) {
        if (w[1] - w[0]).abs() < 0.02 {
            run += 1;
            longest = longest.max(run);
        } else {
            run = 1;
        }
    }
    assert!(
        longest <= 2,
        "a horizontal run of {longest} px in the trace"
    );
}
