//! One SVG plot per limit that a sweep varied: training and validation scores against the
//! limit, so under- and overfitting show at a glance.
//!
//! What a plot shows, for limit L:
//! - the x axis holds every value L took in the sweep, in order. "No limit" (`max_depth` or
//!   `max_leaves` unset) is a labelled position at the right end, set off by a break in the
//!   axis. The axis is logarithmic when L's positive values span two decades or more (never
//!   for `max_depth`); a 0 on a log axis gets its own labelled position at the left end,
//!   also behind a break;
//! - at each x value, the point is **the setting with the best mean validation score among
//!   the settings with that value of L** (ties to fewer mean leaves, then grid order): the
//!   best the sweep could do with L fixed there, the other limits chosen freely. The subtitle
//!   says so and how many settings share each value;
//! - two lines: "training" (the mean training score over the folds, dashed) and
//!   "validation" (the mean validation score, solid), with the validation mean ± one sample
//!   fold scores as dots with their mean as a bar, and the one-SE floor as a dashed rule;
//! - the best validation point is ringed and marked "best"; the picked setting (the pick
//!   rule's choice, e.g. the simplest within one standard error) is a hollow diamond at its
//!   own value and scores, marked "picked" (one mark, "best = picked", when they coincide);
//! - every point carries a tooltip (`<title>`) with its numbers.
//!
//! The SVG is written by hand: no plotting crate, a look of our own, and nothing to build.

use std::fmt::Write as _;
use std::path::{Path, PathBuf};

use crate::sweep::{Metric, SettingScore};

/// The six limits, in the order plots are written.
pub const LIMITS: [&str; 6] = ["max_depth", "min_split_rows", "min_leaf_rows", "max_leaves", "min_gain", "prune_alpha"];

/// Writes `<limit>.svg` into `out_dir` (created if missing) for each limit that takes more
/// than one value in `scores`, and returns the paths written, in [`LIMITS`] order.
/// `picked` is the index in `scores` of the pick rule's setting, marked on every plot.
pub fn limit_plots(scores: &[SettingScore], metric: Metric, picked: Option<usize>, out_dir: &Path) -> Result<Vec<PathBuf>, String> {
    let mut written = Vec::new();
    for (name, svg) in limit_svgs(scores, metric, picked) {
        if written.is_empty() {
            std::fs::create_dir_all(out_dir).map_err(|e| format!("{}: {e}", out_dir.display()))?;
        }
        let path = out_dir.join(format!("{name}.svg"));
        std::fs::write(&path, svg).map_err(|e| format!("{}: {e}", path.display()))?;
        written.push(path);
    }
    Ok(written)
}

/// The plots of [`limit_plots`] as (limit, SVG text), for callers that show them rather
/// than write them (the web view inlines them in its run page).
pub fn limit_svgs(scores: &[SettingScore], metric: Metric, picked: Option<usize>) -> Vec<(&'static str, String)> {
    let folds = scores.iter().map(|s| s.fold_scores.len()).max().unwrap_or(0);
    let mut out = Vec::new();
    for (i, name) in LIMITS.iter().enumerate() {
        let points = profile(scores, i, metric);
        if points.len() < 2 {
            continue;
        }
        let mark = picked.and_then(|p| scores.get(p)).map(|p| Picked { x: limit_value(p, i), valid: p.valid_mean });
        out.push((*name, draw(name, metric, &points, folds, mark)));
    }
    out
}

/// A limit's value: a number, or no limit at all.
#[derive(Clone, Copy, Debug, PartialEq)]
enum X {
    Value(f64),
    NoLimit,
}

impl X {
    fn order(a: &X, b: &X) -> std::cmp::Ordering {
        match (a, b) {
            (X::Value(x), X::Value(y)) => x.total_cmp(y),
            (X::Value(_), X::NoLimit) => std::cmp::Ordering::Less,
            (X::NoLimit, X::Value(_)) => std::cmp::Ordering::Greater,
            (X::NoLimit, X::NoLimit) => std::cmp::Ordering::Equal,
        }
    }
}

fn limit_value(s: &SettingScore, limit: usize) -> X {
    let l = &s.setting.options.limits;
    let opt = |v: Option<u32>| v.map_or(X::NoLimit, |x| X::Value(x as f64));
    match limit {
        0 => opt(l.max_depth),
        1 => X::Value(l.min_split_rows as f64),
        2 => X::Value(l.min_leaf_rows as f64),
        3 => opt(l.max_leaves),
        4 => X::Value(l.min_gain),
        5 => X::Value(l.prune_alpha),
        _ => unreachable!("six limits"),
    }
}

/// Where the picked setting sits on one limit's plot.
#[derive(Clone, Copy, Debug, PartialEq)]
struct Picked {
    x: X,
    valid: f64,
}

/// One plotted position: the best-validating setting among those sharing a value of the limit.
#[derive(Clone, Debug, PartialEq)]
struct Point {
    x: X,
    train: f64,
    valid: f64,
    sd: f64,
    /// The validation score of each fold.
    folds: Vec<f64>,
    /// Settings that share this value.
    settings: usize,
}

