//! Growing one tree.
//!
//! Each feature is sorted once per fit. A node owns the same index range `[start, end)` in
//! every feature's sorted array; splitting it partitions every feature's range stably (left
//! rows first), so children stay sorted without another sort. A level of the tree therefore
//! costs O(rows × features).
//!
//! Growth is depth-first with an explicit stack when there is no leaf cap, and best-first by
//! gain (ties: shallower first, then leftmost) when `max_leaves` is set. Either way every node's
//! best split is found when the node is created, as the best-first order needs its gain.

use std::cmp::Ordering;
use std::collections::BinaryHeap;

use rayon::prelude::*;

use super::limits::fit_error;
use super::split::{Cut, Entry, CLASS_BIT, VALUE_TOLERANCE, FeatureBest, Order, Rows, Scratch, SearchCtx, Totals};
use super::{CheckedOptions, ClassWeight, Monotone, Splitter, MAX_BINS, ColumnInfo, Criterion, FitError, Node, Split, SplitRule, Tree, NO_NODE};
use crate::data::{Column, Frame, Target, Task, MISSING_CODE};

/// Nodes with at least this many (rows × features) search and partition features in
/// parallel; below it the thread hand-off costs more than it saves.
const PARALLEL_WORK: usize = 1 << 17;

/// Trees grown together that part at a node of at most this many (rows × features) sorted
/// entries give each part but the last its own copy of them (8 MiB at most); at a bigger
/// node the parts take turns on the rows in place, and the sorted order is restored after
/// each. So a shared growth holds at most one copy of this size per further tree.
pub(crate) const COPY_ENTRIES: usize = 1 << 20;

/// How trees grown together share memory and threads.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Sharing {
    /// See [`COPY_ENTRIES`].
    pub copy_entries: usize,
    /// Nodes of fewer (rows × features) sorted entries than this grow on the pool as tasks
    /// of their own, each on a copy of its rows (0: none; see [`FORK_ENTRIES`]).
    pub fork_entries: usize,
}

/// Below this many (rows × features) a node's features are searched one after another
/// (see [`PARALLEL_WORK`]), so the subtrees below such nodes grow in parallel instead: each
/// as a task on the pool, on its own copy of the node's rows (1 MiB at most), its nodes
/// grafted into the trees when it ends. A tree's nodes are numbered when growth ends
/// (preorder) and ranked by gain, depth and position, so the order the tasks end in does
/// not change a bit of the result.
pub const FORK_ENTRIES: usize = PARALLEL_WORK;

impl Default for Sharing {
    fn default() -> Self {
        Sharing { copy_entries: COPY_ENTRIES, fork_entries: FORK_ENTRIES }
    }
}

/// What one fit reads: a frame, its target, and optionally a row subset and weights.
#[derive(Clone, Copy)]
pub struct TrainSet<'a> {
    pub frame: &'a Frame,
    pub target: &'a Target,
    /// Name of the target column, kept in the model.
    pub target_name: &'a str,
    /// Frame rows to fit on (every row when `None`), such as one fold's training rows.
    pub rows: Option<&'a [u32]>,
    /// Sample weight per frame row (1 when `None`). Rows of weight 0 take no part.
    pub weights: Option<&'a [f64]>,
}

impl<'a> TrainSet<'a> {
    pub fn new(frame: &'a Frame, target: &'a Target) -> Self {
        TrainSet { frame, target, target_name: "target", rows: None, weights: None }
    }

    /// Every row of a dataset, unweighted.
    pub fn of(data: &'a crate::data::Dataset) -> Self {
        TrainSet { frame: &data.frame, target: &data.target, target_name: &data.target_name, rows: None, weights: None }
    }
}

/// Fits one tree under the checked options.
pub fn fit(set: &TrainSet, options: &CheckedOptions) -> Result<Tree, FitError> {
    fit_with(set, options, true)
}

/// As [`fit`], with feature-level parallelism on or off (for the equality test of the two paths).
pub fn fit_with(set: &TrainSet, options: &CheckedOptions, parallel: bool) -> Result<Tree, FitError> {
    let prepared = Prepared::new(set, options)?;
    let (tree, _) = Grower::new(&prepared, options, parallel).grow(false);
    Ok(pruned(tree, options))
}

/// As [`fit`], and the leaf each training row reached: one entry per row of `set.rows` (per
/// frame row when `None`), [`NO_NODE`] for rows of weight 0. The grower knows them from its
/// partitions, so they cost no routing; they are the leaves [`Tree::apply_row`] gives.
pub fn fit_with_leaves(set: &TrainSet, options: &CheckedOptions) -> Result<(Tree, Vec<u32>), FitError> {
    let prepared = Prepared::new(set, options)?;
    let (tree, leaf_of) = Grower::new(&prepared, options, true).grow(true);
    let tree = pruned(tree, options);
    if options.limits.prune_alpha > 0.0 {
        // Pruning renumbers the nodes: route the rows that took part through the pruned tree.
        let mut leaves = vec![NO_NODE; set.rows.map_or(set.frame.rows, <[u32]>::len)];
        for &j in &prepared.positions {
            let r = set.rows.map_or(j, |rows| rows[j as usize]);
            leaves[j as usize] = tree.apply_row(set.frame, r as usize);
        }
        return Ok((tree, leaves));
    }
    Ok((tree, prepared.by_position(set, &leaf_of)))
}

/// [`fit_with_leaves`] for each of several `min_leaf_rows` values at once, the other options
/// as `options` gives them: one answer per value of `min_leaf_rows`, in its order, each equal
/// to `fit_with_leaves` under that value.
///
/// The trees grow together: they share a node while its best split is the same for all of
/// them, and one scan per node and feature finds the best split of every value (see
/// `split::Bests`). Where their splits differ they part, and each part grows on from there on
/// its own (on its own copy of the node's sorted rows). One value alone grows this way too,
/// for the subtrees grown as parallel tasks ([`FORK_ENTRIES`]). Growth with a leaf cap or
/// pruning fits each value alone.
pub fn fit_shared(set: &TrainSet, options: &CheckedOptions, min_leaf_rows: &[u32]) -> Result<Vec<(Tree, Vec<u32>)>, FitError> {
    fit_shared_with(set, options, min_leaf_rows, Sharing::default())
}

