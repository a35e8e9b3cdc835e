//! Values with units: `"4.7k"`, `"100 nF"`-style strings, parsed into SI base units.
//!
//! A quantity is written as a bare number (already in SI base units) or as a string: a number, an
//! optional SI prefix (`p n u µ m k M G`) and an optional unit. Units are case-sensitive: `"1 ms"` is a
//! millisecond, `"1 Ms"` a megasecond, `"1 mHz"` a millihertz. A unit that is given must match the
//! dimension the key expects.
//!
//! Values are written back with SI prefixes by the crate's one SI formatter, [`format_si_as`], in the style of
//! messages ([`format_si`], parses back), tables ([`format_si_table`]) or plot labels
//! (`report::plot::format_si`).

/// The dimension a key expects; decides which units are accepted and what a bare number means.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Dimension {
    /// Hertz (`Hz`).
    Frequency,
    /// Seconds (`s`).
    Time,
    /// Volts (`V`).
    Voltage,
    /// Volts per second (`V/s`, `V/us`, `kV/s`, `mV/ns`, ...).
    SlewRate,
    /// A plain fraction: bare number, `%` or `ppm`.
    Ratio,
    /// Decibels (`dB`); a bare number is taken as decibels.
    Decibels,
    /// An angle in `deg` or `rad`; a bare number is degrees. Parsed into radians.
    Angle,
    /// A voltage gain: bare number or `V/V` is a ratio, `dB` is 20 log10 of the ratio. Parsed as V/V.
    Gain,
    /// A voltage noise density (`V/rtHz`, `nV/rtHz`; `V/√Hz` too), parsed as V/sqrt(Hz).
    NoiseDensity,
    /// Farads (`F`, `pF`).
    Capacitance,
    /// Kelvin (`K`).
    Temperature,
}

impl Dimension {
    /// "a frequency such as \"1 kHz\"" and similar, for messages.
    pub fn expectation(self) -> &'static str {
        match self {
            Dimension::Frequency => "a frequency such as \"1 kHz\"",
            Dimension::Time => "a time such as \"8 us\"",
            Dimension::Voltage => "a voltage such as \"2.5 V\"",
            Dimension::SlewRate => "a slew rate such as \"13 V/us\"",
            Dimension::Ratio => "a ratio such as 0.01, \"1%\" or \"500 ppm\"",
            Dimension::Decibels => "a level in decibels such as \"0.5 dB\"",
            Dimension::Angle => "an angle such as \"90 deg\" or \"1.57 rad\"",
            Dimension::Gain => "a gain such as 10 or \"20 dB\"",
            Dimension::NoiseDensity => "a noise density such as \"10 nV/rtHz\"",
            Dimension::Capacitance => "a capacitance such as \"10 pF\"",
            Dimension::Temperature => "a temperature in kelvin such as \"300 K\"",
        }
    }

    /// Name of the SI base unit, for messages.
    pub fn base_unit(self) -> &'static str {
        match self {
            Dimension::Frequency => "Hz",
            Dimension::Time => "s",
            Dimension::Voltage => "V",
            Dimension::SlewRate => "V/s",
            Dimension::Ratio => "",
            Dimension::Decibels => "dB",
            Dimension::Angle => "deg",
            Dimension::Gain => "V/V",
            Dimension::NoiseDensity => "V/rtHz",
            Dimension::Capacitance => "F",
            Dimension::Temperature => "K",
        }
    }
}

/// Why a quantity string could not be read.
#[derive(Debug, Clone, PartialEq)]
pub struct UnitError {
    pub message: String,
    pub hint: Option<String>,
}

impl UnitError {
    fn new(message: impl Into<String>) -> Self {
        UnitError {
            message: message.into(),
            hint: None,
        }
    }
    fn hint(mut self, hint: impl Into<String>) -> Self {
        self.hint = Some(hint.into());
        self
    }
}

/// SI prefixes accepted before a unit, with their factors.
const PREFIXES: [(char, f64); 9] = [
    ('p', 1e-12),
    ('n', 1e-9),
    ('u', 1e-6),
    ('µ', 1e-6), // U+00B5 MICRO SIGN
    ('μ', 1e-6), // U+03BC GREEK SMALL LETTER MU
    ('m', 1e-3),
    ('k', 1e3),
    ('M', 1e6),
    ('G', 1e9),
];

fn prefix_factor(c: char) -> Option<f64> {
    PREFIXES.iter().find(|(p, _)| *p == c).map(|(_, f)| *f)
}

