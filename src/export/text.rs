//! The plain-text model rendering, for reading a tree in a terminal.
//!
//! One line per node, two spaces of indentation per level. A condition's line states its
//! test and is followed by its two branches: `holds ▸` (the test is true) first and
//! `fails ▸` second. A leaf's line starts with `leaf:`, so a class named like a branch word
//! cannot be read as one. Each condition says which branch cells with no value take
//! (`blank cells: holds`). The last line sums the tree up.
//!
//! ```text
//! colour in {red, back\slash}  ·  15 rows (100%)  ·  blank cells: holds
//!   holds ▸ length <= 4.5  ·  9 rows (60%)  ·  blank cells: holds
//!     holds ▸ leaf: scrap 100%  ·  5 rows (33.3%)
//!     fails ▸ colour in {back\slash}  ·  4 rows (26.7%)  ·  blank cells: fails
//!       holds ▸ leaf: scrap 100%  ·  1 row (6.7%)
//!       fails ▸ leaf: keep 100%  ·  3 rows (20%)
//!   fails ▸ leaf: keep 100%  ·  6 rows (40%)
//! 4 leaves, depth 3, 15 rows; target target (classify)
//! ```
//!
//! (the classify tree of this file's tests.)
//!
//! Tests read `column <= value` (value as short as the training data allows, see
//! [`show_threshold`]), `column is present`, or `column in {a, b}` (at most eight
//! categories are listed, then `… (+N more)`). Shares of rows are of all training rows. A
//! classify leaf shows its most likely class (lowest class code on ties, as prediction does)
//! and that class's share of the leaf's (weighted) rows; a regress leaf shows its mean to
//! four significant digits. Control characters in names are written as Rust-style escapes so
//! every node stays on one line.
//!
//! The helpers here are shared with the DOT rendering, so both say the same thing.

use std::fmt::Write as _;

use crate::data::Task;
use crate::tree::{Split, SplitRule, Tree};

/// Most categories a `column in {…}` test lists before summing up the rest.
pub(crate) const MAX_LISTED: usize = 8;

/// Renders a tree as indented plain text, ending with a one-line summary.
pub fn to_text(tree: &Tree) -> String {
    let mut out = String::new();
    // Explicit stack of (node, indentation level, branch word): deep trees cannot overflow.
    let mut stack: Vec<(usize, usize, Option<&str>)> = vec![(0, 0, None)];
    while let Some((i, level, branch)) = stack.pop() {
        let node = &tree.nodes[i];
        for _ in 0..level {
            out.push_str("  ");
        }
        if let Some(word) = branch {
            out.push_str(word);
            out.push_str(" ▸ ");
        }
        match &node.split {
            Some(split) => {
                let _ = writeln!(out, "{}  ·  {}  ·  blank cells: {}", describe_test(tree, split), rows_of(tree, i), branch_word(split.missing_left));
                stack.push((node.right as usize, level + 1, Some(branch_word(false))));
                stack.push((node.left as usize, level + 1, Some(branch_word(true))));
            }
            None => {
                let _ = writeln!(out, "leaf: {}  ·  {}", prediction(tree, i), rows_of(tree, i));
            }
        }
    }
    out.push_str(&summary(tree));
    out.push('\n');
    out
}

/// The branch a test's outcome leads to: `holds` (left, the test is true) or `fails`.
pub(crate) fn branch_word(left: bool) -> &'static str {
    if left {
        "holds"
    } else {
        "fails"
    }
}

/// `3 leaves, depth 2, 150 rows; target species (classify)`.
pub(crate) fn summary(tree: &Tree) -> String {
    let leaves = tree.n_leaves();
    format!(
        "{leaves} {}, depth {}, {}; target {} ({})",
        if leaves == 1 { "leaf" } else { "leaves" },
        tree.depth(),
        count_rows(root_rows(tree)),
        clean(&tree.target),
        tree.task
    )
}

