//! Fire instants of schedules across the 2027 daylight-saving changes in Europe/Berlin and
//! America/New_York, checked against instants derived BY HAND from the published rules (not
//! from program output). The derivations:
//!
//! Calendar, by the doomsday rule: the anchor day for 2000-2099 is Tuesday; for 2027,
//! 27 div 12 = 2, 27 mod 12 = 3, 3 div 4 = 0, total 5, and Tuesday + 5 = Sunday, so every
//! doomsday of 2027 is a Sunday. The doomsdays used: 3/14 (March 7, 14, 21, 28 are Sundays;
//! March 31 is a Wednesday, so March 28 is the last Sunday and March 14 the second),
//! 10/10 (October 3, 10, 17, 24, 31: October 31 is the last Sunday) and 11/7 (November 7 is
//! the first Sunday). 2027 is not divisible by 4, so it has 365 days.
//!
//! EU rule (summer time starts the last Sunday of March at 01:00 UTC and ends the last Sunday
//! of October at 01:00 UTC; CET = UTC+1, CEST = UTC+2). In 2027:
//! - 2027-03-28 01:00 UTC: the Berlin clock jumps from 02:00 CET to 03:00 CEST, so local
//!   02:00-02:59 does not exist that night.
//! - 2027-10-31 01:00 UTC: the clock goes back from 03:00 CEST to 02:00 CET, so local
//!   02:00-02:59 happens twice: first as CEST (00:00-00:59 UTC), then as CET (01:00-01:59 UTC).
//!
//! US rule (DST starts the second Sunday of March at 02:00 local and ends the first Sunday of
//! November at 02:00 local; EST = UTC-5, EDT = UTC-4). In 2027:
//! - 2027-03-14 02:00 EST = 07:00 UTC: the New York clock jumps to 03:00 EDT; local
//!   02:00-02:59 does not exist, and 01:30 still does (as EST).
//! - 2027-11-07 02:00 EDT = 06:00 UTC: the clock goes back to 01:00 EST, so local 01:00-01:59
//!   happens twice: first as EDT (05:00-05:59 UTC), then as EST (06:00-06:59 UTC).
//!
//! The fire rules under test: a repeated local time fires once, at its first occurrence; a
//! nonexistent one fires at the first instant after the jump.

use chrono::{TimeZone, Utc};
use pollard::schedule::{due, CatchUp, Cron};

const MINUTE: i64 = 60_000;
const HOUR: i64 = 60 * MINUTE;

/// Unix milliseconds of a UTC wall-clock time.
fn at(y: i32, mo: u32, d: u32, h: u32, mi: u32) -> i64 {
    Utc.with_ymd_and_hms(y, mo, d, h, mi, 0).unwrap().timestamp_millis()
}

/// Every fire instant in calendar year 2027 (UTC), walking `next_after` from 2027-01-01T00:00Z.
fn fires_in_2027(cron: &Cron) -> Vec<i64> {
    let (start, end) = (at(2027, 1, 1, 0, 0), at(2028, 1, 1, 0, 0));
    let mut out = Vec::new();
    let mut t = start;
    while let Some(next) = cron.next_after(t) {
        assert!(next > t, "next_after({t}) went back to {next}");
        if next >= end {
            break;
        }
        out.push(next);
        t = next;
    }
    out
}

/// Unix milliseconds of an RFC 3339 UTC instant written to the minute, `2027-03-28T01:00Z`.
fn utc(text: &str) -> i64 {
    chrono::NaiveDateTime::parse_from_str(text, "%Y-%m-%dT%H:%MZ").unwrap().and_utc().timestamp_millis()
}

/// Hand-derived runs of consecutive fires: (expression, zone, walk from, [(fire, derivation)]).
/// Each run is walked with `next_after` from its start, so no extra fire can sit between two
/// rows. Every instant is derived from the rules in the module comment.
type Run = (&'static str, &'static str, &'static str, &'static [(&'static str, &'static str)]);

