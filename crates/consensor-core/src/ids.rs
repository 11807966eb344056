//! Identifiers and interval lengths, validated once at the edge of the program.

/// Whether `id` is a valid station, area or quantity id: 1–64 characters of `[A-Za-z0-9._-]` (API.md).
pub fn is_valid_id(id: &str) -> bool {
    (1..=64).contains(&id.len())
        && id
            .bytes()
            .all(|b| b.is_ascii_alphanumeric() || matches!(b, b'.' | b'_' | b'-'))
}

/// The interval lengths an area may use (API.md): intervals are aligned to the UTC epoch,
/// `[start, start + length)`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum IntervalLength {
    OneMinute,
    FiveMinutes,
    TenMinutes,
    FifteenMinutes,
    ThirtyMinutes,
    OneHour,
}

/// An interval length that is not one of the allowed ones.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("interval {0:?} is not one of 1m, 5m, 10m, 15m, 30m, 1h")]
pub struct IntervalLengthError(pub String);

impl IntervalLength {
    /// All lengths, shortest first.
    pub const ALL: [IntervalLength; 6] = [
        IntervalLength::OneMinute,
        IntervalLength::FiveMinutes,
        IntervalLength::TenMinutes,
        IntervalLength::FifteenMinutes,
        IntervalLength::ThirtyMinutes,
        IntervalLength::OneHour,
    ];

    /// Parses the API's spelling (`1m`, `5m`, `10m`, `15m`, `30m`, `1h`).
    pub fn parse(text: &str) -> Result<Self, IntervalLengthError> {
        Self::ALL
            .into_iter()
            .find(|length| length.as_str() == text)
            .ok_or_else(|| IntervalLengthError(text.to_owned()))
    }

    /// The API's spelling.
    pub fn as_str(self) -> &'static str {
        match self {
            IntervalLength::OneMinute => "1m",
            IntervalLength::FiveMinutes => "5m",
            IntervalLength::TenMinutes => "10m",
            IntervalLength::FifteenMinutes => "15m",
            IntervalLength::ThirtyMinutes => "30m",
            IntervalLength::OneHour => "1h",
        }
    }

    /// The length in milliseconds.
    pub fn as_millis(self) -> i64 {
        let minutes = match self {
            IntervalLength::OneMinute => 1,
            IntervalLength::FiveMinutes => 5,
            IntervalLength::TenMinutes => 10,
            IntervalLength::FifteenMinutes => 15,
            IntervalLength::ThirtyMinutes => 30,
            IntervalLength::OneHour => 60,
        };
        minutes * 60_000
    }

    /// The length for a number of milliseconds, if it is one of the allowed ones.
    pub fn from_millis(millis: i64) -> Option<Self> {
        Self::ALL
            .into_iter()
            .find(|length| length.as_millis() == millis)
    }

    /// The start of the interval holding `time_ms` (epoch-aligned; floor division, so times before
    /// 1970 fall in the interval below them too).
    pub fn start_of(self, time_ms: i64) -> i64 {
        time_ms.div_euclid(self.as_millis()) * self.as_millis()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ids_follow_the_api_alphabet() {
        assert!(is_valid_id("ST-014"));
        assert!(is_valid_id("north_basin.2"));
        assert!(is_valid_id(&"a".repeat(64)));
        assert!(!is_valid_id(&"a".repeat(65)));
        assert!(!is_valid_id(""));
        assert!(!is_valid_id("ST 014"));
        assert!(!is_valid_id("ST/014"));
        assert!(!is_valid_id("Stätion"));
    }

    #[test]
    fn interval_lengths_parse_and_align_to_the_epoch() {
        assert_eq!(IntervalLength::parse("10m"), Ok(IntervalLength::TenMinutes));
        assert!(IntervalLength::parse("7m").is_err());
        assert!(IntervalLength::parse("60m").is_err());
        let ten = IntervalLength::TenMinutes;
        // 2026-06-01T07:04:59Z = 1780297499 s; its 10-minute interval starts at 07:00:00Z = 1780297200 s
        // (Unix time arithmetic, common practice).
        assert_eq!(ten.start_of(1_780_297_499_000), 1_780_297_200_000);
        assert_eq!(ten.start_of(1_780_297_200_000), 1_780_297_200_000);
        assert_eq!(ten.start_of(-1), -600_000);
        for length in IntervalLength::ALL {
            assert_eq!(
                IntervalLength::from_millis(length.as_millis()),
                Some(length)
            );
            assert_eq!(IntervalLength::parse(length.as_str()), Ok(length));
        }
    }
}