/// A threshold as a reader wants it. Cells are stored as `f32` and a fit's threshold is the
/// midpoint, taken in `f64`, of two neighbouring training values `lo < hi` at its node
/// (`30.65000057220459` between 30.6 and 30.7). With that pair known (`between`), the shown
/// number is the decimal with the fewest significant digits, and among those the one nearest
/// the threshold, that read as an `f32` lies strictly between `lo` and `hi`: it sends every
/// training value the way the threshold does (`31.85`, not `31.849998`). Without the pair,
/// or when no `f32` lies between them, the shown number is the largest `f32` at or below the
/// threshold in its shortest form, which splits every possible cell alike. The model file
/// keeps the exact threshold.
pub(crate) fn show_threshold(t: f64, between: Option<(f32, f32)>) -> String {
    if !t.is_finite() {
        return t.to_string();
    }
    if let Some(short) = between.and_then(|(lo, hi)| shortest_between(t, lo, hi)) {
        return short;
    }
    let near = t as f32;
    let below = if near as f64 <= t { near } else { near.next_down() };
    below.to_string()
}

/// The shortest decimal `d` (1 to 9 significant digits; nearest `t` among the shortest) with
/// `lo < d as f32 < hi`, the string itself parsed. At `p` digits the candidates are `t`
/// rounded to `p` digits and its two neighbours at `p` digits, which include `t` rounded down
/// and up; since `f32` parsing is monotone, a `p`-digit decimal between `lo` and `hi` exists
/// only if one of those is. `None` when there is none (no `f32` lies between `lo` and `hi`).
fn shortest_between(t: f64, lo: f32, hi: f32) -> Option<String> {
    for p in 1..=9usize {
        // `{:.Ne}` rounds the exact binary value correctly: `3.07e1`.
        let sci = format!("{:.*e}", p - 1, t.abs());
        let (mantissa, exp) = sci.split_once('e')?;
        let digits: u64 = mantissa.replace('.', "").parse().ok()?;
        let exp = exp.parse::<i32>().ok()? - (p as i32 - 1);
        let mut best: Option<(f64, String)> = None;
        for m in [digits.saturating_sub(1), digits, digits + 1] {
            let shown = plain_decimal(t < 0.0, m, exp);
            let Ok(v) = shown.parse::<f32>() else { continue };
            if lo < v && v < hi {
                let off = (shown.parse::<f64>().ok()? - t).abs();
                if best.as_ref().is_none_or(|(b, _)| off < *b) {
                    best = Some((off, shown));
                }
            }
        }
        if let Some((_, shown)) = best {
            return Some(shown);
        }
    }
    None
}

/// `m × 10^exp` written out without an exponent, trailing zeros dropped: `3065, -2` is `30.65`.
fn plain_decimal(negative: bool, mut m: u64, mut exp: i32) -> String {
    if m == 0 {
        return "0".to_string();
    }
    while m % 10 == 0 {
        m /= 10;
        exp += 1;
    }
    let digits = m.to_string();
    let mut out = String::from(if negative { "-" } else { "" });
    if exp >= 0 {
        out.push_str(&digits);
        out.extend(std::iter::repeat_n('0', exp as usize));
    } else {
        let point = digits.len() as i64 + exp as i64;
        if point > 0 {
            out.push_str(&digits[..point as usize]);
            out.push('.');
            out.push_str(&digits[point as usize..]);
        } else {
            out.push_str("0.");
            out.extend(std::iter::repeat_n('0', (-point) as usize));
            out.push_str(&digits);
        }
    }
    out
}