/// As [`fit_shared`], with parts copying the sorted rows of nodes of at most
/// `sharing.copy_entries` entries and subtrees below `sharing.fork_entries` grown as tasks;
/// for the test that copying, restoring and forking give the same trees.
pub fn fit_shared_with(set: &TrainSet, options: &CheckedOptions, min_leaf_rows: &[u32], sharing: Sharing) -> Result<Vec<(Tree, Vec<u32>)>, FitError> {
    let per_value = |m: u32| {
        let mut o = options.to_options();
        o.limits.min_leaf_rows = m;
        o.check(options.task)
    };
    let mut values = min_leaf_rows.to_vec();
    values.sort_unstable();
    values.dedup();
    if values.is_empty() || options.limits.max_leaves.is_some() || options.limits.prune_alpha > 0.0 {
        return min_leaf_rows.iter().map(|&m| fit_with_leaves(set, &per_value(m)?)).collect();
    }
    let checked = values.iter().map(|&m| per_value(m)).collect::<Result<Vec<_>, _>>()?;
    let prepared = Prepared::new(set, options)?;
    let grown = Grower::new(&prepared, options, true).grow_shared(&checked, sharing);
    let grown: Vec<(Tree, Vec<u32>)> = grown.into_iter().map(|(tree, leaf_of)| (tree, prepared.by_position(set, &leaf_of))).collect();
    Ok(min_leaf_rows.iter().map(|m| grown[values.binary_search(m).expect("every value grown")].clone()).collect())
}

fn pruned(tree: Tree, options: &CheckedOptions) -> Tree {
    if options.limits.prune_alpha > 0.0 {
        super::prune::prune(&tree, options.limits.prune_alpha)
    } else {
        tree
    }
}

/// Fit-local copies of the target and weights, for the rows that take part.
struct Prepared<'a> {
    frame: &'a Frame,
    target: &'a Target,
    target_name: String,
    /// Frame row of each fit-local row.
    frame_rows: Vec<u32>,
    /// Position in the set's rows of each fit-local row.
    positions: Vec<u32>,
    class: Vec<u32>,
    y: Vec<f64>,
    w: Vec<f64>,
    wy: Vec<f64>,
    k: usize,
    /// Every weight is exactly 1.
    unit: bool,
}

impl<'a> Prepared<'a> {
    fn new(set: &TrainSet<'a>, options: &CheckedOptions) -> Result<Prepared<'a>, FitError> {
        let frame = set.frame;
        if set.target.len() != frame.rows {
            return Err(fit_error("target", format!("has {} values for {} rows", set.target.len(), frame.rows)));
        }
        if set.target.task() != options.task {
            return Err(fit_error("task", format!("options were checked for {}, the target is {}", options.task, set.target.task())));
        }
        if let Some(w) = set.weights {
            if w.len() != frame.rows {
                return Err(fit_error("weights", format!("has {} values for {} rows", w.len(), frame.rows)));
            }
        }
        let all: Vec<u32>;
        let rows = match set.rows {
            Some(r) => r,
            None => {
                all = (0..frame.rows as u32).collect();
                &all
            }
        };
        let mut frame_rows = Vec::with_capacity(rows.len());
        let mut positions = Vec::with_capacity(rows.len());
        let mut w = Vec::with_capacity(rows.len());
        for (j, &r) in rows.iter().enumerate() {
            if r as usize >= frame.rows {
                return Err(fit_error("rows", format!("row {r} is beyond the frame's {} rows", frame.rows)));
            }
            let wr = set.weights.map_or(1.0, |ws| ws[r as usize]);
            if !(wr.is_finite() && wr >= 0.0) {
                return Err(fit_error("weights", format!("row {r} has weight {wr}; weights must be finite and >= 0")));
            }
            // Zero-weight rows are left out entirely, so they count in no row limit.
            if wr > 0.0 {
                frame_rows.push(r);
                positions.push(j as u32);
                w.push(wr);
            }
        }
        if frame_rows.len() >= CLASS_BIT as usize {
            return Err(fit_error("rows", format!("{} rows take part; a fit takes fewer than 2^31", frame_rows.len())));
        }
        if frame_rows.is_empty() {
            return Err(fit_error("rows", "no rows with a positive weight to fit on"));
        }
        let (class, y, k) = match set.target {
            Target::Classes { codes, labels } => (frame_rows.iter().map(|&r| codes[r as usize]).collect(), Vec::new(), labels.len()),
            Target::Values(v) => (Vec::new(), frame_rows.iter().map(|&r| v[r as usize]).collect::<Vec<f64>>(), 0),
        };
        if options.class_weight == ClassWeight::Balanced {
            // n / (k · n_class) from the unweighted counts of the classes present.
            let mut counts = vec![0usize; k];
            for &c in &class {
                counts[c as usize] += 1;
            }
            let present = counts.iter().filter(|&&c| c > 0).count() as f64;
            let n = class.len() as f64;
            for (wi, &c) in w.iter_mut().zip(&class) {
                *wi *= n / (present * counts[c as usize] as f64);
            }
        }
        check_monotone(frame, k, &options.monotone)?;
        let wy = if k == 0 { y.iter().zip(&w).map(|(y, w)| y * w).collect() } else { Vec::new() };
        let unit = w.iter().all(|&x| x == 1.0);
        Ok(Prepared { frame, target: set.target, target_name: set.target_name.to_string(), frame_rows, positions, class, y, w, wy, k, unit })
    }

    fn rows(&self) -> Rows<'_> {
        Rows { class: &self.class, y: &self.y, w: &self.w, wy: &self.wy, k: self.k, unit: self.unit }
    }

    /// Leaves of fit-local rows (`leaf_of`) as one entry per row of `set.rows` (per frame row
    /// when `None`), [`NO_NODE`] for rows that took no part.
    fn by_position(&self, set: &TrainSet, leaf_of: &[u32]) -> Vec<u32> {
        let mut leaves = vec![NO_NODE; set.rows.map_or(set.frame.rows, <[u32]>::len)];
        for (&j, &leaf) in self.positions.iter().zip(leaf_of) {
            leaves[j as usize] = leaf;
        }
        leaves
    }

    /// Each feature's fit-local rows sorted by value, missing cells last; ties by row.
    ///
    /// A stable radix sort (radsort) of the entries, made in row order, by the value's bits
    /// mapped so that unsigned order is `f32::total_cmp` order (missing cells are a positive
    /// NaN, after +inf): stability keeps equal values in row order.
    fn presort(&self, parallel: bool) -> Vec<Vec<Entry>> {
        // Two classes: each entry carries its row's class in bit 31 (see `Entry::r`).
        let class_bit = |i: usize| if self.k == 2 { self.class[i] << 31 } else { 0 };
        let one = |f: &crate::data::Feature| {
            let value = |r: u32| -> f32 {
                match &f.column {
                    Column::Numeric(v) => {
                        let x = v[r as usize];
                        if x.is_nan() {
                            f32::NAN
                        } else {
                            x
                        }
                    }
                    Column::Categorical { codes, .. } => {
                        let c = codes[r as usize];
                        if c == MISSING_CODE {
                            f32::NAN
                        } else {
                            c as f32
                        }
                    }
                }
            };
            let mut entries: Vec<Entry> = self.frame_rows.iter().enumerate().map(|(i, &r)| Entry { v: value(r), r: i as u32 | class_bit(i) }).collect();
            radsort::sort_by_key(&mut entries, |e| order_bits(e.v));
            entries
        };
        if parallel {
            self.frame.features.par_iter().map(one).collect()
        } else {
            self.frame.features.iter().map(one).collect()
        }
    }
}

