//! The Datasets service.

use std::os::unix::fs::OpenOptionsExt as _;
use std::path::PathBuf;

use sha2::{Digest, Sha256};
use std::io::Write as _;
use tonic::{Request, Response, Status, Streaming};

use super::{convert, error, page_size, token, Api};
use crate::data::csv::{read_dataset, read_frame, CsvOptions};
use crate::data::{Column, ColumnKind, Frame};
use crate::job::{ColumnMeta, DatasetMeta, IdKind};
use crate::pb;
use crate::store::{DeleteDataset, PutDataset};
use crate::worker::cpu;

/// Hex SHA-256 of the bytes: a dataset's `content`.
pub fn content_digest(bytes: &[u8]) -> String {
    hex(Sha256::digest(bytes).as_slice())
}

fn hex(digest: &[u8]) -> String {
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

/// The bytes of a dataset to store: a message's, or an upload's staged file.
pub enum Bytes {
    Memory(Vec<u8>),
    Staged(Staged),
}

impl Bytes {
    fn content(&self) -> String {
        match self {
            Bytes::Memory(b) => content_digest(b),
            Bytes::Staged(s) => hex(s.hasher.clone().finalize().as_slice()),
        }
    }

    fn len(&self) -> u64 {
        match self {
            Bytes::Memory(b) => b.len() as u64,
            Bytes::Staged(s) => s.len,
        }
    }

    /// A reader from the start (blocking; call on the CPU pool).
    fn reader(&self) -> std::io::Result<Box<dyn std::io::Read + '_>> {
        Ok(match self {
            Bytes::Memory(b) => Box::new(&b[..]),
            Bytes::Staged(s) => Box::new(std::io::BufReader::with_capacity(1 << 16, std::fs::File::open(&s.path)?)),
        })
    }
}

/// An upload arriving into a file of the store's staging directory (so it is never whole in
/// memory), hashed as it arrives; the file is removed on drop.
pub struct Staged {
    path: PathBuf,
    file: Option<std::fs::File>,
    hasher: Sha256,
    len: u64,
}

/// Runs blocking file work off the runtime's threads.
async fn blocking<T: Send + 'static>(f: impl FnOnce() -> std::io::Result<T> + Send + 'static) -> std::io::Result<T> {
    tokio::task::spawn_blocking(f).await.map_err(std::io::Error::other)?
}

impl Staged {
    async fn create(dir: &std::path::Path) -> std::io::Result<Staged> {
        let path = dir.join(format!("upload-{}.part", uuid::Uuid::now_v7().simple()));
        let (dir, p) = (dir.to_path_buf(), path.clone());
        let file = blocking(move || {
            std::fs::create_dir_all(&dir)?;
            std::fs::OpenOptions::new().write(true).create_new(true).mode(0o600).open(&p)
        })
        .await?;
        Ok(Staged { path, file: Some(file), hasher: Sha256::new(), len: 0 })
    }

    async fn write(&mut self, data: Vec<u8>) -> std::io::Result<()> {
        self.hasher.update(&data);
        self.len += data.len() as u64;
        let mut file = self.file.take().expect("written before finish");
        self.file = Some(
            blocking(move || {
                file.write_all(&data)?;
                Ok(file)
            })
            .await?,
        );
        Ok(())
    }

    async fn finish(&mut self) -> std::io::Result<()> {
        if let Some(mut f) = self.file.take() {
            blocking(move || f.flush()).await?;
        }
        Ok(())
    }
}

impl Drop for Staged {
    fn drop(&mut self) {
        let _ = std::fs::remove_file(&self.path);
    }
}

