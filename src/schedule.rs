//! Schedules: 5-field crontab expressions in an IANA time zone, the instants they fire at
//! across daylight-saving changes, and what a scheduler that wakes up is due to do.
//!
//! Pure: every instant comes in and goes out as Unix milliseconds (UTC), and nothing here
//! reads the clock.
//!
//! Syntax is standard crontab: `minute hour day-of-month month day-of-week`, each field `*`,
//! a number, a range `a-b`, a list `a,b,c`, or a step `*/n` / `a-b/n`; months may be named
//! `JAN`-`DEC` and weekdays `SUN`-`SAT` (any case); day-of-week 0 and 7 are both Sunday.
//! When both day fields are restricted (neither is exactly `*`), a day matches when EITHER
//! matches. A stepped `*/n` counts as restricted. Extensions are rejected: seconds or year
//! fields, `@daily`-style nicknames, and `L`, `W`, `#`, `?`.
//!
//! The fields are matched against the zone's local wall-clock time, one local minute at a
//! time; the search over local minutes is the `croner` crate's, run on zone-less times. This
//! module maps each matching local minute to an instant itself:
//! - a local time that happens once fires at that instant;
//! - a local time that happens twice (the clock goes back) fires once, at its FIRST
//!   occurrence, so nothing fires during the repeated pass;
//! - a local time that does not exist (the clock jumps forward) fires at the next local
//!   minute that exists, the first instant after the jump. All such times in one jump, and a
//!   real match at that instant, are the same single fire.

use chrono::{DateTime, LocalResult, NaiveDateTime, TimeDelta, TimeZone, Timelike};
use chrono_tz::Tz;
use croner::parser::{CronParser, Seconds, Year};

/// How many passed-over fire instants [`due`] counts before it stops counting.
pub const MISSED_COUNT_CAP: u64 = 100_000;

/// How far past its starting point [`Cron::next_after`] looks: five 366-day years.
const HORIZON_MS: i64 = 5 * 366 * 24 * 3_600_000;

/// The longest run of nonexistent local minutes searched past. From memory, the largest jump
/// in the tz database skipped one whole calendar day; this allows two.
const MAX_GAP_MINUTES: u32 = 48 * 60;

/// Why a schedule was refused: which input (`"cron"` or `"time_zone"`) and what is wrong.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ScheduleError {
    pub field: &'static str,
    pub message: String,
}

impl ScheduleError {
    fn cron(message: String) -> Self {
        ScheduleError { field: "cron", message }
    }
}

impl std::fmt::Display for ScheduleError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "{}: {}", self.field, self.message)
    }
}

impl std::error::Error for ScheduleError {}

const MONTH_NAMES: [&str; 12] = ["JAN", "FEB", "MAR", "APR", "MAY", "JUN", "JUL", "AUG", "SEP", "OCT", "NOV", "DEC"];
const DAY_NAMES: [&str; 7] = ["SUN", "MON", "TUE", "WED", "THU", "FRI", "SAT"];

/// One crontab field: its name, its value range and the names that stand for `min`, `min + 1`, ...
struct FieldSpec {
    name: &'static str,
    min: u32,
    max: u32,
    names: &'static [&'static str],
}

const FIELDS: [FieldSpec; 5] = [
    FieldSpec { name: "minute", min: 0, max: 59, names: &[] },
    FieldSpec { name: "hour", min: 0, max: 23, names: &[] },
    FieldSpec { name: "day-of-month", min: 1, max: 31, names: &[] },
    FieldSpec { name: "month", min: 1, max: 12, names: &MONTH_NAMES },
    FieldSpec { name: "day-of-week", min: 0, max: 7, names: &DAY_NAMES },
];

impl FieldSpec {
    /// Checks one field against standard syntax and writes it with numbers only.
    fn normalise(&self, text: &str) -> Result<String, String> {
        let items = text.split(',').map(|item| self.item(item)).collect::<Result<Vec<_>, _>>()?;
        Ok(items.join(","))
    }

