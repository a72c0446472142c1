//! Datasets: put (checked, then stored as the next version of its name), get, list, delete.

use std::path::PathBuf;
use std::sync::Arc;

use sha2::{Digest, Sha256};

use super::error::{Result, ServiceError};
use super::{cpu, Service};
use crate::data::csv::{read_dataset, read_frame, CsvOptions};
use crate::data::{Column, ColumnKind, Frame};
use crate::job::{ColumnMeta, DatasetMeta, IdKind};
use crate::store::{DeleteDataset, PutDataset};

/// Hex SHA-256 of the bytes: a dataset's `content`.
pub fn content_digest(bytes: &[u8]) -> String {
    hex(Sha256::digest(bytes).as_slice())
}

pub fn hex(digest: &[u8]) -> String {
    digest.iter().map(|b| format!("{b:02x}")).collect()
}

/// The id of a new dataset version: "ds_" + hex SHA-256 over its content and name and a
/// fresh time-ordered UUID, so every version of every name has its own id (and its own
/// stored bytes) even when the bytes are equal. Without a name, over the content, target
/// and categorical columns instead: equal unnamed uploads meet at one id.
pub fn new_dataset_id(content: &str, name: &str, target: &str, categorical: &[String]) -> String {
    let mut h = Sha256::new();
    h.update(content.as_bytes());
    if name.is_empty() {
        h.update(b"\0unnamed\0");
        h.update(target.as_bytes());
        for c in categorical {
            h.update(b"\0");
            h.update(c.as_bytes());
        }
    } else {
        h.update(b"\0named\0");
        h.update(name.as_bytes());
        h.update(b"\0");
        h.update(uuid::Uuid::now_v7().as_bytes());
    }
    format!("ds_{}", hex(h.finalize().as_slice()))
}

/// A dataset's CSV bytes to store: in memory, or in a staged file (moved into the store,
/// not copied; the caller removes it if it is still there afterwards).
pub enum CsvBytes {
    Memory(Vec<u8>),
    File { path: PathBuf, content: String, len: u64 },
}

impl CsvBytes {
    fn content(&self) -> String {
        match self {
            CsvBytes::Memory(b) => content_digest(b),
            CsvBytes::File { content, .. } => content.clone(),
        }
    }

    fn len(&self) -> u64 {
        match self {
            CsvBytes::Memory(b) => b.len() as u64,
            CsvBytes::File { len, .. } => *len,
        }
    }

    /// A reader from the start (blocking; call on the CPU pool).
    fn reader(&self) -> std::io::Result<Box<dyn std::io::Read + '_>> {
        Ok(match self {
            CsvBytes::Memory(b) => Box::new(&b[..]),
            CsvBytes::File { path, .. } => Box::new(std::io::BufReader::with_capacity(1 << 16, std::fs::File::open(path)?)),
        })
    }
}

/// What a put gives back: the stored version, or the newest version when it holds the same
/// bytes (`unchanged`).
pub struct PutOutcome {
    pub meta: DatasetMeta,
    pub unchanged: bool,
}

/// A dataset to put.
pub struct PutRequest {
    pub name: String,
    /// `None`: no default target (the table is checked as features only).
    pub target: Option<String>,
    pub categorical: Vec<String>,
    pub bytes: CsvBytes,
}

/// An upload that could not be staged (the server's disk, not the caller).
pub fn staging(e: std::io::Error) -> ServiceError {
    ServiceError::Internal(format!("staging the upload: {e}"))
}

fn summarize(frame: &Frame) -> Vec<ColumnMeta> {
    frame
        .features
        .iter()
        .map(|f| match &f.column {
            Column::Numeric(v) => ColumnMeta { name: f.name.clone(), kind: ColumnKind::Numeric, missing: v.iter().filter(|x| x.is_nan()).count() as u64, levels: 0 },
            Column::Categorical { codes, levels } => ColumnMeta {
                name: f.name.clone(),
                kind: ColumnKind::Categorical,
                missing: codes.iter().filter(|&&c| c == crate::data::MISSING_CODE).count() as u64,
                levels: levels.len() as u64,
            },
        })
        .collect()
}

impl Service {
    /// Checks CSV bytes (row and column errors go back to the caller) and stores them as the
    /// next version of the name, unless the newest version is the same (`unchanged`).
    pub async fn put_dataset(self: &Arc<Self>, r: PutRequest) -> Result<PutOutcome> {
        let service = self.clone();
        cpu(self, move || {
            let PutRequest { name, target, categorical, bytes } = r;
            let cfg = &service.config;
            let mut options = CsvOptions::new(target.clone().unwrap_or_default());
            options.categorical = categorical.clone();
            options.max_rows = Some(cfg.max_rows);
            options.max_columns = Some(cfg.max_columns);
            let reader = || bytes.reader().map_err(staging);
            let data_error = |e: &crate::data::csv::DataError| ServiceError::data(e, cfg.max_rows, cfg.max_columns);
            let (frame, task) = if target.is_none() {
                (read_frame(reader()?, &options).map_err(|e| data_error(&e))?, None)
            } else {
                let d = read_dataset(reader()?, &options).map_err(|e| data_error(&e))?;
                let task = Some(d.task());
                (d.frame, task)
            };
            let content = bytes.content();
            let meta = DatasetMeta {
                id: new_dataset_id(&content, &name, target.as_deref().unwrap_or(""), &categorical),
                content,
                name,
                version: 0,
                rows: frame.rows as u64,
                columns: summarize(&frame),
                target,
                task,
                created_at: service.now(),
                bytes: bytes.len(),
                categorical,
            };
            // The frame is not needed to store the bytes.
            drop(frame);
            // A staged upload's file is moved into the store, not copied.
            let stored = match &bytes {
                CsvBytes::Memory(b) => service.store.put_dataset(meta, b),
                CsvBytes::File { path, .. } => service.store.put_dataset_staged(meta, path),
            };
            Ok(match stored? {
                PutDataset::Created(meta) => PutOutcome { meta, unchanged: false },
                PutDataset::Unchanged(meta) => PutOutcome { meta, unchanged: true },
            })
        })
        .await?
    }

    pub fn dataset(&self, id: &str) -> Result<DatasetMeta> {
        ServiceError::check_id("id", IdKind::Dataset, id)?;
        self.store.dataset(id)?.ok_or_else(|| ServiceError::not_found("dataset", id))
    }

    /// A page of datasets (of one name, when given), and the token of the next page.
    pub fn list_datasets(&self, name: Option<&str>, page_token: Option<&str>, page_size: usize) -> Result<(Vec<DatasetMeta>, Option<String>)> {
        Ok(self.store.list_datasets(name, page_token, page_size)?)
    }

    /// Deletes a dataset no queued or running run uses, and its cached frames.
    pub fn delete_dataset(&self, id: &str) -> Result<()> {
        ServiceError::check_id("id", IdKind::Dataset, id)?;
        match self.store.delete_dataset(id)? {
            DeleteDataset::Deleted => {
                self.frames.forget(id);
                Ok(())
            }
            DeleteDataset::NotFound => Err(ServiceError::not_found("dataset", id)),
            DeleteDataset::InUse { run_id } => Err(ServiceError::Precondition(format!("dataset '{id}' is used by run '{run_id}', which is queued or running; cancel it or wait"))),
        }
    }
}
