//! Axis ticks and their labels: linear "nice numbers", logarithmic decades and
//! UTC calendar dates.
//!
//! - Linear ticks use the step of Heckbert's nice-number labelling (P. S.
//!   Heckbert, "Nice numbers for graph labels", *Graphics Gems*, 1990): the step
//!   is 1, 2 or 5 × 10ᵏ, enlarged to the next such number while there are more
//!   ticks than allowed; ticks are the step's multiples inside the range.
//! - Logarithmic ticks are powers of ten; when a range holds fewer than two
//!   decades, the 1–2–5 and then the 1…9 multiples of each decade are added.
//! - Dates are UTC, computed from seconds since the Unix epoch with the civil
//!   calendar algorithms of H. Hinnant ("chrono-Compatible Low-Level Date
//!   Algorithms", 2013): proleptic Gregorian calendar, no leap seconds. Date
//!   ticks fall on whole hours, midnights, Mondays, first days of months or
//!   first days of years.

/// Tick values at multiples of a nice step (1, 2 or 5 × 10ᵏ) inside
/// `[lo, hi]`, at most `max_ticks` of them (at least 2 are allowed). Empty when
/// the range is not finite or `hi < lo`; a single value when `hi == lo`.
pub fn linear_ticks(lo: f64, hi: f64, max_ticks: usize) -> Vec<f64> {
    if !lo.is_finite() || !hi.is_finite() || hi < lo {
        return Vec::new();
    }
    if hi == lo {
        return vec![lo];
    }
    let max_ticks = max_ticks.max(2);
    // Heckbert: range rounded up to a nice number, step = nice(range / (n - 1)).
    let range = nice_number(hi - lo, false);
    let mut step = NiceStep::from_value(range / (max_ticks - 1) as f64, true);
    loop {
        let ticks = step.multiples_in(lo, hi);
        if ticks.len() <= max_ticks {
            return ticks;
        }
        step = step.next();
    }
}

/// Tick values for a logarithmic axis on `[lo, hi]` (0 < lo < hi): powers of
/// ten (every k-th one when there are more than `max_ticks`), with 2 and 5
/// multiples, then all 1…9 multiples, added while fewer than three ticks
/// show; linear ticks as a last resort for ranges narrower than a factor 2.
pub fn log_ticks(lo: f64, hi: f64, max_ticks: usize) -> Vec<f64> {
    if !(lo > 0.0 && hi > lo && hi.is_finite()) {
        return Vec::new();
    }
    let max_ticks = max_ticks.max(2);
    let tol = 1e-9;
    let inside = |v: f64| v >= lo * (1.0 - tol) && v <= hi * (1.0 + tol);
    let k0 = lo.log10().floor() as i32;
    let k1 = hi.log10().ceil() as i32;
    let decades: Vec<i32> = (k0..=k1).filter(|&k| inside(power_of_ten(1, k))).collect();
    if decades.len() >= 2 {
        let every = decades.len().div_ceil(max_ticks);
        // Keep the decades that are multiples of `every` so ticks stay regular.
        let first = decades.iter().position(|k| k.rem_euclid(every as i32) == 0).unwrap_or(0);
        return decades[first..].iter().step_by(every).map(|&k| power_of_ten(1, k)).collect();
    }
    for mantissas in [&[1u32, 2, 5][..], &[1, 2, 3, 4, 5, 6, 7, 8, 9][..]] {
        let ticks: Vec<f64> = (k0 - 1..=k1)
            .flat_map(|k| mantissas.iter().map(move |&m| power_of_ten(m, k)))
            .filter(|&v| inside(v))
            .collect();
        if ticks.len() >= 3 && ticks.len() <= max_ticks {
            return ticks;
        }
        if ticks.len() > max_ticks {
            break;
        }
    }
    linear_ticks(lo, hi, max_ticks.min(5))
}

/// `m × 10ᵏ` as the nearest double to the decimal number.
fn power_of_ten(m: u32, k: i32) -> f64 {
    if k >= 0 { f64::from(m) * 10f64.powi(k) } else { f64::from(m) / 10f64.powi(-k) }
}

/// Heckbert's nice number: the 1, 2, 5 or 10 × 10ᵏ closest to `x` (`round`) or
/// not smaller than `x` (ceiling).
fn nice_number(x: f64, round: bool) -> f64 {
    let step = NiceStep::from_value(x, round);
    step.value()
}