/// Monotone limits as the reference library defines them: one per feature, on numeric
/// features, for a regress or two-class target.
fn check_monotone(frame: &Frame, k: usize, monotone: &[Monotone]) -> Result<(), FitError> {
    if monotone.is_empty() {
        return Ok(());
    }
    if monotone.len() != frame.features.len() {
        return Err(fit_error("monotone", format!("has {} entries for {} features", monotone.len(), frame.features.len())));
    }
    if k > 2 {
        return Err(fit_error("monotone", format!("monotone limits need a regress or two-class target; this one has {k} classes")));
    }
    for (i, (m, f)) in monotone.iter().zip(&frame.features).enumerate() {
        if *m != Monotone::Free && matches!(f.column, Column::Categorical { .. }) {
            return Err(fit_error(&format!("monotone[{i}]"), format!("'{}' is categorical; a monotone limit needs a numeric feature", f.name)));
        }
    }
    Ok(())
}

/// Quantile bin edges of one numeric feature from its sorted entries (missing cells last):
/// none when the present values have at most [`MAX_BINS`] distinct values (as the scan tells
/// values apart, within [`VALUE_TOLERANCE`]), so every cut stays allowed; else the values at
/// ranks ⌊b·n/MAX_BINS⌋ for b = 1 … MAX_BINS − 1, without repeats, which make at most
/// MAX_BINS bins of about equal row counts.
fn bin_edges(sorted: &[Entry]) -> Vec<f32> {
    let nn = sorted.iter().rposition(|e| !e.v.is_nan()).map_or(0, |i| i + 1);
    let present = &sorted[..nn];
    let distinct = 1 + present.windows(2).filter(|w| w[1].v > w[0].v + VALUE_TOLERANCE).count();
    if nn == 0 || distinct <= MAX_BINS {
        return Vec::new();
    }
    let mut edges: Vec<f32> = (1..MAX_BINS).map(|b| present[b * nn / MAX_BINS].v).filter(|&e| e > present[0].v).collect();
    edges.dedup();
    edges
}

/// The bits of `v` mapped so that unsigned order is `f32::total_cmp` order.
#[inline]
fn order_bits(v: f32) -> u32 {
    let b = v.to_bits();
    if b >> 31 == 1 {
        !b
    } else {
        b | 1 << 31
    }
}


/// A node's totals and impurity.
#[derive(Clone, Debug)]
struct NodeStats {
    totals: Totals,
    impurity: f64,
}

/// The split a node will take if it is expanded.
#[derive(Clone)]
struct Pending {
    split: Split,
    gain: f64,
    n_left: u32,
    left: NodeStats,
    right: NodeStats,
    /// The children's value bounds under monotone limits (see [`Arena::bounds`]).
    left_bounds: Bounds,
    right_bounds: Bounds,
}

/// The range `[lower, upper]` a node's value must lie in under monotone limits: the
/// reference library's bounds, in the value `sums[0] / w` (mean, or class 0's share).
type Bounds = (f64, f64);

/// The bounds of a node with no limit above it.
const UNBOUNDED: Bounds = (f64::NEG_INFINITY, f64::INFINITY);

/// The nodes of one tree in creation order, each with its statistics and the logical start of
/// its rows in the sorted columns.
#[derive(Default)]
struct Arena {
    nodes: Vec<Node>,
    stats: Vec<NodeStats>,
    starts: Vec<u32>,
    /// Per node, the bounds its value is clipped to and its splits' children must keep.
    bounds: Vec<Bounds>,
}

impl Arena {
    fn push(&mut self, depth: u32, start: u32, s: NodeStats, bounds: Bounds) -> u32 {
        let id = self.nodes.len() as u32;
        self.nodes.push(Node {
            depth,
            rows: s.totals.n,
            weighted_rows: s.totals.w,
            impurity: s.impurity,
            gain: 0.0,
            split: None,
            left: NO_NODE,
            right: NO_NODE,
            rank: NO_NODE,
        });
        self.stats.push(s);
        self.starts.push(start);
        self.bounds.push(bounds);
        id
    }

    /// Splits node `id` by `p`: its left child starts where it does, its right child after
    /// the left child's rows.
    fn attach(&mut self, id: u32, p: Pending) -> (u32, u32) {
        let depth = self.nodes[id as usize].depth + 1;
        let start = self.starts[id as usize];
        let l = self.push(depth, start, p.left, p.left_bounds);
        let r = self.push(depth, start + p.n_left, p.right, p.right_bounds);
        let node = &mut self.nodes[id as usize];
        node.split = Some(p.split);
        node.gain = p.gain;
        node.left = l;
        node.right = r;
        (l, r)
    }
}

struct Grower<'p> {
    prep: &'p Prepared<'p>,
    criterion: Criterion,
    limits: super::Limits,
    options: super::FitOptions,
    /// The monotone limit per feature; empty when none is set.
    monotone: std::sync::Arc<[Monotone]>,
    parallel: bool,
    sorted: Vec<Vec<Entry>>,
    /// Per feature, the bin edges of the binned splitter (empty: every cut allowed).
    edges: Vec<Vec<f32>>,
    go_left: Vec<bool>,
    scratch: Vec<Entry>,
    search_scratch: Scratch,
    left_buf: Vec<u32>,
    right_buf: Vec<u32>,
    total_weight: f64,
    width: usize,
    levels: Vec<usize>,
    /// Logical position of `sorted`'s first entry: 0, except while trees grown together
    /// work on their own copy of one node's rows.
    offset: u32,
    /// See [`Sharing`].
    sharing: Sharing,
    arena: Arena,
}

/// Frontier entry of best-first growth: larger gain first, then shallower, then leftmost.
struct Frontier {
    gain: f64,
    depth: u32,
    start: u32,
    id: u32,
}

