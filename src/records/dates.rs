//! A small date reader (ISO, day.month.year, month/day/year) and the
//! conversion of a date to decimal years. Proleptic Gregorian calendar, no
//! time zones: a date is taken as written.

use super::layout::{DateFormat, Today};

/// A calendar date with a time of day, checked to exist.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(super) struct DateTime {
    pub year: i32,
    pub month: u32,
    pub day: u32,
    pub seconds_of_day: u32,
}

impl DateTime {
    /// The date as decimal years.
    pub fn decimal_year(&self) -> f64 {
        decimal_year(self.year, self.month, self.day, self.seconds_of_day)
    }

    /// Days since 1970-01-01 of the date (the time is ignored).
    pub fn day_number(&self) -> i64 {
        day_number(self.year, self.month, self.day)
    }
}

/// Why a cell is not a date.
#[derive(Debug, Clone, PartialEq, Eq)]
pub(super) enum DateProblem {
    /// The text is not in the expected form at all.
    Shape,
    /// The text has the form, but no such day or time exists; says which
    /// part is wrong ("February 2023 has 28 days").
    Impossible(String),
}

/// Reads `text` (already trimmed) in `format`.
pub(super) fn parse_date(text: &str, format: DateFormat) -> Result<DateTime, DateProblem> {
    let mut c = Cursor {
        s: text.as_bytes(),
        i: 0,
    };
    let (year, month, day) = match format {
        DateFormat::Iso => {
            let y = c.digits(4, 4)?;
            c.expect(b'-')?;
            let m = c.digits(2, 2)?;
            c.expect(b'-')?;
            let d = c.digits(2, 2)?;
            (y, m, d)
        }
        DateFormat::DayMonthYear => {
            let d = c.digits(1, 2)?;
            let sep = c.one_of(b"./")?;
            let m = c.digits(1, 2)?;
            c.expect(sep)?;
            let y = c.digits(4, 4)?;
            (y, m, d)
        }
        DateFormat::MonthDayYear => {
            let m = c.digits(1, 2)?;
            c.expect(b'/')?;
            let d = c.digits(1, 2)?;
            c.expect(b'/')?;
            let y = c.digits(4, 4)?;
            (y, m, d)
        }
    };
    let seconds = match c.peek() {
        None => None,
        Some(b'T' | b't') if format == DateFormat::Iso => {
            c.i += 1;
            Some(c.time()?)
        }
        Some(b' ') => {
            c.i += 1;
            Some(c.time()?)
        }
        Some(_) => return Err(DateProblem::Shape),
    };
    if seconds.is_some() && matches!(c.peek(), Some(b'Z' | b'z')) {
        c.i += 1;
    }
    if c.peek().is_some() {
        return Err(DateProblem::Shape);
    }
    // At most four digits were read, so these conversions cannot fail.
    let year = i32::try_from(year).map_err(|_| DateProblem::Shape)?;
    if !(1..=12).contains(&month) {
        return Err(DateProblem::Impossible(format!(
            "month {month} does not exist"
        )));
    }
    let in_month = days_in_month(year, month);
    if day == 0 || day > in_month {
        return Err(DateProblem::Impossible(format!(
            "{} {year} has {in_month} days",
            MONTH_NAMES[(month - 1) as usize]
        )));
    }
    let seconds_of_day = match seconds {
        None => 0,
        Some((h, m, s)) => {
            if h > 23 || m > 59 || s > 59 {
                return Err(DateProblem::Impossible(format!(
                    "{h:02}:{m:02}:{s:02} is not a time of day"
                )));
            }
            h * 3600 + m * 60 + s
        }
    };
    Ok(DateTime {
        year,
        month,
        day,
        seconds_of_day,
    })
}

/// A date as decimal years: `year + (day_of_year - 1 + seconds_of_day /
/// 86400) / days_in_year`, so 1 January 00:00 is exactly the year and the
/// fraction runs over 365 or 366 days.
///
/// Meant for dates that exist; other input does not panic but gives a
/// meaningless number (months outside 1..=12 are clamped).
pub fn decimal_year(year: i32, month: u32, day: u32, seconds_of_day: u32) -> f64 {
    let month = month.clamp(1, 12);
    let days_before = CUMULATIVE_DAYS[(month - 1) as usize] + u32::from(month > 2 && is_leap(year));
    let year_length = if is_leap(year) { 366.0 } else { 365.0 };
    let into_year =
        f64::from(days_before) + f64::from(day) - 1.0 + f64::from(seconds_of_day) / 86_400.0;
    f64::from(year) + into_year / year_length
}