/// A step `mantissa × 10^exponent` with mantissa 1, 2 or 5, kept as integers so
/// multiples are exact decimals.
#[derive(Debug, Clone, Copy)]
struct NiceStep {
    mantissa: u32,
    exponent: i32,
}

impl NiceStep {
    fn from_value(x: f64, round: bool) -> Self {
        let exponent = x.log10().floor() as i32;
        let f = x / power_of_ten(1, exponent);
        let m = if round {
            if f < 1.5 {
                1
            } else if f < 3.0 {
                2
            } else if f < 7.0 {
                5
            } else {
                10
            }
        } else if f <= 1.0 {
            1
        } else if f <= 2.0 {
            2
        } else if f <= 5.0 {
            5
        } else {
            10
        };
        if m == 10 {
            Self { mantissa: 1, exponent: exponent + 1 }
        } else {
            Self { mantissa: m, exponent }
        }
    }

    fn value(self) -> f64 {
        power_of_ten(self.mantissa, self.exponent)
    }

    fn next(self) -> Self {
        match self.mantissa {
            1 => Self { mantissa: 2, ..self },
            2 => Self { mantissa: 5, ..self },
            _ => Self { mantissa: 1, exponent: self.exponent + 1 },
        }
    }

    /// Multiples of the step within `[lo, hi]` (tolerance 1e-9 of a step).
    fn multiples_in(self, lo: f64, hi: f64) -> Vec<f64> {
        let d = self.value();
        let first = (lo / d - 1e-9).ceil() as i64;
        let last = (hi / d + 1e-9).floor() as i64;
        if last < first || last - first > 10_000 {
            return Vec::new();
        }
        (first..=last)
            .map(|k| {
                let n = k * i64::from(self.mantissa);
                if self.exponent >= 0 {
                    n as f64 * 10f64.powi(self.exponent)
                } else {
                    n as f64 / 10f64.powi(-self.exponent)
                }
            })
            .collect()
    }
}

/// A tick label: plain decimal for 1e-4 ≤ |v| < 1e6 (shortest form that reads
/// back as `v`), otherwise `1e6`-style; `-0` prints as `0`.
pub fn format_number(v: f64) -> String {
    if v == 0.0 {
        return "0".to_string();
    }
    let a = v.abs();
    if (1e-4..1e6).contains(&a) {
        // Trim binary noise such as 0.30000000000000004.
        let r: f64 = format!("{v:.10e}").parse().unwrap_or(v);
        format!("{r}")
    } else {
        format!("{v:e}")
    }
}

/// A calendar date and time of day in UTC.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct UtcDateTime {
    year: i64,
    month: u32,
    day: u32,
    hour: u32,
    minute: u32,
    second: u32,
}

const MONTHS: [&str; 12] =
    ["Jan", "Feb", "Mar", "Apr", "May", "Jun", "Jul", "Aug", "Sep", "Oct", "Nov", "Dec"];

impl UtcDateTime {
    /// The UTC date and time `t` seconds after 1970-01-01 00:00:00 UTC
    /// (negative before), proleptic Gregorian calendar, no leap seconds.
    pub fn from_unix(t: i64) -> Self {
        let days = t.div_euclid(86_400);
        let secs = t.rem_euclid(86_400) as u32;
        let (year, month, day) = civil_from_days(days);
        Self { year, month, day, hour: secs / 3600, minute: secs / 60 % 60, second: secs % 60 }
    }

    /// Seconds since the Unix epoch of 00:00:00 UTC on the given date (month
    /// 1–12, day 1–31; out-of-range days roll over as in the civil algorithm).
    pub fn midnight(year: i64, month: u32, day: u32) -> i64 {
        days_from_civil(year, month, day) * 86_400
    }

    /// Year (e.g. 2024).
    pub fn year(&self) -> i64 {
        self.year
    }
    /// Month, 1–12.
    pub fn month(&self) -> u32 {
        self.month
    }
    /// Day of the month, 1–31.
    pub fn day(&self) -> u32 {
        self.day
    }
    /// Hour, 0–23.
    pub fn hour(&self) -> u32 {
        self.hour
    }
    /// Minute, 0–59.
    pub fn minute(&self) -> u32 {
        self.minute
    }
    /// Second, 0–59.
    pub fn second(&self) -> u32 {
        self.second
    }
    /// English three-letter month name.
    pub fn month_name(&self) -> &'static str {
        MONTHS[(self.month - 1) as usize]
    }
}