impl PartialEq for Frontier {
    fn eq(&self, o: &Self) -> bool {
        self.cmp(o) == Ordering::Equal
    }
}
impl Eq for Frontier {}
impl PartialOrd for Frontier {
    fn partial_cmp(&self, o: &Self) -> Option<Ordering> {
        Some(self.cmp(o))
    }
}
impl Ord for Frontier {
    fn cmp(&self, o: &Self) -> Ordering {
        self.gain.total_cmp(&o.gain).then(o.depth.cmp(&self.depth)).then(o.start.cmp(&self.start))
    }
}

impl<'p> Grower<'p> {
    fn new(prep: &'p Prepared<'p>, options: &CheckedOptions, parallel: bool) -> Self {
        let sorted = prep.presort(parallel);
        let edges = sorted
            .iter()
            .zip(&prep.frame.features)
            .map(|(col, f)| match (&f.column, options.splitter) {
                (Column::Numeric(_), Splitter::Binned) => bin_edges(col),
                _ => Vec::new(),
            })
            .collect();
        let n = prep.frame_rows.len();
        let width = if prep.k > 0 { prep.k } else { 1 };
        let levels = prep
            .frame
            .features
            .iter()
            .map(|f| match &f.column {
                Column::Categorical { levels, .. } => levels.len(),
                Column::Numeric(_) => 0,
            })
            .collect();
        Grower {
            prep,
            criterion: options.criterion,
            limits: options.limits.clone(),
            options: options.to_options(),
            monotone: options.monotone.clone(),
            parallel,
            sorted,
            edges,
            go_left: vec![false; n],
            scratch: Vec::with_capacity(n),
            search_scratch: Scratch::default(),
            left_buf: Vec::new(),
            right_buf: Vec::new(),
            total_weight: 0.0,
            width,
            levels,
            offset: 0,
            sharing: Sharing { copy_entries: COPY_ENTRIES, fork_entries: 0 },
            arena: Arena::default(),
        }
    }

