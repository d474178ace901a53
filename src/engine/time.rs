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
        if let Some(m) = parse_canonical_utc(s.as_bytes()) {
            return (MIN_EVENT_TIME..=MAX_EVENT_TIME).contains(&m).then_some(m);
        }
        let t =
            time::OffsetDateTime::parse(s, &time::format_description::well_known::Rfc3339).ok()?;
        let ms = i64::try_from(t.unix_timestamp_nanos().div_euclid(1_000_000)).ok()?;
        let m = Millis(ms);
        (MIN_EVENT_TIME..=MAX_EVENT_TIME).contains(&m).then_some(m)
    }
}

/// The common shape `YYYY-MM-DDTHH:MM:SSZ` (whole seconds, UTC, upper-case `T` and `Z`)
/// read directly: a third of the parse time of a demo line went to the general RFC 3339
/// parser (issue 9). `None` for anything else, including a valid timestamp of another
/// shape, a leap second (`:60`) and an impossible date, which the general parser then
/// decides; a property test holds the two to the same answers.
fn parse_canonical_utc(b: &[u8]) -> Option<Millis> {
    let [
        y0,
        y1,
        y2,
        y3,
        b'-',
        mo0,
        mo1,
        b'-',
        d0,
        d1,
        b'T',
        h0,
        h1,
        b':',
        mi0,
        mi1,
        b':',
        s0,
        s1,
        b'Z',
    ] = *b
    else {
        return None;
    };
    let num = |digits: &[u8]| {
        digits.iter().try_fold(0i64, |acc, &c| {
            c.is_ascii_digit().then(|| acc * 10 + i64::from(c - b'0'))
        })
    };
    let year = num(&[y0, y1, y2, y3])?;
    let month = num(&[mo0, mo1])?;
    let day = num(&[d0, d1])?;
    let (hour, minute, second) = (num(&[h0, h1])?, num(&[mi0, mi1])?, num(&[s0, s1])?);
    if !(1..=12).contains(&month) || hour > 23 || minute > 59 || second > 59 {
        return None;
    }
    let leap = year % 4 == 0 && (year % 100 != 0 || year % 400 == 0);
    let month_days = match month {
        2 if leap => 29,
        2 => 28,
        4 | 6 | 9 | 11 => 30,
        _ => 31,
    };
    if !(1..=month_days).contains(&day) {
        return None;
    }
    let seconds = days_from_civil(year, month, day) * 86_400 + hour * 3_600 + minute * 60 + second;
    Some(Millis(seconds * 1_000))
}

/// Days from 1970-01-01 to the proleptic Gregorian date (year, month 1-12, day 1-31):
/// H. Hinnant, "chrono-Compatible Low-Level Date Algorithms", `days_from_civil` (eras of
/// 400 years, March-based years so the leap day is last).
fn days_from_civil(year: i64, month: i64, day: i64) -> i64 {
    let y = if month <= 2 { year - 1 } else { year };
    let era = y.div_euclid(400);
    let yoe = y - era * 400;
    let mp = (month + 9) % 12; // March = 0
    let doy = (153 * mp + 2) / 5 + day - 1;
    let doe = yoe * 365 + yoe / 4 - yoe / 100 + doy;
    era * 146_097 + doe - 719_468
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    /// The general path alone (the `time` crate's RFC 3339 parser), as the reference.
    fn general(s: &str) -> Option<Millis> {
        let t =
            time::OffsetDateTime::parse(s, &time::format_description::well_known::Rfc3339).ok()?;
        let m = Millis(i64::try_from(t.unix_timestamp_nanos().div_euclid(1_000_000)).ok()?);
        (MIN_EVENT_TIME..=MAX_EVENT_TIME).contains(&m).then_some(m)
    }

    proptest! {
        #![proptest_config(ProptestConfig::with_cases(2048))]

        /// The canonical-shape fast path and the `time` crate agree on every string of that
        /// shape, valid or not: all years, months 0-19, days 0-39 (so the 29th of February
        /// of leap and common years, 31st of 30-day months), hours up to 29, seconds up to
        /// 69 (leap seconds go to the general parser).
        #[test]
        fn canonical_timestamps_parse_like_the_general_parser(
            year in 0u32..10_000,
            month in 0u32..20,
            day in 0u32..40,
            hour in 0u32..30,
            minute in 0u32..70,
            second in 0u32..70,
        ) {
            let s = format!("{year:04}-{month:02}-{day:02}T{hour:02}:{minute:02}:{second:02}Z");
            prop_assert_eq!(Millis::parse_rfc3339(&s), general(&s), "{}", s);
        }

        /// Strings near the canonical shape (one byte changed) get the same answer too.
        #[test]
        fn near_canonical_strings_parse_like_the_general_parser(
            secs in 0i64..253_402_300_800,
            pos in 0usize..20,
            byte in any::<u8>(),
        ) {
            let mut s = Millis(secs * 1000).to_rfc3339().into_bytes();
            s[pos] = byte;
            if let Ok(s) = String::from_utf8(s) {
                prop_assert_eq!(Millis::parse_rfc3339(&s), general(&s), "{}", s);
            }
        }
    }

    #[test]
    fn civil_days_match_known_dates() {
        // 2000-03-01 is day 11017 and 1969-12-31 day -1 (`date -u -d ... +%s` / 86400).
        assert_eq!(days_from_civil(1970, 1, 1), 0);
        assert_eq!(days_from_civil(1969, 12, 31), -1);
        assert_eq!(days_from_civil(2000, 3, 1), 11_017);
        assert_eq!(days_from_civil(9999, 12, 31), 2_932_896);
    }

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
