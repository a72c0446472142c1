//! The demo scenario: **SYNTHETIC** voyages of refrigerated shipping containers ("reefers").
//!
//! Everything here is invented: the routes, the unit models, the numbers and the rules that
//! tie them together. No row describes a real container, voyage, carrier or manufacturer.
//! The data exists so that `pollard demo` has something with a known, tunable shape to sweep;
//! it is never used to check the engine against outside results (those checks use scikit-learn
//! and open datasets, see `tests/`). Files written from it carry `synthetic` in their name
//! (the demo writes `reefer-voyages-synthetic.csv`).
//!
//! One row is one voyage of one container:
//!
//! | column | kind | meaning |
//! | --- | --- | --- |
//! | `route` | category | one of six invented routes ([`ROUTES`]) |
//! | `unit_model` | category | one of four invented refrigeration unit models ([`UNIT_MODELS`]) |
//! | `voyage_hours` | number | plug-in to plug-out time |
//! | `ambient_mean_c` | number | mean outside temperature, °C; missing in about 5% of rows (sensor dropout) |
//! | `set_point_c` | number | the cargo's target temperature, °C |
//! | `door_openings` | count | times the doors were opened on the way |
//! | `compressor_age_years` | number | age of the compressor; missing in about 3% of rows (records lost) |
//! | `shore_power_gaps` | count | times the unit ran without power (transfers, yard moves) |
//! | `excursion` | `yes` / `no` | classification target: did the cargo temperature leave its band? |
//! | `energy_kwh` | number | regression target: energy the unit drew on the voyage |
//!
//! A table holds one of the two targets ([`ReeferTarget`]); the features are the same for the
//! same seed and row count.
//!
//! The signal behind `excursion` is a points score with thresholds and interactions:
//! heat above 30 °C (one point plus a quarter point per degree beyond), frozen cargo
//! (set point below −10 °C) on a warm route (above 26 °C), many door openings (more than 6,
//! and again more than 10), an old compressor (over 9 years) on the two weaker unit models,
//! and repeated shore-power gaps (3 or more) on a long voyage (over 360 hours); one model is a
//! little sturdier than the rest. A voyage has an excursion when its score reaches 1.5, and
//! then 12% of the labels are flipped at random, so no tree can score above about 0.88 on
//! fresh rows: a stump misses most of the rule, a tree of depth 4 to 6 finds most of it, and a
//! deeper tree starts learning the flipped labels. `energy_kwh` grows with the voyage length
//! and the gap between ambient and set point, scaled by the unit model's efficiency and the
//! compressor's age, plus a little per door opening and per power gap, with about 10%
//! multiplicative noise.
//!
//! Generation uses [`SplitMix64`] only, so a seed gives the same table on every platform.

use std::fmt::Write;

use crate::data::csv::{read_dataset, CsvOptions};
use crate::data::Dataset;
use crate::sweep::folds::SplitMix64;

/// Which target column a synthetic voyage table carries.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum ReeferTarget {
    /// `excursion`: `yes` or `no` (classify).
    Excursion,
    /// `energy_kwh`: a positive number (regress).
    Energy,
}

impl ReeferTarget {
    /// The target column's name.
    pub fn column(self) -> &'static str {
        match self {
            ReeferTarget::Excursion => "excursion",
            ReeferTarget::Energy => "energy_kwh",
        }
    }
}

/// The file name the demo writes the synthetic table to.
pub const FILE_NAME: &str = "reefer-voyages-synthetic.csv";

/// The invented routes: name, mean ambient °C, ambient sd, shortest and longest voyage
/// (hours), mean door openings on a 400-hour voyage's first half.
const ROUTE_TABLE: [(&str, f64, f64, f64, f64, f64); 6] = [
    ("north-loop", 9.0, 4.0, 48.0, 200.0, 2.0),
    ("baltic-hop", 12.0, 4.0, 24.0, 120.0, 4.5),
    ("spice-run", 31.0, 3.0, 200.0, 600.0, 1.5),
    ("cape-arc", 24.0, 5.0, 300.0, 700.0, 1.0),
    ("gulf-shuttle", 33.0, 3.0, 24.0, 96.0, 5.0),
    ("pacific-long", 27.0, 4.0, 400.0, 800.0, 0.8),
];

/// The invented route names, in table order.
pub const ROUTES: [&str; 6] = ["north-loop", "baltic-hop", "spice-run", "cape-arc", "gulf-shuttle", "pacific-long"];