    /// A grower for one forked subtree: the rows `sorted` (a copy of a node's rows, whose
    /// logical start is `offset`), `go_left` sized for every fit-local row, one thread.
    fn task(&self, sorted: Vec<Vec<Entry>>, offset: u32, go_left: Vec<bool>) -> Grower<'p> {
        Grower {
            prep: self.prep,
            criterion: self.criterion,
            limits: self.limits.clone(),
            options: self.options.clone(),
            monotone: self.monotone.clone(),
            parallel: false,
            sorted,
            edges: self.edges.clone(),
            go_left,
            scratch: Vec::new(),
            search_scratch: Scratch::default(),
            left_buf: Vec::new(),
            right_buf: Vec::new(),
            total_weight: self.total_weight,
            width: self.width,
            levels: self.levels.clone(),
            offset,
            sharing: Sharing { copy_entries: self.sharing.copy_entries, fork_entries: 0 },
            arena: Arena::default(),
        }
    }

    /// Grows the tree; with `leaves`, also the leaf (final node id) of every fit-local row.
    fn grow(mut self, leaves: bool) -> (Tree, Vec<u32>) {
        let n = self.prep.frame_rows.len() as u32;
        let root = self.stats_of((0..n).collect::<Vec<_>>().iter().copied());
        self.total_weight = root.totals.w;
        self.arena.push(0, 0, root, UNBOUNDED);
        let first = self.evaluate(0);
        match self.limits.max_leaves {
            None => {
                let mut stack = Vec::new();
                if let Some(p) = first {
                    stack.push((0u32, n, p));
                }
                while let Some((id, end, p)) = stack.pop() {
                    let (l, r) = self.expand(id, end, p);
                    for (child, child_end) in [(r, end), (l, self.arena.starts[r as usize])] {
                        if let Some(p) = self.evaluate(child) {
                            stack.push((child, child_end, p));
                        }
                    }
                }
            }
            Some(max_leaves) => {
                let mut budget = max_leaves - 1;
                let mut heap = BinaryHeap::new();
                // Frontier slot -> (node id, end of its range, its pending split).
                let mut pending: Vec<Option<(u32, u32, Pending)>> = Vec::new();
                if let Some(p) = first {
                    heap.push(Frontier { gain: p.gain, depth: 0, start: 0, id: 0 });
                    pending.push(Some((0, n, p)));
                }
                while budget > 0 {
                    let Some(top) = heap.pop() else { break };
                    let (id, end, p) = pending[top.id as usize].take().expect("frontier entry taken once");
                    budget -= 1;
                    let (l, r) = self.expand(id, end, p);
                    for (child, child_end) in [(l, self.arena.starts[r as usize]), (r, end)] {
                        if let Some(p) = self.evaluate(child) {
                            let node = &self.arena.nodes[child as usize];
                            heap.push(Frontier { gain: p.gain, depth: node.depth, start: self.arena.starts[child as usize], id: pending.len() as u32 });
                            pending.push(Some((child, child_end, p)));
                        }
                    }
                }
            }
        }
        let mut leaf_of = Vec::new();
        if leaves {
            leaf_of = vec![NO_NODE; n as usize];
            for (id, node) in self.arena.nodes.iter().enumerate() {
                if node.is_leaf() {
                    let start = self.arena.starts[id] as usize;
                    for e in &self.sorted[0][start..start + node.rows as usize] {
                        leaf_of[e.row()] = id as u32;
                    }
                }
            }
        }
        let arena = std::mem::take(&mut self.arena);
        let options = self.options.clone();
        self.finish(arena, options, leaf_of)
    }

    /// Totals and impurity of a set of fit-local rows.
    fn stats_of(&self, rows: impl Iterator<Item = u32> + Clone) -> NodeStats {
        let r = self.prep.rows();
        let mut t = Totals::zero(self.width);
        for i in rows.clone() {
            t.add(&r, i as usize);
        }
        let impurity = if self.prep.k > 0 {
            self.criterion.class_impurity(&t.sums, t.w)
        } else {
            // Two passes (mean, then squared deviations): a constant target gets impurity 0,
            // where the one-pass E[y²] − E[y]² can leave rounding noise that looks splittable.
            let mean = t.sums[0] / t.w;
            let mut ss = 0.0;
            for i in rows {
                let d = r.y[i as usize] - mean;
                ss += r.w[i as usize] * d * d;
            }
            ss / t.w
        };
        NodeStats { totals: t, impurity }
    }

    fn is_pure(&self, s: &NodeStats) -> bool {
        if self.prep.k > 0 {
            s.totals.sums.iter().filter(|&&c| c > 0.0).count() <= 1
        } else {
            false
        }
    }

    /// Decides whether node `id` may split and, if so, finds its split and the children's
    /// statistics. `None` means the node stays a leaf.
    fn evaluate(&mut self, id: u32) -> Option<Pending> {
        let i = id as usize;
        let node = &self.arena.nodes[i];
        let n = node.rows;
        if self.stops(node.depth, &self.arena.stats[i]) || n < 2 * self.limits.min_leaf_rows {
            return None;
        }
        let start = self.arena.starts[i] as usize;
        let end = start + n as usize;
        let bounds = self.arena.bounds[i];
        // Lent out (not cloned) while the search borrows the grower, and put back.
        let s = std::mem::replace(&mut self.arena.stats[i], NodeStats { totals: Totals::zero(0), impurity: 0.0 });
        let p = self.search(start, end, &s.totals, bounds).and_then(|(feature, fb)| self.pending(feature, &fb, start, end, &s, bounds));
        self.arena.stats[i] = s;
        p
    }

    /// Whether a node at `depth` with statistics `s` stays a leaf whatever its
    /// `min_leaf_rows`.
    fn stops(&self, depth: u32, s: &NodeStats) -> bool {
        let l = &self.limits;
        l.max_depth.is_some_and(|d| depth >= d) || s.totals.n < l.min_split_rows || s.impurity <= f64::EPSILON || self.is_pure(s)
    }

    /// The split `fb` of `feature` for the node whose rows are `[start, end)` of `sorted`,
    /// with both children's statistics; `None` when its gain is below `min_gain`.
    fn pending(&mut self, feature: usize, fb: &FeatureBest, start: usize, end: usize, s: &NodeStats, bounds: Bounds) -> Option<Pending> {
        let mut split = self.make_split(feature, fb);
        // Route the node's rows once to get both children's statistics.
        let seg = &self.sorted[feature][start..end];
        let mut left_rows = std::mem::take(&mut self.left_buf);
        let mut right_rows = std::mem::take(&mut self.right_buf);
        left_rows.clear();
        right_rows.clear();
        for e in seg {
            if entry_goes_left(&split, e.v) {
                left_rows.push(e.row() as u32);
            } else {
                right_rows.push(e.row() as u32);
            }
        }
        if !fb.saw_missing {
            // A node that saw no missing cells in the split feature sends them (and unseen
            // categories) to the child with more training rows; ties go right.
            split.missing_left = left_rows.len() > right_rows.len();
        }
        if let (SplitRule::Categories(bits), Cut::Codes { present, .. }) = (&mut split.rule, &fb.cut) {
            // Categories absent from the node go where missing cells go.
            if split.missing_left {
                for c in 0..self.levels[feature] as u32 {
                    if !present.contains(&c) {
                        bits[(c / 64) as usize] |= 1 << (c % 64);
                    }
                }
            }
        }
        let left = self.stats_of(left_rows.iter().copied());
        let right = self.stats_of(right_rows.iter().copied());
        self.left_buf = left_rows;
        self.right_buf = right_rows;
        let wt = s.totals.w;
        let gain = (wt / self.total_weight) * (s.impurity - (right.totals.w / wt) * right.impurity - (left.totals.w / wt) * left.impurity);
        if gain + f64::EPSILON < self.limits.min_gain {
            return None;
        }
        let (left_bounds, right_bounds) = self.child_bounds(feature, bounds, &left, &right);
        Some(Pending { split, gain, n_left: left.totals.n, left, right, left_bounds, right_bounds })
    }

    /// The sign the split search orders `sums[0] / w` by along `feature`: the limit's own
    /// sign when regressing; flipped for two classes, whose `sums[0]` is class 0's weight
    /// while the limit is on class 1's share (as the reference library does it).
    fn order_sign(&self, feature: usize) -> f64 {
        let sign = self.monotone.get(feature).map_or(0.0, |m| m.sign());
        if self.prep.k > 0 {
            -sign
        } else {
            sign
        }
    }

    /// The monotone limit a split of `feature` keeps at a node with `bounds`.
    fn order(&self, feature: usize, bounds: Bounds) -> Option<Order> {
        let sign = self.order_sign(feature);
        (sign != 0.0).then_some(Order { sign, lower: bounds.0, upper: bounds.1 })
    }

    /// The children's bounds after a split of `feature` at a node with `bounds`: a split on
    /// a limited feature parts the range at the midpoint of the children's values, the
    /// lower child below it, the upper above (the reference library's rule).
    fn child_bounds(&self, feature: usize, bounds: Bounds, left: &NodeStats, right: &NodeStats) -> (Bounds, Bounds) {
        let sign = self.order_sign(feature);
        if sign == 0.0 {
            return (bounds, bounds);
        }
        let (l, r) = (&left.totals, &right.totals);
        let mid = l.sums[0] / (2.0 * l.w) + r.sums[0] / (2.0 * r.w);
        if sign > 0.0 {
            ((bounds.0, mid), (mid, bounds.1))
        } else {
            ((mid, bounds.1), (bounds.0, mid))
        }
    }

    /// Best split over all features, in index order, strictly-better replacement.
    fn search(&mut self, start: usize, end: usize, totals: &Totals, bounds: Bounds) -> Option<(usize, FeatureBest)> {
        let rows = self.prep.rows();
        let base = SearchCtx { rows: &rows, criterion: self.criterion, min_leaf_rows: self.limits.min_leaf_rows, order: None };
        let mut s = std::mem::take(&mut self.search_scratch);
        let mut best = None;
        self.each_feature(
            start,
            end,
            &mut s,
            |f, seg, s| {
                let ctx = SearchCtx { order: self.order(f, bounds), ..base };
                if self.levels[f] > 0 {
                    ctx.categorical(seg, totals, s)
                } else {
                    ctx.numeric(seg, &self.edges[f], totals, s)
                }
            },
            |f, r| offer_feature(&mut best, f, r),
        );
        self.search_scratch = s;
        best
    }

    /// [`Self::search`] for each of the ascending `min_leaf_rows` values `msl`: one scan per
    /// feature serves them all.
    fn search_keys(&mut self, start: usize, end: usize, totals: &Totals, msl: &[u32], bounds: Bounds) -> Vec<Option<(usize, FeatureBest)>> {
        let rows = self.prep.rows();
        let base = SearchCtx { rows: &rows, criterion: self.criterion, min_leaf_rows: msl[0], order: None };
        let mut s = std::mem::take(&mut self.search_scratch);
        let mut best = vec![None; msl.len()];
        self.each_feature(
            start,
            end,
            &mut s,
            |f, seg, s| {
                let ctx = SearchCtx { order: self.order(f, bounds), ..base };
                if self.levels[f] > 0 {
                    ctx.categorical_keys(seg, totals, s, msl)
                } else {
                    ctx.numeric_keys(seg, &self.edges[f], totals, s, msl)
                }
            },
            |f, r| {
                for (b, r) in best.iter_mut().zip(r) {
                    offer_feature(b, f, r);
                }
            },
        );
        self.search_scratch = s;
        best
    }

    /// `take(feature, one(feature, rows [start, end) of that feature))` for every feature in
    /// index order. `one` runs on rayon when the node is big enough to pay for the hand-off;
    /// otherwise each result is taken as it is found (a small node's search is short, and a
    /// list of every feature's result would cost an allocation per node).
    fn each_feature<R: Send>(&self, start: usize, end: usize, scratch: &mut Scratch, one: impl Fn(usize, &[Entry], &mut Scratch) -> R + Sync, mut take: impl FnMut(usize, R)) {
        let nf = self.sorted.len();
        if self.is_parallel(start, end) {
            let results: Vec<R> = (0..nf).into_par_iter().map_init(Scratch::default, |s, f| one(f, &self.sorted[f][start..end], s)).collect();
            for (f, r) in results.into_iter().enumerate() {
                take(f, r);
            }
        } else {
            for f in 0..nf {
                take(f, one(f, &self.sorted[f][start..end], scratch));
            }
        }
    }

    /// Whether the work on rows `[start, end)` of every feature is big enough to share out
    /// on the pool.
    fn is_parallel(&self, start: usize, end: usize) -> bool {
        let nf = self.sorted.len();
        self.parallel && (end - start) * nf >= PARALLEL_WORK && nf > 1
    }

    fn make_split(&self, feature: usize, fb: &FeatureBest) -> Split {
        let start_missing_left = fb.missing_left;
        match &fb.cut {
            Cut::Threshold { at, between } => Split { feature: feature as u32, rule: SplitRule::Threshold(*at), missing_left: start_missing_left, between: *between },
            Cut::Codes { left: codes, .. } => {
                let levels = self.levels[feature];
                let mut bits = vec![0u64; levels.div_ceil(64)];
                for &c in codes {
                    bits[(c / 64) as usize] |= 1 << (c % 64);
                }
                Split { feature: feature as u32, rule: SplitRule::Categories(bits), missing_left: start_missing_left, between: None }
            }
        }
    }

    /// Partitions node `id`'s range in every feature and creates its two children.
    fn expand(&mut self, id: u32, end: u32, p: Pending) -> (u32, u32) {
        let start = self.arena.starts[id as usize] as usize;
        self.partition(&p.split, start, end as usize);
        self.arena.attach(id, p)
    }

    /// Partitions the rows `[start, end)` of every sorted feature by `split`, stably, left
    /// rows first.
    fn partition(&mut self, split: &Split, start: usize, end: usize) {
        let f = split.feature as usize;
        for e in &self.sorted[f][start..end] {
            self.go_left[e.row()] = entry_goes_left(split, e.v);
        }
        let go_left = &self.go_left;
        // Stable and branch-free: every entry is written to both the left slot and the
        // right buffer, and only the cursor of its side moves on.
        let partition = |seg: &mut [Entry], scratch: &mut Vec<Entry>| {
            // Grown once to the largest segment, never cleared: every slot read is written first.
            if scratch.len() < seg.len() {
                scratch.resize(seg.len(), Entry { v: 0.0, r: 0 });
            }
            let (mut l, mut r) = (0, 0);
            for i in 0..seg.len() {
                let e = seg[i];
                let left = go_left[e.row()];
                seg[l] = e;
                scratch[r] = e;
                l += left as usize;
                r += !left as usize;
            }
            seg[l..].copy_from_slice(&scratch[..r]);
        };
        if self.is_parallel(start, end) {
            self.sorted.par_iter_mut().for_each_init(Vec::new, |scratch, col| partition(&mut col[start..end], scratch));
        } else {
            let mut scratch = std::mem::take(&mut self.scratch);
            for col in self.sorted.iter_mut() {
                partition(&mut col[start..end], &mut scratch);
            }
            self.scratch = scratch;
        }
    }

    /// Ranks the splits of `arena` in best-first order, renumbers its nodes in preorder and
    /// fills the values: the tree, and `leaf_of` (creation ids) in the tree's node ids.
    fn finish(&self, arena: Arena, options: super::FitOptions, mut leaf_of: Vec<u32>) -> (Tree, Vec<u32>) {
        let Arena { mut nodes, stats, starts, bounds } = arena;
        let limited = !self.monotone.is_empty();
        // The walks below read compact copies of the links and gains: the nodes themselves
        // are large and are read out of creation order.
        let children: Vec<[u32; 2]> = nodes.iter().map(|n| if n.is_leaf() { [NO_NODE; 2] } else { [n.left, n.right] }).collect();
        let gains: Vec<f64> = nodes.iter().map(|n| n.gain).collect();
        let splits = |id: u32| children[id as usize][0] != NO_NODE;
        // Best-first ranks: a priority walk from the root over split nodes (leaves never
        // enter the heap; the order is strict, so they could not change it).
        let mut ranks = vec![NO_NODE; nodes.len()];
        let mut heap = BinaryHeap::new();
        if splits(0) {
            heap.push(Frontier { gain: gains[0], depth: 0, start: 0, id: 0 });
        }
        let mut rank = 0;
        while let Some(top) = heap.pop() {
            ranks[top.id as usize] = rank;
            rank += 1;
            for c in children[top.id as usize] {
                if splits(c) {
                    heap.push(Frontier { gain: gains[c as usize], depth: top.depth + 1, start: starts[c as usize], id: c });
                }
            }
        }
        // Preorder renumbering, left subtree first.
        let mut order = Vec::with_capacity(nodes.len());
        let mut stack = vec![0u32];
        while let Some(i) = stack.pop() {
            order.push(i);
            let [l, r] = children[i as usize];
            if l != NO_NODE {
                stack.push(r);
                stack.push(l);
            }
        }
        let mut new_id = vec![0u32; nodes.len()];
        for (new, &old) in order.iter().enumerate() {
            new_id[old as usize] = new as u32;
        }
        let k = self.prep.k;
        let width = self.width;
        let mut out = Vec::with_capacity(nodes.len());
        let mut values = Vec::with_capacity(nodes.len() * width);
        let mut class_totals = Vec::with_capacity(nodes.len() * k);
        for &old in &order {
            // Each node is moved out once; what is left behind is never read.
            let mut n = std::mem::replace(&mut nodes[old as usize], Node { depth: 0, rows: 0, weighted_rows: 0.0, impurity: 0.0, gain: 0.0, split: None, left: NO_NODE, right: NO_NODE, rank: NO_NODE });
            n.rank = ranks[old as usize];
            if !n.is_leaf() {
                n.left = new_id[n.left as usize];
                n.right = new_id[n.right as usize];
            }
            let t = &stats[old as usize].totals;
            if limited {
                // The reference library's clipping: the value (mean, or class 0's share) is
                // held within the node's bounds; two class shares then sum to 1.
                let (lo, hi) = bounds[old as usize];
                let v = (t.sums[0] / t.w).clamp(lo, hi);
                values.push(v);
                if k > 0 {
                    values.push(1.0 - v);
                    class_totals.extend_from_slice(&t.sums);
                }
            } else if k > 0 {
                values.extend(t.sums.iter().map(|c| c / t.w));
                class_totals.extend_from_slice(&t.sums);
            } else {
                values.push(t.sums[0] / t.w);
            }
            out.push(n);
        }
        let labels = match self.prep.target {
            Target::Classes { labels, .. } => labels.clone(),
            Target::Values(_) => Vec::new(),
        };
        let columns = self
            .prep
            .frame
            .features
            .iter()
            .map(|f| ColumnInfo {
                name: f.name.clone(),
                kind: f.column.kind(),
                levels: match &f.column {
                    Column::Categorical { levels, .. } => levels.clone(),
                    Column::Numeric(_) => Vec::new(),
                },
            })
            .collect();
        let tree = Tree {
            task: if k > 0 { Task::Classify } else { Task::Regress },
            target: self.prep.target_name.clone(),
            labels,
            columns,
            n_classes: k,
            n_features: self.prep.frame.features.len(),
            nodes: out,
            values,
            class_totals,
            total_weight: self.total_weight,
            options,
            decision: None,
        };
        for l in &mut leaf_of {
            *l = new_id[*l as usize];
        }
        (tree, leaf_of)
    }
}