/// The points of one limit, in x order ("no limit" last).
fn profile(scores: &[SettingScore], limit: usize, metric: Metric) -> Vec<Point> {
    let oriented = |s: &SettingScore| {
        let v = if metric.higher_is_better() { s.valid_mean } else { -s.valid_mean };
        if v.is_nan() {
            f64::NEG_INFINITY
        } else {
            v
        }
    };
    let mut order: Vec<usize> = (0..scores.len()).collect();
    order.sort_by(|&a, &b| X::order(&limit_value(&scores[a], limit), &limit_value(&scores[b], limit)).then(a.cmp(&b)));
    let mut points = Vec::new();
    let mut i = 0;
    while i < order.len() {
        let x = limit_value(&scores[order[i]], limit);
        let mut j = i;
        while j < order.len() && limit_value(&scores[order[j]], limit) == x {
            j += 1;
        }
        let best = order[i..j]
            .iter()
            .copied()
            .min_by(|&a, &b| {
                let (sa, sb) = (&scores[a], &scores[b]);
                oriented(sb).total_cmp(&oriented(sa)).then(sa.mean_leaves.total_cmp(&sb.mean_leaves)).then(a.cmp(&b))
            })
            .expect("a non-empty group");
        let s = &scores[best];
        points.push(Point { x, train: s.train_mean, valid: s.valid_mean, sd: s.valid_sd, folds: s.fold_scores.clone(), settings: j - i });
        i = j;
    }
    points
}

// Layout, in SVG user units.
const WIDTH: f64 = 760.0;
const HEIGHT: f64 = 480.0;
const LEFT: f64 = 80.0;
const RIGHT: f64 = 730.0;
const TOP: f64 = 114.0;
const BOTTOM: f64 = 396.0;
/// Training in olive and validation in plum: our own pair, told apart without colour by
/// marker (open square, filled circle) and line (dashed, solid).
const TRAIN_COLOUR: &str = "#6b7d1f";
const VALID_COLOUR: &str = "#7a2e6e";
const INK: &str = "#2b2b2b";
const MUTED: &str = "#6b6b6b";
const RULE: &str = "#e4e4e4";

/// Where x values land on the page.
struct XAxis {
    lo: f64,
    hi: f64,
    log: bool,
    /// A 0 on a log axis: its own position at the left.
    zero_slot: bool,
    /// "No limit": its own position at the right.
    none_slot: bool,
    /// The pixel span of the finite (or positive) values.
    from: f64,
    to: f64,
}

const SLOT: f64 = 0.13 * (RIGHT - LEFT);
const INSET: f64 = 0.04 * (RIGHT - LEFT);

impl XAxis {
    fn new(limit: &str, points: &[Point]) -> XAxis {
        let finite: Vec<f64> = points.iter().filter_map(|p| if let X::Value(v) = p.x { Some(v) } else { None }).collect();
        let none_slot = points.iter().any(|p| p.x == X::NoLimit);
        let positive: Vec<f64> = finite.iter().copied().filter(|&v| v > 0.0).collect();
        let log = limit != "max_depth" && positive.len() >= 3 && positive[positive.len() - 1] / positive[0] >= 100.0;
        let zero_slot = log && finite.first() == Some(&0.0);
        let on_axis = if log { &positive } else { &finite };
        let (lo, hi) = match (on_axis.first(), on_axis.last()) {
            (Some(&a), Some(&b)) => (a, b),
            _ => (0.0, 1.0),
        };
        let from = LEFT + if zero_slot { SLOT } else { INSET };
        let to = RIGHT - if none_slot { SLOT } else { INSET };
        XAxis { lo, hi, log, zero_slot, none_slot, from, to }
    }

    fn scale(&self, v: f64) -> f64 {
        if self.log {
            v.log10()
        } else {
            v
        }
    }

    fn px_value(&self, v: f64) -> f64 {
        let (a, b) = (self.scale(self.lo), self.scale(self.hi));
        if b == a {
            return (self.from + self.to) / 2.0;
        }
        self.from + (self.scale(v) - a) / (b - a) * (self.to - self.from)
    }

    fn px(&self, x: X) -> f64 {
        match x {
            X::NoLimit => RIGHT - INSET,
            X::Value(v) if self.zero_slot && v == 0.0 => LEFT + INSET,
            X::Value(v) => self.px_value(v),
        }
    }

    /// Tick positions and labels for the finite (or positive) part.
    fn ticks(&self, points: &[Point]) -> Vec<(f64, String)> {
        let data: Vec<f64> = points
            .iter()
            .filter_map(|p| match p.x {
                X::Value(v) if !(self.zero_slot && v == 0.0) => Some(v),
                _ => None,
            })
            .collect();
        let spaced = |vs: &[f64]| vs.windows(2).all(|w| self.px_value(w[1]) - self.px_value(w[0]) >= 38.0);
        if data.len() <= 12 && spaced(&data) {
            return data.iter().map(|&v| (self.px_value(v), number(v))).collect();
        }
        if self.log {
            let (a, b) = (self.lo.log10().floor() as i32, self.hi.log10().ceil() as i32);
            let decades: Vec<f64> = (a..=b).map(|k| 10f64.powi(k)).filter(|&v| v >= self.lo * (1.0 - 1e-9) && v <= self.hi * (1.0 + 1e-9)).collect();
            if decades.len() >= 2 {
                return decades.iter().map(|&v| (self.px_value(v), number(v))).collect();
            }
            return [self.lo, self.hi].iter().map(|&v| (self.px_value(v), number(v))).collect();
        }
        nice_ticks(self.lo, self.hi, 7).into_iter().map(|v| (self.px_value(v), number(v))).collect()
    }
}

