//! Fold plans: how rows are split into training and validation sets.
//!
//! Every plan is deterministic for a seed, and the assignment is part of the result, so the
//! same folds can be used by another tool. Shuffles use SplitMix64 (Steele, Lea & Flood,
//! "Fast splittable pseudorandom number generators", OOPSLA 2014) and the Fisher–Yates
//! shuffle (Knuth, TAOCP vol. 2, Algorithm P).

use super::spec::{spec_error, SpecError};
use crate::data::{Column, Dataset, Target, Task, MISSING_CODE};

/// How rows are split into folds.
#[derive(Clone, Debug, PartialEq)]
pub enum FoldScheme {
    /// Rows shuffled, then cut into k nearly equal folds.
    Shuffled,
    /// Each class dealt evenly over the folds (classification only).
    Stratified,
    /// All rows with the same value in `column` stay in one fold.
    Grouped { column: String },
    /// Rows ordered by `column` (a time); cut into k + 1 blocks; split i trains on blocks
    /// 0..i and validates on block i: train on the past, score on the next block.
    Forward { column: String },
    /// `column` holds each row's fold number.
    Given { column: String },
}

/// A fold scheme with its fold count and repeats.
#[derive(Clone, Debug, PartialEq)]
pub struct FoldPlan {
    pub scheme: FoldScheme,
    /// Folds (splits for `forward`; ignored by `given`, which has as many as it has values).
    pub k: u32,
    /// Repeats with derived seeds (`shuffled`, `stratified` and `grouped` only).
    pub repeats: u32,
}

/// One training/validation split.
#[derive(Clone, Debug, PartialEq)]
pub struct FoldSplit {
    pub repeat: u32,
    pub fold: u32,
    /// Training rows, ascending.
    pub train: Vec<u32>,
    /// Validation rows, ascending.
    pub valid: Vec<u32>,
}

/// The folds of a sweep and the assignment that produced them.
#[derive(Clone, Debug, PartialEq)]
pub struct Folds {
    pub splits: Vec<FoldSplit>,
    /// Per repeat, per row: the fold whose validation set holds the row, or −1 when the row
    /// validates in no split (the first block of a `forward` plan).
    pub assignment: Vec<Vec<i32>>,
    /// Columns the plan reads, which are therefore not used as features.
    pub plan_columns: Vec<String>,
}

impl FoldPlan {
    pub fn default_for(task: Task) -> FoldPlan {
        let scheme = if task == Task::Classify { FoldScheme::Stratified } else { FoldScheme::Shuffled };
        FoldPlan { scheme, k: 5, repeats: 1 }
    }