/// `t` (s since the Unix epoch) as `YYYY-MM-DD HH:MM UTC`.
pub fn format_utc(t: i64) -> String {
    let d = UtcDateTime::from_unix(t);
    format!("{:04}-{:02}-{:02} {:02}:{:02} UTC", d.year, d.month, d.day, d.hour, d.minute)
}

/// Hinnant's `civil_from_days`: (year, month, day) of day `z` since 1970-01-01.
fn civil_from_days(z: i64) -> (i64, u32, u32) {
    let z = z + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z.rem_euclid(146_097);
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let day = (doy - (153 * mp + 2) / 5 + 1) as u32;
    let month = if mp < 10 { mp + 3 } else { mp - 9 } as u32;
    let year = yoe + era * 400 + i64::from(month <= 2);
    (year, month, day)
}

/// Hinnant's `days_from_civil`: days since 1970-01-01 of a proleptic Gregorian date.
fn days_from_civil(year: i64, month: u32, day: u32) -> i64 {
    let y = if month <= 2 { year - 1 } else { year };
    let era = y.div_euclid(400);
    let yoe = y.rem_euclid(400);
    let m = i64::from(month);
    let doy = (153 * (if m > 2 { m - 3 } else { m + 9 }) + 2) / 5 + i64::from(day) - 1;
    let doe = yoe * 365 + yoe / 4 - yoe / 100 + doy;
    era * 146_097 + doe - 719_468
}

#[derive(Debug, Clone, Copy, PartialEq)]
enum DateStep {
    Seconds(i64),
    Week,
    Months(u32),
    Years(i64),
}

impl DateStep {
    /// Typical length, s, for estimating tick counts.
    fn approx_seconds(self) -> f64 {
        match self {
            DateStep::Seconds(s) => s as f64,
            DateStep::Week => 604_800.0,
            DateStep::Months(m) => f64::from(m) * 30.44 * 86_400.0,
            DateStep::Years(y) => y as f64 * 365.25 * 86_400.0,
        }
    }

    fn ticks(self, t0: i64, t1: i64) -> Vec<i64> {
        match self {
            DateStep::Seconds(s) => {
                let first = t0.div_euclid(s) * s + if t0.rem_euclid(s) == 0 { 0 } else { s };
                (0..).map(|k| first + k * s).take_while(|&t| t <= t1).collect()
            }
            DateStep::Week => {
                // 1970-01-05 (day 4) was a Monday.
                let (w, monday) = (604_800, 4 * 86_400);
                let k = (t0 - monday).div_euclid(w) + i64::from((t0 - monday).rem_euclid(w) != 0);
                (0..).map(|j| monday + (k + j) * w).take_while(|&t| t <= t1).collect()
            }
            DateStep::Months(m) => {
                let d = UtcDateTime::from_unix(t0);
                let (mut y, mut mo) = (d.year, d.month);
                let mut out = Vec::new();
                loop {
                    let t = UtcDateTime::midnight(y, mo, 1);
                    if t > t1 {
                        break out;
                    }
                    if t >= t0 && (mo - 1) % m == 0 {
                        out.push(t);
                    }
                    (y, mo) = if mo == 12 { (y + 1, 1) } else { (y, mo + 1) };
                }
            }
            DateStep::Years(k) => {
                let mut y = UtcDateTime::from_unix(t0).year;
                let mut out = Vec::new();
                loop {
                    let t = UtcDateTime::midnight(y, 1, 1);
                    if t > t1 {
                        break out;
                    }
                    if t >= t0 && y.rem_euclid(k) == 0 {
                        out.push(t);
                    }
                    y += 1;
                }
            }
        }
    }

    fn label(self, t: i64, first: bool) -> String {
        let d = UtcDateTime::from_unix(t);
        let date = format!("{} {}", d.day, d.month_name());
        match self {
            DateStep::Seconds(s) if s < 86_400 => {
                let hm = format!("{:02}:{:02}", d.hour, d.minute);
                match (d.hour == 0 && d.minute == 0, first) {
                    (true, _) => date,
                    (false, true) => format!("{date} {hm}"),
                    (false, false) => hm,
                }
            }
            DateStep::Seconds(_) | DateStep::Week => {
                if first || (d.month == 1 && d.day <= 7) {
                    format!("{date} {}", d.year)
                } else {
                    date
                }
            }
            DateStep::Months(_) => {
                if first || d.month == 1 {
                    format!("{} {}", d.month_name(), d.year)
                } else {
                    d.month_name().to_string()
                }
            }
            DateStep::Years(_) => format!("{}", d.year),
        }
    }
}