/// The last day not in the future: tomorrow, as a day number (one day of
/// clock skew between the lab and us is allowed).
pub(super) fn last_allowed_day(today: Today) -> i64 {
    day_number(today.year, today.month, today.day) + 1
}

/// Days since 1970-01-01 (negative before), for any year; months outside
/// 1..=12 are clamped so that no input panics.
fn day_number(year: i32, month: u32, day: u32) -> i64 {
    // Counting from March makes the leap day the last day of a year.
    let month = i64::from(month.clamp(1, 12));
    let year = i64::from(year) - i64::from(month <= 2);
    let era = year.div_euclid(400);
    let year_of_era = year.rem_euclid(400);
    let month_from_march = (month + 9) % 12;
    let day_of_year = (153 * month_from_march + 2) / 5 + i64::from(day) - 1;
    let day_of_era = year_of_era * 365 + year_of_era / 4 - year_of_era / 100 + day_of_year;
    era * 146_097 + day_of_era - 719_468
}

fn is_leap(year: i32) -> bool {
    (year % 4 == 0 && year % 100 != 0) || year % 400 == 0
}

fn days_in_month(year: i32, month: u32) -> u32 {
    match month {
        2 if is_leap(year) => 29,
        2 => 28,
        4 | 6 | 9 | 11 => 30,
        _ => 31,
    }
}

const CUMULATIVE_DAYS: [u32; 12] = [0, 31, 59, 90, 120, 151, 181, 212, 243, 273, 304, 334];

const MONTH_NAMES: [&str; 12] = [
    "January",
    "February",
    "March",
    "April",
    "May",
    "June",
    "July",
    "August",
    "September",
    "October",
    "November",
    "December",
];

struct Cursor<'a> {
    s: &'a [u8],
    i: usize,
}

