//! The columnar table the tree engine reads: feature columns, a target, and the task.

use std::fmt;

/// Code of a missing cell in a categorical column.
pub const MISSING_CODE: u32 = u32::MAX;

/// One feature column, stored the way the engine reads it.
#[derive(Clone, Debug, PartialEq)]
pub enum Column {
    /// Numbers stored as f32 (the reference library also fits on float32); NaN marks a missing cell.
    Numeric(Vec<f32>),
    /// Dictionary-encoded strings: `codes[row]` indexes `levels`, or is [`MISSING_CODE`].
    Categorical { codes: Vec<u32>, levels: Vec<String> },
}

impl Column {
    pub fn len(&self) -> usize {
        match self {
            Column::Numeric(v) => v.len(),
            Column::Categorical { codes, .. } => codes.len(),
        }
    }

    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    pub fn kind(&self) -> ColumnKind {
        match self {
            Column::Numeric(_) => ColumnKind::Numeric,
            Column::Categorical { .. } => ColumnKind::Categorical,
        }
    }

    /// Whether the cell at `row` is missing.
    pub fn is_missing(&self, row: usize) -> bool {
        match self {
            Column::Numeric(v) => v[row].is_nan(),
            Column::Categorical { codes, .. } => codes[row] == MISSING_CODE,
        }
    }
}

/// How a column is read.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum ColumnKind {
    Numeric,
    Categorical,
}

impl ColumnKind {
    pub fn as_str(self) -> &'static str {
        match self {
            ColumnKind::Numeric => "numeric",
            ColumnKind::Categorical => "categorical",
        }
    }

    pub fn parse(text: &str) -> Option<ColumnKind> {
        [ColumnKind::Numeric, ColumnKind::Categorical].into_iter().find(|k| k.as_str() == text)
    }
}

impl fmt::Display for ColumnKind {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

/// A named feature column.
#[derive(Clone, Debug, PartialEq)]
pub struct Feature {
    pub name: String,
    pub column: Column,
}

/// Feature columns of equal length.
#[derive(Clone, Debug, PartialEq, Default)]
pub struct Frame {
    pub features: Vec<Feature>,
    pub rows: usize,
}

impl Frame {
    /// Builds a frame, checking that every column has `rows` cells and names are unique.
    pub fn new(features: Vec<Feature>) -> Result<Frame, String> {
        let rows = features.first().map_or(0, |f| f.column.len());
        for (i, f) in features.iter().enumerate() {
            if f.column.len() != rows {
                return Err(format!(
                    "column '{}' has {} cells, the first column has {rows}",
                    f.name,
                    f.column.len()
                ));
            }
            if features[..i].iter().any(|g| g.name == f.name) {
                return Err(format!("column name '{}' appears twice", f.name));
            }
        }
        Ok(Frame { features, rows })
    }

    pub fn n_features(&self) -> usize {
        self.features.len()
    }

    pub fn feature_index(&self, name: &str) -> Option<usize> {
        self.features.iter().position(|f| f.name == name)
    }

    /// Keeps only the given rows, in the given order.
    pub fn take_rows(&self, rows: &[u32]) -> Frame {
        let features = self
            .features
            .iter()
            .map(|f| Feature {
                name: f.name.clone(),
                column: match &f.column {
                    Column::Numeric(v) => Column::Numeric(rows.iter().map(|&r| v[r as usize]).collect()),
                    Column::Categorical { codes, levels } => Column::Categorical {
                        codes: rows.iter().map(|&r| codes[r as usize]).collect(),
                        levels: levels.clone(),
                    },
                },
            })
            .collect();
        Frame { features, rows: rows.len() }
    }
}

/// What the tree predicts.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum Task {
    Classify,
    Regress,
}

impl Task {
    pub fn as_str(self) -> &'static str {
        match self {
            Task::Classify => "classify",
            Task::Regress => "regress",
        }
    }

    pub fn parse(s: &str) -> Option<Task> {
        match s {
            "classify" => Some(Task::Classify),
            "regress" => Some(Task::Regress),
            _ => None,
        }
    }
}

impl fmt::Display for Task {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

/// The column to predict, encoded for its task.
#[derive(Clone, Debug, PartialEq)]
pub enum Target {
    /// Class codes index `labels`; labels are sorted (numerically when every label is a
    /// number, otherwise as strings), so code order is the same as the reference library's.
    Classes { codes: Vec<u32>, labels: Vec<String> },
    /// Finite values.
    Values(Vec<f64>),
}

impl Target {
    pub fn task(&self) -> Task {
        match self {
            Target::Classes { .. } => Task::Classify,
            Target::Values(_) => Task::Regress,
        }
    }

    pub fn len(&self) -> usize {
        match self {
            Target::Classes { codes, .. } => codes.len(),
            Target::Values(v) => v.len(),
        }
    }

    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    pub fn n_classes(&self) -> usize {
        match self {
            Target::Classes { labels, .. } => labels.len(),
            Target::Values(_) => 0,
        }
    }

    /// Keeps only the given rows, in the given order (labels are kept whole).
    pub fn take_rows(&self, rows: &[u32]) -> Target {
        match self {
            Target::Classes { codes, labels } => Target::Classes {
                codes: rows.iter().map(|&r| codes[r as usize]).collect(),
                labels: labels.clone(),
            },
            Target::Values(v) => Target::Values(rows.iter().map(|&r| v[r as usize]).collect()),
        }
    }
}

/// A frame with its target: what a fit or a sweep reads.
#[derive(Clone, Debug, PartialEq)]
pub struct Dataset {
    pub frame: Frame,
    pub target_name: String,
    pub target: Target,
}

impl Dataset {
    pub fn new(frame: Frame, target_name: String, target: Target) -> Result<Dataset, String> {
        if target.len() != frame.rows {
            return Err(format!(
                "target has {} values, the features have {} rows",
                target.len(),
                frame.rows
            ));
        }
        Ok(Dataset { frame, target_name, target })
    }

    pub fn rows(&self) -> usize {
        self.frame.rows
    }

    pub fn task(&self) -> Task {
        self.target.task()
    }

    pub fn take_rows(&self, rows: &[u32]) -> Dataset {
        Dataset {
            frame: self.frame.take_rows(rows),
            target_name: self.target_name.clone(),
            target: self.target.take_rows(rows),
        }
    }
}