const RUNS: &[Run] = &[
    ("30 2 * * *", "Europe/Berlin", "2027-03-26T12:00Z", &[
        ("2027-03-27T01:30Z", "Sat 2027-03-27 is before the last Sunday of March: 02:30 CET = 01:30 UTC"),
        ("2027-03-28T01:00Z", "Sun 2027-03-28 is the last Sunday of March; 02:30 local does not exist; the next valid minute is 03:00 CEST = 01:00 UTC"),
        ("2027-03-29T00:30Z", "Mon 2027-03-29 is in summer time: 02:30 CEST = 00:30 UTC"),
    ]),
    ("30 2 * * *", "Europe/Berlin", "2027-10-29T12:00Z", &[
        ("2027-10-30T00:30Z", "Sat 2027-10-30 is still summer time: 02:30 CEST = 00:30 UTC"),
        ("2027-10-31T00:30Z", "Sun 2027-10-31 is the last Sunday of October; 02:30 happens at 00:30 UTC (CEST) and 01:30 UTC (CET); fires once, at the first"),
        ("2027-11-01T01:30Z", "Mon 2027-11-01 is winter time: 02:30 CET = 01:30 UTC; nothing at 2027-10-31 01:30 UTC"),
    ]),
    ("30 1 * * *", "America/New_York", "2027-03-12T12:00Z", &[
        ("2027-03-13T06:30Z", "Sat 2027-03-13 is EST: 01:30 EST = 06:30 UTC"),
        ("2027-03-14T06:30Z", "Sun 2027-03-14 is the second Sunday of March; the clock jumps at 02:00, after 01:30, so 01:30 EST = 06:30 UTC"),
        ("2027-03-15T05:30Z", "Mon 2027-03-15 is EDT: 01:30 EDT = 05:30 UTC"),
    ]),
    ("30 1 * * *", "America/New_York", "2027-11-05T12:00Z", &[
        ("2027-11-06T05:30Z", "Sat 2027-11-06 is EDT: 01:30 EDT = 05:30 UTC"),
        ("2027-11-07T05:30Z", "Sun 2027-11-07 is the first Sunday of November; 01:30 happens at 05:30 UTC (EDT) and 06:30 UTC (EST); fires at the first"),
        ("2027-11-08T06:30Z", "Mon 2027-11-08 is EST: 01:30 EST = 06:30 UTC; the 06:30 UTC of Nov 7 is skipped"),
    ]),
    // Minutes 0, 20, 40 of local hour 2.
    ("*/20 2 * * *", "Europe/Berlin", "2027-03-27T00:00Z", &[
        ("2027-03-27T01:00Z", "Mar 27 is CET: 02:00 CET = 01:00 UTC"),
        ("2027-03-27T01:20Z", "02:20 CET = 01:20 UTC"),
        ("2027-03-27T01:40Z", "02:40 CET = 01:40 UTC"),
        ("2027-03-28T01:00Z", "Mar 28: 02:00, 02:20 and 02:40 do not exist; all three collapse to one fire at 03:00 CEST = 01:00 UTC"),
        ("2027-03-29T00:00Z", "Mar 29 is CEST: 02:00 CEST = 00:00 UTC"),
        ("2027-03-29T00:20Z", "02:20 CEST = 00:20 UTC"),
    ]),
    ("*/20 2 * * *", "Europe/Berlin", "2027-10-30T12:00Z", &[
        ("2027-10-31T00:00Z", "Oct 31, first pass of 02:00-02:59 (CEST): 02:00 CEST = 00:00 UTC"),
        ("2027-10-31T00:20Z", "02:20 CEST = 00:20 UTC"),
        ("2027-10-31T00:40Z", "02:40 CEST = 00:40 UTC; the second pass (01:00-01:59 UTC) fires nothing"),
        ("2027-11-01T01:00Z", "Nov 1 is CET: 02:00 CET = 01:00 UTC"),
    ]),
    // 02:00, 02:30, 03:00, 03:30 local: on Mar 28, 02:00 and 02:30 do not exist and move to
    // 03:00 CEST = 01:00 UTC, which is also the real 03:00, so all three are one fire.
    ("0,30 2-3 * * *", "Europe/Berlin", "2027-03-28T00:00Z", &[
        ("2027-03-28T01:00Z", "02:00, 02:30 (nonexistent) and 03:00 CEST are all 01:00 UTC"),
        ("2027-03-28T01:30Z", "03:30 CEST = 01:30 UTC"),
        ("2027-03-29T00:00Z", "Mar 29: 02:00 CEST = 00:00 UTC"),
    ]),
];

#[test]
fn fires_around_the_2027_changes_match_the_hand_derived_table() {
    for (expr, zone, from, rows) in RUNS {
        let cron = Cron::parse(expr, zone).unwrap();
        let mut t = utc(from);
        for (want, why) in rows.iter() {
            let got = cron.next_after(t).unwrap();
            assert_eq!(got, utc(want), "{expr} in {zone} after {t}: {why}");
            t = got;
        }
    }
}

