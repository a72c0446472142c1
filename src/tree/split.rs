//! Best split of one feature within one node.
//!
//! Every feature's rows arrive sorted by value (categorical codes as values), missing cells
//! last, so a numeric search is one forward scan and a categorical search groups equal codes.
//! Both directions for missing cells are tried (sparsity-aware split finding, Chen &
//! Guestrin, 2016): first every position with missing cells on the right, then every
//! position with them on the left; a later candidate wins only when strictly better.

use smallvec::{smallvec, SmallVec};

use super::Criterion;

/// A feature value and the fit-local row it belongs to.
#[derive(Clone, Copy, Debug, PartialEq)]
pub(crate) struct Entry {
    pub v: f32,
    /// The row in the low 31 bits; in a two-class fit bit 31 is the row's class, so the scans
    /// read it without a lookup (a fit has fewer than 2^31 rows).
    pub r: u32,
}

/// The class bit of [`Entry::r`].
pub(crate) const CLASS_BIT: u32 = 1 << 31;

impl Entry {
    /// The fit-local row.
    #[inline(always)]
    pub fn row(self) -> usize {
        (self.r & !CLASS_BIT) as usize
    }
}

/// Values closer than this (in float32 arithmetic) are treated as one value, as the
/// reference library does, so no threshold falls between two nearly equal floats.
pub(crate) const VALUE_TOLERANCE: f32 = 1e-7;

/// The monotone limit one feature's splits must keep at one node (as the reference library
/// applies it): a candidate is admitted only when its two children's values lie within the
/// node's bounds `[lower, upper]` and are ordered by `sign` (+1: left ≤ right, −1: left ≥
/// right). A child's value is `sums[0] / w`: the mean (regress) or the share of class 0
/// (two classes; the grower flips the sign, so the limit holds for class 1).
#[derive(Clone, Copy, Debug, PartialEq)]
pub(crate) struct Order {
    pub sign: f64,
    pub lower: f64,
    pub upper: f64,
}

impl Order {
    #[inline(always)]
    pub fn admits(&self, vl: f64, vr: f64) -> bool {
        vl >= self.lower && vr >= self.lower && vl <= self.upper && vr <= self.upper && (vl - vr) * self.sign <= 0.0
    }
}

/// Whether `order` (if any) admits children with first sums `a`, `b` and weights `wa`, `wb`.
#[inline(always)]
fn admitted(order: Option<Order>, a: f64, wa: f64, b: f64, wb: f64) -> bool {
    order.is_none_or(|o| o.admits(a / wa, b / wb))
}

/// Per-row target data of a fit.
pub(crate) struct Rows<'a> {
    /// Class codes (classify).
    pub class: &'a [u32],
    /// Target values (regress).
    pub y: &'a [f64],
    /// Weights.
    pub w: &'a [f64],
    /// w · y (regress), precomputed once per fit.
    pub wy: &'a [f64],
    /// Number of classes; 0 when regressing.
    pub k: usize,
    /// Every weight is exactly 1, so a running weight is a row count (exact in f64) and the
    /// scans need not read `w`.
    pub unit: bool,
}

/// Weighted totals of a set of rows.
#[derive(Clone, Debug, PartialEq)]
pub(crate) struct Totals {
    pub n: u32,
    pub w: f64,
    /// Class weights (classify) or [Σ w·y] (regress).
    pub sums: SmallVec<[f64; 2]>,
}

impl Totals {
    pub fn zero(width: usize) -> Totals {
        Totals { n: 0, w: 0.0, sums: smallvec![0.0; width] }
    }

    #[inline]
    pub fn add(&mut self, rows: &Rows, r: usize) {
        self.n += 1;
        self.w += rows.w[r];
        if rows.k > 0 {
            self.sums[rows.class[r] as usize] += rows.w[r];
        } else {
            self.sums[0] += rows.wy[r];
        }
    }

    fn add_totals(&mut self, o: &Totals) {
        self.n += o.n;
        self.w += o.w;
        for (a, b) in self.sums.iter_mut().zip(&o.sums) {
            *a += b;
        }
    }
}