/// The invented unit models: name, share of the fleet, energy factor (1 = average).
const MODEL_TABLE: [(&str, f64, f64); 4] = [("kestrel-2", 0.30, 1.00), ("heron-5", 0.25, 1.15), ("osprey-3", 0.25, 0.90), ("tern-1", 0.20, 1.25)];

/// The invented unit model names, in table order.
pub const UNIT_MODELS: [&str; 4] = ["kestrel-2", "heron-5", "osprey-3", "tern-1"];

/// Cargo set points, °C: deep-frozen, frozen, chilled, dairy, fruit, tropical fruit.
const SET_POINTS: [f64; 6] = [-25.0, -18.0, -1.0, 2.0, 4.0, 13.0];

/// Share of rows whose `ambient_mean_c` is left empty.
pub const AMBIENT_MISSING: f64 = 0.05;
/// Share of rows whose `compressor_age_years` is left empty.
pub const AGE_MISSING: f64 = 0.03;
/// Share of `excursion` labels flipped after the rule is applied.
pub const LABEL_FLIP: f64 = 0.12;

/// One generated voyage, with both targets.
#[derive(Clone, Debug, PartialEq)]
struct Voyage {
    route: usize,
    model: usize,
    hours: f64,
    ambient: f64,
    ambient_seen: bool,
    set_point: f64,
    doors: u32,
    age: f64,
    age_seen: bool,
    gaps: u32,
    excursion: bool,
    energy: f64,
}

struct Draw(SplitMix64);

impl Draw {
    /// Uniform in [0, 1) from the top 53 bits.
    fn unit(&mut self) -> f64 {
        (self.0.next() >> 11) as f64 * (1.0 / (1u64 << 53) as f64)
    }
    fn between(&mut self, lo: f64, hi: f64) -> f64 {
        lo + (hi - lo) * self.unit()
    }
    /// Standard normal by the Box–Muller transform (Box & Muller, 1958).
    fn normal(&mut self) -> f64 {
        let u1 = 1.0 - self.unit(); // in (0, 1]
        let u2 = self.unit();
        (-2.0 * u1.ln()).sqrt() * (std::f64::consts::TAU * u2).cos()
    }
    /// Poisson by Knuth's product-of-uniforms method (TAOCP vol. 2, §3.4.1); λ here is small.
    fn poisson(&mut self, lambda: f64) -> u32 {
        let limit = (-lambda).exp();
        let (mut k, mut p) = (0u32, 1.0);
        loop {
            p *= self.unit();
            if p <= limit {
                return k;
            }
            k += 1;
        }
    }
    fn weighted(&mut self, weights: impl Iterator<Item = f64> + Clone) -> usize {
        let total: f64 = weights.clone().sum();
        let mut x = self.unit() * total;
        let n = weights.clone().count();
        for (i, w) in weights.enumerate() {
            if x < w {
                return i;
            }
            x -= w;
        }
        n - 1
    }
}

/// The excursion rule's score before label noise (see the module documentation).
fn risk_points(v: &Voyage) -> f64 {
    let mut s = 0.0;
    if v.ambient > 30.0 {
        s += 1.0 + 0.25 * (v.ambient - 30.0);
    }
    if v.set_point < -10.0 && v.ambient > 26.0 {
        s += 0.8;
    }
    if v.doors > 6 {
        s += 1.0;
    }
    if v.doors > 10 {
        s += 0.7;
    }
    let weak_model = matches!(UNIT_MODELS[v.model], "heron-5" | "tern-1");
    if weak_model && v.age > 9.0 {
        s += 1.6;
    }
    if v.hours > 360.0 && v.gaps >= 3 {
        s += 1.5;
    }
    if UNIT_MODELS[v.model] == "osprey-3" {
        s -= 0.4;
    }
    s
}