/// Split `s` into an optional prefix factor and the rest, when the first char is a prefix and the rest is
/// exactly `unit`.
fn strip_prefixed(s: &str, unit: &str) -> Option<f64> {
    if s == unit {
        return Some(1.0);
    }
    let mut chars = s.chars();
    let first = chars.next()?;
    let factor = prefix_factor(first)?;
    (chars.as_str() == unit).then_some(factor)
}

/// What a unit suffix turned out to be.
#[derive(Debug, Clone, Copy, PartialEq)]
enum Unit {
    /// No unit, only an optional prefix (factor).
    Bare(f64),
    /// Hertz, with prefix factor.
    Hz(f64),
    Seconds(f64),
    Volts(f64),
    /// Volts per second: numerator factor / denominator factor.
    VoltsPerSecond(f64),
    /// Volts per volt.
    VoltsPerVolt,
    /// Volts per root hertz, with prefix factor.
    VoltsPerRootHz(f64),
    Farads(f64),
    Kelvin(f64),
    Percent,
    Ppm,
    Db,
    Degrees,
    Radians,
}

impl Unit {
    fn found_name(self) -> &'static str {
        match self {
            Unit::Bare(_) => "a bare number",
            Unit::Hz(_) => "hertz",
            Unit::Seconds(_) => "seconds",
            Unit::Volts(_) => "volts",
            Unit::VoltsPerSecond(_) => "volts per second",
            Unit::VoltsPerVolt => "volts per volt",
            Unit::VoltsPerRootHz(_) => "volts per root hertz",
            Unit::Farads(_) => "farads",
            Unit::Kelvin(_) => "kelvin",
            Unit::Percent => "a percentage",
            Unit::Ppm => "parts per million",
            Unit::Db => "decibels",
            Unit::Degrees => "degrees",
            Unit::Radians => "radians",
        }
    }
}

/// Recognise a unit suffix (after the number and any spaces).
fn classify_unit(rest: &str) -> Option<Unit> {
    if rest.is_empty() {
        return Some(Unit::Bare(1.0));
    }
    match rest {
        "%" => return Some(Unit::Percent),
        "ppm" => return Some(Unit::Ppm),
        "dB" => return Some(Unit::Db),
        "deg" | "°" => return Some(Unit::Degrees),
        "rad" => return Some(Unit::Radians),
        "V/V" => return Some(Unit::VoltsPerVolt),
        _ => {}
    }
    if let Some((num, den)) = rest.split_once('/')
        && matches!(den.trim(), "rtHz" | "√Hz" | "sqrt(Hz)")
    {
        return strip_prefixed(num.trim(), "V").map(Unit::VoltsPerRootHz);
    }
    if let Some((num, den)) = rest.split_once('/') {
        let n = strip_prefixed(num.trim(), "V")?;
        let d = strip_prefixed(den.trim(), "s")?;
        return Some(Unit::VoltsPerSecond(n / d));
    }
    if let Some(f) = strip_prefixed(rest, "Hz") {
        return Some(Unit::Hz(f));
    }
    if let Some(f) = strip_prefixed(rest, "s") {
        return Some(Unit::Seconds(f));
    }
    if let Some(f) = strip_prefixed(rest, "V") {
        return Some(Unit::Volts(f));
    }
    if let Some(f) = strip_prefixed(rest, "F") {
        return Some(Unit::Farads(f));
    }
    if rest == "K" {
        return Some(Unit::Kelvin(1.0));
    }
    let mut chars = rest.chars();
    let first = chars.next()?;
    if chars.as_str().is_empty() {
        return prefix_factor(first).map(Unit::Bare);
    }
    None
}

/// Scan a leading decimal number (`-1.5e-3`, `.5`, `4.`); returns it and the remaining text.
fn split_number(s: &str) -> Option<(f64, &str)> {
    let b = s.as_bytes();
    let mut i = 0;
    if i < b.len() && (b[i] == b'+' || b[i] == b'-') {
        i += 1;
    }
    let int_start = i;
    while i < b.len() && b[i].is_ascii_digit() {
        i += 1;
    }
    let mut digits = i - int_start;
    if i < b.len() && b[i] == b'.' {
        i += 1;
        let frac_start = i;
        while i < b.len() && b[i].is_ascii_digit() {
            i += 1;
        }
        digits += i - frac_start;
    }
    if digits == 0 {
        return None;
    }
    // An exponent only when `e`/`E` is followed by digits (so "1 e" or "2 Em" is not swallowed).
    if i < b.len() && (b[i] == b'e' || b[i] == b'E') {
        let mut j = i + 1;
        if j < b.len() && (b[j] == b'+' || b[j] == b'-') {
            j += 1;
        }
        let exp_start = j;
        while j < b.len() && b[j].is_ascii_digit() {
            j += 1;
        }
        if j > exp_start {
            i = j;
        }
    }
    let value: f64 = s[..i].parse().ok()?;
    Some((value, &s[i..]))
}

