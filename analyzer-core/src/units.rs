//! Engineering values: reading them from text and writing them back.
//!
//! Accepted forms (all case-sensitive, because `m` and `M` differ by nine decades):
//!
//! * plain numbers and exponents: `50`, `0.1`, `2.2e-9`, `-3`;
//! * an SI prefix after the number, with or without a space: `10k`, `2.2 n`, `4.7µ`
//!   (prefixes `f p n u µ m k M G T`; `K` is read as kilo, as it is often written);
//! * an optional unit word after the prefix, which must fit the quantity: `10 kΩ`, `10kohm`,
//!   `2.2 nF`, `4.7 µH`, `1 MHz`, `1 mA`, `1 V`, `2 mS`;
//! * the letter code of IEC 60062, where the prefix letter stands for the decimal point:
//!   `4k7` = 4.7 k, `2n2` = 2.2 n, `1R5` = 1.5, `0R22` = 0.22, `4M7` = 4.7 M;
//! * for tolerances a percentage: `1%`, `0.5 %`.
//!
//! Anything else (`10kk`, `""`, `1e999`, `NaN`, `-`, `4k7k`) is an error that says what was
//! expected. Magnitudes beyond 1e±30 are refused: no real part has them, and they are the
//! usual sign of a typing slip.
//!
//! [`format_eng`] is the one place that writes values back in engineering notation, so the
//! printed table, the JSON figures and the plot labels agree.

use std::fmt;

/// Frequency in hertz.
pub type Hertz = f64;
/// Angular frequency in radians per second.
pub type RadPerSec = f64;
/// A level in decibels.
pub type Decibels = f64;
/// An angle in degrees.
pub type Degrees = f64;
/// Resistance or impedance magnitude in ohms.
pub type Ohms = f64;
/// Time in seconds.
pub type Seconds = f64;

/// Largest magnitude a value may have; the smallest non-zero one is its reciprocal.
pub const VALUE_LIMIT: f64 = 1e30;

/// The physical quantity a value text is read as; it decides which unit word is accepted.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Quantity {
    /// Ohms (`Ω`, `ohm`, `ohms`, or `R` in the letter code).
    Resistance,
    /// Farads (`F`).
    Capacitance,
    /// Henries (`H`).
    Inductance,
    /// Hertz (`Hz`).
    Frequency,
    /// Volts (`V`).
    Voltage,
    /// Amperes (`A`).
    Current,
    /// Siemens (`S`).
    Conductance,
    /// A plain number with no unit word (gains, coupling coefficients).
    Ratio,
    /// Degrees (`°`, `deg`), for source phases.
    Angle,
    /// A percentage (`%`), for tolerances; the value returned is a fraction (1% → 0.01).
    Percent,
}

impl Quantity {
    /// The unit words accepted after the prefix.
    fn unit_words(self) -> &'static [&'static str] {
        match self {
            Quantity::Resistance => &["Ω", "ohms", "ohm", "Ohm", "R"],
            Quantity::Capacitance => &["F"],
            Quantity::Inductance => &["H"],
            Quantity::Frequency => &["Hz"],
            Quantity::Voltage => &["V"],
            Quantity::Current => &["A"],
            Quantity::Conductance => &["S"],
            Quantity::Ratio => &[],
            Quantity::Angle => &["°", "deg"],
            Quantity::Percent => &["%"],
        }
    }

    /// An example of a well-formed value, for error messages.
    fn example(self) -> &'static str {
        match self {
            Quantity::Resistance => "4k7, 10 kΩ or 1R5",
            Quantity::Capacitance => "2n2, 100 nF or 1e-9",
            Quantity::Inductance => "4.7 µH, 10m or 1e-3",
            Quantity::Frequency => "1 kHz, 2.5MHz or 50",
            Quantity::Voltage => "1 V, 500m or 2.5",
            Quantity::Current => "1 mA, 10u or 0.5",
            Quantity::Conductance => "2 mS or 0.01",
            Quantity::Ratio => "0.98, 100k or 2e5",
            Quantity::Angle => "30 deg, -90 or 45°",
            Quantity::Percent => "1%, 0.5 % or 5%",
        }
    }

    /// The name used in messages.
    pub fn name(self) -> &'static str {
        match self {
            Quantity::Resistance => "resistance",
            Quantity::Capacitance => "capacitance",
            Quantity::Inductance => "inductance",
            Quantity::Frequency => "frequency",
            Quantity::Voltage => "voltage",
            Quantity::Current => "current",
            Quantity::Conductance => "conductance",
            Quantity::Ratio => "plain number",
            Quantity::Angle => "angle",
            Quantity::Percent => "percentage",
        }
    }
}