fn voyage(d: &mut Draw) -> Voyage {
    // Every draw happens for every row in a fixed order, whichever target is asked for.
    let route = d.weighted(ROUTE_TABLE.iter().map(|_| 1.0));
    let (_, amb_mean, amb_sd, h_lo, h_hi, door_rate) = ROUTE_TABLE[route];
    let model = d.weighted(MODEL_TABLE.iter().map(|m| m.1));
    let hours = (d.between(h_lo, h_hi) * 10.0).round() / 10.0;
    let ambient = ((amb_mean + amb_sd * d.normal()) * 10.0).round() / 10.0;
    let set_point = SET_POINTS[d.below(SET_POINTS.len())];
    let doors = d.poisson(door_rate * (1.0 + hours / 400.0));
    let age = (d.between(0.0, 16.0) * 10.0).round() / 10.0;
    let gaps = d.poisson(0.4 + hours / 250.0);
    let ambient_seen = d.unit() >= AMBIENT_MISSING;
    let age_seen = d.unit() >= AGE_MISSING;
    let flip = d.unit() < LABEL_FLIP;
    let noise = d.normal();
    let mut v = Voyage { route, model, hours, ambient, ambient_seen, set_point, doors, age, age_seen, gaps, excursion: false, energy: 0.0 };
    v.excursion = (risk_points(&v) >= 1.5) != flip;
    let kw = (0.9 + 0.045 * (ambient - set_point).max(0.0)) * MODEL_TABLE[model].2 * (1.0 + 0.04 * age);
    let raw = hours * kw + 1.8 * doors as f64 + 4.0 * gaps as f64;
    v.energy = ((raw * (0.10 * noise).exp()) * 10.0).round() / 10.0;
    v
}

impl Draw {
    fn below(&mut self, n: usize) -> usize {
        self.0.below(n as u64) as usize
    }
}

/// SYNTHETIC reefer-container voyages as CSV text with a header row, `rows` data rows and the
/// chosen target as the last column. The same `(rows, seed)` gives the same features for both
/// targets, and the same text on every call. Missing readings are empty cells. The data is
/// invented (see the module documentation); save it under a name that says so, such as
/// [`FILE_NAME`].
pub fn voyages_csv(rows: usize, seed: u64, target: ReeferTarget) -> String {
    let mut d = Draw(SplitMix64::new(seed ^ 0x7265_6566_6572_0001));
    let mut out = String::with_capacity(64 * (rows + 1));
    out.push_str("route,unit_model,voyage_hours,ambient_mean_c,set_point_c,door_openings,compressor_age_years,shore_power_gaps,");
    out.push_str(target.column());
    out.push('\n');
    for _ in 0..rows {
        let v = voyage(&mut d);
        let _ = write!(out, "{},{},{:.1},", ROUTES[v.route], UNIT_MODELS[v.model], v.hours);
        if v.ambient_seen {
            let _ = write!(out, "{:.1}", v.ambient);
        }
        let _ = write!(out, ",{},{},", v.set_point, v.doors);
        if v.age_seen {
            let _ = write!(out, "{:.1}", v.age);
        }
        let _ = write!(out, ",{},", v.gaps);
        match target {
            ReeferTarget::Excursion => out.push_str(if v.excursion { "yes" } else { "no" }),
            ReeferTarget::Energy => {
                let _ = write!(out, "{:.1}", v.energy);
            }
        }
        out.push('\n');
    }
    out
}

/// SYNTHETIC reefer-container voyages as a [`Dataset`], read from [`voyages_csv`] by the same
/// CSV reader an upload goes through, so it is exactly what a client uploading that text gets.
pub fn voyages(rows: usize, seed: u64, target: ReeferTarget) -> Dataset {
    let text = voyages_csv(rows, seed, target);
    read_dataset(text.as_bytes(), &CsvOptions::new(target.column())).expect("the generated table is valid CSV")
}

#[cfg(test)]
mod tests {
    use std::sync::atomic::AtomicBool;

    use super::*;
    use crate::data::{Column, ColumnKind, Target, Task};
    use crate::sweep::{sweep, Flow, Metric, Range, SettingScore, SweepSpec};

    #[test]
    fn same_seed_same_table_and_features_shared_by_both_targets() {
        let a = voyages_csv(800, 11, ReeferTarget::Excursion);
        assert_eq!(a, voyages_csv(800, 11, ReeferTarget::Excursion));
        assert_ne!(a, voyages_csv(800, 12, ReeferTarget::Excursion));
        let b = voyages_csv(800, 11, ReeferTarget::Energy);
        let strip = |t: &str| t.lines().skip(1).map(|l| l.rsplit_once(',').unwrap().0.to_string()).collect::<Vec<_>>();
        assert_eq!(strip(&a), strip(&b));
        // A shorter table is a prefix of a longer one with the same seed.
        assert!(a.starts_with(&voyages_csv(300, 11, ReeferTarget::Excursion)));
    }

