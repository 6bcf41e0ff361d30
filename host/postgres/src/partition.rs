//! Which partition of `readings` a device time falls in.
//!
//! ```text
//!  time_ms (ms since the Unix epoch, as stored: i64)
//!  MINVALUE ........ 946 684 800 000  readings_since_boot   (clock not set: time since boot)
//!  2000-01-01 ...... 2000-02-01       readings_2000_01
//!  ...               one per UTC month
//!  9999-12-01 ...... 10000-01-01      readings_9999_12
//!  10000-01-01 ..... MAXVALUE         readings_far_future
//! ```
//!
//! Times below 2000-01-01 count from boot (`fringe_store::record::
//! SINCE_BOOT_BELOW_MS`), so they share one partition whatever they are.

use fringe_store::record::SINCE_BOOT_BELOW_MS;
use jiff::civil::Date;
use jiff::tz::TimeZone;
use jiff::SignedDuration;

/// First device time of the months: 2000-01-01T00:00:00Z.
const MONTHS_FROM_MS: i64 = SINCE_BOOT_BELOW_MS as i64;
/// First device time after the months: 10000-01-01T00:00:00Z.
const MONTHS_UNTIL_MS: i64 = 253_402_300_800_000;

/// A partition of `readings`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum Part {
    /// Times since boot (below 2000-01-01), and anything negative.
    SinceBoot,
    /// One UTC month.
    Month {
        /// Year, 2000..=9999.
        year: i16,
        /// Month, 1..=12.
        month: i8,
    },
    /// From the year 10000 on.
    FarFuture,
}

fn month_start_ms(year: i16, month: i8) -> i64 {
    // Inside 2000..=9999 every date exists and converts.
    Date::new(year, month, 1)
        .and_then(|d| d.to_zoned_datetime(TimeZone::UTC))
        .map_or(MONTHS_UNTIL_MS, |z| z.timestamp().as_millisecond())
}

impl Part {
    /// The partition of device time `time_ms`.
    pub fn of(time_ms: i64) -> Part {
        if time_ms < MONTHS_FROM_MS {
            return Part::SinceBoot;
        }
        if time_ms >= MONTHS_UNTIL_MS {
            return Part::FarFuture;
        }
        // Days since 1970-01-01 in the civil calendar (a Timestamp stops
        // a day short of the year 10000).
        let days = time_ms.div_euclid(86_400_000);
        match Date::new(1970, 1, 1)
            .and_then(|epoch| epoch.checked_add(SignedDuration::from_hours(days * 24)))
        {
            Ok(d) => Part::Month {
                year: d.year(),
                month: d.month(),
            },
            // Not reached inside the bounds above.
            Err(_) => Part::FarFuture,
        }
    }

    /// The partition after this one.
    pub fn next(self) -> Part {
        match self {
            Part::SinceBoot => Part::Month {
                year: 2000,
                month: 1,
            },
            Part::Month {
                year: 9999,
                month: 12,
            }
            | Part::FarFuture => Part::FarFuture,
            Part::Month { year, month: 12 } => Part::Month {
                year: year + 1,
                month: 1,
            },
            Part::Month { year, month } => Part::Month {
                year,
                month: month + 1,
            },
        }
    }

    /// The table name.
    pub fn name(self) -> String {
        match self {
            Part::SinceBoot => "readings_since_boot".into(),
            Part::Month { year, month } => format!("readings_{year:04}_{month:02}"),
            Part::FarFuture => "readings_far_future".into(),
        }
    }

    /// The `FOR VALUES` bounds: `FROM (lower) TO (upper)`.
    pub fn bounds_sql(self) -> String {
        match self {
            Part::SinceBoot => format!("FROM (MINVALUE) TO ({MONTHS_FROM_MS})"),
            Part::Month { year, month } => {
                let Part::Month {
                    year: y2,
                    month: m2,
                } = self.next()
                else {
                    return format!(
                        "FROM ({}) TO ({MONTHS_UNTIL_MS})",
                        month_start_ms(year, month)
                    );
                };
                format!(
                    "FROM ({}) TO ({})",
                    month_start_ms(year, month),
                    month_start_ms(y2, m2)
                )
            }
            Part::FarFuture => format!("FROM ({MONTHS_UNTIL_MS}) TO (MAXVALUE)"),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn times_fall_in_their_utc_month() {
        // 2026-11-30T23:59:59.999Z and 2026-12-01T00:00:00Z (Unix time of
        // 2026-12-01 = 1 796 083 200 s, computed by hand: 20 788 days).
        assert_eq!(
            Part::of(1_796_083_199_999),
            Part::Month {
                year: 2026,
                month: 11
            }
        );
        assert_eq!(
            Part::of(1_796_083_200_000),
            Part::Month {
                year: 2026,
                month: 12
            }
        );
        assert_eq!(Part::of(0), Part::SinceBoot);
        assert_eq!(Part::of(-5), Part::SinceBoot);
        assert_eq!(Part::of(946_684_799_999), Part::SinceBoot);
        assert_eq!(
            Part::of(946_684_800_000),
            Part::Month {
                year: 2000,
                month: 1
            }
        );
        assert_eq!(Part::of(i64::MAX), Part::FarFuture);
        assert_eq!(Part::of(253_402_300_799_999).name(), "readings_9999_12");
    }

    #[test]
    fn bounds_tile_the_time_axis() {
        let dec = Part::Month {
            year: 2026,
            month: 12,
        };
        assert_eq!(dec.name(), "readings_2026_12");
        assert_eq!(dec.bounds_sql(), "FROM (1796083200000) TO (1798761600000)");
        assert_eq!(
            dec.next(),
            Part::Month {
                year: 2027,
                month: 1
            }
        );
        // Each partition's upper bound is the next one's lower bound.
        let mut p = Part::SinceBoot;
        let mut upper = String::new();
        for _ in 0..30 {
            let b = p.bounds_sql();
            if !upper.is_empty() {
                assert!(b.starts_with(&format!("FROM ({upper})")), "{b}");
            }
            upper = b
                .rsplit("TO (")
                .next()
                .unwrap()
                .trim_end_matches(')')
                .into();
            p = p.next();
        }
        let last = Part::Month {
            year: 9999,
            month: 12,
        };
        assert_eq!(
            last.bounds_sql(),
            "FROM (253399622400000) TO (253402300800000)"
        );
        assert_eq!(last.next(), Part::FarFuture);
    }
}