    fn item(&self, item: &str) -> Result<String, String> {
        if item.is_empty() {
            return Err(format!("{} field has an empty list item", self.name));
        }
        let (base, step) = match item.split_once('/') {
            Some((base, step)) => (base, Some(self.step(item, step)?)),
            None => (item, None),
        };
        let base = if base == "*" {
            base.to_string()
        } else if let Some((lo, hi)) = base.split_once('-') {
            let (lo, hi) = (self.value(item, lo, false)?, self.value(item, hi, true)?);
            if lo > hi {
                return Err(format!("{} field: range {item:?} runs backwards", self.name));
            }
            format!("{lo}-{hi}")
        } else if step.is_some() {
            return Err(format!("{} field: {item:?} steps from a single value; a step follows `*` or a range", self.name));
        } else {
            self.value(item, base, false)?.to_string()
        };
        Ok(match step {
            Some(step) => format!("{base}/{step}"),
            None => base,
        })
    }

    fn step(&self, item: &str, text: &str) -> Result<u32, String> {
        match text.parse::<u32>() {
            Ok(step) if step >= 1 && text.bytes().all(|b| b.is_ascii_digit()) => Ok(step),
            _ => Err(format!("{} field: the step in {item:?} must be a whole number of at least 1", self.name)),
        }
    }

    /// One number or name; `SUN` ending a range is 7, so that `MON-SUN` covers the week.
    fn value(&self, item: &str, text: &str, ends_range: bool) -> Result<u32, String> {
        if text.is_empty() {
            return Err(format!("{} field: {item:?} is missing a value", self.name));
        }
        if text.bytes().all(|b| b.is_ascii_digit()) {
            return text
                .parse::<u32>()
                .ok()
                .filter(|v| (self.min..=self.max).contains(v))
                .ok_or_else(|| format!("{} field: {text} is outside {}-{}", self.name, self.min, self.max));
        }
        match self.names.iter().position(|name| name.eq_ignore_ascii_case(text)) {
            Some(0) if ends_range && self.max == 7 => Ok(7),
            Some(i) => Ok(self.min + i as u32),
            None if self.names.is_empty() => Err(format!("{} field: {text:?} is not a number", self.name)),
            None => Err(format!(
                "{} field: {text:?} is neither a number nor a name {}-{}",
                self.name,
                self.names[0],
                self.names[self.names.len() - 1]
            )),
        }
    }
}

/// A parsed 5-field crontab expression in one IANA time zone.
#[derive(Debug, Clone)]
pub struct Cron {
    expr: String,
    tz: Tz,
    parsed: croner::Cron,
}

impl Cron {
    /// Parses; rejects 6/7-field (seconds/years) expressions, non-standard syntax and unknown
    /// zones with a one-line message.
    pub fn parse(expr: &str, time_zone: &str) -> Result<Cron, ScheduleError> {
        let fields: Vec<&str> = expr.split_whitespace().collect();
        if fields.len() != 5 {
            let hint = match fields.as_slice() {
                [one] if one.starts_with('@') => "; nicknames such as @daily are not supported, write the five fields",
                _ if fields.len() > 5 => "; seconds and year fields are not supported",
                _ => "",
            };
            return Err(ScheduleError::cron(format!(
                "expected 5 fields (minute hour day-of-month month day-of-week), found {}{hint}",
                fields.len()
            )));
        }
        let numeric = fields
            .iter()
            .zip(&FIELDS)
            .map(|(text, spec)| spec.normalise(text))
            .collect::<Result<Vec<_>, _>>()
            .map_err(ScheduleError::cron)?
            .join(" ");
        let parsed = CronParser::builder()
            .seconds(Seconds::Disallowed)
            .year(Year::Disallowed)
            .build()
            .parse(&numeric)
            .map_err(|e| ScheduleError::cron(e.to_string()))?;
        let tz = time_zone.parse::<Tz>().map_err(|_| ScheduleError {
            field: "time_zone",
            message: if time_zone.is_empty() {
                "no time zone given; use an IANA name such as Europe/Berlin or UTC".to_string()
            } else {
                format!("{time_zone:?} is not an IANA time zone name (such as Europe/Berlin or UTC)")
            },
        })?;
        Ok(Cron { expr: expr.to_string(), tz, parsed })
    }