/// Parse a quantity string for the given dimension into SI base units (radians for angles, V/V for gains).
pub fn parse_quantity(text: &str, dim: Dimension) -> Result<f64, UnitError> {
    let s = text.trim();
    let Some((number, rest)) = split_number(s) else {
        return Err(UnitError::new(format!(
            "expected {}, found \"{}\" (it does not start with a number)",
            dim.expectation(),
            text
        )));
    };
    let rest = rest.trim_start();
    let Some(unit) = classify_unit(rest) else {
        return Err(unknown_unit(text, rest, dim));
    };
    let value = convert(number, unit, dim).ok_or_else(|| {
        let err = UnitError::new(format!(
            "expected {}, found {}",
            dim.expectation(),
            unit.found_name()
        ));
        match (dim, unit) {
            (
                Dimension::Ratio | Dimension::Decibels | Dimension::Angle | Dimension::Gain,
                Unit::Bare(_),
            ) => err.hint("SI prefixes are not used here; write the plain number"),
            _ => err,
        }
    })?;
    if !value.is_finite() {
        return Err(UnitError::new(format!("\"{text}\" is too large")));
    }
    Ok(value)
}

/// Apply the unit, if it fits the dimension.
fn convert(x: f64, unit: Unit, dim: Dimension) -> Option<f64> {
    use Dimension as D;
    match (dim, unit) {
        (
            D::Frequency | D::Time | D::Voltage | D::SlewRate | D::NoiseDensity | D::Capacitance,
            Unit::Bare(f),
        ) => Some(x * f),
        (D::Temperature, Unit::Bare(1.0)) => Some(x),
        (D::NoiseDensity, Unit::VoltsPerRootHz(f)) => Some(x * f),
        (D::Capacitance, Unit::Farads(f)) => Some(x * f),
        (D::Temperature, Unit::Kelvin(f)) => Some(x * f),
        (D::Ratio | D::Decibels | D::Gain, Unit::Bare(1.0)) => Some(x),
        (D::Angle, Unit::Bare(1.0)) => Some(x.to_radians()),
        (D::Frequency, Unit::Hz(f)) => Some(x * f),
        (D::Time, Unit::Seconds(f)) => Some(x * f),
        (D::Voltage, Unit::Volts(f)) => Some(x * f),
        (D::SlewRate, Unit::VoltsPerSecond(f)) => Some(x * f),
        (D::Ratio, Unit::Percent) => Some(x / 100.0),
        (D::Ratio, Unit::Ppm) => Some(x * 1e-6),
        (D::Decibels, Unit::Db) => Some(x),
        (D::Angle, Unit::Degrees) => Some(x.to_radians()),
        (D::Angle, Unit::Radians) => Some(x),
        (D::Gain, Unit::VoltsPerVolt) => Some(x),
        (D::Gain, Unit::Db) => Some(10f64.powf(x / 20.0)),
        _ => None,
    }
}

/// Error for a suffix that is not a unit we know, with a hint for wrong letter case.
fn unknown_unit(text: &str, rest: &str, dim: Dimension) -> UnitError {
    let err = UnitError::new(format!(
        "expected {}, found \"{}\" (unknown unit \"{}\")",
        dim.expectation(),
        text,
        rest
    ));
    let lower = rest.to_lowercase();
    let base = dim.base_unit();
    if !base.is_empty() && lower.ends_with(&base.to_lowercase()) && lower != base.to_lowercase() {
        let head = &lower[..lower.len() - base.len()];
        if head == "m" {
            return err.hint(format!(
                "units are case-sensitive: \"m{base}\" is milli, \"M{base}\" is mega"
            ));
        }
        if head.chars().count() == 1 {
            let c = head.chars().next().unwrap_or('?');
            let fixed = match c {
                'k' | 'n' | 'p' | 'u' | 'µ' => c.to_string(),
                'g' => "G".into(),
                other => other.to_string(),
            };
            return err.hint(format!(
                "units are case-sensitive: did you mean \"{fixed}{base}\"?"
            ));
        }
    }
    if !base.is_empty() && lower == base.to_lowercase() {
        return err.hint(format!("units are case-sensitive: write \"{base}\""));
    }
    err.hint(format!(
        "write a number with an optional prefix (p n u µ m k M G) and the unit {}",
        if base.is_empty() { "% or ppm" } else { base }
    ))
}