    pub fn scheme_name(&self) -> &'static str {
        match self.scheme {
            FoldScheme::Shuffled => "shuffled",
            FoldScheme::Stratified => "stratified",
            FoldScheme::Grouped { .. } => "grouped",
            FoldScheme::Forward { .. } => "forward",
            FoldScheme::Given { .. } => "given",
        }
    }

    /// The column the plan reads, if any.
    pub fn column(&self) -> Option<&str> {
        match &self.scheme {
            FoldScheme::Grouped { column } | FoldScheme::Forward { column } | FoldScheme::Given { column } => Some(column),
            _ => None,
        }
    }

    /// Checks that the plan can work on `data`; returns how many splits it makes.
    pub fn check(&self, data: &Dataset) -> Result<usize, SpecError> {
        let n = data.rows();
        let given = matches!(self.scheme, FoldScheme::Given { .. });
        if !given && self.k < 2 {
            return Err(spec_error("folds.k", format!("must be at least 2, got {}", self.k)));
        }
        if self.repeats < 1 {
            return Err(spec_error("folds.repeats", "must be at least 1"));
        }
        if self.repeats > 1 && matches!(self.scheme, FoldScheme::Forward { .. } | FoldScheme::Given { .. }) {
            return Err(spec_error("folds.repeats", format!("a {} plan has one fixed assignment; repeats must be 1", self.scheme_name())));
        }
        let needed = if matches!(self.scheme, FoldScheme::Forward { .. }) { self.k as usize + 1 } else { self.k as usize };
        if !given && needed > n {
            return Err(spec_error("folds.k", format!("{} folds need at least {needed} rows, the dataset has {n}", self.k)));
        }
        let k = self.k as usize;
        match &self.scheme {
            FoldScheme::Shuffled => Ok(k * self.repeats as usize),
            FoldScheme::Stratified => {
                let Target::Classes { codes, labels } = &data.target else {
                    return Err(spec_error("folds.scheme", "stratified folds need a classify target; use shuffled"));
                };
                let mut counts = vec![0usize; labels.len()];
                for &c in codes {
                    counts[c as usize] += 1;
                }
                let (c, &rarest) = counts.iter().enumerate().filter(|(_, &n)| n > 0).min_by_key(|(_, &n)| n).unwrap();
                if rarest < self.k as usize {
                    return Err(spec_error(
                        "folds.k",
                        format!("{} stratified folds need every class in each fold, but class '{}' has only {rarest} rows", self.k, labels[c]),
                    ));
                }
                Ok(k * self.repeats as usize)
            }
            FoldScheme::Grouped { column } => {
                let groups = group_ids(data, column, "folds.column")?;
                let distinct = groups.iter().max().map_or(0, |m| m + 1) as usize;
                if distinct < self.k as usize {
                    return Err(spec_error("folds.k", format!("{} folds need at least {} groups, column '{column}' has {distinct}", self.k, self.k)));
                }
                Ok(k * self.repeats as usize)
            }
            FoldScheme::Forward { column } => time_order(data, column).map(|_| k),
            FoldScheme::Given { column } => {
                let ids = group_ids(data, column, "folds.column")?;
                let distinct = ids.iter().max().map_or(0, |m| m + 1);
                if distinct < 2 {
                    return Err(spec_error("folds.column", format!("column '{column}' holds one fold number only; given folds need at least two")));
                }
                Ok(distinct as usize)
            }
        }
    }

    /// Assigns rows to folds. Call after [`FoldPlan::check`].
    pub fn assign(&self, data: &Dataset, seed: u64) -> Result<Folds, SpecError> {
        let n = data.rows();
        let k = self.k as usize;
        let mut assignment = Vec::new();
        for rep in 0..self.repeats {
            // Derived seed per repeat, so repeat r of seed s never depends on other repeats.
            let mut rng = SplitMix64::new(seed ^ SplitMix64::new(rep as u64).next());
            let fold_of: Vec<i32> = match &self.scheme {
                FoldScheme::Shuffled => {
                    let mut order: Vec<u32> = (0..n as u32).collect();
                    rng.shuffle(&mut order);
                    let mut f = vec![0i32; n];
                    let (base, extra) = (n / k, n % k);
                    let mut pos = 0;
                    for fold in 0..k {
                        let size = base + usize::from(fold < extra);
                        for &r in &order[pos..pos + size] {
                            f[r as usize] = fold as i32;
                        }
                        pos += size;
                    }
                    f
                }
                FoldScheme::Stratified => {
                    let Target::Classes { codes, labels } = &data.target else { unreachable!("checked") };
                    let mut f = vec![0i32; n];
                    let mut deal = 0usize;
                    for c in 0..labels.len() as u32 {
                        let mut rows: Vec<u32> = (0..n as u32).filter(|&r| codes[r as usize] == c).collect();
                        rng.shuffle(&mut rows);
                        for r in rows {
                            f[r as usize] = (deal % k) as i32;
                            deal += 1;
                        }
                    }
                    f
                }
                FoldScheme::Grouped { column } => {
                    let groups = group_ids(data, column, "folds.column")?;
                    let g = groups.iter().max().map_or(0, |m| m + 1) as usize;
                    let mut sizes = vec![0usize; g];
                    for &x in &groups {
                        sizes[x as usize] += 1;
                    }
                    let mut order: Vec<u32> = (0..g as u32).collect();
                    rng.shuffle(&mut order);
                    // Largest groups first, each to the fold with the fewest rows so far.
                    order.sort_by_key(|&x| std::cmp::Reverse(sizes[x as usize]));
                    let mut fold_rows = vec![0usize; k];
                    let mut group_fold = vec![0i32; g];
                    for x in order {
                        let fold = (0..k).min_by_key(|&f| fold_rows[f]).unwrap();
                        fold_rows[fold] += sizes[x as usize];
                        group_fold[x as usize] = fold as i32;
                    }
                    groups.iter().map(|&x| group_fold[x as usize]).collect()
                }
                FoldScheme::Forward { column } => {
                    let order = time_order(data, column)?;
                    let blocks = k + 1;
                    let mut f = vec![0i32; n];
                    let (base, extra) = (n / blocks, n % blocks);
                    let mut pos = 0;
                    for b in 0..blocks {
                        let size = base + usize::from(b < extra);
                        for &r in &order[pos..pos + size] {
                            f[r as usize] = b as i32 - 1;
                        }
                        pos += size;
                    }
                    f
                }
                FoldScheme::Given { column } => group_ids(data, column, "folds.column")?.into_iter().map(|x| x as i32).collect(),
            };
            assignment.push(fold_of);
        }
        let mut splits = Vec::new();
        for (rep, fold_of) in assignment.iter().enumerate() {
            let folds = fold_of.iter().copied().max().unwrap_or(-1) + 1;
            for fold in 0..folds {
                let valid: Vec<u32> = (0..n as u32).filter(|&r| fold_of[r as usize] == fold).collect();
                let train: Vec<u32> = match self.scheme {
                    // Train on the past only.
                    FoldScheme::Forward { .. } => (0..n as u32).filter(|&r| fold_of[r as usize] < fold).collect(),
                    _ => (0..n as u32).filter(|&r| fold_of[r as usize] != fold).collect(),
                };
                splits.push(FoldSplit { repeat: rep as u32, fold: fold as u32, train, valid });
            }
        }
        let plan_columns = self.column().map(|c| vec![c.to_string()]).unwrap_or_default();
        Ok(Folds { splits, assignment, plan_columns })
    }
}

