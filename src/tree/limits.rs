//! What a fit may do: the six complexity limits, the criterion and class weighting, checked
//! once before any growth.

use std::fmt;
use std::sync::Arc;

use super::Criterion;
use crate::data::Task;

/// The six complexity limits. `None` means "no limit".
#[derive(Clone, Debug, PartialEq)]
pub struct Limits {
    /// Deepest level a split may happen above; the root has depth 0, so `Some(0)` is a single leaf.
    pub max_depth: Option<u32>,
    /// Rows a node needs before it may split (at least 2).
    pub min_split_rows: u32,
    /// Rows each child must keep (at least 1).
    pub min_leaf_rows: u32,
    /// Most leaves; when set, the tree grows best-first, the split with the largest gain next.
    pub max_leaves: Option<u32>,
    /// Smallest weighted impurity decrease a split must reach.
    pub min_gain: f64,
    /// Cost-complexity parameter α of minimal cost-complexity pruning (0 keeps the grown tree).
    pub prune_alpha: f64,
}

impl Default for Limits {
    fn default() -> Self {
        Limits { max_depth: None, min_split_rows: 2, min_leaf_rows: 1, max_leaves: None, min_gain: 0.0, prune_alpha: 0.0 }
    }
}

/// How rows are weighted by their class.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, Default)]
pub enum ClassWeight {
    /// Every row weighs its sample weight.
    #[default]
    None,
    /// Each class weighs n / (k · n_class), from the unweighted class counts of the fit's rows.
    Balanced,
}

impl ClassWeight {
    pub fn as_str(self) -> &'static str {
        match self {
            ClassWeight::None => "none",
            ClassWeight::Balanced => "balanced",
        }
    }

    pub fn parse(s: &str) -> Option<ClassWeight> {
        match s {
            "none" => Some(ClassWeight::None),
            "balanced" => Some(ClassWeight::Balanced),
            _ => None,
        }
    }
}

/// Where a numeric feature may be cut.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, Default)]
pub enum Splitter {
    /// Between any two neighbouring distinct values.
    #[default]
    Exact,
    /// Only between quantile bins: at most 255 bins per numeric feature, their edges taken
    /// from the fit's own rows (a fold's training rows in a sweep). A feature with at most 255
    /// distinct values keeps every cut, so it splits exactly as [`Splitter::Exact`] does.
    Binned,
}

impl Splitter {
    pub fn as_str(self) -> &'static str {
        match self {
            Splitter::Exact => "exact",
            Splitter::Binned => "binned",
        }
    }

    pub fn parse(s: &str) -> Option<Splitter> {
        [Splitter::Exact, Splitter::Binned].into_iter().find(|x| x.as_str() == s)
    }
}

/// The direction a prediction must keep along one feature (a monotone limit): as the
/// feature grows, the prediction (the mean when regressing, the share of the second class
/// when classifying two classes) must never fall (`Increasing`) or never rise
/// (`Decreasing`). Common practice in credit scoring and pricing.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, Default)]
pub enum Monotone {
    /// No limit along this feature.
    #[default]
    Free,
    Increasing,
    Decreasing,
}

impl Monotone {
    pub fn as_str(self) -> &'static str {
        match self {
            Monotone::Free => "free",
            Monotone::Increasing => "increasing",
            Monotone::Decreasing => "decreasing",
        }
    }

    pub fn parse(s: &str) -> Option<Monotone> {
        [Monotone::Free, Monotone::Increasing, Monotone::Decreasing].into_iter().find(|x| x.as_str() == s)
    }

    /// +1, −1 or 0: the sign of the change of the prediction along the feature.
    pub fn sign(self) -> f64 {
        match self {
            Monotone::Free => 0.0,
            Monotone::Increasing => 1.0,
            Monotone::Decreasing => -1.0,
        }
    }
}

/// Most bins of a numeric feature under [`Splitter::Binned`].
pub const MAX_BINS: usize = 255;