/// Keeps `r` as the best split so far when it is strictly better (features in index order).
fn offer_feature(best: &mut Option<(usize, FeatureBest)>, f: usize, r: Option<FeatureBest>) {
    if let Some(fb) = r {
        if best.as_ref().is_none_or(|(_, b)| fb.proxy > b.proxy) {
            *best = Some((f, fb));
        }
    }
}

/// One tree of a shared growth: its options, its nodes, and the leaf of each fit-local row.
struct KeyTree {
    options: super::FitOptions,
    arena: Arena,
    leaves: Leaves,
}

/// The leaf of each fit-local row a tree has placed: one slot per row in the whole tree, a
/// list of (row, node) in a forked subtree (which holds few of the rows).
enum Leaves {
    Slots(Vec<u32>),
    Listed(Vec<(u32, u32)>),
}

impl Leaves {
    fn set(&mut self, row: usize, id: u32) {
        match self {
            Leaves::Slots(slots) => slots[row] = id,
            Leaves::Listed(list) => list.push((row as u32, id)),
        }
    }
}

impl KeyTree {
    /// A tree for a forked subtree: node `id` of this tree as its root (local id 0).
    fn fork(&self, id: u32) -> KeyTree {
        let a = &self.arena;
        let i = id as usize;
        let arena = Arena { nodes: vec![a.nodes[i].clone()], stats: vec![a.stats[i].clone()], starts: vec![a.starts[i]], bounds: vec![a.bounds[i]] };
        KeyTree { options: self.options.clone(), arena, leaves: Leaves::Listed(Vec::new()) }
    }