const DATE_STEPS: [DateStep; 24] = [
    DateStep::Seconds(60),
    DateStep::Seconds(300),
    DateStep::Seconds(900),
    DateStep::Seconds(1800),
    DateStep::Seconds(3600),
    DateStep::Seconds(2 * 3600),
    DateStep::Seconds(3 * 3600),
    DateStep::Seconds(6 * 3600),
    DateStep::Seconds(12 * 3600),
    DateStep::Seconds(86_400),
    DateStep::Seconds(2 * 86_400),
    DateStep::Week,
    DateStep::Months(1),
    DateStep::Months(2),
    DateStep::Months(3),
    DateStep::Months(6),
    DateStep::Years(1),
    DateStep::Years(2),
    DateStep::Years(5),
    DateStep::Years(10),
    DateStep::Years(20),
    DateStep::Years(50),
    DateStep::Years(100),
    DateStep::Years(1000),
];

/// Date ticks on `[t0, t1]` (s since the Unix epoch, UTC) with their labels: the
/// finest calendar step (1 min … 1000 years) giving at most `max_ticks` (≥ 2)
/// ticks. Labels are `HH:MM` within a day (the date at midnight and on the
/// first tick), `4 Mar` for days and weeks (Mondays), `Mar` for months and
/// `2024` for years; the first tick and each January also carry the year.
pub fn date_ticks(t0: i64, t1: i64, max_ticks: usize) -> Vec<(i64, String)> {
    if t1 < t0 {
        return Vec::new();
    }
    let max_ticks = max_ticks.max(2);
    let span = (t1 - t0) as f64;
    for step in DATE_STEPS {
        // Skip steps that would obviously give far too many ticks.
        if span / step.approx_seconds() > max_ticks as f64 + 2.0 {
            continue;
        }
        let ticks = step.ticks(t0, t1);
        if ticks.len() <= max_ticks {
            return ticks.iter().enumerate().map(|(i, &t)| (t, step.label(t, i == 0))).collect();
        }
    }
    Vec::new()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn check(ticks: Vec<f64>, expected: &[f64]) {
        assert_eq!(ticks.len(), expected.len(), "{ticks:?} vs {expected:?}");
        for (t, e) in ticks.iter().zip(expected) {
            assert!((t - e).abs() <= 1e-12 * e.abs().max(1.0), "{ticks:?} vs {expected:?}");
        }
    }

    #[test]
    fn heckbert_nice_numbers() {
        // Heckbert 1990, loose labelling worked by hand from the published
        // algorithm for the range 105–543 with 5 ticks (the example range from
        // memory): nice range = 500, step = nice(125, round) = 100.
        assert_eq!(nice_number(543.0 - 105.0, false), 500.0);
        assert_eq!(nice_number(125.0, true), 100.0);
        check(linear_ticks(105.0, 543.0, 5), &[200.0, 300.0, 400.0, 500.0]);
        // A 47 m line: step 10 m.
        check(linear_ticks(0.0, 47.0, 6), &[0.0, 10.0, 20.0, 30.0, 40.0]);
        // Decimal steps come out as exact decimals, not 0.30000000000000004.
        let t = linear_ticks(0.0, 1.0, 11);
        assert_eq!(t[3], 0.3);
        assert_eq!(format_number(t[3]), "0.3");
        // Symmetric ranges include zero.
        check(linear_ticks(-25.0, 25.0, 7), &[-20.0, -10.0, 0.0, 10.0, 20.0]);
        // Never more than asked for.
        let mut rng_span = 0.013;
        while rng_span < 1e7 {
            for n in 2..12 {
                let t = linear_ticks(-0.3 * rng_span, rng_span, n);
                assert!(!t.is_empty() && t.len() <= n, "{rng_span} {n} {t:?}");
            }
            rng_span *= 3.7;
        }
        assert!(linear_ticks(1.0, 0.0, 5).is_empty());
        assert_eq!(linear_ticks(2.0, 2.0, 5), vec![2.0]);
    }

    #[test]
    fn log_ticks_follow_decades() {
        check(log_ticks(1.0, 1000.0, 8), &[1.0, 10.0, 100.0, 1000.0]);
        check(log_ticks(3.0, 4000.0, 8), &[10.0, 100.0, 1000.0]);
        // Eight decades with room for five ticks: every second decade.
        check(log_ticks(0.01, 1e6, 5), &[0.01, 1.0, 100.0, 1e4, 1e6]);
        // Less than two decades inside: 1-2-5 multiples.
        check(log_ticks(20.0, 300.0, 8), &[20.0, 50.0, 100.0, 200.0]);
        // Narrow: 1…9 multiples.
        check(log_ticks(42.0, 95.0, 8), &[50.0, 60.0, 70.0, 80.0, 90.0]);
        // Narrower than a factor 2 without enough multiples: linear.
        check(log_ticks(101.0, 104.0, 8), &[101.0, 102.0, 103.0, 104.0]);
        assert!(log_ticks(0.0, 10.0, 5).is_empty());
        assert_eq!(format_number(0.01), "0.01");
        assert_eq!(format_number(1e4), "10000");
        assert_eq!(format_number(2e6), "2e6");
        assert_eq!(format_number(-0.0), "0");
    }

    #[test]
    fn civil_dates_match_python_datetime() {
        // Reference values from Python 3.11 `datetime.fromtimestamp(t, timezone.utc)`.
        let cases = [
            (0, (1970, 1, 1, 0, 0, 0)),
            (951_782_400, (2000, 2, 29, 0, 0, 0)),
            (1_700_000_000, (2023, 11, 14, 22, 13, 20)),
            (-86_400, (1969, 12, 31, 0, 0, 0)),
            (1_709_251_200, (2024, 3, 1, 0, 0, 0)),
        ];
        for (t, (y, mo, d, h, mi, s)) in cases {
            let u = UtcDateTime::from_unix(t);
            assert_eq!(
                (u.year(), u.month(), u.day(), u.hour(), u.minute(), u.second()),
                (y, mo, d, h, mi, s),
                "t = {t}"
            );
            assert_eq!(UtcDateTime::midnight(y, mo, d), t - i64::from(h * 3600 + mi * 60 + s));
        }
        assert_eq!(format_utc(1_700_000_000), "2023-11-14 22:13 UTC");
        // Round trip over four centuries of days, either side of the epoch.
        for day in (-150_000..150_000).step_by(7) {
            let u = UtcDateTime::from_unix(day * 86_400);
            assert_eq!(days_from_civil(u.year(), u.month(), u.day()), day);
        }
    }

    #[test]
    fn date_ticks_fall_on_calendar_boundaries() {
        // March 2024 (Python: 2024-03-01 = 1709251200, 2024-04-01 = 1711929600);
        // 2024-03-04 was a Monday (Python `date.weekday() == 0`).
        let (t0, t1) = (1_709_251_200, 1_711_929_600);
        let ticks = date_ticks(t0, t1, 6);
        let days: Vec<u32> = ticks.iter().map(|(t, _)| UtcDateTime::from_unix(*t).day()).collect();
        assert_eq!(days, vec![4, 11, 18, 25, 1]);
        assert_eq!(ticks[0].1, "4 Mar 2024");
        assert_eq!(ticks[1].1, "11 Mar");
        // Hourly ticks over half a day; midnight shows the date.
        let ticks = date_ticks(t0 - 3 * 3600, t0 + 9 * 3600, 5);
        let labels: Vec<&str> = ticks.iter().map(|(_, l)| l.as_str()).collect();
        assert_eq!(labels, vec!["29 Feb 21:00", "1 Mar", "03:00", "06:00", "09:00"]);
        // A season: months, the year on the first tick and on January.
        let ticks =
            date_ticks(UtcDateTime::midnight(2024, 10, 15), UtcDateTime::midnight(2025, 4, 20), 8);
        let labels: Vec<&str> = ticks.iter().map(|(_, l)| l.as_str()).collect();
        assert_eq!(labels, vec!["Nov 2024", "Dec", "Jan 2025", "Feb", "Mar", "Apr"]);
        // Decades.
        let ticks = date_ticks(0, UtcDateTime::midnight(2030, 6, 1), 8);
        let labels: Vec<&str> = ticks.iter().map(|(_, l)| l.as_str()).collect();
        assert_eq!(labels, vec!["1970", "1980", "1990", "2000", "2010", "2020", "2030"]);
        for n in 2..10 {
            assert!(date_ticks(t0, t0 + 86_400 * 400, n).len() <= n);
        }
        assert!(date_ticks(5, 4, 5).is_empty());
    }
}