/// The next message of an upload, or UNAVAILABLE once the server is shutting down.
async fn next_chunk(stream: &mut Streaming<pb::UploadChunk>, shutdown: &mut tokio::sync::watch::Receiver<bool>) -> Result<Option<pb::UploadChunk>, Status> {
    tokio::select! {
        m = stream.message() => m,
        _ = shutdown.wait_for(|s| *s) => Err(error::shutting_down("upload again once it is back")),
    }
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

impl Api {
    /// Checks CSV bytes (row and column errors go back to the caller) and stores them as the
    /// next version of the name, unless the newest version is the same (`unchanged`).
    pub async fn store_dataset(&self, name: String, target: String, categorical: Vec<String>, bytes: Bytes) -> Result<pb::DatasetInfo, Status> {
        let shared = self.shared.clone();
        let cfg = shared.config.clone();
        let store = shared.store.clone();
        let clock = shared.clock.clone();
        cpu(&shared, move || {
            let mut options = CsvOptions::new(target.clone());
            options.categorical = categorical.clone();
            options.max_rows = Some(cfg.max_rows);
            options.max_columns = Some(cfg.max_columns);
            let reader = || bytes.reader().map_err(error::staging);
            let (frame, task) = if target.is_empty() {
                (read_frame(reader()?, &options).map_err(|e| error::data(&e))?, None)
            } else {
                let d = read_dataset(reader()?, &options).map_err(|e| error::data(&e))?;
                let task = Some(d.task());
                (d.frame, task)
            };
            let content = bytes.content();
            let meta = DatasetMeta {
                id: new_dataset_id(&content, &name, &target, &categorical),
                content,
                name,
                version: 0,
                rows: frame.rows as u64,
                columns: summarize(&frame),
                target,
                task,
                created_at: clock.now_ms(),
                bytes: bytes.len(),
                categorical,
            };
            // The frame is not needed to store the bytes.
            drop(frame);
            // A staged upload's file is moved into the store, not copied.
            let stored = match &bytes {
                Bytes::Memory(b) => store.put_dataset(meta, b),
                Bytes::Staged(s) => store.put_dataset_staged(meta, &s.path),
            };
            match stored.map_err(error::store)? {
                PutDataset::Created(m) => Ok(convert::dataset_info(&m)),
                PutDataset::Unchanged(m) => Ok(pb::DatasetInfo { unchanged: true, ..convert::dataset_info(&m) }),
            }
        })
        .await?
    }
}

#[tonic::async_trait]
impl pb::datasets_server::Datasets for Api {
    async fn upload(&self, request: Request<Streaming<pb::UploadChunk>>) -> Result<Response<pb::DatasetInfo>, Status> {
        let mut stream = request.into_inner();
        let mut shutdown = self.shared.shutdown.subscribe();
        let Some(first) = next_chunk(&mut stream, &mut shutdown).await? else { return Err(Status::invalid_argument("the upload is empty; send the header first")) };
        let Some(pb::upload_chunk::Part::Header(header)) = first.part else {
            return Err(Status::invalid_argument("the first message of an upload must carry the header"));
        };
        match pb::DataFormat::try_from(header.format) {
            Ok(pb::DataFormat::Csv | pb::DataFormat::Unspecified) => {}
            _ => return Err(Status::invalid_argument(format!("header.format: {} is not a format pollard reads (CSV)", header.format))),
        }
        let max = self.shared.config.max_upload_bytes;
        let mut staged = Staged::create(self.shared.store.staging_dir()).await.map_err(error::staging)?;
        while let Some(chunk) = next_chunk(&mut stream, &mut shutdown).await? {
            match chunk.part {
                Some(pb::upload_chunk::Part::Data(b)) => {
                    if staged.len.saturating_add(b.len() as u64) > max {
                        return Err(Status::resource_exhausted(format!("the upload is larger than the limit of {max} bytes")));
                    }
                    staged.write(b).await.map_err(error::staging)?;
                }
                Some(pb::upload_chunk::Part::Header(_)) => return Err(Status::invalid_argument("an upload carries one header, in its first message")),
                None => {}
            }
        }
        staged.finish().await.map_err(error::staging)?;
        Ok(Response::new(self.store_dataset(header.name, header.target, header.categorical, Bytes::Staged(staged)).await?))
    }

    async fn put_table(&self, request: Request<pb::PutTableRequest>) -> Result<Response<pb::DatasetInfo>, Status> {
        let r = request.into_inner();
        let table = r.table.ok_or_else(|| Status::invalid_argument("table: missing"))?;
        let categorical = table
            .columns
            .iter()
            .filter(|c| matches!(c.cells, Some(pb::table_column::Cells::Texts(_))) && c.name != r.target)
            .map(|c| c.name.clone())
            .collect();
        let bytes = convert::table_to_csv(&table)?;
        if bytes.len() as u64 > self.shared.config.max_upload_bytes {
            return Err(Status::resource_exhausted(format!("the table is larger than the limit of {} bytes", self.shared.config.max_upload_bytes)));
        }
        Ok(Response::new(self.store_dataset(r.name, r.target, categorical, Bytes::Memory(bytes)).await?))
    }

    async fn get_dataset(&self, request: Request<pb::GetDatasetRequest>) -> Result<Response<pb::DatasetInfo>, Status> {
        let id = request.into_inner().id;
        error::check_id("id", IdKind::Dataset, &id)?;
        match self.shared.store.dataset(&id).map_err(error::store)? {
            Some(m) => Ok(Response::new(convert::dataset_info(&m))),
            None => Err(error::not_found("dataset", &id)),
        }
    }

    async fn list_datasets(&self, request: Request<pb::ListDatasetsRequest>) -> Result<Response<pb::ListDatasetsReply>, Status> {
        let r = request.into_inner();
        let name = (!r.name.is_empty()).then_some(r.name.as_str());
        let (list, next) = self.shared.store.list_datasets(name, token(&r.page_token), page_size(r.page_size)).map_err(error::store)?;
        Ok(Response::new(pb::ListDatasetsReply { datasets: list.iter().map(convert::dataset_info).collect(), next_page_token: next.unwrap_or_default() }))
    }

    async fn delete_dataset(&self, request: Request<pb::DeleteDatasetRequest>) -> Result<Response<pb::DeleteDatasetReply>, Status> {
        let id = request.into_inner().id;
        error::check_id("id", IdKind::Dataset, &id)?;
        match self.shared.store.delete_dataset(&id).map_err(error::store)? {
            DeleteDataset::Deleted => Ok(Response::new(pb::DeleteDatasetReply {})),
            DeleteDataset::NotFound => Err(error::not_found("dataset", &id)),
            DeleteDataset::InUse { run_id } => Err(Status::failed_precondition(format!("dataset '{id}' is used by run '{run_id}', which is queued or running; cancel it or wait"))),
        }
    }
}