/// The test of a split, as a reader would say it: `x <= 2.45`, `x is present`, `c in {a, b}`.
pub(crate) fn describe_test(tree: &Tree, split: &Split) -> String {
    let column = tree.columns.get(split.feature as usize);
    let name = column.map_or_else(|| format!("column {}", split.feature), |c| clean(&c.name));
    match &split.rule {
        SplitRule::Threshold(t) if *t == f64::INFINITY => format!("{name} is present"),
        SplitRule::Threshold(t) => format!("{name} <= {}", show_threshold(*t, split.between)),
        SplitRule::Categories(bits) => {
            let levels = column.map_or(&[][..], |c| &c.levels[..]);
            let chosen: Vec<&String> = levels
                .iter()
                .enumerate()
                .filter(|(code, _)| SplitRule::category_left(bits, *code as u32))
                .map(|(_, level)| level)
                .collect();
            let listed: Vec<String> = chosen.iter().take(MAX_LISTED).map(|l| clean(l)).collect();
            let mut set = listed.join(", ");
            if chosen.len() > MAX_LISTED {
                let _ = write!(set, ", … (+{} more)", chosen.len() - MAX_LISTED);
            }
            format!("{name} in {{{set}}}")
        }
    }
}

/// What a node predicts: `malignant 94.1%` (class and its share) or `mean 3.142`.
pub(crate) fn prediction(tree: &Tree, node: usize) -> String {
    match tree.task {
        Task::Classify => {
            let class = tree.leaf_class(node as u32) as usize;
            let label = tree.labels.get(class).map_or_else(|| format!("class {class}"), |l| clean(l));
            format!("{label} {}", percent(tree.value(node)[class]))
        }
        Task::Regress => format!("mean {}", sig4(tree.value(node)[0])),
    }
}

/// `50 rows (33.3%)`: the node's training rows and their share of all training rows.
pub(crate) fn rows_of(tree: &Tree, node: usize) -> String {
    let rows = tree.nodes[node].rows;
    let all = root_rows(tree);
    let share = if all == 0 { 0.0 } else { rows as f64 / all as f64 };
    format!("{} ({})", count_rows(rows), percent(share))
}

fn root_rows(tree: &Tree) -> u32 {
    tree.nodes.first().map_or(0, |n| n.rows)
}

fn count_rows(rows: u32) -> String {
    if rows == 1 {
        "1 row".to_string()
    } else {
        format!("{rows} rows")
    }
}

/// A fraction as a percentage with at most one decimal: `33.3%`, `25%`. A fraction that is
/// not exactly 0 or 1 never reads as `0%` or `100%`.
pub(crate) fn percent(fraction: f64) -> String {
    let p = fraction * 100.0;
    let mut s = format!("{p:.1}");
    if let Some(stripped) = s.strip_suffix(".0") {
        s = stripped.to_string();
    }
    if s == "100" && fraction < 1.0 {
        return ">99.9%".to_string();
    }
    if s == "0" && fraction > 0.0 {
        return "<0.1%".to_string();
    }
    s.push('%');
    s
}

/// A number to four significant digits, trailing zeros dropped: `3.142`, `12350`, `0.5`.
/// Magnitudes below 1e-4 or from 1e9 up use exponent form (`1.235e-5`).
pub(crate) fn sig4(value: f64) -> String {
    if !value.is_finite() {
        return format!("{value}");
    }
    if value == 0.0 {
        return "0".to_string();
    }
    // Rounding to four digits first settles the exponent (9.99996 becomes 1.000e1).
    let sci = format!("{value:.3e}");
    let (mantissa, exp) = sci.split_once('e').expect("exponent form has an 'e'");
    let exp: i32 = exp.parse().expect("exponent is an integer");
    if !(-4..9).contains(&exp) {
        return format!("{}e{exp}", trim_zeros(mantissa));
    }
    let rounded: f64 = sci.parse().expect("exponent form parses");
    let decimals = (3 - exp).max(0) as usize;
    trim_zeros(&format!("{rounded:.decimals$}")).to_string()
}

fn trim_zeros(s: &str) -> &str {
    if s.contains('.') {
        s.trim_end_matches('0').trim_end_matches('.')
    } else {
        s
    }
}