/// Why a value text could not be read. The message names the text and what was expected.
#[derive(Clone, Debug, PartialEq, Eq, thiserror::Error)]
#[error("{reason} in {text:?}; expected {} {quantity} such as {example}", article(.quantity))]
pub struct ValueError {
    /// The text as given.
    pub text: String,
    /// What went wrong.
    pub reason: String,
    /// The quantity that was being read.
    pub quantity: &'static str,
    /// A well-formed example.
    pub example: &'static str,
}

/// "an" before a vowel ("an inductance", "an angle"), else "a".
fn article(word: &str) -> &'static str {
    if word.starts_with(['a', 'e', 'i', 'o', 'u']) {
        "an"
    } else {
        "a"
    }
}

fn prefix_factor(c: char) -> Option<f64> {
    Some(match c {
        'f' => 1e-15,
        'p' => 1e-12,
        'n' => 1e-9,
        'u' | 'µ' | 'μ' => 1e-6,
        'm' => 1e-3,
        'k' | 'K' => 1e3,
        'M' => 1e6,
        'G' => 1e9,
        'T' => 1e12,
        _ => return None,
    })
}

/// Reads an engineering value as the given quantity. Returns the value in SI base units
/// (a percentage as a fraction). Never panics; every failure is a [`ValueError`].
///
/// ```
/// use analyzer_core::units::{parse_value, Quantity};
/// assert_eq!(parse_value("4k7", Quantity::Resistance).unwrap(), 4700.0);
/// assert!((parse_value("2.2 nF", Quantity::Capacitance).unwrap() - 2.2e-9).abs() < 1e-24);
/// assert_eq!(parse_value("1k ohm", Quantity::Resistance).unwrap(), 1000.0);
/// assert!(parse_value("10kk", Quantity::Resistance).is_err());
/// ```
pub fn parse_value(text: &str, quantity: Quantity) -> Result<f64, ValueError> {
    let fail = |reason: &str| ValueError {
        text: text.to_string(),
        reason: reason.to_string(),
        quantity: quantity.name(),
        example: quantity.example(),
    };
    let s = text.trim();
    if s.is_empty() {
        return Err(fail("empty value"));
    }
    // Digits and signs are ASCII, so byte positions below are character boundaries.
    let b = s.as_bytes();
    let digits_from = |mut j: usize| {
        while j < b.len() && b[j].is_ascii_digit() {
            j += 1;
        }
        j
    };
    let mut i = 0;
    let negative = b[0] == b'-';
    if b[0] == b'-' || b[0] == b'+' {
        i = 1;
    }
    let int_start = i;
    i = digits_from(i);
    let int_digits = &s[int_start..i];
    if int_digits.is_empty() && b.get(i) != Some(&b'.') {
        return Err(fail("no digits"));
    }

    // The letter code: digits, a prefix letter (or R), digits, optional unit word.
    if !int_digits.is_empty() {
        if let Some(letter) = s[i..].chars().next() {
            let factor = if letter == 'R' {
                Some(1.0)
            } else {
                prefix_factor(letter)
            };
            let after = i + letter.len_utf8();
            if let (Some(factor), true) = (factor, b.get(after).is_some_and(u8::is_ascii_digit)) {
                let frac_end = digits_from(after);
                let frac = &s[after..frac_end];
                check_unit_word(s[frac_end..].trim_start(), quantity, &fail)?;
                if letter == 'R' && quantity != Quantity::Resistance {
                    return Err(fail("the letter code R marks ohms"));
                }
                let number: f64 = format!("{int_digits}.{frac}")
                    .parse()
                    .map_err(|_| fail("unreadable number"))?;
                return finish(number * factor, negative, &fail);
            }
        }
    }

    // A plain decimal number, optional exponent.
    if b.get(i) == Some(&b'.') {
        i = digits_from(i + 1);
    }
    if &s[int_start..i] == "." || i == int_start {
        return Err(fail("no digits"));
    }
    if matches!(b.get(i), Some(b'e' | b'E')) {
        let mut j = i + 1;
        if matches!(b.get(j), Some(b'-' | b'+')) {
            j += 1;
        }
        let k = digits_from(j);
        if k == j {
            return Err(fail("exponent without digits"));
        }
        i = k;
    }
    let number: f64 = s[int_start..i]
        .parse()
        .map_err(|_| fail("unreadable number"))?;
    let factor = read_suffix(s[i..].trim_start(), quantity, &fail)?;
    finish(number * factor, negative, &fail)
}