    /// Refuses an expression that never fires, such as `0 0 30 2 *` (February 30) or
    /// `0 0 31 4 *` (April 31). Whether a local minute matches depends only on the calendar:
    /// the 30 years from 2024 hold every month-day pair that exists (February 29 in 2024)
    /// and every weekday (a weekday field matches on its own: either day field matches).
    /// Every matching local minute fires (one skipped by a clock change fires at the end of
    /// the jump), so the zone does not matter.
    pub fn check_fires(&self) -> Result<(), ScheduleError> {
        const FROM_MS: i64 = 1_704_067_200_000; // 2024-01-01T00:00:00Z
        const YEARS: i64 = 30;
        if self.next_within(FROM_MS, FROM_MS + YEARS * 366 * 24 * 3_600_000).is_some() {
            return Ok(());
        }
        Err(ScheduleError::cron(format!("{:?} never fires: no calendar day matches its day-of-month and month fields", self.expr)))
    }

    /// The expression as given to [`Cron::parse`].
    pub fn expr(&self) -> &str {
        &self.expr
    }

    /// The IANA name of the zone.
    pub fn time_zone(&self) -> &str {
        self.tz.name()
    }

    /// The first fire instant strictly after `after_ms`, or None if none within ~5 years.
    pub fn next_after(&self, after_ms: i64) -> Option<i64> {
        self.next_within(after_ms, after_ms.saturating_add(HORIZON_MS))
    }

    /// The first fire instant in (`after_ms`, `until_ms`].
    fn next_within(&self, after_ms: i64, until_ms: i64) -> Option<i64> {
        let after = DateTime::from_timestamp_millis(after_ms)?;
        let mut local = after.with_timezone(&self.tz).naive_local().with_nanosecond(0)?;
        // Fire instants never decrease as the local minutes increase (a repeated time takes
        // its first occurrence, a missing one the end of the jump), so the first matching
        // local minute whose instant lies past `after_ms` gives the earliest fire.
        loop {
            local = self.parsed.find_next_occurrence(&local, false).ok()?;
            let instant = self.fire_instant(local)?;
            if instant > after_ms {
                return (instant <= until_ms).then_some(instant);
            }
            // Otherwise this local minute already fired: a repeated time whose first
            // occurrence is at or before `after_ms`, or a jump that fired at its end.
        }
    }

    /// The instant a matching local minute fires at.
    fn fire_instant(&self, local: NaiveDateTime) -> Option<i64> {
        let mut minute = local;
        for _ in 0..=MAX_GAP_MINUTES {
            match self.tz.from_local_datetime(&minute) {
                LocalResult::Single(t) | LocalResult::Ambiguous(t, _) => return Some(t.timestamp_millis()),
                LocalResult::None => minute = minute.checked_add_signed(TimeDelta::minutes(1))?,
            }
        }
        None
    }
}

/// What to do about fire instants that passed while no scheduler was awake to start them.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum CatchUp {
    /// Start one run for the latest of them (not one per missed instant).
    Once,
    /// Start nothing; wait for the next fire instant.
    Skip,
}

impl CatchUp {
    pub fn as_str(self) -> &'static str {
        match self {
            CatchUp::Once => "once",
            CatchUp::Skip => "skip",
        }
    }

    /// Reads `"once"` or `"skip"`.
    pub fn parse(text: &str) -> Option<CatchUp> {
        match text {
            "once" => Some(CatchUp::Once),
            "skip" => Some(CatchUp::Skip),
            _ => None,
        }
    }
}