/// Round steps of 1, 2 or 5 × 10^k covering [lo, hi] with about `want` ticks.
fn nice_step(lo: f64, hi: f64, want: usize) -> f64 {
    let raw = (hi - lo) / want.max(1) as f64;
    let mag = 10f64.powf(raw.log10().floor());
    let f = raw / mag;
    mag * if f <= 1.0 {
        1.0
    } else if f <= 2.0 {
        2.0
    } else if f <= 5.0 {
        5.0
    } else {
        10.0
    }
}

fn nice_ticks(lo: f64, hi: f64, want: usize) -> Vec<f64> {
    let step = nice_step(lo, hi, want);
    let first = (lo / step).ceil() as i64;
    let last = (hi / step).floor() as i64;
    (first..=last).map(|k| k as f64 * step).collect()
}

/// A value as a short label: whole numbers plainly, small numbers in e-notation.
fn number(v: f64) -> String {
    if v == 0.0 {
        "0".into()
    } else if v.fract() == 0.0 && v.abs() < 1e9 {
        format!("{}", v as i64)
    } else if v.abs() < 1e-3 {
        // Four significant digits, trailing zeros dropped: 9.999999999999997e-6 reads 1e-5.
        let e = format!("{v:.3e}");
        let (mantissa, exponent) = e.split_once('e').expect("e-notation");
        format!("{}e{exponent}", mantissa.trim_end_matches('0').trim_end_matches('.'))
    } else {
        let s = format!("{v:.6}");
        s.trim_end_matches('0').trim_end_matches('.').to_string()
    }
}

/// Text made safe for XML content and attribute values.
fn esc(s: &str) -> String {
    s.replace('&', "&amp;").replace('<', "&lt;").replace('>', "&gt;").replace('"', "&quot;")
}

fn fmt_score(v: f64) -> String {
    if v.is_finite() {
        format!("{v:.4}")
    } else {
        "n/a".into()
    }
}

