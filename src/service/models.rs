//! Models: a finished run's tree in a format, and predictions with it.

use std::sync::Arc;

use super::error::{Result, ServiceError};
use super::{cpu, Service};
use crate::data::Frame;
use crate::export;
use crate::tree::{PathStep, Predictions, Tree};

/// A row's leaf and, root first, the conditions on its way there.
pub type RowPath = (u32, Vec<PathStep>);

/// The formats a model is served in.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum ModelFormat {
    /// The tree itself (the transport writes its own encoding).
    Native,
    Json,
    Dot,
    Text,
    Onnx,
}

/// A model in a format.
pub enum ModelFile {
    Native(Tree),
    Text(String),
    Bytes(Vec<u8>),
}

impl Service {
    /// The model of a finished run: `NotFound` for an unknown run, `Precondition` while it
    /// has none.
    pub fn model(&self, run_id: &str) -> Result<Tree> {
        let run = self.run("run_id", run_id)?;
        let outcome = self.outcomes.get(self.store.as_ref(), run_id)?;
        match outcome.and_then(|o| o.model.clone()) {
            Some(m) => Ok(m),
            None if run.state.is_terminal() => Err(ServiceError::Precondition(format!("run '{run_id}' ended {} without a model", run.state.as_str()))),
            None => Err(ServiceError::Precondition(format!("run '{run_id}' is {}; its model exists once it has finished", run.state.as_str()))),
        }
    }

    /// The model of a finished run in a format.
    pub fn model_file(&self, run_id: &str, format: ModelFormat) -> Result<ModelFile> {
        model_in(self.model(run_id)?, run_id, format)
    }

    /// Predictions of `tree` for the rows of `frame` (its columns in the tree's order), on
    /// the CPU pool for calls, within `max_rows`; with `explain`, also each row's leaf and
    /// the conditions on its way there, within `max_explained_rows` (checked first).
    pub async fn predict(self: &Arc<Self>, tree: Arc<Tree>, frame: Frame, explain: bool) -> Result<(Predictions, Vec<RowPath>)> {
        let max = self.config.max_rows;
        if frame.rows as u64 > max as u64 {
            return Err(ServiceError::TooLarge { what: "rows".into(), limit: max as u64, message: format!("{} rows is more than the limit of {max}", frame.rows) });
        }
        let max = self.config.max_explained_rows;
        if explain && frame.rows > max {
            return Err(ServiceError::cap("explain", &format!("{} rows asked to be explained", frame.rows), "max_explained_rows", max as u64));
        }
        cpu(self, move || {
            let paths = if explain { (0..frame.rows).map(|row| tree.path_row(&frame, row)).collect() } else { Vec::new() };
            (tree.predict(&frame), paths)
        })
        .await
    }
}

/// A run's model in a format.
pub fn model_in(tree: Tree, run_id: &str, format: ModelFormat) -> Result<ModelFile> {
    Ok(match format {
        ModelFormat::Native => ModelFile::Native(tree),
        ModelFormat::Json => ModelFile::Text(export::to_json(&tree)),
        ModelFormat::Dot => ModelFile::Text(export::to_dot(&tree)),
        ModelFormat::Text => ModelFile::Text(export::to_text(&tree)),
        ModelFormat::Onnx => ModelFile::Bytes(export::to_onnx(&tree).map_err(|e| ServiceError::Precondition(format!("run '{run_id}': the model cannot be written as ONNX: {e}")))?),
    })
}