/// How the winning candidate of one feature splits.
#[derive(Clone, Debug, PartialEq)]
pub(crate) enum Cut {
    /// The threshold, and the two present values it lies between (`None` for the
    /// `is present` cut).
    Threshold { at: f64, between: Option<(f32, f32)> },
    /// Codes that go left, and every code present in the node; absent codes follow the
    /// missing direction.
    Codes { left: Vec<u32>, present: Vec<u32> },
}

/// The best split of one feature.
#[derive(Clone, Debug, PartialEq)]
pub(crate) struct FeatureBest {
    pub proxy: f64,
    pub cut: Cut,
    pub missing_left: bool,
    /// Whether the node had missing cells in this feature.
    pub saw_missing: bool,
}

/// Scratch buffers reused across searches.
#[derive(Default)]
pub(crate) struct Scratch {
    left: Vec<f64>,
    right: Vec<f64>,
    miss: Vec<f64>,
    nonmiss: Vec<f64>,
    tmp: Vec<f64>,
}

impl Scratch {
    /// Sizes every buffer to `width` and zeroes the two that are summed into (`left`,
    /// `miss`); the others are written before they are read.
    #[inline]
    fn reset(&mut self, width: usize) {
        if self.left.len() != width {
            for b in [&mut self.left, &mut self.right, &mut self.miss, &mut self.nonmiss, &mut self.tmp] {
                b.clear();
                b.resize(width, 0.0);
            }
        } else {
            self.left.fill(0.0);
            self.miss.fill(0.0);
        }
    }
}

/// Counts and weights a numeric scan needs.
struct Scan<'e> {
    nn: usize,
    n_miss: u32,
    msl: u32,
    miss_w: f64,
    nonmiss_w: f64,
    /// Bin edges (binned splitter), ascending: a cut between present values `u < v` needs an
    /// edge `e` with `u < e <= v`. Empty: every cut is allowed.
    edges: &'e [f32],
    /// The first edge above the values scanned so far.
    edge: usize,
}

impl Scan<'_> {
    /// Positions a scan visits: past the last one, no cut leaves `min_leaf_rows` on the right
    /// even with the missing cells there.
    #[inline(always)]
    fn end(&self) -> usize {
        (self.nn - 1).min((self.nn + self.n_miss as usize).saturating_sub(self.msl as usize))
    }

    /// After the entry at `i` joined the left side: `None` when the next present value equals
    /// it (within [`VALUE_TOLERANCE`]), else the rows of the smaller side of a cut after `i`
    /// with missing cells right, and with them left (0 when there are none): the largest
    /// `min_leaf_rows` that allows each.
    #[inline(always)]
    fn cut_after(&mut self, seg: &[Entry], i: usize) -> Option<(u32, u32)> {
        if seg[i + 1].v <= seg[i].v + VALUE_TOLERANCE {
            return None;
        }
        if !self.edges.is_empty() {
            while self.edge < self.edges.len() && self.edges[self.edge] <= seg[i].v {
                self.edge += 1;
            }
            if self.edge == self.edges.len() || self.edges[self.edge] > seg[i + 1].v {
                return None;
            }
        }
        let (nn, nl, n_miss) = (self.nn as u32, i as u32 + 1, self.n_miss);
        Some((nl.min(nn - nl + n_miss), if n_miss > 0 { (nl + n_miss).min(nn - nl) } else { 0 }))
    }
}

/// Tracks the best candidate of one pass; replaces only on a strictly larger proxy.
struct Best<T> {
    proxy: f64,
    at: Option<T>,
}

impl<T> Best<T> {
    fn new() -> Self {
        Best { proxy: f64::NEG_INFINITY, at: None }
    }
    #[inline]
    fn offer(&mut self, proxy: f64, at: T) {
        if proxy > self.proxy {
            self.proxy = proxy;
            self.at = Some(at);
        }
    }
}

/// Where the candidates of one pass go: the best for one `min_leaf_rows` value, or the
/// best for each of several.
pub(crate) trait Pass<T> {
    /// Offers a candidate allowed for every `min_leaf_rows` value up to `cap` (the rows of
    /// its smaller side). The scan offers only candidates allowed for the smallest value.
    fn offer_within(&mut self, proxy: f64, at: T, cap: u32);
}

impl<T> Pass<T> for Best<T> {
    #[inline(always)]
    fn offer_within(&mut self, proxy: f64, at: T, _cap: u32) {
        self.offer(proxy, at);
    }
}