impl Cursor<'_> {
    fn peek(&self) -> Option<u8> {
        self.s.get(self.i).copied()
    }

    /// Reads `min..=max` ASCII digits as a number.
    fn digits(&mut self, min: usize, max: usize) -> Result<u32, DateProblem> {
        let mut value = 0u32;
        let mut n = 0;
        while n < max {
            match self.peek() {
                Some(b @ b'0'..=b'9') => {
                    value = value.saturating_mul(10).saturating_add(u32::from(b - b'0'));
                    self.i += 1;
                    n += 1;
                }
                _ => break,
            }
        }
        if n < min {
            return Err(DateProblem::Shape);
        }
        Ok(value)
    }

    fn expect(&mut self, byte: u8) -> Result<(), DateProblem> {
        if self.peek() == Some(byte) {
            self.i += 1;
            Ok(())
        } else {
            Err(DateProblem::Shape)
        }
    }

    fn one_of(&mut self, bytes: &[u8]) -> Result<u8, DateProblem> {
        match self.peek() {
            Some(b) if bytes.contains(&b) => {
                self.i += 1;
                Ok(b)
            }
            _ => Err(DateProblem::Shape),
        }
    }

    /// `H[H]:MM[:SS[.fff]]` -> (hours, minutes, seconds); the fraction is
    /// dropped.
    fn time(&mut self) -> Result<(u32, u32, u32), DateProblem> {
        let h = self.digits(1, 2)?;
        self.expect(b':')?;
        let m = self.digits(2, 2)?;
        let mut s = 0;
        if self.peek() == Some(b':') {
            self.i += 1;
            s = self.digits(2, 2)?;
            if self.peek() == Some(b'.') {
                self.i += 1;
                self.digits(1, usize::MAX)?;
            }
        }
        Ok((h, m, s))
    }
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;

    fn iso(text: &str) -> Result<DateTime, DateProblem> {
        parse_date(text, DateFormat::Iso)
    }

    #[test]
    fn decimal_year_of_new_year_is_the_year() {
        assert_eq!(decimal_year(2023, 1, 1, 0), 2023.0);
    }

    #[test]
    fn decimal_year_counts_days_of_a_leap_year() {
        // By hand: 2024 is a leap year; Jan 31 + Feb 29 + Mar 31 + Apr 30 +
        // May 31 + Jun 30 = 182 days before July, so 2 July is day 184 and
        // 183 whole days have passed at its midnight.
        assert_eq!(decimal_year(2024, 7, 2, 0), 2024.0 + 183.0 / 366.0);
        // 31 December 2023 at noon: 364.5 of 365 days.
        assert_eq!(decimal_year(2023, 12, 31, 43_200), 2023.0 + 364.5 / 365.0);
    }

    #[test]
    fn reads_iso_dates_with_and_without_time() {
        let d = iso("2024-07-02").unwrap();
        assert_eq!((d.year, d.month, d.day, d.seconds_of_day), (2024, 7, 2, 0));
        assert_eq!(iso("2024-07-02T06:30").unwrap().seconds_of_day, 23_400);
        assert_eq!(iso("2024-07-02 06:30:15Z").unwrap().seconds_of_day, 23_415);
        assert_eq!(
            iso("2024-07-02T06:30:15.250Z").unwrap().seconds_of_day,
            23_415
        );
    }

    #[test]
    fn rejects_iso_dates_in_other_shapes() {
        for bad in [
            "2024-7-2",
            "24-07-02",
            "2024/07/02",
            "2024-07-02T",
            "2024-07-02+01:00",
            "2024-07-02T06:30+01:00",
            "2024-07-02Z",
            "02.07.2024",
            "",
        ] {
            assert_eq!(iso(bad), Err(DateProblem::Shape), "{bad}");
        }
    }

    #[test]
    fn rejects_dates_that_do_not_exist() {
        assert_eq!(
            iso("2023-02-29"),
            Err(DateProblem::Impossible("February 2023 has 28 days".into()))
        );
        assert!(iso("2024-02-29").is_ok());
        assert!(matches!(iso("2023-02-30"), Err(DateProblem::Impossible(_))));
        assert!(matches!(iso("2023-13-01"), Err(DateProblem::Impossible(_))));
        assert!(matches!(iso("2023-04-31"), Err(DateProblem::Impossible(_))));
        assert!(matches!(iso("2023-01-00"), Err(DateProblem::Impossible(_))));
        assert!(matches!(
            iso("2023-01-01 24:00"),
            Err(DateProblem::Impossible(_))
        ));
        assert!(iso("1900-02-29").is_err());
        assert!(iso("2000-02-29").is_ok());
    }

    #[test]
    fn reads_day_month_year_with_dots_or_slashes() {
        let a = parse_date("02.07.2024", DateFormat::DayMonthYear).unwrap();
        let b = parse_date("2/7/2024 14:05", DateFormat::DayMonthYear).unwrap();
        assert_eq!((a.year, a.month, a.day), (2024, 7, 2));
        assert_eq!(
            (b.year, b.month, b.day, b.seconds_of_day),
            (2024, 7, 2, 50_700)
        );
        assert_eq!(
            parse_date("02.07/2024", DateFormat::DayMonthYear),
            Err(DateProblem::Shape)
        );
    }

    #[test]
    fn month_day_year_reads_month_first() {
        let d = parse_date("12/31/2024", DateFormat::MonthDayYear).unwrap();
        assert_eq!((d.year, d.month, d.day), (2024, 12, 31));
        assert!(matches!(
            parse_date("31/12/2024", DateFormat::MonthDayYear),
            Err(DateProblem::Impossible(_))
        ));
    }

    #[test]
    fn day_numbers_count_from_1970() {
        assert_eq!(day_number(1970, 1, 1), 0);
        assert_eq!(day_number(2000, 3, 1), 11_017);
        assert_eq!(day_number(1969, 12, 31), -1);
        assert_eq!(day_number(2024, 3, 1) - day_number(2024, 2, 28), 2);
    }

    #[test]
    fn tomorrow_is_the_last_allowed_day() {
        let today = Today {
            year: 2024,
            month: 12,
            day: 31,
        };
        assert_eq!(last_allowed_day(today), day_number(2025, 1, 1));
    }
}