#[test]
fn berlin_nightly_fires_once_every_day_of_2027() {
    let fires = fires_in_2027(&Cron::parse("30 2 * * *", "Europe/Berlin").unwrap());
    // One fire per local day: 365 days, the nonexistent 02:30 of March 28 moved to 03:00
    // CEST, the doubled 02:30 of October 31 fired once.
    assert_eq!(fires.len(), 365);
    // January 1 and December 31 are winter (CET): 02:30 CET = 01:30 UTC.
    assert_eq!(fires[0], at(2027, 1, 1, 1, 30));
    assert_eq!(fires[364], at(2027, 12, 31, 1, 30));
    // Spacing is 24 h except at the changes: 01:30 UTC (Mar 27, CET) to 01:00 UTC (Mar 28,
    // 03:00 CEST) is 23 h 30; 01:00 to 00:30 UTC (Mar 29, 02:30 CEST) is 23 h 30; 00:30 UTC
    // (Oct 31, first 02:30, CEST) to 01:30 UTC (Nov 1, 02:30 CET) is 25 h.
    let odd: Vec<(i64, i64)> = fires.windows(2).filter(|w| w[1] - w[0] != 24 * HOUR).map(|w| (w[0], w[1] - w[0])).collect();
    assert_eq!(
        odd,
        vec![
            (at(2027, 3, 27, 1, 30), 23 * HOUR + 30 * MINUTE),
            (at(2027, 3, 28, 1, 0), 23 * HOUR + 30 * MINUTE),
            (at(2027, 10, 31, 0, 30), 25 * HOUR),
        ]
    );
}

#[test]
fn new_york_nightly_across_2027() {
    let cron = Cron::parse("30 1 * * *", "America/New_York").unwrap();
    let fires = fires_in_2027(&cron);
    // 01:30 exists on every day of 2027 (the spring gap is 02:00-02:59), and the doubled
    // 01:30 of November 7 fires once: 365 fires. January 1 and December 31 are EST:
    // 01:30 EST = 06:30 UTC, and both stay inside the UTC year.
    assert_eq!(fires.len(), 365);
    assert_eq!((fires[0], fires[364]), (at(2027, 1, 1, 6, 30), at(2027, 12, 31, 6, 30)));
    // The second 01:30 of November 7 (01:30 EST = 06:30 UTC) never fires.
    assert!(!fires.contains(&at(2027, 11, 7, 6, 30)));
    // Asked from inside the repeated hour, before and after its first 01:30 and during its
    // second pass (01:00 EST = 06:00 UTC), the answer is the first 01:30 or the next night.
    assert_eq!(cron.next_after(at(2027, 11, 7, 5, 30) - 1), Some(at(2027, 11, 7, 5, 30)));
    assert_eq!(cron.next_after(at(2027, 11, 7, 5, 30)), Some(at(2027, 11, 8, 6, 30)));
    assert_eq!(cron.next_after(at(2027, 11, 7, 6, 0)), Some(at(2027, 11, 8, 6, 30)));
}

#[test]
fn due_across_the_new_york_autumn_night() {
    let cron = Cron::parse("30 1 * * *", "America/New_York").unwrap();
    let first = at(2027, 11, 7, 5, 30); // 01:30 EDT
    let second = at(2027, 11, 7, 6, 30); // 01:30 EST, the repeated local time
    let next_night = at(2027, 11, 8, 6, 30); // 01:30 EST
    // Handled up to just after the first 01:30; waking at the second: nothing to do.
    let d = due(&cron, first + MINUTE, second, 5 * MINUTE, CatchUp::Once);
    assert_eq!((d.fire_for, d.on_time, d.missed, d.last_missed), (None, false, 0, None));
    assert_eq!((d.considered_until, d.next), (first + MINUTE, Some(next_night)));
    // Waking 30 s after the first 01:30: it is on time.
    let d = due(&cron, first - 30 * MINUTE, first + 30_000, 5 * MINUTE, CatchUp::Once);
    assert_eq!((d.fire_for, d.on_time, d.missed), (Some(first), true, 0));
    // Nov 6 handled, asleep through the first 01:30 and waking at the second: the first is an
    // hour late, so missed; one catch-up run for it.
    let d = due(&cron, at(2027, 11, 6, 5, 30), second, 5 * MINUTE, CatchUp::Once);
    assert_eq!((d.fire_for, d.on_time, d.missed, d.last_missed), (Some(first), false, 1, Some(first)));
    assert_eq!((d.considered_until, d.next), (second, Some(next_night)));
}

#[test]
fn due_at_the_berlin_spring_jump() {
    // Mar 27 handled; waking 30 s after 01:00 UTC on Mar 28, the moved 02:30 fire is on time.
    let cron = Cron::parse("30 2 * * *", "Europe/Berlin").unwrap();
    let moved = at(2027, 3, 28, 1, 0);
    let d = due(&cron, at(2027, 3, 27, 1, 30), moved + 30_000, MINUTE, CatchUp::Skip);
    assert_eq!((d.fire_for, d.on_time, d.missed), (Some(moved), true, 0));
    assert_eq!(d.next, Some(at(2027, 3, 29, 0, 30)));
}