/// The best candidate of one pass for each of several `min_leaf_rows` values, ascending.
///
/// Each value keeps exactly what a scan for that value alone keeps: the first candidate of
/// the largest proxy among those it allows (strictly-better replacement, in scan order). A
/// candidate allowed for a value is allowed for every smaller one, so the values it may go
/// to are a prefix; and along the values the best proxy so far never rises (a larger value
/// sees a subset of the candidates), so the values it beats are a suffix of that prefix.
/// Most candidates therefore cost one comparison, as in the scan for one value.
pub(crate) struct Bests<'m, T> {
    msl: &'m [u32],
    /// How many values allowed the last candidate (the next cap is usually close).
    allowed: usize,
    best: Vec<Best<T>>,
}

impl<'m, T> Bests<'m, T> {
    fn new(msl: &'m [u32]) -> Self {
        debug_assert!(msl.windows(2).all(|w| w[0] < w[1]), "min_leaf_rows values ascending");
        Bests { msl, allowed: 0, best: msl.iter().map(|_| Best::new()).collect() }
    }
}

impl<T: Copy> Pass<T> for Bests<'_, T> {
    #[inline(always)]
    fn offer_within(&mut self, proxy: f64, at: T, cap: u32) {
        while self.allowed < self.msl.len() && self.msl[self.allowed] <= cap {
            self.allowed += 1;
        }
        while self.allowed > 0 && self.msl[self.allowed - 1] > cap {
            self.allowed -= 1;
        }
        let mut j = self.allowed;
        while j > 0 && proxy > self.best[j - 1].proxy {
            self.best[j - 1] = Best { proxy, at: Some(at) };
            j -= 1;
        }
    }
}

/// What a numeric scan leaves for picking each `min_leaf_rows` value's winner.
struct NumericScan {
    nn: usize,
    n_miss: u32,
    /// Proxy of the cut with every present value left and the missing cells right.
    all_left: Option<f64>,
}

/// What a categorical scan leaves for picking each `min_leaf_rows` value's winner.
struct CategoricalScan {
    groups: Vec<(u32, Totals)>,
    exhaustive: bool,
    n_miss: u32,
}

/// The search settings a node's split depends on.
pub(crate) struct SearchCtx<'a> {
    pub rows: &'a Rows<'a>,
    pub criterion: Criterion,
    pub min_leaf_rows: u32,
    /// The monotone limit of the feature searched, if it has one (numeric features only).
    pub order: Option<Order>,
}

