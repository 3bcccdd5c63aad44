//! Timestamps as signed documents carry them: RFC 3339 UTC text with whole seconds
//! (`2026-12-01T08:30:00Z`), one spelling per instant, converted without a date library.

use std::fmt;
use std::str::FromStr;
use std::time::{Duration, SystemTime, UNIX_EPOCH};

use serde::{Deserialize, Deserializer, Serialize, Serializer};

/// A UTC instant with whole-second precision, on or after 1970-01-01.
#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub struct Timestamp(u64);

/// The latest instant a timestamp may name: 9999-12-31T23:59:59Z.
const MAX_UNIX: u64 = 253_402_300_799;

impl Timestamp {
    /// The instant `secs` seconds after the Unix epoch, if not past year 9999.
    pub fn from_unix(secs: u64) -> Option<Self> {
        (secs <= MAX_UNIX).then_some(Timestamp(secs))
    }

    /// Seconds since the Unix epoch.
    pub fn unix(self) -> u64 {
        self.0
    }

    /// The current time from the system clock, rounded down to the second.
    pub fn now() -> Self {
        let secs = SystemTime::now()
            .duration_since(UNIX_EPOCH)
            .unwrap_or(Duration::ZERO)
            .as_secs();
        Timestamp(secs.min(MAX_UNIX))
    }
}

/// Days since 1970-01-01 of a civil date (proleptic Gregorian), after H. Hinnant's
/// `days_from_civil` algorithm ("chrono-Compatible Low-Level Date Algorithms").
fn days_from_civil(y: i64, m: i64, d: i64) -> i64 {
    let y = if m <= 2 { y - 1 } else { y };
    let era = y.div_euclid(400);
    let yoe = y - era * 400;
    let mp = (m + 9) % 12;
    let doy = (153 * mp + 2) / 5 + d - 1;
    let doe = yoe * 365 + yoe / 4 - yoe / 100 + doy;
    era * 146_097 + doe - 719_468
}

/// The civil date of a day count since 1970-01-01 (the inverse, `civil_from_days`).
fn civil_from_days(z: i64) -> (i64, i64, i64) {
    let z = z + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z - era * 146_097;
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let d = doy - (153 * mp + 2) / 5 + 1;
    let m = if mp < 10 { mp + 3 } else { mp - 9 };
    let y = yoe + era * 400 + i64::from(m <= 2);
    (y, m, d)
}

fn days_in_month(y: i64, m: i64) -> i64 {
    match m {
        2 if (y % 4 == 0 && y % 100 != 0) || y % 400 == 0 => 29,
        2 => 28,
        4 | 6 | 9 | 11 => 30,
        _ => 31,
    }
}

impl fmt::Display for Timestamp {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let secs = self.0 as i64;
        let (y, m, d) = civil_from_days(secs.div_euclid(86_400));
        let rem = secs.rem_euclid(86_400);
        write!(
            f,
            "{y:04}-{m:02}-{d:02}T{:02}:{:02}:{:02}Z",
            rem / 3600,
            rem / 60 % 60,
            rem % 60
        )
    }
}

/// The text is not an RFC 3339 UTC timestamp of the form `YYYY-MM-DDTHH:MM:SSZ`.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ParseTimestampError(String);

impl fmt::Display for ParseTimestampError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(
            f,
            "'{}' is not a UTC time of the form YYYY-MM-DDTHH:MM:SSZ (RFC 3339)",
            self.0.escape_debug()
        )
    }
}

impl std::error::Error for ParseTimestampError {}

impl FromStr for Timestamp {
    type Err = ParseTimestampError;

    fn from_str(s: &str) -> Result<Self, Self::Err> {
        let err = || ParseTimestampError(s.chars().take(40).collect());
        let b = s.as_bytes();
        let shape_ok = b.len() == 20
            && b[4] == b'-'
            && b[7] == b'-'
            && b[10] == b'T'
            && b[13] == b':'
            && b[16] == b':'
            && b[19] == b'Z';
        if !shape_ok {
            return Err(err());
        }
        let num = |r: std::ops::Range<usize>| -> Result<i64, ParseTimestampError> {
            let part = &s[r];
            if !part.bytes().all(|c| c.is_ascii_digit()) {
                return Err(err());
            }
            part.parse().map_err(|_| err())
        };
        let (y, mo, d) = (num(0..4)?, num(5..7)?, num(8..10)?);
        let (h, mi, sec) = (num(11..13)?, num(14..16)?, num(17..19)?);
        if y < 1970 || !(1..=12).contains(&mo) || d < 1 || d > days_in_month(y, mo) {
            return Err(err());
        }
        if h > 23 || mi > 59 || sec > 59 {
            return Err(err());
        }
        let secs = days_from_civil(y, mo, d) * 86_400 + h * 3600 + mi * 60 + sec;
        Timestamp::from_unix(secs as u64).ok_or_else(err)
    }
}

impl Serialize for Timestamp {
    fn serialize<S: Serializer>(&self, serializer: S) -> Result<S::Ok, S::Error> {
        serializer.collect_str(self)
    }
}

impl<'de> Deserialize<'de> for Timestamp {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> Result<Self, D::Error> {
        let text = <std::borrow::Cow<'de, str>>::deserialize(deserializer)?;
        text.parse().map_err(serde::de::Error::custom)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn known_instants() {
        // Unix time of these instants as printed by `date -u -d @SECS` (GNU coreutils).
        for (secs, text) in [
            (0, "1970-01-01T00:00:00Z"),
            (951_782_400, "2000-02-29T00:00:00Z"),
            (1_764_547_200, "2025-12-01T00:00:00Z"),
            (MAX_UNIX, "9999-12-31T23:59:59Z"),
        ] {
            let t = Timestamp::from_unix(secs).expect("in range");
            assert_eq!(t.to_string(), text);
            assert_eq!(text.parse::<Timestamp>(), Ok(t));
        }
    }

    #[test]
    fn refuses_other_spellings() {
        for bad in [
            "2026-12-01T00:00:00+00:00",
            "2026-12-01 00:00:00Z",
            "2026-02-29T00:00:00Z",
            "2026-12-01T24:00:00Z",
            "2026-12-01T00:00:00.5Z",
            "1969-12-31T23:59:59Z",
            "2026-1२-01T00:00:00Z",
        ] {
            assert!(bad.parse::<Timestamp>().is_err(), "{bad} parsed");
        }
    }
}