    /// Takes in the nodes and leaves `sub` grew below node `id` (see [`KeyTree::fork`]):
    /// its root replaces node `id`, its other nodes are appended.
    fn graft(&mut self, id: u32, sub: KeyTree) {
        let base = self.arena.nodes.len() as u32;
        let map = |local: u32| if local == 0 { id } else { base + local - 1 };
        let Arena { nodes, stats, starts, bounds } = sub.arena;
        for (local, (((mut node, s), start), b)) in nodes.into_iter().zip(stats).zip(starts).zip(bounds).enumerate() {
            if !node.is_leaf() {
                node.left = map(node.left);
                node.right = map(node.right);
            }
            if local == 0 {
                self.arena.nodes[id as usize] = node;
            } else {
                self.arena.nodes.push(node);
                self.arena.stats.push(s);
                self.arena.starts.push(start);
                self.arena.bounds.push(b);
            }
        }
        if let Leaves::Listed(list) = sub.leaves {
            for (row, local) in list {
                self.leaves.set(row as usize, map(local));
            }
        }
    }
}

/// A node that several trees of a shared growth hold alike: (tree, node id in that tree) for
/// each, trees in ascending `min_leaf_rows`, and the node's logical rows `[start, end)`.
struct SharedNode {
    members: Vec<(usize, u32)>,
    start: u32,
    end: u32,
}