impl SearchCtx<'_> {
    #[inline(always)]
    fn proxy(&self, left: &[f64], wl: f64, right: &[f64], wr: f64) -> f64 {
        if self.rows.k > 0 {
            self.criterion.class_proxy(left, wl, right, wr)
        } else {
            super::criterion::squared_error_proxy(left[0], wl, right[0], wr)
        }
    }

    /// Index of the first missing entry (missing cells sort last).
    fn missing_start(seg: &[Entry]) -> usize {
        let mut nn = seg.len();
        while nn > 0 && seg[nn - 1].v.is_nan() {
            nn -= 1;
        }
        nn
    }

    /// Adds the rows' class weights (or w·y) into `sums`; returns their total weight.
    #[inline]
    fn add_rows(&self, seg: &[Entry], sums: &mut [f64]) -> f64 {
        let rows = self.rows;
        let mut w = 0.0;
        for e in seg {
            let r = e.row();
            w += rows.w[r];
            if rows.k > 0 {
                sums[rows.class[r] as usize] += rows.w[r];
            } else {
                sums[0] += rows.wy[r];
            }
        }
        w
    }

    fn missing_totals(&self, seg: &[Entry], width: usize) -> Totals {
        let mut t = Totals::zero(width);
        for e in seg {
            t.add(self.rows, e.row());
        }
        t
    }

    /// Best threshold split of a numeric feature.
    pub fn numeric(&self, seg: &[Entry], edges: &[f32], node: &Totals, s: &mut Scratch) -> Option<FeatureBest> {
        let (mut right, mut left) = (Best::new(), Best::new());
        let scan = self.numeric_scan(seg, edges, node, s, self.min_leaf_rows, &mut right, &mut left)?;
        self.numeric_pick(seg, &scan, self.min_leaf_rows, right, left)
    }

    /// [`Self::numeric`] for each of the ascending `min_leaf_rows` values `msl`, from one scan.
    pub fn numeric_keys(&self, seg: &[Entry], edges: &[f32], node: &Totals, s: &mut Scratch, msl: &[u32]) -> Vec<Option<FeatureBest>> {
        let (mut right, mut left) = (Bests::new(msl), Bests::new(msl));
        match self.numeric_scan(seg, edges, node, s, msl[0], &mut right, &mut left) {
            None => vec![None; msl.len()],
            Some(scan) => right.best.into_iter().zip(left.best).zip(msl).map(|((r, l), &m)| self.numeric_pick(seg, &scan, m, r, l)).collect(),
        }
    }

    /// Offers every threshold allowed under `min_leaf_rows` = `msl` to the two passes.
    #[allow(clippy::too_many_arguments)]
    fn numeric_scan<P: Pass<usize>>(&self, seg: &[Entry], edges: &[f32], node: &Totals, s: &mut Scratch, msl: u32, pass_right: &mut P, pass_left: &mut P) -> Option<NumericScan> {
        let width = node.sums.len();
        let nn = Self::missing_start(seg);
        if nn == 0 {
            return None;
        }
        let n_miss = (seg.len() - nn) as u32;
        if self.rows.k == 0 && n_miss == 0 && edges.is_empty() && self.order.is_none() {
            // No missing cells, bins or monotone limit: only the first pass has candidates,
            // every one admitted, and the present rows' sums are the node's.
            if seg[nn - 1].v <= seg[0].v + VALUE_TOLERANCE {
                return None;
            }
            let scan = Scan { nn, n_miss, msl, miss_w: 0.0, nonmiss_w: node.w, edges, edge: 0 };
            if self.rows.unit {
                self.scan_regress_plain::<true, P>(seg, &scan, node.sums[0], pass_right);
            } else {
                self.scan_regress_plain::<false, P>(seg, &scan, node.sums[0], pass_right);
            }
            return Some(NumericScan { nn, n_miss, all_left: None });
        }
        s.reset(width);
        let miss_w = self.add_rows(&seg[nn..], &mut s.miss);
        for k in 0..width {
            s.nonmiss[k] = node.sums[k] - s.miss[k];
        }
        let nonmiss_w = node.w - miss_w;
        let constant = seg[nn - 1].v <= seg[0].v + VALUE_TOLERANCE;
        if constant && n_miss == 0 {
            return None;
        }
        if !constant {
            let mut scan = Scan { nn, n_miss, msl, miss_w, nonmiss_w, edges, edge: 0 };
            match (self.rows.k, self.rows.unit) {
                (0, true) => self.scan_positions::<true, true, P>(seg, &mut scan, s, pass_right, pass_left),
                (0, false) => self.scan_positions::<true, false, P>(seg, &mut scan, s, pass_right, pass_left),
                (2, true) => self.scan_two_classes::<true, P>(seg, &mut scan, s, pass_right, pass_left),
                (2, false) => self.scan_two_classes::<false, P>(seg, &mut scan, s, pass_right, pass_left),
                _ => self.scan_positions::<false, false, P>(seg, &mut scan, s, pass_right, pass_left),
            }
        }
        let all_left = (n_miss > 0 && admitted(self.order, s.nonmiss[0], nonmiss_w, s.miss[0], miss_w)).then(|| self.proxy(&s.nonmiss, nonmiss_w, &s.miss, miss_w));
        Some(NumericScan { nn, n_miss, all_left })
    }

    /// The winner under `min_leaf_rows` = `msl`, from the best of each pass.
    fn numeric_pick(&self, seg: &[Entry], scan: &NumericScan, msl: u32, mut pass_right: Best<usize>, pass_left: Best<usize>) -> Option<FeatureBest> {
        let n_miss = scan.n_miss;
        // All present values left, missing cells right.
        let mut all_left = false;
        if let Some(p) = scan.all_left {
            if scan.nn as u32 >= msl && n_miss >= msl && p > pass_right.proxy {
                pass_right.proxy = p;
                pass_right.at = None;
                all_left = true;
            }
        }
        // Only the winner's cut is made: the scan above kept positions, not pairs.
        let threshold = |i: usize| Cut::Threshold { at: seg[i].v as f64 / 2.0 + seg[i + 1].v as f64 / 2.0, between: Some((seg[i].v, seg[i + 1].v)) };
        let right_found = pass_right.at.is_some() || all_left;
        if pass_left.at.is_some() && (!right_found || pass_left.proxy > pass_right.proxy) {
            let i = pass_left.at.unwrap();
            return Some(FeatureBest { proxy: pass_left.proxy, cut: threshold(i), missing_left: true, saw_missing: true });
        }
        if all_left {
            return Some(FeatureBest { proxy: pass_right.proxy, cut: Cut::Threshold { at: f64::INFINITY, between: None }, missing_left: false, saw_missing: true });
        }
        let i = pass_right.at?;
        Some(FeatureBest { proxy: pass_right.proxy, cut: threshold(i), missing_left: false, saw_missing: n_miss > 0 })
    }

    /// The forward scan over the present values of a numeric feature. `REGRESS` picks the
    /// scalar squared-error path at compile time, so the hot loop carries no branch on the task;
    /// `UNIT` (every weight 1) counts the left weight instead of summing it: the same exact
    /// integer, without reading `w`.
    #[inline(always)]
    fn scan_positions<const REGRESS: bool, const UNIT: bool, P: Pass<usize>>(&self, seg: &[Entry], sc: &mut Scan, s: &mut Scratch, pass_right: &mut P, pass_left: &mut P) {
        let rows = self.rows;
        let width = s.left.len();
        let mut lw = 0.0;
        let mut sl = 0.0;
        let (miss0, nonmiss0) = (s.miss[0], s.nonmiss[0]);
        for i in 0..sc.end() {
            let r = seg[i].row();
            if UNIT {
                lw = (i + 1) as f64;
            } else {
                lw += rows.w[r];
            }
            if REGRESS {
                sl += rows.wy[r];
            } else {
                s.left[rows.class[r] as usize] += rows.w[r];
            }
            let Some((right, left)) = sc.cut_after(seg, i) else { continue };
            if right >= sc.msl && (!REGRESS || admitted(self.order, sl, lw, nonmiss0 - sl + miss0, sc.nonmiss_w - lw + sc.miss_w)) {
                let rw = sc.nonmiss_w - lw + sc.miss_w;
                let p = if REGRESS {
                    super::criterion::squared_error_proxy(sl, lw, nonmiss0 - sl + miss0, rw)
                } else {
                    for k in 0..width {
                        s.right[k] = s.nonmiss[k] - s.left[k] + s.miss[k];
                    }
                    self.criterion.class_proxy(&s.left, lw, &s.right, rw)
                };
                pass_right.offer_within(p, i, right);
            }
            if left >= sc.msl && (!REGRESS || admitted(self.order, sl + miss0, lw + sc.miss_w, nonmiss0 - sl, sc.nonmiss_w - lw)) {
                let rw = sc.nonmiss_w - lw;
                let p = if REGRESS {
                    super::criterion::squared_error_proxy(sl + miss0, lw + sc.miss_w, nonmiss0 - sl, rw)
                } else {
                    for k in 0..width {
                        s.tmp[k] = s.left[k] + s.miss[k];
                        s.right[k] = s.nonmiss[k] - s.left[k];
                    }
                    self.criterion.class_proxy(&s.tmp, lw + sc.miss_w, &s.right, rw)
                };
                pass_left.offer_within(p, i, left);
            }
        }
    }

    /// [`Self::scan_positions`] for a regress target with no missing cells, bins or monotone
    /// limit (so no candidate of the second pass, and every cut admitted), `total` the node's
    /// Σ w·y: the same candidates and the same proxies, in a loop whose state fits in
    /// registers. (The general scan adds the missing cells' empty sums, +0, to the right
    /// side's: that only turns a −0 into +0, which squares and divides alike.)
    #[inline(always)]
    fn scan_regress_plain<const UNIT: bool, P: Pass<usize>>(&self, seg: &[Entry], sc: &Scan, total: f64, pass_right: &mut P) {
        let rows = self.rows;
        let (wy, w) = (rows.wy, rows.w);
        let (nonmiss_w, msl) = (sc.nonmiss_w, sc.msl);
        let end = sc.end();
        let nn = sc.nn as u32;
        let (mut lw, mut sl) = (0.0f64, 0.0f64);
        for (i, (e, next)) in seg[..end].iter().zip(&seg[1..=end]).enumerate() {
            let r = e.row();
            if UNIT {
                lw = (i + 1) as f64;
            } else {
                lw += w[r];
            }
            sl += wy[r];
            // As `Scan::cut_after`: no cut between values within the tolerance.
            if next.v <= e.v + VALUE_TOLERANCE {
                continue;
            }
            let nl = i as u32 + 1;
            let right = nl.min(nn - nl);
            if right >= msl {
                let p = super::criterion::squared_error_proxy(sl, lw, total - sl, nonmiss_w - lw);
                pass_right.offer_within(p, i, right);
            }
        }
    }

    /// [`Self::scan_positions`] for two classes: both class weights live in registers and are
    /// updated without a branch on the class. Bit for bit the general scan: adding `w · 0`
    /// or `w − w` (both +0) leaves a sum unchanged, and with unit weights the class-1 count is
    /// an integer and the class-0 weight the row count minus it, the same exact integers.
    #[inline(always)]
    fn scan_two_classes<const UNIT: bool, P: Pass<usize>>(&self, seg: &[Entry], sc: &mut Scan, s: &mut Scratch, pass_right: &mut P, pass_left: &mut P) {
        let rows = self.rows;
        let (m0, m1, n0, n1) = (s.miss[0], s.miss[1], s.nonmiss[0], s.nonmiss[1]);
        let gini = self.criterion == Criterion::Gini;
        let proxy = |a0: f64, a1: f64, wa: f64, b0: f64, b1: f64, wb: f64| {
            if gini {
                // Criterion::class_proxy's Gini branch, unrolled (0 + x is x for x >= 0).
                (a0 * a0 + a1 * a1) / wa + (b0 * b0 + b1 * b1) / wb
            } else {
                self.criterion.class_proxy(&[a0, a1], wa, &[b0, b1], wb)
            }
        };
        let (mut lw, mut l0, mut l1) = (0.0f64, 0.0f64, 0.0f64);
        let mut ones = 0u32;
        for i in 0..sc.end() {
            let c = seg[i].r >> 31;
            if UNIT {
                ones += c;
                lw = (i + 1) as f64;
                l1 = ones as f64;
                l0 = (i as u32 + 1 - ones) as f64;
            } else {
                let w = rows.w[seg[i].row()];
                let wc = w * c as f64;
                lw += w;
                l1 += wc;
                l0 += w - wc;
            }
            let Some((right, left)) = sc.cut_after(seg, i) else { continue };
            if right >= sc.msl && admitted(self.order, l0, lw, n0 - l0 + m0, sc.nonmiss_w - lw + sc.miss_w) {
                let rw = sc.nonmiss_w - lw + sc.miss_w;
                pass_right.offer_within(proxy(l0, l1, lw, n0 - l0 + m0, n1 - l1 + m1, rw), i, right);
            }
            if left >= sc.msl && admitted(self.order, l0 + m0, lw + sc.miss_w, n0 - l0, sc.nonmiss_w - lw) {
                let rw = sc.nonmiss_w - lw;
                pass_left.offer_within(proxy(l0 + m0, l1 + m1, lw + sc.miss_w, n0 - l0, n1 - l1, rw), i, left);
            }
        }
    }

    /// Best category-set split of a categorical feature (codes stored as values).
    pub fn categorical(&self, seg: &[Entry], node: &Totals, s: &mut Scratch) -> Option<FeatureBest> {
        let (mut right, mut left) = (Best::new(), Best::new());
        let scan = self.categorical_scan(seg, node, s, self.min_leaf_rows, &mut right, &mut left)?;
        Self::categorical_pick(&scan, right, left)
    }

    /// [`Self::categorical`] for each of the ascending `min_leaf_rows` values `msl`, from one scan.
    pub fn categorical_keys(&self, seg: &[Entry], node: &Totals, s: &mut Scratch, msl: &[u32]) -> Vec<Option<FeatureBest>> {
        let (mut right, mut left) = (Bests::new(msl), Bests::new(msl));
        match self.categorical_scan(seg, node, s, msl[0], &mut right, &mut left) {
            None => vec![None; msl.len()],
            Some(scan) => right.best.into_iter().zip(left.best).map(|(r, l)| Self::categorical_pick(&scan, r, l)).collect(),
        }
    }

    /// Offers every category set allowed under `min_leaf_rows` = `msl` to the two passes.
    fn categorical_scan<P: Pass<u64>>(&self, seg: &[Entry], node: &Totals, s: &mut Scratch, msl: u32, pass_right: &mut P, pass_left: &mut P) -> Option<CategoricalScan> {
        let width = node.sums.len();
        let nn = Self::missing_start(seg);
        let n_miss = (seg.len() - nn) as u32;
        let miss = self.missing_totals(&seg[nn..], width);
        // Group the present rows by code.
        let mut groups: Vec<(u32, Totals)> = Vec::new();
        let mut i = 0;
        while i < nn {
            let code = seg[i].v;
            let mut t = Totals::zero(width);
            while i < nn && seg[i].v == code {
                t.add(self.rows, seg[i].row());
                i += 1;
            }
            groups.push((code as u32, t));
        }
        let g = groups.len();
        if g == 0 || (g == 1 && n_miss == 0) {
            return None;
        }
        s.reset(width);
        let exhaustive = self.rows.k > 2 && g <= 10;
        if !exhaustive {
            let key = self.order_key(node);
            groups.sort_by(|a, b| key(&a.1).total_cmp(&key(&b.1)).then(a.0.cmp(&b.0)));
        }
        let present = {
            let mut t = Totals::zero(width);
            for (_, gt) in &groups {
                t.add_totals(gt);
            }
            t
        };
        // A candidate is a set of groups going left: a prefix length or a bit mask. Its cap
        // is the rows of its smaller side, the largest `min_leaf_rows` that allows it.
        let mut evaluate = |left: &Totals, id: u64, s: &mut Scratch| {
            let nl = left.n;
            let nr_present = present.n - nl;
            if nl >= msl && nr_present + n_miss >= msl && (nr_present > 0 || n_miss > 0) && nl > 0 {
                for k in 0..width {
                    s.right[k] = present.sums[k] - left.sums[k] + miss.sums[k];
                }
                let p = self.proxy(&left.sums, left.w, &s.right, present.w - left.w + miss.w);
                pass_right.offer_within(p, id, nl.min(nr_present + n_miss));
            }
            if n_miss > 0 && nr_present > 0 && nl + n_miss >= msl && nr_present >= msl {
                for k in 0..width {
                    s.tmp[k] = left.sums[k] + miss.sums[k];
                    s.right[k] = present.sums[k] - left.sums[k];
                }
                let p = self.proxy(&s.tmp, left.w + miss.w, &s.right, present.w - left.w);
                pass_left.offer_within(p, id, (nl + n_miss).min(nr_present));
            }
        };
        if exhaustive {
            // Group 0 always goes left, so each two-way partition is seen once.
            for m in 0..(1u64 << (g - 1)) {
                let mask = 1 | (m << 1);
                let mut left = Totals::zero(width);
                for (j, (_, gt)) in groups.iter().enumerate() {
                    if mask >> j & 1 == 1 {
                        left.add_totals(gt);
                    }
                }
                evaluate(&left, mask, s);
            }
        } else {
            let mut left = Totals::zero(width);
            for (j, (_, gt)) in groups.iter().enumerate() {
                left.add_totals(gt);
                evaluate(&left, j as u64 + 1, s);
            }
        }
        Some(CategoricalScan { groups, exhaustive, n_miss })
    }

    /// The winner of one `min_leaf_rows` value, from the best of each pass.
    fn categorical_pick(scan: &CategoricalScan, pass_right: Best<u64>, pass_left: Best<u64>) -> Option<FeatureBest> {
        let (proxy, id, missing_left) = match (pass_right.at, pass_left.at) {
            (_, Some(l)) if pass_left.proxy > pass_right.proxy => (pass_left.proxy, l, true),
            (Some(r), _) => (pass_right.proxy, r, false),
            (None, Some(l)) => (pass_left.proxy, l, true),
            (None, None) => return None,
        };
        let exhaustive = scan.exhaustive;
        let codes: Vec<u32> = scan
            .groups
            .iter()
            .enumerate()
            .filter(|(j, _)| if exhaustive { id >> j & 1 == 1 } else { (*j as u64) < id })
            .map(|(_, (c, _))| *c)
            .collect();
        let present = scan.groups.iter().map(|(c, _)| *c).collect();
        Some(FeatureBest { proxy, cut: Cut::Codes { left: codes, present }, missing_left, saw_missing: scan.n_miss > 0 })
    }

    /// The order in which categories are scanned: class-1 share (binary), mean target
    /// (regress), or the share of the node's majority class (more than two classes, used
    /// above 10 present categories where exhaustive search is too costly).
    fn order_key(&self, node: &Totals) -> impl Fn(&Totals) -> f64 {
        let k = self.rows.k;
        let class = if k == 2 {
            1
        } else if k > 2 {
            let mut best = 0;
            for c in 1..k {
                if node.sums[c] > node.sums[best] {
                    best = c;
                }
            }
            best
        } else {
            0
        };
        move |t: &Totals| t.sums[class] / t.w
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::sweep::folds::SplitMix64;

    /// What the general scan's first pass and the plain regress scan keep, for each of
    /// `msl` (ascending): (proxy bits, position).
    fn both_scans(seg: &[Entry], rows: &Rows, node: &Totals, msl: &[u32]) -> [Vec<(u64, Option<usize>)>; 2] {
        let ctx = SearchCtx { rows, criterion: Criterion::SquaredError, min_leaf_rows: msl[0], order: None };
        let mut s = Scratch::default();
        s.reset(1);
        s.nonmiss[0] = node.sums[0];
        let scan = || Scan { nn: seg.len(), n_miss: 0, msl: msl[0], miss_w: 0.0, nonmiss_w: node.w, edges: &[], edge: 0 };
        let kept = |b: Bests<usize>| b.best.iter().map(|b| (b.proxy.to_bits(), b.at)).collect::<Vec<_>>();
        let (mut general, mut unused) = (Bests::new(msl), Bests::new(msl));
        let mut plain = Bests::new(msl);
        if rows.unit {
            ctx.scan_positions::<true, true, _>(seg, &mut scan(), &mut s, &mut general, &mut unused);
            ctx.scan_regress_plain::<true, _>(seg, &scan(), node.sums[0], &mut plain);
        } else {
            ctx.scan_positions::<true, false, _>(seg, &mut scan(), &mut s, &mut general, &mut unused);
            ctx.scan_regress_plain::<false, _>(seg, &scan(), node.sums[0], &mut plain);
        }
        assert!(unused.best.iter().all(|b| b.at.is_none()), "without missing cells the second pass has no candidate");
        [kept(general), kept(plain)]
    }

    /// The plain regress scan keeps what the general scan keeps, bit for bit, for each
    /// `min_leaf_rows` value: seeded segments with many tied values, unit and other weights.
    #[test]
    fn the_plain_regress_scan_keeps_what_the_general_scan_keeps() {
        let mut rng = SplitMix64::new(2026);
        let mut found = 0;
        for case in 0..600 {
            let n = 2 + rng.below(70) as usize;
            let distinct = 1 + rng.below(15);
            let unit = case % 2 == 0;
            let y: Vec<f64> = (0..n).map(|_| rng.below(2001) as f64 / 7.0 - 140.0).collect();
            let w: Vec<f64> = (0..n).map(|_| if unit { 1.0 } else { 0.25 + rng.below(12) as f64 / 8.0 }).collect();
            let wy: Vec<f64> = y.iter().zip(&w).map(|(y, w)| y * w).collect();
            let mut seg: Vec<Entry> = (0..n).map(|r| Entry { v: rng.below(distinct) as f32 * 0.37, r: r as u32 }).collect();
            seg.sort_by(|a, b| a.v.total_cmp(&b.v).then(a.r.cmp(&b.r)));
            let rows = Rows { class: &[], y: &y, w: &w, wy: &wy, k: 0, unit };
            let mut node = Totals::zero(1);
            for r in 0..n {
                node.add(&rows, r);
            }
            let [general, plain] = both_scans(&seg, &rows, &node, &[1, 2, 3, 7]);
            assert_eq!(plain, general, "case {case}: n = {n}, {distinct} distinct values, unit weights: {unit}");
            found += general.iter().filter(|(_, at)| at.is_some()).count();
        }
        assert!(found > 1000, "the cases have cuts to find ({found})");
    }
}