fn draw(limit: &str, metric: Metric, points: &[Point], folds: usize, picked: Option<Picked>) -> String {
    let m = metric.as_str();
    let x = XAxis::new(limit, points);
    // Y range over everything drawn.
    let mut ys: Vec<f64> = Vec::new();
    for p in points {
        let sd = if p.sd.is_finite() { p.sd } else { 0.0 };
        ys.extend([p.train, p.valid, p.valid - sd, p.valid + sd]);
        ys.extend(p.folds.iter().copied());
    }
    ys.retain(|v| v.is_finite());
    let (mut lo, mut hi) = ys.iter().fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), &v| (a.min(v), b.max(v)));
    if ys.is_empty() {
        (lo, hi) = (0.0, 1.0);
    }
    if hi - lo < 1e-12 {
        let pad = if lo.abs() > 0.0 { lo.abs() * 0.05 } else { 0.05 };
        lo -= pad;
        hi += pad;
    }
    let step = nice_step(lo, hi, 5);
    let (lo, hi) = ((lo / step).floor() * step, (hi / step).ceil() * step);
    let py = |v: f64| BOTTOM - (v - lo) / (hi - lo) * (BOTTOM - TOP);
    let decimals = (-step.log10().floor()).max(0.0) as usize;

    let mut s = String::new();
    let w = &mut s;
    let _ = writeln!(w, r#"<?xml version="1.0" encoding="UTF-8"?>"#);
    let _ = writeln!(
        w,
        r#"<svg xmlns="http://www.w3.org/2000/svg" width="{WIDTH}" height="{HEIGHT}" viewBox="0 0 {WIDTH} {HEIGHT}" font-family="sans-serif" font-size="12" fill="{INK}">"#
    );
    let better = if metric.higher_is_better() { "higher is better" } else { "lower is better" };
    let _ = writeln!(w, r#"<title>{}</title>"#, esc(&format!("{limit}: training and validation {m}")));
    let _ = writeln!(w, r##"<rect x="0" y="0" width="{WIDTH}" height="{HEIGHT}" fill="#ffffff"/>"##);
    let _ = writeln!(w, r#"<text x="{LEFT}" y="30" font-size="17" font-weight="bold">{}</text>"#, esc(&format!("{limit}: training and validation {m}")));
    let per = {
        let (a, b) = (points.iter().map(|p| p.settings).min().unwrap_or(0), points.iter().map(|p| p.settings).max().unwrap_or(0));
        if a == b {
            format!("{a} setting{}", if a == 1 { "" } else { "s" })
        } else {
            format!("{a} to {b} settings")
        }
    };
    let note = format!(
        "Each point: the setting with the best validation {m} among the {per} with that {limit} value. \
         Dots: its {folds} fold scores; bar: their mean. The dashed rule is the one-SE floor \
         (best mean minus one standard error). A widening gap is overfitting; both low is underfitting."
    );
    for (i, text) in wrap(&note, 104).iter().take(3).enumerate() {
        let _ = writeln!(w, r#"<text x="{LEFT}" y="{}" font-size="11.5" fill="{MUTED}">{}</text>"#, 50.0 + 15.0 * i as f64, esc(text));
    }
    // Legend.
    let ly = 100.0;
    let _ = writeln!(w, r#"<line x1="{LEFT}" y1="{ly}" x2="{}" y2="{ly}" stroke="{TRAIN_COLOUR}" stroke-width="2.5" stroke-dasharray="7 4"/>"#, LEFT + 28.0);
    let _ = writeln!(w, r#"<text x="{}" y="{}">training</text>"#, LEFT + 34.0, ly + 4.0);
    let v0 = LEFT + 110.0;
    let _ = writeln!(w, r#"<circle cx="{}" cy="{ly}" r="2.5" fill="{VALID_COLOUR}" fill-opacity="0.55"/>"#, v0 + 6.0);
    let _ = writeln!(w, r#"<line x1="{}" y1="{ly}" x2="{}" y2="{ly}" stroke="{VALID_COLOUR}" stroke-width="3"/>"#, v0 + 12.0, v0 + 28.0);
    let _ = writeln!(w, r#"<text x="{}" y="{}">validation: fold scores and mean</text>"#, v0 + 34.0, ly + 4.0);
    let f0 = v0 + 250.0;
    let _ = writeln!(w, r#"<line x1="{f0}" y1="{ly}" x2="{}" y2="{ly}" stroke="{MUTED}" stroke-width="1.2" stroke-dasharray="3 3"/>"#, f0 + 28.0);
    let _ = writeln!(w, r#"<text x="{}" y="{}">one-SE floor</text>"#, f0 + 34.0, ly + 4.0);

    // Horizontal rules and y labels.
    let mut k = 0;
    loop {
        let v = lo + k as f64 * step;
        if v > hi + step * 1e-9 {
            break;
        }
        let y = py(v);
        let _ = writeln!(w, r#"<line x1="{LEFT}" y1="{y:.2}" x2="{RIGHT}" y2="{y:.2}" stroke="{RULE}"/>"#);
        let _ = writeln!(w, r#"<text x="{}" y="{:.2}" text-anchor="end">{v:.decimals$}</text>"#, LEFT - 8.0, y + 4.0);
        k += 1;
    }
    // Axes.
    let _ = writeln!(w, r#"<line x1="{LEFT}" y1="{TOP}" x2="{LEFT}" y2="{BOTTOM}" stroke="{INK}"/>"#);
    let _ = writeln!(w, r#"<line x1="{LEFT}" y1="{BOTTOM}" x2="{RIGHT}" y2="{BOTTOM}" stroke="{INK}"/>"#);
    let gap_mark = |w: &mut String, at: f64| {
        let _ = writeln!(w, r##"<rect x="{:.2}" y="{}" width="8" height="8" fill="#ffffff"/>"##, at - 4.0, BOTTOM - 4.0);
        for d in [-3.0, 3.0] {
            let _ = writeln!(w, r#"<line x1="{:.2}" y1="{}" x2="{:.2}" y2="{}" stroke="{INK}"/>"#, at + d - 2.0, BOTTOM + 5.0, at + d + 2.0, BOTTOM - 5.0);
        }
    };
    if x.zero_slot {
        gap_mark(w, (LEFT + INSET + x.from) / 2.0);
    }
    if x.none_slot {
        gap_mark(w, (x.to + RIGHT - INSET) / 2.0);
    }
    // X ticks.
    let tick = |w: &mut String, at: f64, label: &str| {
        let _ = writeln!(w, r#"<line x1="{at:.2}" y1="{BOTTOM}" x2="{at:.2}" y2="{}" stroke="{INK}"/>"#, BOTTOM + 5.0);
        let _ = writeln!(w, r#"<text x="{at:.2}" y="{}" text-anchor="middle">{}</text>"#, BOTTOM + 19.0, esc(label));
    };
    if x.zero_slot {
        tick(w, LEFT + INSET, "0");
    }
    for (at, label) in x.ticks(points) {
        tick(w, at, &label);
    }
    if x.none_slot {
        tick(w, RIGHT - INSET, "no limit");
    }
    let xlabel = if x.log { format!("{limit} (log scale)") } else { limit.to_string() };
    let _ = writeln!(w, r#"<text x="{:.2}" y="{}" text-anchor="middle" font-size="14">{}</text>"#, (LEFT + RIGHT) / 2.0, BOTTOM + 44.0, esc(&xlabel));
    let cy = (TOP + BOTTOM) / 2.0;
    let _ = writeln!(w, r#"<text x="22" y="{cy:.2}" text-anchor="middle" font-size="14" transform="rotate(-90 22 {cy:.2})">{}</text>"#, esc(&format!("{m} ({better})")));

    // Each fold's validation score as a dot, spread a little sideways so equal scores show,
    // and the mean as a short bar.
    for p in points.iter().filter(|p| p.valid.is_finite()) {
        let px = x.px(p.x);
        let n = p.folds.len().max(1) as f64;
        for (i, v) in p.folds.iter().enumerate().filter(|(_, v)| v.is_finite()) {
            let dx = (i as f64 - (n - 1.0) / 2.0) * 3.0;
            let _ = writeln!(w, r#"<circle cx="{:.2}" cy="{:.2}" r="2.5" fill="{VALID_COLOUR}" fill-opacity="0.45"/>"#, px + dx, py(*v));
        }
        let _ = writeln!(w, r#"<line x1="{:.2}" y1="{:.2}" x2="{:.2}" y2="{:.2}" stroke="{VALID_COLOUR}" stroke-width="3"/>"#, px - 9.0, py(p.valid), px + 9.0, py(p.valid));
    }
    // The one-SE floor: the best mean less one standard error (sd / √folds).
    let better = |a: &Point, b: &Point| if metric.higher_is_better() { a.valid.total_cmp(&b.valid) } else { b.valid.total_cmp(&a.valid) };
    if let Some(b) = points.iter().filter(|p| p.valid.is_finite()).max_by(|a, b| better(a, b)) {
        let se = if b.sd.is_finite() && !b.folds.is_empty() { b.sd / (b.folds.len() as f64).sqrt() } else { 0.0 };
        let floor = if metric.higher_is_better() { b.valid - se } else { b.valid + se };
        if floor.is_finite() && floor >= lo && floor <= hi {
            let fy = py(floor);
            let _ = writeln!(w, r#"<line x1="{LEFT}" y1="{fy:.2}" x2="{RIGHT}" y2="{fy:.2}" stroke="{MUTED}" stroke-width="1.2" stroke-dasharray="3 3"/>"#);
        }
    }
    // Lines: solid within the main stretch, dotted across an axis break.
    let line = |w: &mut String, value: &dyn Fn(&Point) -> f64, colour: &str, dash: &str| {
        let drawn: Vec<&Point> = points.iter().filter(|p| value(p).is_finite()).collect();
        for pair in drawn.windows(2) {
            let (a, b) = (pair[0], pair[1]);
            let across = is_slot(&x, a.x) || is_slot(&x, b.x);
            let style = if across { r#" stroke-dasharray="2 4""#.to_string() } else { dash.to_string() };
            let _ = writeln!(
                w,
                r#"<line x1="{:.2}" y1="{:.2}" x2="{:.2}" y2="{:.2}" stroke="{colour}" stroke-width="2.5"{style}/>"#,
                x.px(a.x),
                py(value(a)),
                x.px(b.x),
                py(value(b))
            );
        }
    };
    line(w, &|p| p.train, TRAIN_COLOUR, r#" stroke-dasharray="7 4""#);
    line(w, &|p| p.valid, VALID_COLOUR, r#" stroke-opacity="0.5""#);
    // Markers with tooltips.
    let label = |p: &Point| match p.x {
        X::NoLimit => format!("{limit}: no limit"),
        X::Value(v) => format!("{limit} = {}", number(v)),
    };
    for p in points {
        let px = x.px(p.x);
        let tip = esc(&format!(
            "{}: training {}, validation {} ± {} (best of {} setting{})",
            label(p),
            fmt_score(p.train),
            fmt_score(p.valid),
            fmt_score(p.sd),
            p.settings,
            if p.settings == 1 { "" } else { "s" }
        ));
        if p.train.is_finite() {
            let _ = writeln!(w, r##"<rect x="{:.2}" y="{:.2}" width="7" height="7" fill="#ffffff" stroke="{TRAIN_COLOUR}" stroke-width="2"><title>{tip}</title></rect>"##, px - 3.5, py(p.train) - 3.5);
        }
        if p.valid.is_finite() {
            let _ = writeln!(w, r#"<circle cx="{px:.2}" cy="{:.2}" r="4" fill="{VALID_COLOUR}"><title>{tip}</title></circle>"#, py(p.valid));
        }
    }
    // The best validation point, and the picked setting.
    let oriented = |p: &Point| if metric.higher_is_better() { p.valid } else { -p.valid };
    let best = points.iter().filter(|p| p.valid.is_finite()).min_by(|a, b| oriented(b).total_cmp(&oriented(a)));
    let same = |b: &Point, p: &Picked| b.x == p.x && b.valid.to_bits() == p.valid.to_bits();
    // The training line usually lies on the better side of validation: label the other side.
    let label_y = |y: f64| {
        let below = if metric.higher_is_better() { BOTTOM - y > 28.0 } else { y - TOP < 28.0 };
        if below {
            y + 24.0
        } else {
            y - 15.0
        }
    };
    if let Some(b) = best {
        let (bx, by) = (x.px(b.x), py(b.valid));
        let _ = writeln!(w, r#"<circle cx="{bx:.2}" cy="{by:.2}" r="9" fill="none" stroke="{VALID_COLOUR}" stroke-width="1.5"/>"#);
        let word = if picked.is_some_and(|p| same(b, &p)) { "best = picked" } else { "best" };
        let _ = writeln!(w, r#"<text x="{bx:.2}" y="{:.2}" text-anchor="middle" fill="{VALID_COLOUR}" font-weight="bold">{word}</text>"#, label_y(by));
    }
    if let Some(p) = picked.filter(|p| p.valid.is_finite() && !best.is_some_and(|b| same(b, p))) {
        let (kx, ky) = (x.px(p.x), py(p.valid));
        let _ = writeln!(
            w,
            r#"<path d="M {kx:.2} {:.2} L {:.2} {ky:.2} L {kx:.2} {:.2} L {:.2} {ky:.2} Z" fill="none" stroke="{INK}" stroke-width="1.8"><title>picked setting: validation {}</title></path>"#,
            ky - 8.0,
            kx + 8.0,
            ky + 8.0,
            kx - 8.0,
            fmt_score(p.valid)
        );
        let _ = writeln!(w, r#"<text x="{kx:.2}" y="{:.2}" text-anchor="middle" fill="{INK}" font-weight="bold">picked</text>"#, label_y(ky));
    }
    if ys.is_empty() {
        let _ = writeln!(w, r#"<text x="{:.2}" y="{cy:.2}" text-anchor="middle" fill="{MUTED}">no finite scores to show</text>"#, (LEFT + RIGHT) / 2.0);
    }
    let _ = writeln!(w, "</svg>");
    s
}

/// Words packed into lines of at most `width` characters (a long word gets its own line).
fn wrap(text: &str, width: usize) -> Vec<String> {
    let mut lines: Vec<String> = Vec::new();
    let mut line = String::new();
    for word in text.split_whitespace() {
        if !line.is_empty() && line.chars().count() + 1 + word.chars().count() > width {
            lines.push(std::mem::take(&mut line));
        }
        if !line.is_empty() {
            line.push(' ');
        }
        line.push_str(word);
    }
    if !line.is_empty() {
        lines.push(line);
    }
    lines
}

fn is_slot(x: &XAxis, v: X) -> bool {
    match v {
        X::NoLimit => true,
        X::Value(v) => x.zero_slot && v == 0.0,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::sweep::Setting;
    use crate::tree::{FitOptions, Limits};

    /// A minimal XML well-formedness check: one root element, tags nest and close in order,
    /// attribute values are quoted, `&` starts a known entity, no `<` in text or attributes.
    fn well_formed(text: &str) -> Result<String, String> {
        let b = text.as_bytes();
        let mut i = 0;
        let mut stack: Vec<String> = Vec::new();
        let mut root: Option<String> = None;
        let check_entities = |s: &str| -> Result<(), String> {
            let mut rest = s;
            while let Some(p) = rest.find('&') {
                let tail = &rest[p + 1..];
                let end = tail.find(';').ok_or("unterminated entity")?;
                let name = &tail[..end];
                let ok = matches!(name, "amp" | "lt" | "gt" | "quot" | "apos")
                    || (name.starts_with("#x") && name.len() > 2 && name[2..].chars().all(|c| c.is_ascii_hexdigit()))
                    || (name.starts_with('#') && name.len() > 1 && name[1..].chars().all(|c| c.is_ascii_digit()));
                if !ok {
                    return Err(format!("unknown entity &{name};"));
                }
                rest = &tail[end + 1..];
            }
            Ok(())
        };
        let is_name = |s: &str| !s.is_empty() && s.chars().all(|c| c.is_alphanumeric() || "-_:.".contains(c)) && !s.starts_with(|c: char| c.is_ascii_digit() || c == '-' || c == '.');
        while i < b.len() {
            if b[i] != b'<' {
                let end = text[i..].find('<').map_or(b.len(), |p| i + p);
                let chunk = &text[i..end];
                if stack.is_empty() && !chunk.trim().is_empty() {
                    return Err(format!("text outside the root: {chunk:?}"));
                }
                if chunk.contains('>') && chunk.contains("]]>") {
                    return Err("]]> in text".into());
                }
                check_entities(chunk)?;
                i = end;
                continue;
            }
            let rest = &text[i..];
            if rest.starts_with("<?") {
                if i != 0 && !stack.is_empty() {
                    return Err("processing instruction inside content".into());
                }
                i += rest.find("?>").ok_or("unterminated <?")? + 2;
                continue;
            }
            if rest.starts_with("<!--") {
                i += rest.find("-->").ok_or("unterminated comment")? + 3;
                continue;
            }
            // A tag: find its end, outside quotes.
            let mut j = i + 1;
            let mut quote: Option<u8> = None;
            while j < b.len() {
                match (quote, b[j]) {
                    (None, b'"' | b'\'') => quote = Some(b[j]),
                    (Some(q), c) if c == q => quote = None,
                    (Some(_), b'<') => return Err("< inside an attribute value".into()),
                    (None, b'>') => break,
                    (None, b'<') => return Err("< inside a tag".into()),
                    _ => {}
                }
                j += 1;
            }
            if j >= b.len() {
                return Err("unterminated tag".into());
            }
            let inner = &text[i + 1..j];
            i = j + 1;
            if let Some(name) = inner.strip_prefix('/') {
                let name = name.trim();
                match stack.pop() {
                    Some(open) if open == name => {}
                    other => return Err(format!("</{name}> closes {other:?}")),
                }
                continue;
            }
            let self_closing = inner.ends_with('/');
            let body = inner.trim_end_matches('/');
            let name_end = body.find(|c: char| c.is_whitespace()).unwrap_or(body.len());
            let name = &body[..name_end];
            if !is_name(name) {
                return Err(format!("bad tag name {name:?}"));
            }
            // Attributes: name="value" pairs, each name once.
            let mut attrs = body[name_end..].trim();
            let mut seen = Vec::new();
            while !attrs.is_empty() {
                let eq = attrs.find('=').ok_or(format!("attribute without value in <{name}>"))?;
                let an = attrs[..eq].trim();
                if !is_name(an) || seen.contains(&an) {
                    return Err(format!("bad or repeated attribute {an:?} in <{name}>"));
                }
                seen.push(an);
                let after = attrs[eq + 1..].trim_start();
                let q = after.chars().next().ok_or("missing attribute value")?;
                if q != '"' && q != '\'' {
                    return Err(format!("unquoted attribute {an} in <{name}>"));
                }
                let close = after[1..].find(q).ok_or("unterminated attribute value")?;
                check_entities(&after[1..1 + close])?;
                let next = &after[close + 2..];
                if !next.is_empty() && !next.starts_with(char::is_whitespace) {
                    return Err(format!("no space after attribute {an} in <{name}>"));
                }
                attrs = next.trim_start();
            }
            if stack.is_empty() {
                if root.is_some() {
                    return Err("a second root element".into());
                }
                root = Some(name.to_string());
            }
            if !self_closing {
                stack.push(name.to_string());
            }
        }
        if !stack.is_empty() {
            return Err(format!("unclosed elements: {stack:?}"));
        }
        root.ok_or("no root element".into())
    }

    #[test]
    fn labels_are_short() {
        assert_eq!(number(9.999999999999997e-6), "1e-5");
        assert_eq!(number(2.5e-4), "2.5e-4");
        assert_eq!(number(0.0010000000000000002), "0.001");
        assert_eq!(number(0.05), "0.05");
        assert_eq!(number(12.0), "12");
        assert_eq!(wrap("aa bb cc", 5), ["aa bb", "cc"]);
        assert_eq!(wrap("abcdefgh ij", 4), ["abcdefgh", "ij"]);
    }

    #[test]
    fn the_checker_rejects_broken_xml() {
        assert_eq!(well_formed(r#"<?xml version="1.0"?><svg a="1"><g><text>x &amp; y</text></g><line b='2'/></svg>"#), Ok("svg".into()));
        for bad in ["<svg><g></svg>", "<svg>a & b</svg>", "<svg a=1/>", "<svg/><svg/>", "<svg><g></g>", "<svg a=\"1\" a=\"2\"/>", "<svg a=\"x<y\"/>", "text<svg/>"] {
            assert!(well_formed(bad).is_err(), "accepted {bad}");
        }
    }

    fn score(limits: Limits, train: f64, valid: f64, sd: f64) -> SettingScore {
        SettingScore {
            setting: Setting { key: 0, options: FitOptions { limits, ..FitOptions::default() } },
            fold_scores: vec![valid - sd, valid, valid + sd],
            valid_mean: valid,
            valid_sd: sd,
            train_mean: train,
            gap: train - valid,
            mean_leaves: 4.0,
            mean_depth: 2.0,
        }
    }

    /// A grid over max_depth (with "no limit"), min_leaf_rows and min_gain (with 0 and four
    /// decades); the other three limits stay at one value.
    fn grid() -> Vec<SettingScore> {
        let mut out = Vec::new();
        for (d, depth) in [Some(1), Some(2), Some(4), Some(8), None].into_iter().enumerate() {
            for (l, leaf) in [1u32, 5, 25].into_iter().enumerate() {
                for (g, gain) in [0.0, 1e-5, 1e-4, 1e-3, 1e-2, 1e-1].into_iter().enumerate() {
                    let limits = Limits { max_depth: depth, min_leaf_rows: leaf, min_gain: gain, min_split_rows: 10, ..Limits::default() };
                    let train = 0.6 + 0.08 * d as f64 - 0.02 * l as f64 - 0.01 * g as f64;
                    let valid = 0.6 + 0.05 * d as f64 - 0.015 * (d as f64 - 2.0).powi(2) + 0.01 * l as f64 - 0.005 * g as f64;
                    out.push(score(limits, train, valid, 0.01 + 0.002 * g as f64));
                }
            }
        }
        out
    }

    fn temp_dir(name: &str) -> PathBuf {
        let dir = std::env::temp_dir().join(format!("pollard-plots-{}-{name}", std::process::id()));
        let _ = std::fs::remove_dir_all(&dir);
        dir
    }

    /// The plots of [`grid`] in a fresh folder, with a picked setting that is not the best of
    /// any plot: depth 1 (d = 0), l = 0, g = 1.
    fn grid_plots(name: &str) -> (PathBuf, Vec<PathBuf>) {
        let dir = temp_dir(name);
        let g = grid();
        let picked = g.iter().position(|s| s.setting.options.limits.max_depth == Some(1) && s.setting.options.limits.min_leaf_rows == 1).unwrap();
        let files = limit_plots(&g, Metric::Accuracy, Some(picked), &dir).unwrap();
        (dir, files)
    }

    #[test]
    fn one_well_formed_svg_per_varying_limit() {
        let (dir, files) = grid_plots("grid");
        let names: Vec<String> = files.iter().map(|p| p.file_name().unwrap().to_string_lossy().into_owned()).collect();
        assert_eq!(names, ["max_depth.svg", "min_leaf_rows.svg", "min_gain.svg"]);
        let on_disk = std::fs::read_dir(&dir).unwrap().count();
        assert_eq!(on_disk, 3);
        for (f, limit) in files.iter().zip(["max_depth", "min_leaf_rows", "min_gain"]) {
            let text = std::fs::read_to_string(f).unwrap();
            assert_eq!(well_formed(&text), Ok("svg".to_string()), "{}", f.display());
            for word in ["training", "validation", "accuracy", "higher is better", limit, ">best<", ">picked<", "picked setting: validation"] {
                assert!(text.contains(word), "{} lacks {word}", f.display());
            }
        }
        let depth = std::fs::read_to_string(dir.join("max_depth.svg")).unwrap();
        assert!(depth.contains(">no limit</text>") && !depth.contains("log scale"));
        let gain = std::fs::read_to_string(dir.join("min_gain.svg")).unwrap();
        assert!(gain.contains("min_gain (log scale)") && gain.contains(">0</text>") && gain.contains(">1e-5</text>"));
        finish(&dir);
    }

    /// Our look, as DEVELOPERS.md ("Our look") describes it: training olive, open squares on a
    /// dashed line; validation plum, filled circles; the best ringed; the picked setting a
    /// hollow diamond; the one-SE floor a grey dashed rule.
    #[test]
    fn the_plots_keep_our_look() {
        let (dir, files) = grid_plots("look");
        let text = std::fs::read_to_string(&files[0]).unwrap();
        let has = |what: &str, needle: &str| assert!(text.contains(needle), "{what}: no {needle:?} in {}", files[0].display());
        has("training squares, open", &format!(r##"width="7" height="7" fill="#ffffff" stroke="{TRAIN_COLOUR}""##));
        has("training line, dashed", &format!(r#"stroke="{TRAIN_COLOUR}" stroke-width="2.5" stroke-dasharray="7 4""#));
        has("validation circles, filled", &format!(r#"r="4" fill="{VALID_COLOUR}""#));
        has("the best, ringed", &format!(r#"r="9" fill="none" stroke="{VALID_COLOUR}""#));
        has("the pick, a hollow diamond", r#"Z" fill="none" stroke="#);
        has("the one-SE floor", &format!(r#"stroke="{MUTED}" stroke-width="1.2" stroke-dasharray="3 3""#));
        finish(&dir);
        let guide = std::fs::read_to_string(concat!(env!("CARGO_MANIFEST_DIR"), "/DEVELOPERS.md")).unwrap();
        let look = guide.split("\n## Our look\n").nth(1).expect("DEVELOPERS.md has an Our look section");
        for word in ["olive", "plum", "open squares", "filled circles", "ringed", "hollow diamond", "hexagons", "holds ▸", "Score tables"] {
            assert!(look.contains(word), "Our look does not say {word:?}");
        }
    }

    #[test]
    fn each_point_is_the_best_validating_setting_of_its_value() {
        let g = grid();
        let p = profile(&g, 0, Metric::Accuracy);
        assert_eq!(p.iter().map(|p| p.x).collect::<Vec<_>>(), [X::Value(1.0), X::Value(2.0), X::Value(4.0), X::Value(8.0), X::NoLimit]);
        for (d, point) in p.iter().enumerate() {
            assert_eq!(point.settings, 18);
            // Best validation at this depth: largest leaf term (l = 2), no gain term (g = 0).
            let want = 0.6 + 0.05 * d as f64 - 0.015 * (d as f64 - 2.0).powi(2) + 0.02;
            assert!((point.valid - want).abs() < 1e-12, "{d}: {} vs {want}", point.valid);
            assert!((point.train - (0.6 + 0.08 * d as f64 - 0.04)).abs() < 1e-12);
            assert_eq!(point.sd, 0.01);
        }
        // Lower is better: the smallest validation value wins.
        let low = profile(&g, 0, Metric::Rmse);
        assert!((low[0].valid - (0.6 - 0.06 - 0.025)).abs() < 1e-12, "{}", low[0].valid);
    }

    #[test]
    fn nothing_varies_no_files_and_nan_scores_still_draw() {
        let dir = temp_dir("flat");
        let one = vec![score(Limits::default(), 0.9, 0.8, 0.01)];
        assert!(limit_plots(&one, Metric::Accuracy, Some(0), &dir).unwrap().is_empty());
        assert!(!dir.exists());
        let two = vec![
            score(Limits { prune_alpha: 0.0, ..Limits::default() }, 0.9, f64::NAN, f64::NAN),
            score(Limits { prune_alpha: 0.01, ..Limits::default() }, 0.7, f64::NAN, f64::NAN),
        ];
        let files = limit_plots(&two, Metric::RocAuc, None, &dir).unwrap();
        assert_eq!(files.len(), 1);
        let text = std::fs::read_to_string(&files[0]).unwrap();
        assert_eq!(well_formed(&text), Ok("svg".to_string()));
        assert!(!text.contains("NaN") && !text.contains("inf"));
        std::fs::remove_dir_all(&dir).unwrap();
        // A lower-is-better metric says so on its axis.
        let files = limit_plots(&two, Metric::Rmse, None, &dir).unwrap();
        let text = std::fs::read_to_string(&files[0]).unwrap();
        assert!(text.contains("lower is better") && !text.contains("higher is better"), "{}", files[0].display());
        std::fs::remove_dir_all(&dir).unwrap();
    }

    #[test]
    fn all_six_limits_from_a_real_sweep() {
        use crate::reefer::{voyages, ReeferTarget};
        use crate::sweep::{sweep, Flow, Range, SweepSpec};
        let data = voyages(600, 9, ReeferTarget::Excursion);
        let v = |xs: &[Option<f64>]| Some(Range::Values(xs.to_vec()));
        let spec = SweepSpec {
            max_depth: v(&[Some(1.0), Some(3.0), Some(6.0), None]),
            min_split_rows: v(&[Some(2.0), Some(40.0)]),
            min_leaf_rows: v(&[Some(1.0), Some(10.0)]),
            max_leaves: v(&[Some(8.0), None]),
            min_gain: v(&[Some(0.0), Some(0.001)]),
            prune_alpha: Some(Range::LogSpan { from: 1e-5, to: 1e-1, count: 5 }),
            fit_final: false,
            ..SweepSpec::default()
        };
        let (_, r) = sweep(&data, &spec, &|_, _| Flow::Continue, &std::sync::atomic::AtomicBool::new(false)).unwrap();
        let dir = temp_dir("sweep");
        let files = limit_plots(&r.scores, r.metric, Some(r.picked), &dir).unwrap();
        assert_eq!(files.len(), 6);
        for f in &files {
            let text = std::fs::read_to_string(f).unwrap();
            assert_eq!(well_formed(&text), Ok("svg".to_string()), "{}", f.display());
            // The picked setting is marked on every plot, alone or as the best too.
            assert!(text.contains(">picked</text>") || text.contains(">best = picked</text>"), "{}", f.display());
        }
        assert!(std::fs::read_to_string(dir.join("prune_alpha.svg")).unwrap().contains("prune_alpha (log scale)"));
        finish(&dir);
    }

    /// Removes a test's plots, or keeps them for a look when `POLLARD_KEEP_PLOTS` is set.
    fn finish(dir: &Path) {
        if std::env::var_os("POLLARD_KEEP_PLOTS").is_none() {
            std::fs::remove_dir_all(dir).unwrap();
        } else {
            eprintln!("plots kept in {}", dir.display());
        }
    }
}