/// Dense ids 0..g for a column's values, in order of the sorted distinct values (numbers by
/// value, categories by name). Missing cells are an error.
fn group_ids(data: &Dataset, column: &str, field: &str) -> Result<Vec<u32>, SpecError> {
    let Some(i) = data.frame.feature_index(column) else {
        return Err(spec_error(field, format!("column '{column}' is not a feature column of the dataset")));
    };
    match &data.frame.features[i].column {
        Column::Numeric(v) => {
            if let Some(r) = v.iter().position(|x| x.is_nan()) {
                return Err(spec_error(field, format!("column '{column}' has a missing cell at row {}", r + 1)));
            }
            let mut distinct: Vec<f32> = v.clone();
            distinct.sort_by(f32::total_cmp);
            distinct.dedup();
            Ok(v.iter().map(|x| distinct.binary_search_by(|d| d.total_cmp(x)).unwrap() as u32).collect())
        }
        Column::Categorical { codes, levels } => {
            if let Some(r) = codes.iter().position(|&c| c == MISSING_CODE) {
                return Err(spec_error(field, format!("column '{column}' has a missing cell at row {}", r + 1)));
            }
            let mut used: Vec<u32> = codes.clone();
            used.sort_unstable();
            used.dedup();
            used.sort_by(|a, b| levels[*a as usize].cmp(&levels[*b as usize]));
            let mut id = vec![0u32; levels.len()];
            for (j, &c) in used.iter().enumerate() {
                id[c as usize] = j as u32;
            }
            Ok(codes.iter().map(|&c| id[c as usize]).collect())
        }
    }
}

/// Rows ordered by a numeric time column (ties by row).
fn time_order(data: &Dataset, column: &str) -> Result<Vec<u32>, SpecError> {
    let Some(i) = data.frame.feature_index(column) else {
        return Err(spec_error("folds.column", format!("column '{column}' is not a feature column of the dataset")));
    };
    let Column::Numeric(v) = &data.frame.features[i].column else {
        return Err(spec_error("folds.column", format!("column '{column}' must be numeric (a time as a number) for forward folds")));
    };
    if let Some(r) = v.iter().position(|x| x.is_nan()) {
        return Err(spec_error("folds.column", format!("column '{column}' has a missing cell at row {}", r + 1)));
    }
    let mut order: Vec<u32> = (0..v.len() as u32).collect();
    order.sort_by(|&a, &b| v[a as usize].total_cmp(&v[b as usize]).then(a.cmp(&b)));
    Ok(order)
}

/// SplitMix64 (Steele, Lea & Flood, 2014).
pub(crate) struct SplitMix64(u64);

impl SplitMix64 {
    pub fn new(seed: u64) -> Self {
        SplitMix64(seed)
    }

    pub fn next(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }

    /// Uniform in 0..n by rejection, so no value is favoured.
    pub fn below(&mut self, n: u64) -> u64 {
        let zone = u64::MAX - u64::MAX % n;
        loop {
            let x = self.next();
            if x < zone {
                return x % n;
            }
        }
    }

    pub fn shuffle<T>(&mut self, v: &mut [T]) {
        for i in (1..v.len()).rev() {
            let j = self.below(i as u64 + 1) as usize;
            v.swap(i, j);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn splitmix_reference_values() {
        // First two outputs for seed 0 of the reference implementation (splitmix64.c by
        // Sebastiano Vigna, public domain); the values are quoted from memory, not a download.
        let mut r = SplitMix64::new(0);
        assert_eq!(r.next(), 0xE220_A839_7B1D_CDAF);
        assert_eq!(r.next(), 0x6E78_9E6A_A1B9_65F4);
    }
}
