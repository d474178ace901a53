//! Engine time: event time and clock ticks as integer milliseconds since the Unix epoch.
//!
//! The engine never reads a clock; the runtime passes `Millis` in. Durations in the
//! configuration use the suffixes `ms`, `s`, `m`, `h` and `d`.

use std::fmt;

/// A point in time, in milliseconds since 1970-01-01T00:00:00Z (UTC, no leap seconds).
#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub struct Millis(pub i64);

/// A span of time in milliseconds; always positive where the configuration needs it.
#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub struct DurationMs(pub i64);

/// Earliest accepted event time: 1970-01-01T00:00:00Z.
pub const MIN_EVENT_TIME: Millis = Millis(0);
/// Latest accepted event time: 9999-12-31T23:59:59.999Z.
pub const MAX_EVENT_TIME: Millis = Millis(253_402_300_799_999);

/// Why a duration string did not parse.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[non_exhaustive]
pub enum DurationError {
    /// Not `<positive integer><unit>`.
    #[error(
        "'{0}' is not a duration: write a whole number followed by ms, s, m, h or d (e.g. \"1h\", \"90s\")"
    )]
    Syntax(String),
    /// The value overflows 64-bit milliseconds.
    #[error("'{0}' is too long a duration")]
    Overflow(String),
}

/// Parses `"90s"`, `"5m"`, `"1h"`, `"2d"`, `"250ms"`.
pub fn parse_duration(s: &str) -> Result<DurationMs, DurationError> {
    let t = s.trim();
    let split = t.find(|c: char| !c.is_ascii_digit()).unwrap_or(t.len());
    let (num, unit) = t.split_at(split);
    if num.is_empty() {
        return Err(DurationError::Syntax(s.to_string()));
    }
    let n: i64 = num
        .parse()
        .map_err(|_| DurationError::Overflow(s.to_string()))?;
    let mult = match unit {
        "ms" => 1,
        "s" => 1_000,
        "m" => 60_000,
        "h" => 3_600_000,
        "d" => 86_400_000,
        _ => return Err(DurationError::Syntax(s.to_string())),
    };
    n.checked_mul(mult)
        .map(DurationMs)
        .ok_or_else(|| DurationError::Overflow(s.to_string()))
}

impl fmt::Display for DurationMs {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let ms = self.0;
        for (unit, size) in [
            ("d", 86_400_000),
            ("h", 3_600_000),
            ("m", 60_000),
            ("s", 1_000),
        ] {
            if ms != 0 && ms % size == 0 {
                return write!(f, "{}{}", ms / size, unit);
            }
        }
        write!(f, "{ms}ms")
    }
}

impl Millis {
    /// RFC 3339 in UTC with a `Z` suffix and millisecond precision only when needed,
    /// e.g. `2026-03-02T08:00:00Z`.
    pub fn to_rfc3339(self) -> String {
        let secs = self.0.div_euclid(1000);
        let ms = self.0.rem_euclid(1000);
        match time::OffsetDateTime::from_unix_timestamp(secs) {
            Ok(t) => {
                let base = format!(
                    "{:04}-{:02}-{:02}T{:02}:{:02}:{:02}",
                    t.year(),
                    u8::from(t.month()),
                    t.day(),
                    t.hour(),
                    t.minute(),
                    t.second()
                );
                if ms == 0 {
                    format!("{base}Z")
                } else {
                    format!("{base}.{ms:03}Z")
                }
            }
            Err(_) => format!("@{}ms", self.0),
        }
    }

    /// Parses an RFC 3339 timestamp (any offset) into UTC milliseconds, truncating
    /// sub-millisecond digits. Returns `None` if malformed or outside the accepted range.
    pub fn parse_rfc3339(s: &str) -> Option<Millis> {
        let t =
            time::OffsetDateTime::parse(s, &time::format_description::well_known::Rfc3339).ok()?;
        let ms = i64::try_from(t.unix_timestamp_nanos().div_euclid(1_000_000)).ok()?;
        let m = Millis(ms);
        (MIN_EVENT_TIME..=MAX_EVENT_TIME).contains(&m).then_some(m)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn durations_parse_and_print() {
        assert_eq!(parse_duration("1h"), Ok(DurationMs(3_600_000)));
        assert_eq!(parse_duration("5m"), Ok(DurationMs(300_000)));
        assert_eq!(parse_duration("250ms"), Ok(DurationMs(250)));
        assert_eq!(parse_duration("2d").unwrap().to_string(), "2d");
        assert!(parse_duration("h").is_err());
        assert!(parse_duration("1 hour").is_err());
        assert!(parse_duration("-1h").is_err());
        assert!(parse_duration("99999999999999999d").is_err());
    }

    #[test]
    fn rfc3339_round_trip() {
        // 2026-03-02T08:14:07Z = 1772439247 s since the epoch (computed with `date -u -d`).
        let m = Millis::parse_rfc3339("2026-03-02T08:14:07Z").unwrap();
        assert_eq!(m, Millis(1_772_439_247_000));
        assert_eq!(m.to_rfc3339(), "2026-03-02T08:14:07Z");
        let off = Millis::parse_rfc3339("2026-03-02T09:14:07.5+01:00").unwrap();
        assert_eq!(off.0, 1_772_439_247_500);
        assert_eq!(off.to_rfc3339(), "2026-03-02T08:14:07.500Z");
        assert!(Millis::parse_rfc3339("2026-13-02T08:14:07Z").is_none());
        assert!(Millis::parse_rfc3339("1969-12-31T23:59:59Z").is_none());
    }
}