/// The SI prefix for showing `value`: (factor to divide by, prefix), from p to G; `micro` is the symbol for 1e-6.
pub fn si_prefix(value: f64, micro: &'static str) -> (f64, &'static str) {
    let a = value.abs();
    if a == 0.0 || !a.is_finite() {
        (1.0, "")
    } else if a >= 1e9 {
        (1e9, "G")
    } else if a >= 1e6 {
        (1e6, "M")
    } else if a >= 1e3 {
        (1e3, "k")
    } else if a >= 1.0 {
        (1.0, "")
    } else if a >= 1e-3 {
        (1e-3, "m")
    } else if a >= 1e-6 {
        (1e-6, micro)
    } else if a >= 1e-9 {
        (1e-9, "n")
    } else {
        (1e-12, "p")
    }
}

/// The power of ten of the prefix [`si_prefix`] picks for `value` (-12 for p to 9 for G; 0 for zero or a
/// non-finite value), for code that scales by it (plot axes).
pub fn si_prefix_exponent(value: f64) -> i32 {
    si_prefix(value, "").0.log10().round() as i32
}

/// An SI prefix: its symbol and its power of ten (chosen by [`si_prefix`]).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct SiPrefix {
    /// "µ", "m", "", "k", ...
    pub symbol: &'static str,
    /// Power of ten of the prefix (-6 for µ).
    pub exponent: i32,
}

impl SiPrefix {
    /// No prefix.
    pub const NONE: SiPrefix = SiPrefix {
        symbol: "",
        exponent: 0,
    };

    /// Multiply a value in the base unit by this to express it with the prefix (1e3 for "m").
    pub fn scale(self) -> f64 {
        10f64.powi(-self.exponent)
    }
}

/// The prefix whose range holds `magnitude` (1 <= magnitude / 10^exponent < 1000), from p to G as
/// [`si_prefix`] picks it (micro written µ); no prefix for zero or non-finite input.
pub fn si_prefix_for_value(magnitude: f64) -> SiPrefix {
    // A nudge of 1e-9 decades keeps exact powers of ten that rounding left just below themselves (a span
    // of 1e-3 computed as 0.000999...) in their own decade.
    let m = magnitude.abs() * 10f64.powf(1e-9);
    SiPrefix {
        symbol: si_prefix(m, "µ").1,
        exponent: si_prefix_exponent(m),
    }
}

/// The prefix for an axis spanning `span` base units: the span then reads between 1 and 1000
/// (2 ms span -> "m", 500 µs span -> "µ", 20 kHz span -> "k").
pub fn si_prefix_for_span(span: f64) -> SiPrefix {
    si_prefix_for_value(span)
}

/// Whether a unit takes SI prefixes (s, Hz, V, A, W, F, H, Ω, V/s, ...) or not (dB, dBFS, LSB, %, none).
pub fn unit_takes_prefix(unit: &str) -> bool {
    let base = unit.split('/').next().unwrap_or("");
    matches!(
        base,
        "s" | "Hz" | "V" | "A" | "W" | "F" | "H" | "Ω" | "ohm" | "S" | "C" | "J" | "m" | "g"
    )
}

/// How [`format_si_as`] writes a value.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum SiStyle {
    /// About 4 significant digits, trailing zeros dropped, micro written `u` so the text parses back
    /// (messages): `"83.33 kHz"`, `"12 us"`.
    Parseable,
    /// At most 5 significant digits and 4 decimals, trailing zeros dropped, micro written `µ` (tables):
    /// `"67.231 µs"`, `"3.5 ns"`; a phase delay of 99.99988 ns reads `"100 ns"`, not `"99.9999 ns"`.
    Table,
    /// Exactly this many significant digits (at least 1), micro written `µ`; units that take no prefix
    /// (dB, LSB, %) are written unprefixed (plot labels): `"12.3 µs"`, `"72.1 dB"`.
    Significant(usize),
}