    #[test]
    fn shape_missing_cells_and_class_balance() {
        let n = 5000;
        let data = voyages(n, 3, ReeferTarget::Excursion);
        assert_eq!(data.rows(), n);
        assert_eq!(data.task(), Task::Classify);
        let names: Vec<&str> = data.frame.features.iter().map(|f| f.name.as_str()).collect();
        assert_eq!(names, ["route", "unit_model", "voyage_hours", "ambient_mean_c", "set_point_c", "door_openings", "compressor_age_years", "shore_power_gaps"]);
        let kinds: Vec<ColumnKind> = data.frame.features.iter().map(|f| f.column.kind()).collect();
        assert_eq!(&kinds[..2], [ColumnKind::Categorical, ColumnKind::Categorical]);
        assert!(kinds[2..].iter().all(|k| *k == ColumnKind::Numeric));
        let Column::Categorical { levels, .. } = &data.frame.features[0].column else { panic!("route is categorical") };
        assert_eq!(levels.len(), 6);
        let missing = |i: usize| (0..n).filter(|&r| data.frame.features[i].column.is_missing(r)).count() as f64 / n as f64;
        let (amb, age) = (missing(3), missing(6));
        assert!((0.04..0.06).contains(&amb), "ambient missing share {amb}");
        assert!((0.02..0.04).contains(&age), "age missing share {age}");
        for i in [0, 1, 2, 4, 5, 7] {
            assert_eq!(missing(i), 0.0, "column {i}");
        }
        let Target::Classes { codes, labels } = &data.target else { panic!("classes") };
        assert_eq!(labels, &["no", "yes"]);
        let yes = codes.iter().filter(|&&c| c == 1).count() as f64 / n as f64;
        assert!((0.2..0.5).contains(&yes), "excursion share {yes}");
        let energy = voyages(n, 3, ReeferTarget::Energy);
        assert_eq!(energy.task(), Task::Regress);
        let Target::Values(v) = &energy.target else { panic!("values") };
        assert!(v.iter().all(|&x| x > 0.0));
    }

    /// Size, not speed (speed belongs in benches/): 5000 rows come back whole, and the text
    /// fits the space `voyages_csv` reserves up front (64 bytes a row), so its buffer never
    /// grows while it is written.
    #[test]
    fn five_thousand_rows_read_back_whole_within_the_reserved_space() {
        let rows = 5000;
        let text = voyages_csv(rows, 1, ReeferTarget::Excursion);
        assert!(text.len() <= 64 * (rows + 1), "{} bytes for {rows} rows", text.len());
        assert_eq!(text.lines().count(), rows + 1);
        assert!(text.lines().all(|l| l.split(',').count() == 9), "every line has 9 cells");
        let data = voyages(rows, 1, ReeferTarget::Excursion);
        assert_eq!((data.rows(), data.frame.features.len()), (rows, 8));
    }

    fn one_limit_sweep(data: &Dataset, set: impl FnOnce(&mut SweepSpec)) -> Vec<SettingScore> {
        let mut spec = SweepSpec { seed: 5, fit_final: false, ..SweepSpec::default() };
        set(&mut spec);
        let (_, result) = sweep(data, &spec, &|_, _| Flow::Continue, &AtomicBool::new(false)).unwrap();
        result.scores
    }

    fn table(label: &str, values: &[String], s: &[SettingScore]) -> String {
        let mut t = format!("{label:>14} {:>8} {:>8} {:>8} {:>8} {:>8}\n", "train", "valid", "sd", "gap", "leaves");
        for (v, s) in values.iter().zip(s) {
            t += &format!("{v:>14} {:>8.4} {:>8.4} {:>8.4} {:>8.4} {:>8.1}\n", s.train_mean, s.valid_mean, s.valid_sd, s.gap, s.mean_leaves);
        }
        t
    }

    fn argmax(s: &[SettingScore]) -> usize {
        (0..s.len()).max_by(|&a, &b| s[a].valid_mean.total_cmp(&s[b].valid_mean).then(b.cmp(&a))).unwrap()
    }