/// The unit words of a quantity as a message shows them: "Ω, ohm or R".
fn unit_list(quantity: Quantity) -> &'static str {
    match quantity {
        Quantity::Resistance => "Ω, ohm or R",
        Quantity::Capacitance => "F",
        Quantity::Inductance => "H",
        Quantity::Frequency => "Hz",
        Quantity::Voltage => "V",
        Quantity::Current => "A",
        Quantity::Conductance => "S",
        Quantity::Ratio => "no unit",
        Quantity::Angle => "° or deg",
        Quantity::Percent => "%",
    }
}

fn unit_mismatch(unit: &str, quantity: Quantity, prefix: Option<char>) -> String {
    if quantity == Quantity::Ratio {
        return format!("unit {unit:?} does not fit a plain number (give no unit)");
    }
    // `10 uf`, `2.2 mh`: the symbol in the wrong case (SI symbols are case-sensitive, and a
    // lowercase f is femto), said as such rather than as a unit of another quantity.
    if let Some(word) = quantity
        .unit_words()
        .iter()
        .find(|w| w.eq_ignore_ascii_case(unit))
    {
        let milli = if prefix == Some('m') {
            "; m is milli, M mega"
        } else {
            ""
        };
        return format!(
            "unit {unit:?} is written {word:?} (unit symbols are case-sensitive{milli})"
        );
    }
    format!(
        "unit {unit:?} does not fit {} {} (use {} or no unit)",
        article(quantity.name()),
        quantity.name(),
        unit_list(quantity)
    )
}

/// Reads what follows the number: nothing, a unit word, a prefix, or a prefix and unit word,
/// with or without a space between them.
fn read_suffix(
    rest: &str,
    quantity: Quantity,
    fail: &dyn Fn(&str) -> ValueError,
) -> Result<f64, ValueError> {
    if rest.is_empty() {
        if quantity == Quantity::Percent {
            return Err(fail("a tolerance needs the % sign"));
        }
        return Ok(1.0);
    }
    if quantity == Quantity::Percent {
        return if rest == "%" {
            Ok(0.01)
        } else {
            Err(fail("unexpected text after the number"))
        };
    }
    if quantity.unit_words().contains(&rest) {
        return Ok(1.0);
    }
    if rest.get(..3).is_some_and(|m| m.eq_ignore_ascii_case("meg")) {
        return Err(fail(
            "\"meg\" is not a prefix here: write M for mega (1M) or m for milli (1m)",
        ));
    }
    let mut it = rest.chars();
    let first = it.next().unwrap_or(' ');
    let tail = it.as_str().trim_start();
    if let Some(factor) = prefix_factor(first) {
        if quantity == Quantity::Angle {
            return Err(fail("no prefix is allowed here"));
        }
        if tail.is_empty() || quantity.unit_words().contains(&tail) {
            return Ok(factor);
        }
        let case_slip = quantity
            .unit_words()
            .iter()
            .any(|w| w.eq_ignore_ascii_case(tail));
        if tail.chars().next().and_then(prefix_factor).is_some() && !case_slip {
            return Err(fail("two prefixes"));
        }
        return Err(fail(&unit_mismatch(tail, quantity, Some(first))));
    }
    Err(fail(&unit_mismatch(rest, quantity, None)))
}