/// Everything a fit is told, before checking.
#[derive(Clone, Debug, PartialEq, Default)]
pub struct FitOptions {
    pub limits: Limits,
    /// `None` picks the task's default: Gini impurity, or squared error.
    pub criterion: Option<Criterion>,
    pub class_weight: ClassWeight,
    pub splitter: Splitter,
    /// A monotone limit per feature, in feature order; empty: none. Checked against the
    /// data when the fit starts (one entry per feature, numeric features only, a regress or
    /// two-class target). Shared, so the settings of a sweep hold one copy.
    pub monotone: Arc<[Monotone]>,
}

/// Options that passed [`FitOptions::check`] for one task; fitting accepts only these.
#[derive(Clone, Debug, PartialEq)]
pub struct CheckedOptions {
    pub(crate) limits: Limits,
    pub(crate) criterion: Criterion,
    pub(crate) class_weight: ClassWeight,
    pub(crate) splitter: Splitter,
    /// Empty when no feature is limited.
    pub(crate) monotone: Arc<[Monotone]>,
    pub(crate) task: Task,
}

impl CheckedOptions {
    pub fn limits(&self) -> &Limits {
        &self.limits
    }
    pub fn criterion(&self) -> Criterion {
        self.criterion
    }
    pub fn class_weight(&self) -> ClassWeight {
        self.class_weight
    }
    pub fn task(&self) -> Task {
        self.task
    }
    pub fn splitter(&self) -> Splitter {
        self.splitter
    }
    /// The monotone limit per feature; empty when no feature is limited.
    pub fn monotone(&self) -> &[Monotone] {
        &self.monotone
    }
    /// The options as given, with the criterion made explicit.
    pub fn to_options(&self) -> FitOptions {
        FitOptions { limits: self.limits.clone(), criterion: Some(self.criterion), class_weight: self.class_weight, splitter: self.splitter, monotone: self.monotone.clone() }
    }
}

/// Why a fit cannot start.
#[derive(Clone, Debug, PartialEq)]
pub struct FitError {
    /// The option or input at fault, as a field path (`limits.min_leaf_rows`).
    pub field: String,
    pub message: String,
}

impl fmt::Display for FitError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}: {}", self.field, self.message)
    }
}

impl std::error::Error for FitError {}

pub(crate) fn fit_error(field: &str, message: impl Into<String>) -> FitError {
    FitError { field: field.to_string(), message: message.into() }
}

impl FitOptions {
    /// Checks every limit's domain and that the criterion and weighting fit the task.
    pub fn check(&self, task: Task) -> Result<CheckedOptions, FitError> {
        let l = &self.limits;
        if l.min_split_rows < 2 {
            return Err(fit_error("limits.min_split_rows", format!("must be at least 2, got {}", l.min_split_rows)));
        }
        if l.min_leaf_rows < 1 {
            return Err(fit_error("limits.min_leaf_rows", "must be at least 1, got 0"));
        }
        if l.max_leaves == Some(0) {
            return Err(fit_error("limits.max_leaves", "must be at least 1, got 0"));
        }
        if !(l.min_gain.is_finite() && l.min_gain >= 0.0) {
            return Err(fit_error("limits.min_gain", format!("must be a finite number >= 0, got {}", l.min_gain)));
        }
        if !(l.prune_alpha.is_finite() && l.prune_alpha >= 0.0) {
            return Err(fit_error("limits.prune_alpha", format!("must be a finite number >= 0, got {}", l.prune_alpha)));
        }
        let criterion = self.criterion.unwrap_or(match task {
            Task::Classify => Criterion::Gini,
            Task::Regress => Criterion::SquaredError,
        });
        if criterion.task() != task {
            return Err(fit_error(
                "criterion",
                format!("{} is for the {} task, this target is {}", criterion.as_str(), criterion.task(), task),
            ));
        }
        if task == Task::Regress && self.class_weight != ClassWeight::None {
            return Err(fit_error("class_weight", "class weighting needs a classify target"));
        }
        // All free is no limit at all: the fit takes the unlimited path.
        let monotone = if self.monotone.iter().any(|&m| m != Monotone::Free) { self.monotone.clone() } else { Arc::default() };
        Ok(CheckedOptions { limits: l.clone(), criterion, class_weight: self.class_weight, splitter: self.splitter, monotone, task })
    }
}