    /// The scenario does what the demo needs: stumps underfit, deep trees overfit.
    #[test]
    fn depth_sweep_peaks_in_the_middle_and_the_gap_grows() {
        let data = voyages(3000, 2024, ReeferTarget::Excursion);
        let depths: Vec<u32> = (1..=12).collect();
        let t = std::time::Instant::now();
        let s = one_limit_sweep(&data, |spec| spec.max_depth = Some(Range::Values(depths.iter().map(|&d| Some(d as f64)).collect())));
        eprintln!("reefer: 5-fold accuracy by max_depth, 3000 rows (sweep took {:?})\n{}", t.elapsed(), table("max_depth", &depths.iter().map(|d| d.to_string()).collect::<Vec<_>>(), &s));
        assert_eq!(s.len(), 12);
        let best = argmax(&s);
        assert!((3..=8).contains(&depths[best]), "validation peaks at depth {}", depths[best]);
        // Underfit at the stump, overfit at the deep end, both clearly.
        assert!(s[best].valid_mean - s[0].valid_mean > 0.03, "stump {} vs best {}", s[0].valid_mean, s[best].valid_mean);
        assert!(s[best].valid_mean - s[11].valid_mean > 0.02, "depth 12 {} vs best {}", s[11].valid_mean, s[best].valid_mean);
        // Training accuracy keeps rising past the peak.
        for d in best..11 {
            assert!(s[d + 1].train_mean >= s[d].train_mean, "train falls from depth {} to {}", depths[d], depths[d + 1]);
        }
        assert!(s[11].train_mean - s[best].train_mean > 0.05);
        // The gap grows with depth (allowing fold noise of half a point between neighbours
        // below the peak) and is large at the deep end.
        for d in 0..11 {
            assert!(s[d + 1].gap >= s[d].gap - 0.005, "gap falls from depth {} to {}", depths[d], depths[d + 1]);
        }
        assert!(s[11].gap > s[best].gap + 0.05 && s[best].gap < 0.05, "gaps {} at best, {} at 12", s[best].gap, s[11].gap);
        // The ceiling set by the 12% flipped labels is not beaten.
        assert!(s[best].valid_mean < 0.9);
    }

    #[test]
    fn one_row_leaves_overfit() {
        let data = voyages(3000, 2024, ReeferTarget::Excursion);
        let leaf: Vec<u32> = vec![1, 2, 5, 10, 20, 40, 80, 160, 320];
        let s = one_limit_sweep(&data, |spec| spec.min_leaf_rows = Some(Range::Values(leaf.iter().map(|&d| Some(d as f64)).collect())));
        eprintln!("reefer: 5-fold accuracy by min_leaf_rows, no depth limit, 3000 rows\n{}", table("min_leaf_rows", &leaf.iter().map(|d| d.to_string()).collect::<Vec<_>>(), &s));
        let best = argmax(&s);
        assert!(leaf[best] >= 10 && leaf[best] <= 160, "validation peaks at min_leaf_rows {}", leaf[best]);
        assert!(s[best].valid_mean - s[0].valid_mean > 0.04);
        assert!(s[0].train_mean > 0.99, "one-row leaves fit the training rows: {}", s[0].train_mean);
        // The gap shrinks as leaves grow, up to the peak; past it the gap is fold noise.
        for i in 0..best {
            assert!(s[i].gap > s[i + 1].gap, "gap does not shrink from {} to {}", leaf[i], leaf[i + 1]);
        }
        assert!(s[0].gap > 0.2 && s[best].gap < 0.05, "gaps {} at 1, {} at best", s[0].gap, s[best].gap);
        // Leaves too large underfit again.
        assert!(s[best].valid_mean - s[leaf.len() - 1].valid_mean > 0.01);
    }

    #[test]
    fn energy_deep_trees_overfit_too() {
        let data = voyages(3000, 2024, ReeferTarget::Energy);
        let depths: Vec<u32> = (1..=14).collect();
        let s = one_limit_sweep(&data, |spec| {
            spec.max_depth = Some(Range::Values(depths.iter().map(|&d| Some(d as f64)).collect()));
            spec.metric = Some(Metric::R2);
        });
        eprintln!("reefer: 5-fold R² of energy_kwh by max_depth, 3000 rows\n{}", table("max_depth", &depths.iter().map(|d| d.to_string()).collect::<Vec<_>>(), &s));
        let best = argmax(&s);
        assert!((4..=12).contains(&depths[best]), "validation peaks at depth {}", depths[best]);
        assert!(s[best].valid_mean > 0.8 && s[best].valid_mean - s[0].valid_mean > 0.2);
        assert!(s[13].gap > s[best].gap && s[13].train_mean > 0.99);
    }
}