/// A name with control characters escaped, so it cannot break a line.
pub(crate) fn clean(name: &str) -> String {
    if !name.chars().any(char::is_control) {
        return name.to_string();
    }
    name.chars()
        .map(|c| if c.is_control() { c.escape_default().to_string() } else { c.to_string() })
        .collect()
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;
    use crate::data::{Column, ColumnKind, Feature, Frame, Target, MISSING_CODE};
    use crate::tree::{fit, ColumnInfo, FitOptions, Node, TrainSet, NO_NODE};

    fn mid(a: f32, b: f32) -> f64 {
        a as f64 / 2.0 + b as f64 / 2.0
    }

    /// Significant digits of a plain decimal: `30.65` has 4, `-0.5` 1, `1200` 2, `0` none.
    fn sig_digits(shown: &str) -> usize {
        let digits: String = shown.chars().filter(char::is_ascii_digit).collect();
        digits.trim_start_matches('0').trim_end_matches('0').len()
    }

    /// Checks the shown threshold of the pair `(lo, hi)` against the rule: read as an `f32` it
    /// lies strictly between them when some `f32` does (at `lo` otherwise), and it has no more
    /// significant digits than the display without the pair.
    fn check_between(lo: f32, hi: f32) -> String {
        let t = mid(lo, hi);
        let shown = show_threshold(t, Some((lo, hi)));
        let v: f32 = shown.parse().unwrap_or_else(|e| panic!("{shown}: {e}"));
        if lo.next_up() < hi {
            assert!(lo < v && v < hi, "({lo:e}, {hi:e}) shown as {shown}");
        } else {
            assert!(lo <= v && v < hi, "adjacent ({lo:e}, {hi:e}) shown as {shown}");
        }
        let old = show_threshold(t, None);
        assert!(sig_digits(&shown) <= sig_digits(&old), "({lo:e}, {hi:e}): {shown} is longer than {old}");
        // None shorter lies between: with fewer digits, neither t rounded nor its neighbours
        // at that many digits (written in exponent form, `3185e-2`) do.
        for q in 1..sig_digits(&shown) {
            let rounded = format!("{:.*e}", q - 1, t);
            let (mantissa, exp) = rounded.split_once('e').unwrap();
            let m: i64 = mantissa.replace('.', "").parse().unwrap();
            let exp = exp.parse::<i32>().unwrap() - (q as i32 - 1);
            for near in [m - 1, m, m + 1] {
                let v: f32 = format!("{near}e{exp}").parse().unwrap();
                assert!(!(lo < v && v < hi), "({lo:e}, {hi:e}): {near}e{exp} is shorter than {shown}");
            }
        }
        shown
    }

    #[test]
    fn without_the_training_pair_thresholds_split_every_f32_alike() {
        assert_eq!(show_threshold(mid(30.6, 30.7), None), "30.65");
        assert_eq!(show_threshold(mid(31.8, 31.9), None), "31.849998");
        assert_eq!(show_threshold(mid(2.4, 2.5), None), "2.45");
        assert_eq!(show_threshold(mid(-1.0, 0.0), None), "-0.5");
        assert_eq!(show_threshold(f64::INFINITY, None), "inf");
        // Neighbouring cells, tiny and large values, negatives: the shown number, read as an
        // f32 the way cells are stored, sends the f32 values around the threshold the way the
        // threshold does.
        let one = 1.0f32;
        for (x, y) in [(30.6f32, 30.7f32), (31.8, 31.9), (one, one.next_up()), (0.1, 0.2), (123456.7, 123456.8), (-3.3, -3.2), (1e-30, 2e-30), (0.0, 1e-8)] {
            let t = mid(x, y);
            let shown: f32 = show_threshold(t, None).parse().unwrap();
            let below = if (t as f32) as f64 <= t { t as f32 } else { (t as f32).next_down() };
            for v in [below.next_down(), below, below.next_up(), below.next_up().next_up(), x, y] {
                assert_eq!(v as f64 <= t, v <= shown, "{v} against {t} shown as {shown}");
            }
        }
    }

    #[test]
    fn with_the_training_pair_thresholds_show_the_shortest_decimal_between() {
        for (lo, hi, shown) in [(30.6f32, 30.7f32, "30.65"), (31.8, 31.9, "31.85"), (2.4, 2.5, "2.45"), (-1.0, 0.0, "-0.5"), (1.9, 3.0, "2"), (0.6, 1.0, "0.8"), (-31.9, -31.8, "-31.85"), (123456.7, 123456.8, "123456.75"), (99.5, 100.5, "100"), (0.0, 1e-8, "0.000000005")] {
            assert_eq!(check_between(lo, hi), shown, "({lo}, {hi})");
        }
        // No f32 lies between 1 and the next f32: the shown 1 still sends 1 left and the
        // other right.
        assert_eq!(check_between(1.0, 1.0f32.next_up()), "1");
        // The "is present" test has no pair.
        assert_eq!(show_threshold(f64::INFINITY, Some((1.0, 2.0))), "inf");
    }

    #[test]
    fn shown_thresholds_lie_between_random_training_pairs() {
        let mut rng = crate::sweep::folds::SplitMix64::new(0x7468_7265_7368);
        let mut seen = 0;
        while seen < 20_000 {
            let kind = rng.next() % 4;
            let a = match kind {
                // Any finite f32, tiny and huge ones included.
                0 => f32::from_bits(rng.next() as u32),
                // Values as tables write them: a few decimal digits.
                1 => ((rng.next() % 200_000) as f32 - 100_000.0) / 10f32.powi((rng.next() % 6) as i32),
                // Near zero and near powers of two.
                2 => 2f32.powi((rng.next() % 60) as i32 - 30) * if rng.next() % 2 == 0 { 1.0 } else { -1.0 },
                _ => ((rng.next() % 2_000) as f32 - 1_000.0) / 100.0,
            };
            // The other value: a few f32 steps away, or a random one of the same kind.
            let mut b = a;
            if rng.next() % 2 == 0 {
                for _ in 0..=rng.next() % 4 {
                    b = b.next_up();
                }
            } else {
                b = ((rng.next() % 2_000) as f32 - 1_000.0) / 10f32.powi((rng.next() % 4) as i32);
            }
            if !a.is_finite() || !b.is_finite() || a == b {
                continue;
            }
            check_between(a.min(b), a.max(b));
            seen += 1;
        }
    }

    /// Every split of trees fitted on the open datasets (and the synthetic ones with missing
    /// cells, see tests/data/SOURCES.md): the shown threshold, read back, sends every training
    /// row that reached the node the way the stored threshold does.
    #[test]
    fn shown_thresholds_route_the_training_rows_like_the_stored_ones() {
        use crate::data::csv::{read_dataset, CsvOptions};
        let mut shortened = 0;
        for file in ["iris.csv", "wine.csv", "breast_cancer.csv", "diabetes.csv", "synthetic_missing.csv", "synthetic_missing_reg.csv"] {
            let path = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/data").join(file);
            let data = read_dataset(std::fs::File::open(&path).unwrap(), &CsvOptions::new("target")).unwrap();
            let task = match data.target {
                Target::Classes { .. } => Task::Classify,
                Target::Values(_) => Task::Regress,
            };
            let tree = fit(&TrainSet::of(&data), &FitOptions::default().check(task).unwrap()).unwrap();
            let mut checked = 0;
            for row in 0..data.frame.rows {
                let mut i = 0usize;
                while let Some(split) = &tree.nodes[i].split {
                    let left = match (&split.rule, &data.frame.features[split.feature as usize].column) {
                        (SplitRule::Threshold(t), Column::Numeric(v)) if v[row].is_nan() => {
                            assert!(split.between.is_some() || *t == f64::INFINITY, "{file}: node {i} has no pair");
                            split.missing_left
                        }
                        (SplitRule::Threshold(t), Column::Numeric(_)) if *t == f64::INFINITY => {
                            assert_eq!(split.between, None);
                            true
                        }
                        (SplitRule::Threshold(t), Column::Numeric(v)) => {
                            let (lo, hi) = split.between.unwrap_or_else(|| panic!("{file}: node {i} has no pair"));
                            let test = describe_test(&tree, split);
                            let shown = test.rsplit_once(" <= ").unwrap_or_else(|| panic!("{test}")).1;
                            let (as_f32, as_f64): (f32, f64) = (shown.parse().unwrap(), shown.parse().unwrap());
                            let x = v[row];
                            let left = (x as f64) <= *t;
                            assert_eq!(x <= as_f32, left, "{file}: row {row} ({x}) at node {i}: {test}, threshold {t}");
                            assert_eq!((x as f64) <= as_f64, left, "{file}: row {row} ({x}) at node {i}: {test}, threshold {t}");
                            assert!(x <= lo || x >= hi, "{file}: row {row} ({x}) lies inside the pair ({lo}, {hi})");
                            checked += 1;
                            left
                        }
                        (SplitRule::Categories(bits), Column::Categorical { codes, .. }) => {
                            assert_eq!(split.between, None);
                            let c = codes[row];
                            if c == MISSING_CODE {
                                split.missing_left
                            } else {
                                SplitRule::category_left(bits, c)
                            }
                        }
                        _ => unreachable!("a split on a column of the other kind"),
                    };
                    i = if left { tree.nodes[i].left } else { tree.nodes[i].right } as usize;
                }
                assert_eq!(i as u32, tree.apply_row(&data.frame, row), "{file}: row {row} walked to another leaf");
            }
            assert!(checked > 0, "{file}: no threshold checked");
            for split in tree.nodes.iter().filter_map(|n| n.split.as_ref()) {
                if let (SplitRule::Threshold(t), Some(_)) = (&split.rule, split.between) {
                    shortened += usize::from(sig_digits(&show_threshold(*t, split.between)) < sig_digits(&show_threshold(*t, None)));
                }
            }
        }
        assert!(shortened > 0, "no threshold came out shorter than before");
    }

    /// Category names of the small frame, with DOT's troublemakers among them.
    pub(crate) const COLOURS: [&str; 4] = ["red", "a\"b{c}", "<blue>", "back\\slash"];

    /// Fifteen rows: `length` alone cannot separate the classes (equal lengths carry both),
    /// nor can `colour` (red carries both), so a pure tree needs both columns. One cell of
    /// each column is missing.
    pub(crate) fn small_frame() -> Frame {
        let length = vec![1.0, 2.0, 3.0, 6.0, 7.0, 8.0, 1.0, 2.0, 7.0, 3.0, 4.0, 8.0, 2.0, 6.0, f32::NAN];
        let colour = vec![0, 0, 0, 0, 0, 0, 1, 1, 1, 2, 2, 2, 3, 3, MISSING_CODE];
        Frame::new(vec![
            Feature { name: "length".into(), column: Column::Numeric(length) },
            Feature {
                name: "colour".into(),
                column: Column::Categorical { codes: colour, levels: COLOURS.iter().map(|s| s.to_string()).collect() },
            },
        ])
        .unwrap()
    }

    pub(crate) fn classify_tree() -> Tree {
        let frame = small_frame();
        let codes = vec![0, 0, 0, 1, 1, 1, 1, 1, 1, 1, 1, 1, 0, 0, 0];
        let target = Target::Classes { codes, labels: vec!["scrap".into(), "keep".into()] };
        let opts = FitOptions::default().check(Task::Classify).unwrap();
        fit(&TrainSet::new(&frame, &target), &opts).unwrap()
    }

    /// Regress on the same frame with `max_depth` 1: the target is 1.5 below length 5 and
    /// 10.5 above it (the missing-length row has 1.5), so the root splits at 5 and its
    /// children are pure leaves.
    pub(crate) fn regress_tree() -> Tree {
        let frame = small_frame();
        let Column::Numeric(length) = &frame.features[0].column else { unreachable!() };
        let values: Vec<f64> = length.iter().map(|&x| if x.is_nan() || x < 5.0 { 1.5 } else { 10.5 }).collect();
        let target = Target::Values(values);
        let mut options = FitOptions::default();
        options.limits.max_depth = Some(1);
        let opts = options.check(Task::Regress).unwrap();
        fit(&TrainSet::new(&frame, &target), &opts).unwrap()
    }

    /// A hand-built classify tree: root tests `shade in {…}` on twelve categories (ten set,
    /// names with quotes, braces, angle brackets, a backslash and a newline), its left child
    /// tests `x is present`.
    pub(crate) fn hand_tree() -> Tree {
        let mut levels: Vec<String> = vec!["a\"b{c}".into(), "<b>".into(), "c\\".into(), "line\nbreak".into()];
        levels.extend((4..12).map(|i| format!("s{i}")));
        // Codes 0..=9 go left: 0b11_1111_1111.
        let bits = vec![0x3ffu64];
        let leaf = |depth, rows| Node {
            depth,
            rows,
            weighted_rows: rows as f64,
            impurity: 0.0,
            gain: 0.0,
            split: None,
            left: NO_NODE,
            right: NO_NODE,
            rank: NO_NODE,
        };
        let nodes = vec![
            Node {
                depth: 0,
                rows: 8,
                weighted_rows: 8.0,
                impurity: 0.5,
                gain: 0.2,
                split: Some(Split { feature: 1, rule: SplitRule::Categories(bits), missing_left: true, between: None }),
                left: 1,
                right: 4,
                rank: 0,
            },
            Node {
                depth: 1,
                rows: 5,
                weighted_rows: 5.0,
                impurity: 0.48,
                gain: 0.1,
                split: Some(Split { feature: 0, rule: SplitRule::Threshold(f64::INFINITY), missing_left: false, between: None }),
                left: 2,
                right: 3,
                rank: 1,
            },
            leaf(2, 3),
            leaf(2, 2),
            leaf(1, 3),
        ];
        Tree {
            task: Task::Classify,
            target: "grade \"A\"".into(),
            labels: vec!["lo{w}".into(), "hi\"gh".into()],
            columns: vec![
                ColumnInfo { name: "x".into(), kind: ColumnKind::Numeric, levels: vec![] },
                ColumnInfo { name: "shade".into(), kind: ColumnKind::Categorical, levels },
            ],
            n_classes: 2,
            n_features: 2,
            nodes,
            values: vec![0.5, 0.5, 0.4, 0.6, 0.0, 1.0, 1.0, 0.0, 2.0 / 3.0, 1.0 / 3.0],
            class_totals: vec![4.0, 4.0, 2.0, 3.0, 0.0, 3.0, 2.0, 0.0, 2.0, 1.0],
            total_weight: 8.0,
            options: FitOptions::default(),
            decision: None,
        }
    }

    #[test]
    fn number_forms() {
        assert_eq!(sig4(1.23456), "1.235");
        assert_eq!(sig4(12345.6), "12350");
        assert_eq!(sig4(0.000123456), "0.0001235");
        assert_eq!(sig4(0.0000123456), "1.235e-5");
        assert_eq!(sig4(9.99996), "10");
        assert_eq!(sig4(1e10), "1e10");
        assert_eq!(sig4(-2.5), "-2.5");
        assert_eq!(sig4(0.0), "0");
        assert_eq!(percent(1.0), "100%");
        assert_eq!(percent(0.0), "0%");
        assert_eq!(percent(1.0 / 3.0), "33.3%");
        assert_eq!(percent(0.25), "25%");
        assert_eq!(percent(0.99999), ">99.9%");
        assert_eq!(percent(0.00001), "<0.1%");
        assert_eq!(clean("a\nb\tc"), "a\\nb\\tc");
    }

    #[test]
    fn classify_text_names_every_split_column_and_leaf() {
        let tree = classify_tree();
        let text = to_text(&tree);
        let lines: Vec<&str> = text.lines().collect();
        assert_eq!(lines.len(), tree.nodes.len() + 1, "one line per node plus the summary:\n{text}");
        for n in tree.nodes.iter().filter_map(|n| n.split.as_ref()) {
            let name = &tree.columns[n.feature as usize].name;
            assert!(text.contains(name.as_str()), "no split on {name} in\n{text}");
        }
        assert!(text.contains("length"), "{text}");
        assert!(text.contains("colour in {"), "{text}");
        // Every leaf is pure, so each reads `leaf: <class> 100%`, in preorder.
        let leaf_lines: Vec<&str> = lines.iter().copied().filter(|l| l.contains("leaf: ")).collect();
        let leaves = tree.leaves();
        assert_eq!(leaf_lines.len(), leaves.len());
        for (line, &leaf) in leaf_lines.iter().zip(&leaves) {
            let label = &tree.labels[tree.leaf_class(leaf) as usize];
            assert!(line.contains(&format!("leaf: {label} 100%  ·  ")), "leaf {leaf}: {line}");
        }
        assert!(lines[0].starts_with(|c: char| c.is_alphabetic()), "the root is not indented");
        assert!(lines[0].contains("15 rows (100%)"), "{}", lines[0]);
        assert!(lines[1].starts_with("  holds ▸ ") && !lines[1].starts_with("   "), "{text}");
        let summary = format!("{} leaves, depth {}, 15 rows; target target (classify)", tree.n_leaves(), tree.depth());
        assert_eq!(*lines.last().unwrap(), summary);
    }

    #[test]
    fn regress_text_shows_means() {
        let tree = regress_tree();
        assert_eq!(tree.nodes.len(), 3, "{tree:?}");
        let text = to_text(&tree);
        // Eight rows have length <= 5 and target 1.5; the missing-length row (also 1.5) can
        // only join them for a pure split. The other six have 10.5.
        assert!(text.starts_with("length <= 5  ·  15 rows (100%)  ·  blank cells: holds\n"), "{text}");
        assert!(text.contains("  holds ▸ leaf: mean 1.5  ·  9 rows (60%)\n"), "{text}");
        assert!(text.contains("  fails ▸ leaf: mean 10.5  ·  6 rows (40%)\n"), "{text}");
        assert!(text.ends_with("2 leaves, depth 1, 15 rows; target target (regress)\n"), "{text}");
    }

    #[test]
    fn hand_tree_text() {
        let text = to_text(&hand_tree());
        let expected = "\
shade in {a\"b{c}, <b>, c\\, line\\nbreak, s4, s5, s6, s7, … (+2 more)}  ·  8 rows (100%)  ·  blank cells: holds
  holds ▸ x is present  ·  5 rows (62.5%)  ·  blank cells: fails
    holds ▸ leaf: hi\"gh 100%  ·  3 rows (37.5%)
    fails ▸ leaf: lo{w} 100%  ·  2 rows (25%)
  fails ▸ leaf: lo{w} 66.7%  ·  3 rows (37.5%)
3 leaves, depth 2, 8 rows; target grade \"A\" (classify)
";
        assert_eq!(text, expected);
    }

    #[test]
    fn text_is_deterministic() {
        let a = to_text(&classify_tree());
        let b = to_text(&classify_tree());
        assert_eq!(a, b);
        assert_eq!(to_text(&regress_tree()), to_text(&regress_tree()));
    }
}