fn check_unit_word(
    rest: &str,
    quantity: Quantity,
    fail: &dyn Fn(&str) -> ValueError,
) -> Result<(), ValueError> {
    if rest.is_empty() || quantity.unit_words().contains(&rest) {
        Ok(())
    } else if rest.chars().next().and_then(prefix_factor).is_some() {
        Err(fail("a prefix after the letter code"))
    } else {
        Err(fail(&unit_mismatch(rest, quantity, None)))
    }
}

fn finish(
    magnitude: f64,
    negative: bool,
    fail: &dyn Fn(&str) -> ValueError,
) -> Result<f64, ValueError> {
    if !magnitude.is_finite() || magnitude > VALUE_LIMIT {
        return Err(fail("magnitude above 1e30"));
    }
    if magnitude != 0.0 && magnitude < 1.0 / VALUE_LIMIT {
        return Err(fail("magnitude below 1e-30"));
    }
    Ok(if negative { -magnitude } else { magnitude })
}

/// Writes a quality factor with `decimals` decimals, or with an exponent from 10⁵ up (a
/// lossless resonance measures a Q of 10¹² and more, which fixed notation would spell out in
/// sixteen digits): `format_q(3.16228, 4)` → `"3.1623"`, `format_q(4.2e12, 4)` → `"4.2000e12"`,
/// an infinite Q → `"∞"`.
pub fn format_q(q: f64, decimals: usize) -> String {
    if q.is_infinite() && q > 0.0 {
        "∞".to_string()
    } else if q.abs() < 1e5 || !q.is_finite() {
        format!("{q:.decimals$}")
    } else {
        format!("{q:.decimals$e}")
    }
}

/// Writes `value` in engineering notation with `digits` significant digits and the unit,
/// e.g. `format_eng(1591.549, 5, "Hz")` → `"1.5915 kHz"`. Prefixes from f to T; outside that
/// range an exponent is used. Non-finite values are written as `inf`, `-inf` or `NaN`.
pub fn format_eng(value: f64, digits: usize, unit: &str) -> String {
    let sep = if unit.is_empty() { "" } else { " " };
    if !value.is_finite() {
        return format!("{value}{sep}{unit}");
    }
    if value == 0.0 {
        return format!("0{sep}{unit}");
    }
    let digits = digits.clamp(1, 17);
    // Round first, so 999.99 with 3 digits becomes 1.00 k rather than 1000.
    let exp10 = value.abs().log10().floor() as i32;
    let scale = 10f64.powi(digits as i32 - 1 - exp10);
    let rounded = (value * scale).round() / scale;
    let exp10 = rounded.abs().log10().floor() as i32;
    let eng = exp10.div_euclid(3) * 3;
    let prefix = match eng {
        -15 => "f",
        -12 => "p",
        -9 => "n",
        -6 => "µ",
        -3 => "m",
        0 => "",
        3 => "k",
        6 => "M",
        9 => "G",
        12 => "T",
        _ => {
            return format!("{:.*e}{sep}{unit}", digits - 1, rounded);
        }
    };
    let mantissa = rounded / 10f64.powi(eng);
    let decimals = (digits as i32 - 1 - (exp10 - eng)).max(0) as usize;
    let sep = if unit.is_empty() && prefix.is_empty() {
        ""
    } else {
        " "
    };
    format!("{mantissa:.decimals$}{sep}{prefix}{unit}")
}

/// A fraction as a percentage with up to four decimals and no trailing zeros: `0.01` →
/// `"1 %"`, `0.0025` → `"0.25 %"`.
pub fn format_percent(fraction: f64) -> String {
    let s = format!("{:.4}", fraction * 100.0);
    let s = if s.contains('.') {
        s.trim_end_matches('0').trim_end_matches('.')
    } else {
        &s
    };
    format!("{s} %")
}