/// What a scheduler waking at `now` should do for one schedule whose fire instants up to and
/// including `considered_until` are already handled.
#[derive(Clone, Debug, PartialEq)]
pub struct Due {
    /// The scheduled instant to start a run for now (None: start nothing).
    pub fire_for: Option<i64>,
    /// Whether `fire_for` is on time (within grace of now) rather than a catch-up of a missed fire.
    pub on_time: bool,
    /// Scheduled instants in (considered_until, now] that were passed over without a run
    /// (older than grace), counted up to [`MISSED_COUNT_CAP`]; past it `missed_capped` is true.
    pub missed: u64,
    pub missed_capped: bool,
    /// The latest missed instant (None when nothing was missed).
    pub last_missed: Option<i64>,
    /// New considered_until: `now` when anything in the window was handled or passed over,
    /// else unchanged.
    pub considered_until: i64,
    /// The next fire instant strictly after `now`.
    pub next: Option<i64>,
}

/// What is due at `now` for `cron`, whose instants up to `considered_until` are handled. The
/// latest instant in (considered_until, now] is on time when at most `grace_ms` old; every
/// other instant in the window is missed, and `catch_up` says whether a missed latest one
/// still gets a run.
pub fn due(cron: &Cron, considered_until: i64, now: i64, grace_ms: i64, catch_up: CatchUp) -> Due {
    due_capped(cron, considered_until, now, grace_ms, catch_up, MISSED_COUNT_CAP)
}

fn due_capped(cron: &Cron, considered_until: i64, now: i64, grace_ms: i64, catch_up: CatchUp, cap: u64) -> Due {
    // Counting past cap + 1 instants cannot change the answer: the missed count is capped.
    let limit = cap.saturating_add(2);
    let counted = scan(cron, considered_until, now, limit);
    let tail = if counted.count < limit { counted } else { last_two(cron, considered_until, now) };
    let on_time = tail.last.is_some_and(|t| now.saturating_sub(t) <= grace_ms);
    let missed = counted.count - u64::from(on_time);
    let fire_for = match catch_up {
        _ if on_time => tail.last,
        CatchUp::Once => tail.last,
        CatchUp::Skip => None,
    };
    Due {
        fire_for,
        on_time,
        missed: missed.min(cap),
        missed_capped: missed > cap,
        last_missed: if on_time { tail.before_last } else { tail.last },
        considered_until: if counted.count > 0 { now } else { considered_until },
        next: cron.next_after(now),
    }
}

/// Fire instants in a window: how many were counted and the last two of them.
#[derive(Clone, Copy)]
struct Scan {
    count: u64,
    last: Option<i64>,
    before_last: Option<i64>,
}

/// Walks the fire instants in (`from`, `to`], stopping after `limit` of them.
fn scan(cron: &Cron, from: i64, to: i64, limit: u64) -> Scan {
    let mut seen = Scan { count: 0, last: None, before_last: None };
    let mut cursor = from;
    while seen.count < limit {
        let Some(t) = cron.next_within(cursor, to) else { break };
        seen.count += 1;
        seen.before_last = seen.last;
        seen.last = Some(t);
        cursor = t;
    }
    seen
}