/// The crate's one SI formatter: `value` in base units with an SI prefix on `unit`, written in `style`.
pub fn format_si_as(value: f64, unit: &str, style: SiStyle) -> String {
    // A negative zero (a delay of -0.0 from a sign flip of nothing) prints as zero.
    let value = if value == 0.0 { 0.0 } else { value };
    match style {
        SiStyle::Parseable => {
            if !value.is_finite() {
                return format!("{value} {unit}");
            }
            let (factor, prefix) = si_prefix(value, "u");
            let scaled = value / factor;
            // Keep about 4 significant digits, drop trailing zeros.
            let int_digits = scaled.abs().max(1.0).log10().floor() as usize + 1;
            let decimals = 4usize.saturating_sub(int_digits);
            let mut s = format!("{:.*}", decimals, scaled);
            if s.contains('.') {
                s = s.trim_end_matches('0').trim_end_matches('.').to_string();
            }
            format!("{s} {prefix}{unit}")
        }
        SiStyle::Table => {
            // Arithmetic noise off first (99.99999999 ns from a sum of delays is 100 ns), then the prefix.
            let value = round_significant(value, ECHO_DIGITS);
            let (factor, prefix) = si_prefix(value, "µ");
            let scaled = value / factor;
            let int_digits = if scaled.is_finite() {
                scaled.abs().max(1.0).log10().floor() as usize + 1
            } else {
                1
            };
            let decimals = TABLE_DIGITS.saturating_sub(int_digits).min(4);
            let s = format!("{scaled:.decimals$}");
            let s = if s.contains('.') {
                s.trim_end_matches('0').trim_end_matches('.')
            } else {
                &s
            };
            // Rounding may reach the next prefix (999.996 ns reads 1 µs).
            if s.trim_start_matches('-').starts_with("1000") && prefix != "G" && !s.contains('.') {
                return format_si_as(value.signum() * 1000.0 * factor, unit, style);
            }
            format!("{s} {prefix}{unit}")
        }
        SiStyle::Significant(significant) => {
            let prefix = if unit_takes_prefix(unit) {
                si_prefix_for_value(value)
            } else {
                SiPrefix::NONE
            };
            let scaled = value * prefix.scale();
            let digits = significant.max(1) as i32;
            let decimals = if scaled == 0.0 || !scaled.is_finite() {
                0
            } else {
                (digits - 1 - (scaled.abs().log10() + 1e-9).floor() as i32).max(0) as usize
            };
            let sep = if unit.is_empty() { "" } else { " " };
            format!("{scaled:.decimals$}{sep}{}{unit}", prefix.symbol)
        }
    }
}

/// Most significant digits of a table value ([`SiStyle::Table`]): enough to compare delays to a
/// thousandth, not so many that model-level differences (a single pole's phase delay a hair under its time
/// constant) read as digits.
const TABLE_DIGITS: usize = 5;

/// Significant digits kept where a value is echoed or tabulated ([`round_significant`]): far below the
/// precision of any input or measurement, far above double-precision arithmetic noise (about 16 digits).
pub const ECHO_DIGITS: usize = 12;

/// `x` rounded to `digits` significant decimal digits (1 to 17), so arithmetic noise such as
/// `9.999999999999999e-06` (from "10 us" = 10 x 1e-6) reads `1e-05` again. Zero and non-finite values are
/// returned unchanged. Goes through the decimal text, which rounds exactly.
pub fn round_significant(x: f64, digits: usize) -> f64 {
    if x == 0.0 || !x.is_finite() {
        return x;
    }
    let d = digits.clamp(1, 17) - 1;
    format!("{x:.d$e}").parse().unwrap_or(x)
}

/// [`format_si_as`] in [`SiStyle::Parseable`]: e.g. `format_si(83_333.3, "Hz")` = `"83.33 kHz"`.
pub fn format_si(value: f64, unit: &str) -> String {
    format_si_as(value, unit, SiStyle::Parseable)
}