/// As [`format_eng`] with up to `digits` significant digits and no trailing zeros:
/// `format_short(0.01, 4, "Ω")` → `"10 mΩ"`, `format_short(4700.0, 4, "Ω")` → `"4.7 kΩ"`.
pub fn format_short(value: f64, digits: usize, unit: &str) -> String {
    let s = format_eng(value, digits, unit);
    let (num, rest) = match s.find(' ') {
        Some(i) => (&s[..i], &s[i..]),
        None => (s.as_str(), ""),
    };
    if num.contains('.') && !num.contains('e') {
        let t = num.trim_end_matches('0').trim_end_matches('.');
        return format!("{t}{rest}");
    }
    s
}

/// A value with its unit that displays in engineering notation (5 significant digits).
#[derive(Clone, Copy, Debug)]
pub struct Eng(pub f64, pub &'static str);

impl fmt::Display for Eng {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&format_eng(self.0, 5, self.1))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn close(a: f64, b: f64) -> bool {
        (a - b).abs() <= 1e-12 * b.abs().max(1e-300)
    }

    #[test]
    fn reads_prefixes_units_and_letter_codes() {
        // Letter codes as IEC 60062 writes them.
        assert!(close(
            parse_value("4k7", Quantity::Resistance).unwrap(),
            4700.0
        ));
        assert!(close(
            parse_value("2n2", Quantity::Capacitance).unwrap(),
            2.2e-9
        ));
        assert!(close(
            parse_value("1R5", Quantity::Resistance).unwrap(),
            1.5
        ));
        assert!(close(
            parse_value("0R22", Quantity::Resistance).unwrap(),
            0.22
        ));
        assert!(close(
            parse_value("4M7", Quantity::Resistance).unwrap(),
            4.7e6
        ));
        assert!(close(
            parse_value("10 kHz", Quantity::Frequency).unwrap(),
            1e4
        ));
        assert!(close(
            parse_value("10kΩ", Quantity::Resistance).unwrap(),
            1e4
        ));
        assert!(close(
            parse_value("10 kohm", Quantity::Resistance).unwrap(),
            1e4
        ));
        assert!(close(
            parse_value("100R", Quantity::Resistance).unwrap(),
            100.0
        ));
        assert!(close(
            parse_value("4.7 µH", Quantity::Inductance).unwrap(),
            4.7e-6
        ));
        assert!(close(
            parse_value("4.7uH", Quantity::Inductance).unwrap(),
            4.7e-6
        ));
        assert!(close(
            parse_value("1 F", Quantity::Capacitance).unwrap(),
            1.0
        ));
        assert!(close(
            parse_value("1 f", Quantity::Capacitance).unwrap(),
            1e-15
        ));
        assert!(close(parse_value("1 mA", Quantity::Current).unwrap(), 1e-3));
        assert!(close(
            parse_value("2.2e-9", Quantity::Capacitance).unwrap(),
            2.2e-9
        ));
        assert!(close(parse_value("-3", Quantity::Voltage).unwrap(), -3.0));
        assert!(close(parse_value(".5", Quantity::Ratio).unwrap(), 0.5));
        assert!(close(parse_value("1%", Quantity::Percent).unwrap(), 0.01));
        assert!(close(
            parse_value("0.5 %", Quantity::Percent).unwrap(),
            0.005
        ));
        assert!(close(parse_value("30 deg", Quantity::Angle).unwrap(), 30.0));
        assert!(close(
            parse_value("1 MHz", Quantity::Frequency).unwrap(),
            1e6
        ));
        assert!(close(
            parse_value("1 mHz", Quantity::Frequency).unwrap(),
            1e-3
        ));
        // A unit after a prefixed value, with or without a space (common practice).
        for (text, q, v) in [
            ("1k ohm", Quantity::Resistance, 1e3),
            ("1k Ω", Quantity::Resistance, 1e3),
            ("1 k Ω", Quantity::Resistance, 1e3),
            ("1kohms", Quantity::Resistance, 1e3),
            ("100n F", Quantity::Capacitance, 100e-9),
            ("4.7 µ H", Quantity::Inductance, 4.7e-6),
            ("2 M Hz", Quantity::Frequency, 2e6),
            ("1 %", Quantity::Percent, 0.01),
        ] {
            assert!(close(parse_value(text, q).unwrap(), v), "{text}");
        }
    }

    #[test]
    fn refuses_garbage_with_a_reason() {
        for (text, reason) in [
            ("10kk", "two prefixes"),
            ("", "empty value"),
            ("1e999", "magnitude above 1e30"),
            ("NaN", "no digits"),
            ("inf", "no digits"),
            ("-", "no digits"),
            ("4k7k", "a prefix after the letter code"),
            ("1e", "exponent without digits"),
            (
                "10 kHz",
                "unit \"Hz\" does not fit a resistance (use Ω, ohm or R or no unit)",
            ),
            ("1e-40", "magnitude below 1e-30"),
            (".", "no digits"),
            (
                "1..2",
                "unit \".2\" does not fit a resistance (use Ω, ohm or R or no unit)",
            ),
            (
                "1meg",
                "\"meg\" is not a prefix here: write M for mega (1M) or m for milli (1m)",
            ),
            ("1 k k", "two prefixes"),
        ] {
            let err = parse_value(text, Quantity::Resistance).unwrap_err();
            assert_eq!(err.reason, reason, "for {text:?}");
            assert!(err.to_string().contains("expected a resistance such as"));
        }
        assert_eq!(
            parse_value("1", Quantity::Percent).unwrap_err().reason,
            "a tolerance needs the % sign"
        );
        // A unit symbol in the wrong case is named as such (SI symbols are case-sensitive,
        // and a lowercase f is femto), with the article the quantity takes.
        let err = parse_value("1 uf", Quantity::Capacitance).unwrap_err();
        assert_eq!(
            err.reason,
            "unit \"f\" is written \"F\" (unit symbols are case-sensitive)"
        );
        let err = parse_value("10mh", Quantity::Inductance).unwrap_err();
        assert_eq!(
            err.reason,
            "unit \"h\" is written \"H\" (unit symbols are case-sensitive; m is milli, M mega)"
        );
        assert!(
            err.to_string().contains("expected an inductance such as"),
            "{err}"
        );
        let err = parse_value("10 mhz", Quantity::Frequency).unwrap_err();
        assert!(err.reason.contains("m is milli, M mega"), "{err}");
    }

    #[test]
    fn writes_engineering_notation() {
        assert_eq!(format_eng(1_591.549_430_9, 5, "Hz"), "1.5915 kHz");
        assert_eq!(format_eng(-3.0103, 3, "dB"), "-3.01 dB");
        assert_eq!(format_eng(999.999, 3, "Hz"), "1.00 kHz");
        assert_eq!(format_eng(2.2e-9, 3, "F"), "2.20 nF");
        assert_eq!(format_eng(0.0, 3, "V"), "0 V");
        assert_eq!(format_eng(1e20, 3, "Hz"), "1.00e20 Hz");
        assert_eq!(format_eng(7.0711, 3, ""), "7.07");
        assert_eq!(format_short(0.01, 4, "Ω"), "10 mΩ");
        assert_eq!(format_short(4700.0, 4, "Ω"), "4.7 kΩ");
        assert_eq!(format_short(-3.0, 4, "dB"), "-3 dB");
        assert_eq!(format_short(123456.0, 4, "Hz"), "123.5 kHz");
        assert_eq!(format_q(3.162_277_66, 4), "3.1623");
        assert_eq!(format_q(99_999.0, 1), "99999.0");
        assert_eq!(format_q(4.233_42e12, 4), "4.2334e12");
        assert_eq!(format_q(f64::INFINITY, 4), "∞");
    }
}