/// The last two fire instants in (`from`, `to`], found by walking ever longer windows that end at `to`.
fn last_two(cron: &Cron, from: i64, to: i64) -> Scan {
    let mut span: i64 = 3_600_000;
    loop {
        let start = to.saturating_sub(span).max(from);
        let seen = scan(cron, start, to, u64::MAX);
        if seen.count >= 2 || start == from {
            return seen;
        }
        span = span.saturating_mul(2);
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use chrono::Utc;

    /// Unix milliseconds of a UTC wall-clock time.
    fn utc(y: i32, mo: u32, d: u32, h: u32, mi: u32) -> i64 {
        Utc.with_ymd_and_hms(y, mo, d, h, mi, 0).unwrap().timestamp_millis()
    }

    const MINUTE: i64 = 60_000;
    const HOUR: i64 = 3_600_000;

    fn err(expr: &str, zone: &str) -> ScheduleError {
        Cron::parse(expr, zone).expect_err(expr)
    }

    /// The first `n` fire instants after `from`.
    fn fires(expr: &str, zone: &str, from: i64, n: usize) -> Vec<i64> {
        let cron = Cron::parse(expr, zone).unwrap();
        let mut out = Vec::new();
        let mut t = from;
        while out.len() < n {
            t = cron.next_after(t).unwrap();
            out.push(t);
        }
        out
    }

    // Calendar facts used below, by the doomsday rule: the anchor day for 2000-2099 is
    // Tuesday; for 2027, 27 div 12 = 2, 27 mod 12 = 3, 3 div 4 = 0, and Tuesday + 5 = Sunday,
    // so the doomsday 2027-01-03 is a Sunday and 2027-01-01 a Friday.

    #[test]
    fn rejects_seconds_and_year_fields() {
        for expr in ["0 30 2 * * *", "0 30 2 * * * 2027"] {
            let e = err(expr, "UTC");
            assert_eq!(e.field, "cron");
            assert!(e.message.contains("expected 5 fields") && e.message.contains("seconds and year"), "{e}");
        }
        assert!(err("30 2 * *", "UTC").message.contains("found 4"));
        assert!(err("", "UTC").message.contains("found 0"));
        assert!(err("@daily", "UTC").message.contains("@daily"));
    }

    #[test]
    fn rejects_bad_fields_naming_the_field() {
        let cases = [
            ("61 * * * *", "minute field: 61 is outside 0-59"),
            ("* 24 * * *", "hour field: 24 is outside 0-23"),
            ("* * 0 * *", "day-of-month field: 0 is outside 1-31"),
            ("* * * 13 *", "month field: 13 is outside 1-12"),
            ("* * * * 8", "day-of-week field: 8 is outside 0-7"),
            ("5-1 * * * *", "minute field: range \"5-1\" runs backwards"),
            ("*/0 * * * *", "minute field: the step in \"*/0\" must be a whole number of at least 1"),
            ("5/10 * * * *", "steps from a single value"),
            ("1,,2 * * * *", "minute field has an empty list item"),
            ("* * L * *", "day-of-month field: \"L\" is not a number"),
            ("* * * * 5L", "day-of-week field: \"5L\" is neither a number nor a name SUN-SAT"),
            ("* * * * MON#2", "day-of-week field"),
            ("* * ? * *", "day-of-month field"),
            ("* * * JANUARY *", "month field: \"JANUARY\" is neither a number nor a name JAN-DEC"),
            ("* * * * +1", "day-of-week field"),
        ];
        for (expr, want) in cases {
            let e = err(expr, "UTC");
            assert_eq!(e.field, "cron", "{expr}");
            assert!(e.to_string().starts_with("cron: "), "{e}");
            assert!(e.message.contains(want), "{expr}: {e}");
        }
    }

    #[test]
    fn rejects_unknown_zones() {
        for zone in ["Europe/Berlín", "Mars/Olympus_Mons", "europe/berlin", "", "+02:00"] {
            let e = err("0 3 * * *", zone);
            assert_eq!(e.field, "time_zone", "{zone}");
            assert!(e.to_string().starts_with("time_zone: ") && !e.to_string().contains('\n'), "{e}");
        }
    }

    #[test]
    fn keeps_expression_and_zone() {
        let cron = Cron::parse("30 2 * * MON-FRI", "Europe/Berlin").unwrap();
        assert_eq!(cron.expr(), "30 2 * * MON-FRI");
        assert_eq!(cron.time_zone(), "Europe/Berlin");
    }

    #[test]
    fn day_of_week_zero_and_seven_are_sunday() {
        // 2027-01-01 is a Friday, so the first Sundays after it are January 3 and 10.
        let from = utc(2027, 1, 1, 0, 0);
        let sundays = vec![utc(2027, 1, 3, 12, 0), utc(2027, 1, 10, 12, 0)];
        for expr in ["0 12 * * 0", "0 12 * * 7", "0 12 * * sun", "0 12 * * SUN"] {
            assert_eq!(fires(expr, "UTC", from, 2), sundays, "{expr}");
        }
        // 5-7 is Friday, Saturday, Sunday; FRI-SUN names the same days.
        let weekend = vec![utc(2027, 1, 1, 12, 0), utc(2027, 1, 2, 12, 0), utc(2027, 1, 3, 12, 0), utc(2027, 1, 8, 12, 0)];
        assert_eq!(fires("0 12 * * 5-7", "UTC", from, 4), weekend);
        assert_eq!(fires("0 12 * * FRI-SUN", "UTC", from, 4), weekend);
    }

    #[test]
    fn both_day_fields_restricted_match_either() {
        // Midnight on the 13th or on a Friday. Fridays after 2027-01-01 (itself a Friday, but
        // its midnight is not strictly after `from`): January 8, 15, 22, 29; the 13th is a
        // Wednesday, so it fires on its own.
        let from = utc(2027, 1, 1, 0, 0);
        let want = vec![utc(2027, 1, 8, 0, 0), utc(2027, 1, 13, 0, 0), utc(2027, 1, 15, 0, 0), utc(2027, 1, 22, 0, 0)];
        assert_eq!(fires("0 0 13 * 5", "UTC", from, 4), want);
        // With day-of-week `*`, only the 13th; with day-of-month `*`, only Fridays.
        assert_eq!(fires("0 0 13 * *", "UTC", from, 2), vec![utc(2027, 1, 13, 0, 0), utc(2027, 2, 13, 0, 0)]);
        assert_eq!(fires("0 0 * * 5", "UTC", from, 2), vec![utc(2027, 1, 8, 0, 0), utc(2027, 1, 15, 0, 0)]);
    }

    #[test]
    fn names_lists_ranges_and_steps() {
        // Minutes 0, 20, 40 of hours 9-10, only in February: from 2027-01-01 the first is
        // 2027-02-01 09:00 UTC.
        let from = utc(2027, 1, 1, 0, 0);
        let want = vec![utc(2027, 2, 1, 9, 0), utc(2027, 2, 1, 9, 20), utc(2027, 2, 1, 9, 40), utc(2027, 2, 1, 10, 0)];
        assert_eq!(fires("*/20 9-10 * feb *", "UTC", from, 4), want);
        assert_eq!(fires("0,20,40 9,10 * 2 *", "UTC", from, 4), want);
        // 10-50/20 is 10, 30, 50.
        assert_eq!(fires("10-50/20 0 * * *", "UTC", from, 3), vec![utc(2027, 1, 1, 0, 10), utc(2027, 1, 1, 0, 30), utc(2027, 1, 1, 0, 50)]);
    }

    #[test]
    fn expressions_that_never_fire_are_refused() {
        for expr in ["0 0 30 2 *", "0 0 31 4 *", "0 0 31 2,4,6,9,11 *", "15 3 30,31 FEB *"] {
            let e = Cron::parse(expr, "UTC").unwrap().check_fires().unwrap_err();
            assert_eq!(e.field, "cron", "{expr}");
            assert!(e.message.contains("never fires"), "{expr}: {e}");
        }
        // February 29 fires once in four years (eight around 2100); a weekday field fires
        // on its weekdays even when the day of the month never exists (either field matches).
        for expr in ["0 0 29 2 *", "0 0 31 * *", "0 0 30 2 MON", "0 0 31 1-4 *", "*/5 * * * *"] {
            assert_eq!(Cron::parse(expr, "Europe/Berlin").unwrap().check_fires(), Ok(()), "{expr}");
        }
    }

    #[test]
    fn next_after_is_strict_and_sees_milliseconds() {
        let cron = Cron::parse("0 * * * *", "UTC").unwrap();
        let ten = utc(2027, 1, 1, 10, 0);
        assert_eq!(cron.next_after(ten), Some(ten + HOUR));
        assert_eq!(cron.next_after(ten - 1), Some(ten));
        assert_eq!(cron.next_after(ten + 1), Some(ten + HOUR));
    }

    #[test]
    fn next_after_gives_up_past_the_horizon() {
        // February 30 never exists.
        assert_eq!(Cron::parse("0 0 30 2 *", "UTC").unwrap().next_after(utc(2027, 1, 1, 0, 0)), None);
        // February 29: 2028 is the next leap year (divisible by 4), within five years.
        assert_eq!(Cron::parse("0 0 29 2 *", "UTC").unwrap().next_after(utc(2027, 1, 1, 0, 0)), Some(utc(2028, 2, 29, 0, 0)));
        // 2100 is not a leap year (divisible by 100, not by 400), so after 2096 the next
        // February 29 is in 2104, more than five years on.
        assert_eq!(Cron::parse("0 0 29 2 *", "UTC").unwrap().next_after(utc(2096, 3, 1, 0, 0)), None);
    }

    #[test]
    fn catch_up_names() {
        for c in [CatchUp::Once, CatchUp::Skip] {
            assert_eq!(CatchUp::parse(c.as_str()), Some(c));
        }
        assert_eq!(CatchUp::parse("always"), None);
        assert_eq!(CatchUp::parse("Once"), None);
    }

    fn hourly() -> Cron {
        Cron::parse("0 * * * *", "UTC").unwrap()
    }

    #[test]
    fn due_on_time() {
        // 10:00 handled; waking 30 s after 11:00 with 60 s grace: 11:00 is on time.
        let now = utc(2027, 1, 1, 11, 0) + 30_000;
        let d = due(&hourly(), utc(2027, 1, 1, 10, 0), now, 60_000, CatchUp::Skip);
        let want = Due {
            fire_for: Some(utc(2027, 1, 1, 11, 0)),
            on_time: true,
            missed: 0,
            missed_capped: false,
            last_missed: None,
            considered_until: now,
            next: Some(utc(2027, 1, 1, 12, 0)),
        };
        assert_eq!(d, want);
        // Grace is inclusive: exactly 60 s late is still on time, 60.001 s is not.
        let at = utc(2027, 1, 1, 11, 0);
        assert!(due(&hourly(), at - HOUR, at + 60_000, 60_000, CatchUp::Skip).on_time);
        assert!(!due(&hourly(), at - HOUR, at + 60_001, 60_000, CatchUp::Skip).on_time);
    }

    #[test]
    fn due_on_time_after_missed_ones() {
        // 08:00 handled; waking at 11:00:30: 09:00 and 10:00 were passed over, 11:00 is on time.
        let now = utc(2027, 1, 1, 11, 0) + 30_000;
        let d = due(&hourly(), utc(2027, 1, 1, 8, 0), now, 60_000, CatchUp::Skip);
        assert_eq!((d.fire_for, d.on_time), (Some(utc(2027, 1, 1, 11, 0)), true));
        assert_eq!((d.missed, d.missed_capped, d.last_missed), (2, false, Some(utc(2027, 1, 1, 10, 0))));
        assert_eq!(d.considered_until, now);
    }

    #[test]
    fn due_missed_once_catches_up_with_one_run() {
        // 08:00 handled; waking at 11:05 with 60 s grace: 09:00, 10:00 and 11:00 all missed.
        let now = utc(2027, 1, 1, 11, 5);
        let d = due(&hourly(), utc(2027, 1, 1, 8, 0), now, 60_000, CatchUp::Once);
        let want = Due {
            fire_for: Some(utc(2027, 1, 1, 11, 0)),
            on_time: false,
            missed: 3,
            missed_capped: false,
            last_missed: Some(utc(2027, 1, 1, 11, 0)),
            considered_until: now,
            next: Some(utc(2027, 1, 1, 12, 0)),
        };
        assert_eq!(d, want);
    }

    #[test]
    fn due_missed_skip_starts_nothing() {
        let now = utc(2027, 1, 1, 11, 5);
        let d = due(&hourly(), utc(2027, 1, 1, 8, 0), now, 60_000, CatchUp::Skip);
        assert_eq!((d.fire_for, d.on_time), (None, false));
        assert_eq!((d.missed, d.last_missed, d.considered_until), (3, Some(utc(2027, 1, 1, 11, 0)), now));
    }

    #[test]
    fn due_empty_window_changes_nothing() {
        let handled = utc(2027, 1, 1, 11, 0);
        let want = Due {
            fire_for: None,
            on_time: false,
            missed: 0,
            missed_capped: false,
            last_missed: None,
            considered_until: handled,
            next: Some(utc(2027, 1, 1, 12, 0)),
        };
        for catch_up in [CatchUp::Once, CatchUp::Skip] {
            assert_eq!(due(&hourly(), handled, handled + 30 * MINUTE, 60_000, catch_up), want);
            // A clock that went back behind considered_until is an empty window too.
            let back = due(&hourly(), handled, handled - 30 * MINUTE, 60_000, catch_up);
            assert_eq!((back.fire_for, back.missed, back.considered_until), (None, 0, handled));
        }
    }

    #[test]
    fn due_caps_the_missed_count() {
        // 00:00 handled; waking at 10:00:30: instants 01:00 ... 10:00 (ten), 10:00 on time, so
        // nine missed, the latest 09:00.
        let cu = utc(2027, 1, 1, 0, 0);
        let now = utc(2027, 1, 1, 10, 0) + 30_000;
        let exact = due_capped(&hourly(), cu, now, 60_000, CatchUp::Once, 9);
        assert_eq!((exact.missed, exact.missed_capped, exact.last_missed), (9, false, Some(utc(2027, 1, 1, 9, 0))));
        for cap in [8, 5, 0] {
            let d = due_capped(&hourly(), cu, now, 60_000, CatchUp::Once, cap);
            assert_eq!((d.missed, d.missed_capped), (cap, true), "cap {cap}");
            // The latest instants are still found past the cap.
            assert_eq!((d.fire_for, d.on_time, d.last_missed), (Some(utc(2027, 1, 1, 10, 0)), true, Some(utc(2027, 1, 1, 9, 0))));
            assert_eq!(d.considered_until, now);
        }
        // Ten missed, none on time (grace 0 and 30 s late): cap 9 caps, cap 10 does not.
        assert!(due_capped(&hourly(), cu, now, 0, CatchUp::Once, 9).missed_capped);
        let ten = due_capped(&hourly(), cu, now, 0, CatchUp::Once, 10);
        assert_eq!((ten.missed, ten.missed_capped, ten.fire_for), (10, false, Some(utc(2027, 1, 1, 10, 0))));
    }

    #[test]
    fn due_caps_a_long_outage_at_the_default_cap() {
        // Every minute, 70 days down: 70 × 1440 = 100 800 instants in the window, the last at
        // `now` itself (on time with zero grace), so 100 799 missed: over the cap.
        let cron = Cron::parse("* * * * *", "UTC").unwrap();
        let cu = utc(2027, 1, 1, 0, 0);
        let now = utc(2027, 3, 12, 0, 0); // January 31 + February 28 + 11 days = day 70
        assert_eq!(now - cu, 70 * 24 * HOUR);
        let d = due(&cron, cu, now, 0, CatchUp::Skip);
        assert_eq!((d.missed, d.missed_capped), (MISSED_COUNT_CAP, true));
        assert_eq!((d.fire_for, d.on_time, d.last_missed), (Some(now), true, Some(now - MINUTE)));
        assert_eq!(d.next, Some(now + MINUTE));
    }
}
