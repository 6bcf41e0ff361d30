//! UTC times as plant engineers type them, and back.

/// Formats ms since the Unix epoch as `YYYY-MM-DDTHH:MM:SSZ` (UTC).
pub fn fmt_time(ms: i64) -> String {
    let secs = ms.div_euclid(1000);
    let days = secs.div_euclid(86_400);
    let tod = secs.rem_euclid(86_400);
    // Civil date from days since 1970-01-01 (Hinnant's algorithm).
    let z = days + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z - era * 146_097;
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let d = doy - (153 * mp + 2) / 5 + 1;
    let m = if mp < 10 { mp + 3 } else { mp - 9 };
    let y = yoe + era * 400 + i64::from(m <= 2);
    format!(
        "{y:04}-{m:02}-{d:02}T{:02}:{:02}:{:02}Z",
        tod / 3600,
        tod / 60 % 60,
        tod % 60
    )
}

/// Days since 1970-01-01 of a civil date (Hinnant's algorithm).
fn days_from_civil(y: i64, m: i64, d: i64) -> i64 {
    let y = if m <= 2 { y - 1 } else { y };
    let era = y.div_euclid(400);
    let yoe = y - era * 400;
    let mp = (m + 9) % 12;
    let doy = (153 * mp + 2) / 5 + d - 1;
    let doe = yoe * 365 + yoe / 4 - yoe / 100 + doy;
    era * 146_097 + doe - 719_468
}

/// Parses a UTC time: `2026-12-01T06:30:00Z`, `2026-12-01T06:30Z`,
/// `2026-12-01 06:30:00` (UTC), `2026-12-01` (midnight), or plain
/// milliseconds since the Unix epoch. Returns ms since the epoch.
///
/// # Errors
/// A message naming the text and the accepted forms.
pub fn parse_time(s: &str) -> Result<i64, String> {
    let t = s.trim();
    let bad = || {
        format!("`{s}` is not a time: use UTC like 2026-12-01T06:30:00Z, 2026-12-01 06:30, 2026-12-01, or milliseconds since 1970")
    };
    if !t.is_empty() && t.chars().all(|c| c.is_ascii_digit()) {
        return t.parse().map_err(|_| bad());
    }
    let t = t
        .strip_suffix('Z')
        .or_else(|| t.strip_suffix("+00:00"))
        .unwrap_or(t);
    let (date, time) = match t.split_once(['T', ' ']) {
        Some((d, h)) => (d, Some(h)),
        None => (t, None),
    };
    let num = |x: &str| x.parse::<i64>().map_err(|_| bad());
    let dp: Vec<&str> = date.split('-').collect();
    if dp.len() != 3 || dp[0].len() != 4 {
        return Err(bad());
    }
    let (y, mo, d) = (num(dp[0])?, num(dp[1])?, num(dp[2])?);
    if !(1..=12).contains(&mo) || !(1..=31).contains(&d) {
        return Err(bad());
    }
    let mut ms = 0i64;
    if let Some(h) = time {
        let hp: Vec<&str> = h.split(':').collect();
        if !(2..=3).contains(&hp.len()) {
            return Err(bad());
        }
        let (hh, mm) = (num(hp[0])?, num(hp[1])?);
        let sec: f64 = match hp.get(2) {
            Some(x) => x.parse().map_err(|_| bad())?,
            None => 0.0,
        };
        if !(0..24).contains(&hh) || !(0..60).contains(&mm) || !(0.0..61.0).contains(&sec) {
            return Err(bad());
        }
        ms = (hh * 3600 + mm * 60) * 1000 + (sec * 1000.0).round() as i64;
    }
    Ok(days_from_civil(y, mo, d) * 86_400_000 + ms)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn time_formatting() {
        assert_eq!(fmt_time(0), "1970-01-01T00:00:00Z");
        // 2000-03-01T12:34:56Z = 951914096 s (leap-year boundary).
        assert_eq!(fmt_time(951_914_096_000), "2000-03-01T12:34:56Z");
    }

    #[test]
    fn time_parsing_round_trips() {
        assert_eq!(parse_time("2000-03-01T12:34:56Z"), Ok(951_914_096_000));
        assert_eq!(parse_time("2000-03-01 12:34:56"), Ok(951_914_096_000));
        assert_eq!(parse_time("951914096000"), Ok(951_914_096_000));
        assert_eq!(parse_time("1970-01-02"), Ok(86_400_000));
        assert_eq!(
            parse_time("2026-12-01T06:30Z").map(fmt_time),
            Ok("2026-12-01T06:30:00Z".into())
        );
        let e = parse_time("yesterday").expect_err("words");
        assert!(e.contains("`yesterday`"), "{e}");
        assert!(parse_time("2026-13-01").is_err());
    }
}
