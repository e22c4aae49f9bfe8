//! A small `strftime` for the `strftime_now(fmt)` template global.
//!
//! transformers defines `strftime_now(fmt)` as `datetime.now().strftime(fmt)` (local time of
//! the Python process). liftgate formats the current **UTC** time instead so runs do not depend
//! on the machine's time zone. Templates that call it (the Llama-3.1 style "Today Date" header)
//! render a different prompt, and so a different prompt fingerprint, every day.
//!
//! Supported codes (C locale, as glibc prints them): `%Y %y %m %d %e %j %B %b %h %A %a %H %I %M
//! %S %p %F %T %D %%`, and the glibc `-` flag (`%-d`, `%-m`, `%-H`, `%-I`, `%-M`, `%-S`, `%-j`)
//! that drops zero padding. An unknown code is an error, so a template never gets a silently
//! wrong date.

use std::time::{SystemTime, UNIX_EPOCH};

/// A broken-down UTC time.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct DateTime {
    pub year: i64,
    /// 1..=12
    pub month: u32,
    /// 1..=31
    pub day: u32,
    pub hour: u32,
    pub minute: u32,
    pub second: u32,
}

const MONTHS: [&str; 12] = [
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
const WEEKDAYS: [&str; 7] = [
    "Monday",
    "Tuesday",
    "Wednesday",
    "Thursday",
    "Friday",
    "Saturday",
    "Sunday",
];

impl DateTime {
    /// The current UTC time.
    pub fn now_utc() -> Self {
        let secs = SystemTime::now()
            .duration_since(UNIX_EPOCH)
            .map(|d| d.as_secs() as i64)
            .unwrap_or(0);
        Self::from_unix(secs)
    }

    /// Civil date from Unix seconds (Howard Hinnant's `civil_from_days` algorithm).
    pub fn from_unix(secs: i64) -> Self {
        let days = secs.div_euclid(86_400);
        let rem = secs.rem_euclid(86_400);
        let z = days + 719_468;
        let era = z.div_euclid(146_097);
        let doe = z.rem_euclid(146_097);
        let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
        let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
        let mp = (5 * doy + 2) / 153;
        let day = (doy - (153 * mp + 2) / 5 + 1) as u32;
        let month = if mp < 10 { mp + 3 } else { mp - 9 } as u32;
        let year = yoe + era * 400 + i64::from(month <= 2);
        DateTime {
            year,
            month,
            day,
            hour: (rem / 3600) as u32,
            minute: ((rem % 3600) / 60) as u32,
            second: (rem % 60) as u32,
        }
    }

    fn is_leap(&self) -> bool {
        (self.year % 4 == 0 && self.year % 100 != 0) || self.year % 400 == 0
    }

    /// Day of the year, 1..=366.
    fn ordinal(&self) -> u32 {
        const CUM: [u32; 12] = [0, 31, 59, 90, 120, 151, 181, 212, 243, 273, 304, 334];
        CUM[(self.month - 1) as usize] + self.day + u32::from(self.month > 2 && self.is_leap())
    }

    /// 0 = Monday .. 6 = Sunday.
    fn weekday(&self) -> usize {
        // Days since 1970-01-01 (a Thursday) from the inverse of `from_unix`.
        let y = if self.month <= 2 {
            self.year - 1
        } else {
            self.year
        };
        let era = y.div_euclid(400);
        let yoe = y.rem_euclid(400);
        let m = i64::from(self.month);
        let mp = if m > 2 { m - 3 } else { m + 9 };
        let doy = (153 * mp + 2) / 5 + i64::from(self.day) - 1;
        let doe = yoe * 365 + yoe / 4 - yoe / 100 + doy;
        let days = era * 146_097 + doe - 719_468;
        (days + 3).rem_euclid(7) as usize
    }
}

/// Formats `t` with a C-style format string.
pub fn strftime(fmt: &str, t: &DateTime) -> Result<String, String> {
    let mut out = String::new();
    let mut chars = fmt.chars();
    while let Some(c) = chars.next() {
        if c != '%' {
            out.push(c);
            continue;
        }
        let mut code = chars
            .next()
            .ok_or_else(|| "strftime format ends with a lone '%'".to_string())?;
        let pad = if code == '-' {
            code = chars
                .next()
                .ok_or_else(|| "strftime format ends with '%-'".to_string())?;
            false
        } else {
            true
        };
        let num = |v: u32, width: usize| {
            if pad {
                format!("{v:0width$}")
            } else {
                v.to_string()
            }
        };
        let hour12 = match t.hour % 12 {
            0 => 12,
            h => h,
        };
        let piece = match code {
            'Y' => t.year.to_string(),
            'y' => num(t.year.rem_euclid(100) as u32, 2),
            'm' => num(t.month, 2),
            'd' => num(t.day, 2),
            'e' => {
                if pad {
                    format!("{:>2}", t.day)
                } else {
                    t.day.to_string()
                }
            }
            'j' => num(t.ordinal(), 3),
            'B' => MONTHS[(t.month - 1) as usize].to_string(),
            'b' | 'h' => MONTHS[(t.month - 1) as usize][..3].to_string(),
            'A' => WEEKDAYS[t.weekday()].to_string(),
            'a' => WEEKDAYS[t.weekday()][..3].to_string(),
            'H' => num(t.hour, 2),
            'I' => num(hour12, 2),
            'M' => num(t.minute, 2),
            'S' => num(t.second, 2),
            'p' => if t.hour < 12 { "AM" } else { "PM" }.to_string(),
            'F' => format!("{}-{:02}-{:02}", t.year, t.month, t.day),
            'T' => format!("{:02}:{:02}:{:02}", t.hour, t.minute, t.second),
            'D' => format!("{:02}/{:02}/{:02}", t.month, t.day, t.year.rem_euclid(100)),
            '%' => "%".to_string(),
            other => return Err(format!("unsupported strftime code '%{other}'")),
        };
        out.push_str(&piece);
    }
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;

    // Expected values: Python `datetime.datetime.fromtimestamp(s, datetime.UTC).strftime(...)`
    // semantics, worked out by hand for these instants (2024-02-29 was a Thursday,
    // 2000-01-01 a Saturday).
    #[test]
    fn civil_date_and_codes() {
        let t = DateTime::from_unix(1_709_217_045); // 2024-02-29 14:30:45 UTC
        assert_eq!(
            t,
            DateTime {
                year: 2024,
                month: 2,
                day: 29,
                hour: 14,
                minute: 30,
                second: 45
            }
        );
        assert_eq!(
            strftime("%d %b %Y", &t).unwrap(),
            "29 Feb 2024",
            "Llama-3.1 style date header"
        );
        assert_eq!(
            strftime("%A %B %-d, %Y %I:%M %p (%j) %F %T %%", &t).unwrap(),
            "Thursday February 29, 2024 02:30 PM (060) 2024-02-29 14:30:45 %"
        );
        let y2k = DateTime::from_unix(946_684_800);
        assert_eq!(
            strftime("%a %Y-%m-%d %H:%M:%S %y %e", &y2k).unwrap(),
            "Sat 2000-01-01 00:00:00 00  1"
        );
    }

    #[test]
    fn unknown_code_is_an_error() {
        let t = DateTime::from_unix(0);
        assert!(strftime("%Q", &t).unwrap_err().contains("%Q"));
        assert!(strftime("100%", &t).is_err());
    }
}