/// [`format_si_as`] in [`SiStyle::Table`]: e.g. `"67.231 µs"`.
pub fn format_si_table(value: f64, unit: &str) -> String {
    format_si_as(value, unit, SiStyle::Table)
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    #[test]
    fn table_values_and_echoes_carry_no_arithmetic_noise() {
        // 10 x 1e-6 in doubles is 9.999999999999999e-06 (IEEE 754 binary64 rounding; common practice, no
        // source): twelve significant digits give 1e-5 back.
        assert_eq!(10.0 * 1e-6, 9.999999999999999e-6);
        assert_eq!(round_significant(10.0 * 1e-6, ECHO_DIGITS), 1e-5);
        assert_eq!(round_significant(5.000000000000001e-7, ECHO_DIGITS), 5e-7);
        assert_eq!(
            round_significant(-0.000019999999999999998, ECHO_DIGITS),
            -2e-5
        );
        assert_eq!(round_significant(123.456, 2), 120.0);
        assert_eq!(round_significant(0.0, 3), 0.0);
        assert!(round_significant(f64::NAN, 3).is_nan());
        // A sum of delays a hair under 100 ns is 100 ns in a table, and one under 1 us is 1 us.
        assert_eq!(format_si_table(99.99999999e-9, "s"), "100 ns");
        assert_eq!(format_si_table(0.9999999999999e-6, "s"), "1 µs");
        // Real digits stay.
        assert_eq!(format_si_table(67.2309e-6, "s"), "67.231 µs");
        assert_eq!(format_si_table(3.5e-9, "s"), "3.5 ns");
        assert_eq!(format_si_table(-499.4602e-9, "s"), "-499.46 ns");
        // At most 5 significant digits: a value a hair under 100 ns or 1 us reads so.
        assert_eq!(format_si_table(99.99988e-9, "s"), "100 ns");
        assert_eq!(format_si_table(999.996e-9, "s"), "1 µs");
        assert_eq!(format_si_table(0.0, "s"), "0 s");
        assert_eq!(format_si_table(-0.0, "s"), "0 s");
        assert_eq!(format_si(-0.0, "V"), format_si(0.0, "V"));
    }

    fn q(s: &str, d: Dimension) -> f64 {
        parse_quantity(s, d).unwrap_or_else(|e| panic!("{s}: {}", e.message))
    }

    fn close(a: f64, b: f64) -> bool {
        (a - b).abs() <= 1e-12 * b.abs().max(1e-300)
    }

    #[test]
    fn prefixes_and_units_scale_to_si_base_units() {
        use Dimension::*;
        assert!(close(q("4.7k", Frequency), 4700.0));
        assert!(close(q("1 kHz", Frequency), 1000.0));
        assert!(close(q("10 MHz", Frequency), 10e6));
        assert!(close(q("1 mHz", Frequency), 1e-3));
        assert!(close(q("8 us", Time), 8e-6));
        assert!(close(q("8 µs", Time), 8e-6));
        assert!(close(q("8 μs", Time), 8e-6));
        assert!(close(q("1 ms", Time), 1e-3));
        assert!(close(q("1 Ms", Time), 1e6));
        assert!(close(q("2.5e-3 V", Voltage), 2.5e-3));
        assert!(close(q("-3 V", Voltage), -3.0));
        assert!(close(q("100 pV", Voltage), 100e-12));
        assert!(close(q("13 V/us", SlewRate), 13e6));
        assert!(close(q("13 V/µs", SlewRate), 13e6));
        assert!(close(q("2 V/ms", SlewRate), 2e3));
        assert!(close(q("1 kV/s", SlewRate), 1e3));
        assert!(close(q("5 mV/ns", SlewRate), 5e6));
        assert!(close(q("1%", Ratio), 0.01));
        assert!(close(q("500 ppm", Ratio), 500e-6));
        assert!(close(q("0.25", Ratio), 0.25));
        assert!(close(q("-3 dB", Decibels), -3.0));
        assert!(close(q("90 deg", Angle), std::f64::consts::FRAC_PI_2));
        assert!(close(q("90", Angle), std::f64::consts::FRAC_PI_2));
        assert!(close(q("1.5 rad", Angle), 1.5));
        assert!(close(q("20 dB", Gain), 10.0));
        assert!(close(q("3 V/V", Gain), 3.0));
        assert!(close(q("7", Gain), 7.0));
        assert!(close(q(".5 V", Voltage), 0.5));
        assert!(close(q("5.V", Voltage), 5.0));
        assert!(close(q("3E2Hz", Frequency), 300.0));
    }

    #[test]
    fn a_unit_of_the_wrong_dimension_is_named() {
        let e = parse_quantity("1 kV", Dimension::Frequency).unwrap_err();
        assert_eq!(
            e.message,
            "expected a frequency such as \"1 kHz\", found volts"
        );
        let e = parse_quantity("3 ms", Dimension::Voltage).unwrap_err();
        assert!(e.message.contains("found seconds"), "{}", e.message);
        let e = parse_quantity("1%", Dimension::Time).unwrap_err();
        assert!(e.message.contains("found a percentage"), "{}", e.message);
    }

    #[test]
    fn wrong_letter_case_gets_a_hint() {
        let e = parse_quantity("1 mhz", Dimension::Frequency).unwrap_err();
        assert!(e.hint.unwrap().contains("\"MHz\" is mega"));
        let e = parse_quantity("1 KHZ", Dimension::Frequency).unwrap_err();
        assert!(e.hint.unwrap().contains("kHz"));
    }

    #[test]
    fn garbage_is_rejected() {
        for s in [
            "", "V", "k", "1 2", "1 kk", "1 e", "--1", "1 xyz", "1 % %", "nan", "inf", "1e999 V",
        ] {
            assert!(
                parse_quantity(s, Dimension::Voltage).is_err(),
                "{s:?} accepted"
            );
        }
        // A prefix alone is not allowed where the unit has no SI prefixes.
        assert!(parse_quantity("5m", Dimension::Ratio).is_err());
        assert!(parse_quantity("5 k", Dimension::Decibels).is_err());
    }

    #[test]
    fn format_si_picks_a_prefix() {
        assert_eq!(format_si(83_333.33, "Hz"), "83.33 kHz");
        assert_eq!(format_si(12e-6, "s"), "12 us");
        assert_eq!(format_si(0.0, "V"), "0 V");
        assert_eq!(format_si(-2.5, "V"), "-2.5 V");
    }

    #[test]
    fn si_prefix_follows_the_axis_span() {
        // Prefix powers are those of the SI (BIPM SI Brochure, 9th ed., table of SI prefixes; from memory);
        // choosing the prefix so the span reads 1..1000 is common practice, no source.
        assert_eq!(si_prefix_for_span(2e-3).symbol, "m");
        assert_eq!(si_prefix_for_span(1e-3).symbol, "m");
        assert_eq!(si_prefix_for_span(999e-6).symbol, "µ");
        assert_eq!(si_prefix_for_span(500e-6).symbol, "µ");
        assert_eq!(si_prefix_for_span(20e3).symbol, "k");
        assert_eq!(si_prefix_for_span(0.2).symbol, "m");
        assert_eq!(si_prefix_for_span(3.3).symbol, "");
        assert_eq!(si_prefix_for_span(2.5e6).symbol, "M");
        assert_eq!(si_prefix_for_span(40e-9).symbol, "n");
        assert_eq!(si_prefix_for_span(0.0), SiPrefix::NONE);
        assert_eq!(si_prefix_for_span(f64::NAN), SiPrefix::NONE);
    }

    #[test]
    fn plot_prefixes_are_those_of_si_prefix() {
        // Away from the decade edges the prefix for plots is exactly si_prefix's, from p to G.
        for e in -13..11 {
            for m in [1.5, 4.0, 30.0, 700.0] {
                let v = m * 10f64.powi(e);
                let p = si_prefix_for_value(v);
                let (factor, symbol) = si_prefix(v, "µ");
                assert_eq!(p.symbol, symbol, "{v}");
                assert_eq!(10f64.powi(p.exponent), factor, "{v}");
            }
        }
        // Out of range: clamped to p and G.
        assert_eq!(si_prefix_for_value(3e-15).symbol, "p");
        assert_eq!(si_prefix_for_value(3e13).symbol, "G");
        // A span that rounding left just below a power of ten keeps that decade's prefix.
        let one = 1.0 - f64::EPSILON / 2.0;
        assert_eq!(si_prefix_for_span(one), SiPrefix::NONE);
    }

    #[test]
    fn values_are_written_with_prefix_and_significant_digits() {
        assert_eq!(
            format_si_as(12.34e-6, "s", SiStyle::Significant(3)),
            "12.3 µs"
        );
        assert_eq!(
            format_si_as(1e3, "Hz", SiStyle::Significant(4)),
            "1.000 kHz"
        );
        assert_eq!(
            format_si_as(-2.5e-3, "V", SiStyle::Significant(2)),
            "-2.5 mV"
        );
        assert_eq!(
            format_si_as(72.14, "dB", SiStyle::Significant(3)),
            "72.1 dB"
        );
        assert_eq!(format_si_as(0.0, "s", SiStyle::Significant(3)), "0 s");
    }

    #[test]
    fn prefix_exponents_match_the_prefix_factors() {
        for (v, e, p) in [
            (3e-13, -12, "p"),
            (1e-12, -12, "p"),
            (2e-9, -9, "n"),
            (999e-9, -9, "n"),
            (1e-6, -6, "µ"),
            (0.2, -3, "m"),
            (1.0, 0, ""),
            (-999.0, 0, ""),
            (1e3, 3, "k"),
            (2.5e6, 6, "M"),
            (4e12, 9, "G"),
            (0.0, 0, ""),
            (f64::NAN, 0, ""),
        ] {
            assert_eq!(si_prefix_exponent(v), e, "{v}");
            assert_eq!(si_prefix(v, "µ").1, p, "{v}");
            assert_eq!(si_prefix(v, "µ").0, 10f64.powi(e), "{v}");
        }
    }

    const PFX: [(&str, f64); 10] = [
        ("", 1.0),
        ("p", 1e-12),
        ("n", 1e-9),
        ("u", 1e-6),
        ("µ", 1e-6),
        ("μ", 1e-6),
        ("m", 1e-3),
        ("k", 1e3),
        ("M", 1e6),
        ("G", 1e9),
    ];
    const UNITS: [(&str, Dimension); 4] = [
        ("Hz", Dimension::Frequency),
        ("s", Dimension::Time),
        ("V", Dimension::Voltage),
        ("V/s", Dimension::SlewRate),
    ];

    proptest! {
        #[test]
        fn formatted_values_parse_back(
            mantissa in -1e6f64..1e6,
            p in 0usize..PFX.len(),
            u in 0usize..UNITS.len(),
            space in any::<bool>(),
            exp_form in any::<bool>(),
        ) {
            let (prefix, factor) = PFX[p];
            let (unit, dim) = UNITS[u];
            let num = if exp_form { format!("{mantissa:e}") } else { format!("{mantissa}") };
            let text = format!("{num}{}{prefix}{unit}", if space { " " } else { "" });
            let expected = mantissa * factor;
            let got = parse_quantity(&text, dim).unwrap();
            prop_assert!((got - expected).abs() <= 1e-12 * expected.abs(), "{} -> {} vs {}", text, got, expected);
        }

        #[test]
        fn slew_rates_with_prefixed_denominators_parse_back(
            mantissa in 1e-3f64..1e3,
            pn in 0usize..PFX.len(),
            pd in 0usize..PFX.len(),
        ) {
            let text = format!("{mantissa} {}V/{}s", PFX[pn].0, PFX[pd].0);
            let expected = mantissa * PFX[pn].1 / PFX[pd].1;
            let got = parse_quantity(&text, Dimension::SlewRate).unwrap();
            prop_assert!((got - expected).abs() <= 1e-12 * expected.abs(), "{} -> {} vs {}", text, got, expected);
        }

        #[test]
        fn noise_density_capacitance_and_temperature_parse(x in 0.001f64..1000.0) {
            let d = parse_quantity(&format!("{x} nV/rtHz"), Dimension::NoiseDensity).unwrap();
            prop_assert!((d - x * 1e-9).abs() <= 1e-12 * x * 1e-9);
            let c = parse_quantity(&format!("{x} pF"), Dimension::Capacitance).unwrap();
            prop_assert!((c - x * 1e-12).abs() <= 1e-12 * x * 1e-12);
            prop_assert_eq!(parse_quantity(&format!("{x} K"), Dimension::Temperature).unwrap(), x);
            let volts = format!("{x} nV");
            let kilo = format!("{x} kK");
            prop_assert!(parse_quantity(&volts, Dimension::NoiseDensity).is_err());
            prop_assert!(parse_quantity(&kilo, Dimension::Temperature).is_err());
        }

        #[test]
        fn arbitrary_strings_never_panic(s in any::<String>(), d in 0usize..8) {
            let dims = [
                Dimension::Frequency, Dimension::Time, Dimension::Voltage, Dimension::SlewRate,
                Dimension::Ratio, Dimension::Decibels, Dimension::Angle, Dimension::Gain,
            ];
            let _ = parse_quantity(&s, dims[d]);
        }

        #[test]
        fn number_like_strings_never_panic(s in "[-+]?[0-9.eE]{0,6} ?[pnuµmkMGdV/sHz%ppmgdr°]{0,5}") {
            let _ = parse_quantity(&s, Dimension::SlewRate);
            let _ = parse_quantity(&s, Dimension::Angle);
        }
    }
}
