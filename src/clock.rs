//! Calendar arithmetic on `SystemTime` (UTC), without a time-zone database:
//! RFC 3339 stamps for the store and today's date for validation.
//!
//! Days from civil dates follow Howard Hinnant's public-domain
//! `days_from_civil` / `civil_from_days` algorithms.

use std::time::{SystemTime, UNIX_EPOCH};

/// (year, month, day, seconds of the day) of a time, in UTC.
pub fn civil(t: SystemTime) -> (i32, u32, u32, u32) {
    let secs = match t.duration_since(UNIX_EPOCH) {
        Ok(d) => d.as_secs() as i64,
        Err(e) => -(e.duration().as_secs() as i64),
    };
    let days = secs.div_euclid(86_400);
    let sod = secs.rem_euclid(86_400) as u32;
    let (y, m, d) = civil_from_days(days);
    (y, m, d, sod)
}

/// RFC 3339 in UTC with second precision, e.g. `2026-12-02T06:19:27Z`.
pub fn rfc3339(t: SystemTime) -> String {
    let (y, m, d, sod) = civil(t);
    format!(
        "{y:04}-{m:02}-{d:02}T{:02}:{:02}:{:02}Z",
        sod / 3600,
        sod / 60 % 60,
        sod % 60
    )
}

fn civil_from_days(z: i64) -> (i32, u32, u32) {
    let z = z + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z.rem_euclid(146_097);
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let y = yoe + era * 400;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let d = (doy - (153 * mp + 2) / 5 + 1) as u32;
    let m = if mp < 10 { mp + 3 } else { mp - 9 } as u32;
    ((if m <= 2 { y + 1 } else { y }) as i32, m, d)
}

/// Whole seconds since the Unix epoch (0 for times before it).
pub fn unix_seconds(t: SystemTime) -> i64 {
    t.duration_since(std::time::UNIX_EPOCH)
        .map_or(0, |d| d.as_secs() as i64)
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::time::Duration;

    #[test]
    fn formats_known_instants() {
        // 1_700_000_000 s after the epoch is 2023-11-14T22:13:20Z (checked with
        // GNU date -u -d @1700000000).
        assert_eq!(
            rfc3339(UNIX_EPOCH + Duration::from_secs(1_700_000_000)),
            "2023-11-14T22:13:20Z"
        );
        assert_eq!(rfc3339(UNIX_EPOCH), "1970-01-01T00:00:00Z");
        // Leap day: 2024-02-29T12:00:00Z = 1709208000 (GNU date).
        assert_eq!(
            civil(UNIX_EPOCH + Duration::from_secs(1_709_208_000)),
            (2024, 2, 29, 43_200)
        );
    }
}
