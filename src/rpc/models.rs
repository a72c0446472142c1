//! The Models service: export a finished run's model, predict with it.

use tonic::{Request, Response, Status};

use super::{convert, error, Api};
use crate::export;
use crate::job::IdKind;
use crate::pb;
use crate::tree::{Predictions, Tree};
use crate::worker::cpu;

impl Api {
    /// The model of a finished run: NOT_FOUND for an unknown run, FAILED_PRECONDITION while
    /// it has none.
    fn model_of(&self, run_id: &str) -> Result<Tree, Status> {
        error::check_id("run_id", IdKind::Run, run_id)?;
        let run = self.shared.store.run(run_id).map_err(error::store)?.ok_or_else(|| error::not_found("run", run_id))?;
        let outcome = self.shared.store.outcome(run_id).map_err(error::store)?;
        match outcome.and_then(|o| o.model) {
            Some(m) => Ok(m),
            None if run.state.is_terminal() => Err(Status::failed_precondition(format!("run '{run_id}' ended {} without a model", run.state.as_str()))),
            None => Err(Status::failed_precondition(format!("run '{run_id}' is {}; its model exists once it has finished", run.state.as_str()))),
        }
    }
}

#[tonic::async_trait]
impl pb::models_server::Models for Api {
    async fn get_model(&self, request: Request<pb::GetModelRequest>) -> Result<Response<pb::ModelFile>, Status> {
        let r = request.into_inner();
        let tree = self.model_of(&r.run_id)?;
        let format = pb::ModelFormat::try_from(r.format).map_err(|_| Status::invalid_argument(format!("format: {} is not a model format", r.format)))?;
        let file = match format {
            pb::ModelFormat::Protobuf | pb::ModelFormat::Unspecified => pb::ModelFile { format: pb::ModelFormat::Protobuf as i32, model: Some(convert::model_to(&tree)), ..Default::default() },
            pb::ModelFormat::Json => pb::ModelFile { format: r.format, text: export::to_json(&tree), ..Default::default() },
            pb::ModelFormat::Dot => pb::ModelFile { format: r.format, text: export::to_dot(&tree), ..Default::default() },
            pb::ModelFormat::Text => pb::ModelFile { format: r.format, text: export::to_text(&tree), ..Default::default() },
            pb::ModelFormat::Onnx => {
                let data = export::to_onnx(&tree).map_err(|e| Status::failed_precondition(format!("run '{}': the model cannot be written as ONNX: {e}", r.run_id)))?;
                pb::ModelFile { format: r.format, data, ..Default::default() }
            }
        };
        Ok(Response::new(file))
    }

    async fn predict(&self, request: Request<pb::PredictRequest>) -> Result<Response<pb::PredictReply>, Status> {
        let r = request.into_inner();
        let tree = self.model_of(&r.run_id)?;
        let rows = r.rows.ok_or_else(|| Status::invalid_argument("rows: missing"))?;
        let frame = convert::table_to_frame(&rows, &tree.columns)?;
        if frame.rows as u64 > self.shared.config.max_rows as u64 {
            return Err(Status::resource_exhausted(format!("{} rows is more than the limit of {}", frame.rows, self.shared.config.max_rows)));
        }
        let reply = cpu(&self.shared, move || match tree.predict(&frame) {
            Predictions::Classes { classes, probabilities } => pb::PredictReply {
                predicted: classes.iter().map(|&c| tree.labels[c as usize].clone()).collect(),
                classes: tree.labels.clone(),
                probabilities,
                values: Vec::new(),
            },
            Predictions::Values(values) => pb::PredictReply { values, ..Default::default() },
        })
        .await?;
        Ok(Response::new(reply))
    }
}