impl Grower<'_> {
    /// Grows one tree per checked options (ascending `min_leaf_rows`, otherwise equal) from
    /// one set of sorted columns; see [`fit_shared`]. Each tree, with the leaf of every
    /// fit-local row.
    fn grow_shared(mut self, per_value: &[CheckedOptions], sharing: Sharing) -> Vec<(Tree, Vec<u32>)> {
        self.sharing = sharing;
        let n = self.prep.frame_rows.len() as u32;
        let root = self.stats_of(0..n);
        self.total_weight = root.totals.w;
        let mut trees: Vec<KeyTree> = per_value
            .iter()
            .map(|o| {
                let mut arena = Arena::default();
                arena.push(0, 0, root.clone(), UNBOUNDED);
                KeyTree { options: o.to_options(), arena, leaves: Leaves::Slots(vec![NO_NODE; n as usize]) }
            })
            .collect();
        let all = SharedNode { members: (0..trees.len()).map(|t| (t, 0)).collect(), start: 0, end: n };
        self.grow_together(&mut trees, vec![all]);
        trees
            .into_iter()
            .map(|t| {
                let Leaves::Slots(leaf_of) = t.leaves else { unreachable!("a whole tree keeps a slot per row") };
                self.finish(t.arena, t.options, leaf_of)
            })
            .collect()
    }

    /// Grows the nodes of `stack` and everything below them, depth-first. Where the trees of
    /// a node part, every part but the last grows first, in a recursive call (at most one per
    /// parting, so as deep as there are trees): on its own copy of the node's rows, or on
    /// the rows in place for a node bigger than [`COPY_ENTRIES`], whose order is then
    /// restored. The last part keeps the rows in place. Nodes smaller than
    /// `sharing.fork_entries` are put aside and grown as parallel tasks at the end (see
    /// [`FORK_ENTRIES`]).
    fn grow_together(&mut self, trees: &mut [KeyTree], mut stack: Vec<SharedNode>) {
        let mut forks = Vec::new();
        while let Some(node) = stack.pop() {
            let (a, b) = ((node.start - self.offset) as usize, (node.end - self.offset) as usize);
            if (b - a) * self.sorted.len() < self.sharing.fork_entries {
                forks.push(node);
                continue;
            }
            let parts = self.evaluate_together(trees, &node, a, b);
            let last = parts.len().saturating_sub(1);
            for (i, (members, p)) in parts.into_iter().enumerate() {
                if i < last && (b - a) * self.sorted.len() > self.sharing.copy_entries {
                    let children = self.split_together(trees, &members, &node, a, b, p);
                    self.grow_together(trees, children.into());
                    self.restore_order(a, b);
                } else if i < last {
                    let copy = self.copy_rows(a, b);
                    let sorted = std::mem::replace(&mut self.sorted, copy);
                    let offset = std::mem::replace(&mut self.offset, node.start);
                    let children = self.split_together(trees, &members, &node, 0, b - a, p);
                    self.grow_together(trees, children.into());
                    self.sorted = sorted;
                    self.offset = offset;
                } else {
                    stack.extend(self.split_together(trees, &members, &node, a, b, p));
                }
            }
        }
        self.grow_forks(trees, forks);
    }

    /// Grows each of the put-aside nodes `forks` and everything below them as a task on the
    /// pool, on a copy of its rows, and grafts what each grew into `trees` as it ends.
    fn grow_forks(&self, trees: &mut [KeyTree], forks: Vec<SharedNode>) {
        if forks.is_empty() {
            return;
        }
        let tasks: Vec<(SharedNode, Vec<KeyTree>)> = forks.into_iter().map(|node| {
            let subs = node.members.iter().map(|&(t, id)| trees[t].fork(id)).collect();
            (node, subs)
        }).collect();
        let trees = std::sync::Mutex::new(trees);
        let n = self.prep.frame_rows.len();
        tasks.into_par_iter().for_each_init(
            || vec![false; n],
            |go_left, (node, mut subs)| {
                let (a, b) = ((node.start - self.offset) as usize, (node.end - self.offset) as usize);
                let copy = self.copy_rows(a, b);
                let mut task = self.task(copy, node.start, std::mem::take(go_left));
                let root = SharedNode { members: (0..subs.len()).map(|i| (i, 0)).collect(), start: node.start, end: node.end };
                task.grow_together(&mut subs, vec![root]);
                *go_left = std::mem::take(&mut task.go_left);
                drop(task);
                let mut trees = trees.lock().unwrap_or_else(|e| e.into_inner());
                for (&(t, id), sub) in node.members.iter().zip(subs) {
                    trees[t].graft(id, sub);
                }
            },
        );
    }

    /// A copy of rows `[a, b)` of every sorted feature.
    fn copy_rows(&self, a: usize, b: usize) -> Vec<Vec<Entry>> {
        self.sorted.iter().map(|col| col[a..b].to_vec()).collect()
    }

    /// Sorts rows `[a, b)` of every feature back into the presort's order (by value, ties by
    /// row), as they were before the node's rows were partitioned.
    fn restore_order(&mut self, a: usize, b: usize) {
        let sort = |col: &mut Vec<Entry>| radsort::sort_by_key(&mut col[a..b], |e| (order_bits(e.v) as u64) << 32 | e.row() as u64);
        if self.parallel && self.sorted.len() > 1 {
            self.sorted.par_iter_mut().for_each(sort);
        } else {
            self.sorted.iter_mut().for_each(sort);
        }
    }

    /// The splits the trees of `node` (rows `[a, b)` of `sorted`) take: the trees whose best
    /// split is the same form one part with it. Trees in no part get the node as a leaf.
    fn evaluate_together(&mut self, trees: &mut [KeyTree], node: &SharedNode, a: usize, b: usize) -> Vec<(Vec<(usize, u32)>, Pending)> {
        let (t0, id0) = node.members[0];
        let s = trees[t0].arena.stats[id0 as usize].clone();
        let depth = trees[t0].arena.nodes[id0 as usize].depth;
        // The trees of a shared node took the same splits above it, so share its bounds.
        let bounds = trees[t0].arena.bounds[id0 as usize];
        let n = node.end - node.start;
        let mut parts: Vec<(Vec<(usize, u32)>, Pending)> = Vec::new();
        let open: Vec<(usize, u32)> = if self.stops(depth, &s) { Vec::new() } else { node.members.iter().copied().filter(|&(t, _)| n >= 2 * trees[t].options.limits.min_leaf_rows).collect() };
        if !open.is_empty() {
            let msl: Vec<u32> = open.iter().map(|&(t, _)| trees[t].options.limits.min_leaf_rows).collect();
            let bests = self.search_keys(a, b, &s.totals, &msl, bounds);
            let mut agree: Vec<((usize, FeatureBest), Vec<(usize, u32)>)> = Vec::new();
            for (&member, best) in open.iter().zip(bests) {
                let Some(best) = best else { continue };
                match agree.iter_mut().find(|(b, _)| *b == best) {
                    Some((_, members)) => members.push(member),
                    None => agree.push((best, vec![member])),
                }
            }
            for ((feature, fb), members) in agree {
                if let Some(p) = self.pending(feature, &fb, a, b, &s, bounds) {
                    parts.push((members, p));
                }
            }
        }
        for &(t, id) in &node.members {
            if !parts.iter().any(|(members, _)| members.iter().any(|&(pt, _)| pt == t)) {
                for e in &self.sorted[0][a..b] {
                    trees[t].leaves.set(e.row(), id);
                }
            }
        }
        parts
    }

    /// Partitions rows `[a, b)` of `sorted` by `p` and splits the node in every tree of
    /// `members`: the two children, right first (the stack takes the left one next).
    fn split_together(&mut self, trees: &mut [KeyTree], members: &[(usize, u32)], node: &SharedNode, a: usize, b: usize, p: Pending) -> [SharedNode; 2] {
        self.partition(&p.split, a, b);
        let mid = node.start + p.n_left;
        let (mut left, mut right) = (Vec::with_capacity(members.len()), Vec::with_capacity(members.len()));
        for &(t, id) in members {
            let (l, r) = trees[t].arena.attach(id, p.clone());
            left.push((t, l));
            right.push((t, r));
        }
        [SharedNode { members: right, start: mid, end: node.end }, SharedNode { members: left, start: node.start, end: mid }]
    }
}

/// Routes a sorted entry (numeric value, or category code as a value) through a split.
#[inline]
fn entry_goes_left(split: &Split, v: f32) -> bool {
    if v.is_nan() {
        return split.missing_left;
    }
    match &split.rule {
        SplitRule::Threshold(t) => (v as f64) <= *t,
        SplitRule::Categories(bits) => SplitRule::category_left(bits, v as u32),
    }
}
