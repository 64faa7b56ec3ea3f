//! Seconds since 1970 (UTC) as a civil date and time, for time stamps in reports and
//! version lists, without a date-time crate.

/// A moment in UTC, proleptic Gregorian calendar.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct UtcTime {
    pub year: i64,
    pub month: i64,
    pub day: i64,
    pub hour: i64,
    pub minute: i64,
    pub second: i64,
}

impl UtcTime {
    /// Days to a civil date by H. Hinnant's `civil_from_days` algorithm ("chrono-Compatible
    /// Low-Level Date Algorithms", 2013).
    pub fn from_unix_seconds(secs: i64) -> UtcTime {
        let (days, rest) = (secs.div_euclid(86_400), secs.rem_euclid(86_400));
        let z = days + 719_468;
        let era = z.div_euclid(146_097);
        let doe = z.rem_euclid(146_097);
        let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
        let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
        let mp = (5 * doy + 2) / 153;
        let day = doy - (153 * mp + 2) / 5 + 1;
        let month = if mp < 10 { mp + 3 } else { mp - 9 };
        UtcTime {
            year: yoe + era * 400 + i64::from(month <= 2),
            month,
            day,
            hour: rest / 3600,
            minute: rest % 3600 / 60,
            second: rest % 60,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn known_moments() {
        // From GNU date: `date -u -d @951782400` is 2000-02-29 00:00:00; `@0` the epoch;
        // `@4107542399` is 2100-02-28 23:59:59 (2100 is not a leap year).
        assert_eq!(
            UtcTime::from_unix_seconds(0),
            UtcTime {
                year: 1970,
                month: 1,
                day: 1,
                hour: 0,
                minute: 0,
                second: 0
            }
        );
        let t = UtcTime::from_unix_seconds(951_782_400);
        assert_eq!((t.year, t.month, t.day), (2000, 2, 29));
        let t = UtcTime::from_unix_seconds(4_107_542_399);
        assert_eq!(
            (t.year, t.month, t.day, t.hour, t.minute, t.second),
            (2100, 2, 28, 23, 59, 59)
        );
    }
}
