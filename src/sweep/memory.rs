//! How much memory a run needs, estimated before it starts from the sizes the checked spec
//! and the dataset fix. The terms follow the data structures a run holds (n rows, f
//! features, w = classes, or 1 for regression; s splits; r repeats; S settings; u groups of
//! units in flight, at most the CPU pool's threads (one for a big table); q envelopes grown together in a group,
//! one per `min_leaf_rows` value):
//!
//! | held | bytes | where |
//! | --- | --- | --- |
//! | the CSV text while it is parsed | `csv` | `service::frames` (parse) |
//! | the dataset, and the plan's copy without the fold column | 2 · (4·n·f + 8·n) | `data::Frame` (f32 or u32 codes per cell), `Target` |
//! | fold assignments and the splits' row lists | 4·n·r + 4·n·s | [`super::Folds`] |
//! | per group in flight: fit-local rows, weights, targets | 28·n | `tree::grow::Prepared` |
//! | … partition buffers | 21·n | `go_left`, `scratch`, `left_buf`, `right_buf` |
//! | … the presorted columns (value, row), and at worst one copy of a node's rows per further envelope, where envelopes part (only for nodes of at most `COPY_ENTRIES` entries) | 8·n·f + (q − 1) · 8·min(n·f, 2²⁰) | `Grower::sorted` |
//! | … the envelope trees: under `min_leaf_rows` m at most 2⌈n/m⌉ nodes, each with stats and value | N · (176 + 16·w), N = Σ_m 2⌈n/m⌉ | `Tree`, `NodeStats` |
//! | … per envelope: the training rows' leaves | q · 8·n | `KeyTree::leaf_of`, `Envelope::grow_shared` |
//! | … rows aggregated per leaf, both sides (one envelope at a time) | 4·n + 16·n + 8·n·w | `envelope::LeafRows` |
//! | unit results kept for scoring, twice (the run's copy and the collected one) | 2 · 40·S·s | [`super::UnitResult`] |
//! | the summary: per setting and split, then per setting | 40·S·s + 8·S·s + 256·S | [`super::summarize`] |
//!
//! It is an estimate of the largest sizes (a tree with a node per row, all units in flight
//! at once), not a measurement; allocator overhead is not counted.

use super::spec::CheckedSpec;
use crate::data::{Dataset, Target};

/// What the estimate is made from.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct RunSize {
    pub csv_bytes: u64,
    pub rows: u64,
    pub features: u64,
    /// Classes, or 1 for regression.
    pub width: u64,
    pub repeats: u64,
    pub splits: u64,
    pub settings: u64,
    /// Groups of units scored at the same time.
    pub units_in_flight: u64,
    /// Envelopes a group grows together (its `min_leaf_rows` values).
    pub together: u64,
    /// Most nodes of a group's envelope trees together: Σ 2⌈n/m⌉ over its `min_leaf_rows`
    /// values m.
    pub tree_nodes: u64,
}

impl RunSize {
    /// The sizes of a checked sweep on `data` run by `threads` threads. In path mode the α
    /// count is known only after growth: the settings count is then its upper bound (one α
    /// per row, at most `max_settings`).
    pub fn of(data: &Dataset, spec: &CheckedSpec, csv_bytes: u64, threads: usize, max_settings: usize) -> RunSize {
        let rows = data.rows() as u64;
        let keys = spec.keys.len() as u64;
        let stopping = spec.stopping_count() as u64;
        let alphas = if spec.spec.prune_path { rows.max(1) } else { spec.prune_alpha.len().max(1) as u64 };
        let settings = stopping.saturating_mul(keys).saturating_mul(alphas).min(max_settings as u64);
        let together = spec.min_leaf_rows.len().max(1) as u64;
        let tree_nodes = spec.min_leaf_rows.iter().fold(0u64, |a, &m| a.saturating_add(2 * rows.div_ceil(m.max(1) as u64)));
        let groups = (spec.splits as u64).saturating_mul(keys / together);
        RunSize {
            csv_bytes,
            rows,
            features: data.frame.features.len() as u64,
            width: match &data.target {
                Target::Classes { labels, .. } => labels.len().max(1) as u64,
                Target::Values(_) => 1,
            },
            repeats: spec.folds.repeats as u64,
            splits: spec.splits as u64,
            settings,
            units_in_flight: if super::one_group_at_a_time(data.rows(), data.frame.features.len()) { groups.min(1) } else { groups.min(threads.max(1) as u64) },
            together,
            tree_nodes,
        }
    }

    /// The estimate in bytes (saturating: an absurd size reads as `u64::MAX`).
    pub fn bytes(&self) -> u64 {
        let RunSize { csv_bytes, rows: n, features: f, width: w, repeats: r, splits: s, settings, units_in_flight: u, together: q, tree_nodes } = *self;
        let sum = |terms: &[u64]| terms.iter().fold(0u64, |a, &t| a.saturating_add(t));
        let mul = |factors: &[u64]| factors.iter().fold(1u64, |a, &t| a.saturating_mul(t));
        let dataset = mul(&[2, sum(&[mul(&[4, n, f]), mul(&[8, n])])]);
        let folds = sum(&[mul(&[4, n, r]), mul(&[4, n, s])]);
        let copies = mul(&[q.saturating_sub(1), 8, mul(&[n, f]).min(crate::tree::grow::COPY_ENTRIES as u64)]);
        let trees = mul(&[tree_nodes, sum(&[176, mul(&[16, w])])]);
        let per_unit = sum(&[mul(&[28, n]), mul(&[21, n]), mul(&[8, n, f]), copies, trees, mul(&[q, 8, n]), mul(&[20, n]), mul(&[8, n, w])]);
        let results = sum(&[mul(&[2, 40, settings, s]), mul(&[48, settings, s]), mul(&[256, settings])]);
        sum(&[csv_bytes, dataset, folds, mul(&[u, per_unit]), results])
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn size() -> RunSize {
        RunSize { csv_bytes: 1000, rows: 150, features: 4, width: 3, repeats: 1, splits: 5, settings: 10, units_in_flight: 1, together: 1, tree_nodes: 300 }
    }

    #[test]
    fn grows_with_every_size_and_saturates() {
        let base = size().bytes();
        assert!(base > 0);
        for bigger in [
            RunSize { rows: 300, ..size() },
            RunSize { features: 8, ..size() },
            RunSize { width: 6, ..size() },
            RunSize { splits: 10, ..size() },
            RunSize { settings: 20, ..size() },
            RunSize { units_in_flight: 2, ..size() },
            RunSize { together: 2, ..size() },
            RunSize { tree_nodes: 600, ..size() },
            RunSize { csv_bytes: 2000, ..size() },
        ] {
            assert!(bigger.bytes() > base, "{bigger:?}");
        }
        // Units in flight each hold their own buffers: two hold more than one, less than twice the whole.
        let two = RunSize { units_in_flight: 2, ..size() }.bytes();
        assert!(two < 2 * base);
        assert_eq!(RunSize { rows: u64::MAX, ..size() }.bytes(), u64::MAX);
    }
}
