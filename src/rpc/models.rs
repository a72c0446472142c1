//! The Models service: convert, call the service ([`crate::service::models`]), convert.

use std::sync::Arc;

use tonic::{Request, Response, Status};

use super::{convert, Api};
use crate::pb;
use crate::service::models::{model_in, ModelFile, ModelFormat};
use crate::service::ServiceError;
use crate::tree::Predictions;

fn format_from(format: i32) -> Result<ModelFormat, Status> {
    Ok(match pb::ModelFormat::try_from(format).map_err(|_| ServiceError::invalid("format", format!("{format} is not a model format")))? {
        pb::ModelFormat::Protobuf | pb::ModelFormat::Unspecified => ModelFormat::Native,
        pb::ModelFormat::Json => ModelFormat::Json,
        pb::ModelFormat::Dot => ModelFormat::Dot,
        pb::ModelFormat::Text => ModelFormat::Text,
        pb::ModelFormat::Onnx => ModelFormat::Onnx,
    })
}

#[tonic::async_trait]
impl pb::models_server::Models for Api {
    async fn get_model(&self, request: Request<pb::GetModelRequest>) -> Result<Response<pb::ModelFile>, Status> {
        let r = request.into_inner();
        // The run is looked up first: an unknown run is NOT_FOUND whatever the format says.
        let tree = self.shared.model(&r.run_id)?;
        let format = format_from(r.format)?;
        let file = match model_in(tree, &r.run_id, format)? {
            ModelFile::Native(tree) => pb::ModelFile { format: pb::ModelFormat::Protobuf as i32, model: Some(convert::model_to(&tree)), ..Default::default() },
            ModelFile::Text(text) => pb::ModelFile { format: r.format, text, ..Default::default() },
            ModelFile::Bytes(data) => pb::ModelFile { format: r.format, data, ..Default::default() },
        };
        Ok(Response::new(file))
    }

    async fn predict(&self, request: Request<pb::PredictRequest>) -> Result<Response<pb::PredictReply>, Status> {
        let r = request.into_inner();
        let tree = Arc::new(self.shared.model(&r.run_id)?);
        let rows = r.rows.ok_or_else(|| Status::invalid_argument("rows: missing"))?;
        let frame = convert::table_to_frame(&rows, &tree.columns)?;
        let (predictions, paths) = self.shared.predict(tree.clone(), frame, r.explain).await?;
        let paths = paths.iter().map(|p| convert::path_to(&tree, p)).collect();
        let reply = match predictions {
            Predictions::Classes { classes, probabilities } => pb::PredictReply {
                predicted: classes.iter().map(|&c| tree.labels[c as usize].clone()).collect(),
                classes: tree.labels.clone(),
                probabilities,
                values: Vec::new(),
                paths,
            },
            Predictions::Values(values) => pb::PredictReply { values, paths, ..Default::default() },
        };
        Ok(Response::new(reply))
    }
}
