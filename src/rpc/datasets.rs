//! The Datasets service: uploads staged in a file as they arrive, then convert, call the
//! service ([`crate::service::datasets`]), convert.

use std::os::unix::fs::OpenOptionsExt as _;
use std::path::PathBuf;

use sha2::{Digest, Sha256};
use std::io::Write as _;
use tonic::{Request, Response, Status, Streaming};

use super::{convert, error, page_size, token, Api};
use crate::pb;
use crate::service::datasets::{hex, staging, CsvBytes, PutRequest};

pub use crate::service::datasets::{content_digest, new_dataset_id};

/// The bytes of a dataset to store: a message's, or an upload's staged file.
pub enum Bytes {
    Memory(Vec<u8>),
    Staged(Staged),
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

impl Api {
    /// Checks CSV bytes and stores them as the next version of the name (see
    /// [`crate::service::Service::put_dataset`]).
    pub async fn store_dataset(&self, name: String, target: String, categorical: Vec<String>, bytes: Bytes) -> Result<pb::DatasetInfo, Status> {
        // A staged file stays alive (and is removed on drop) until the put has ended.
        let (bytes, _staged) = match bytes {
            Bytes::Memory(b) => (CsvBytes::Memory(b), None),
            Bytes::Staged(s) => (CsvBytes::File { path: s.path.clone(), content: hex(s.hasher.clone().finalize().as_slice()), len: s.len }, Some(s)),
        };
        let put = self.shared.put_dataset(PutRequest { name, target: crate::job::given(target), categorical, bytes }).await?;
        Ok(pb::DatasetInfo { unchanged: put.unchanged, ..convert::dataset_info(&put.meta) })
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
        let mut staged = Staged::create(self.shared.store.staging_dir()).await.map_err(staging)?;
        while let Some(chunk) = next_chunk(&mut stream, &mut shutdown).await? {
            match chunk.part {
                Some(pb::upload_chunk::Part::Data(b)) => {
                    if staged.len.saturating_add(b.len() as u64) > max {
                        return Err(Status::resource_exhausted(format!("the upload is larger than the limit of {max} bytes")));
                    }
                    staged.write(b).await.map_err(staging)?;
                }
                Some(pb::upload_chunk::Part::Header(_)) => return Err(Status::invalid_argument("an upload carries one header, in its first message")),
                None => {}
            }
        }
        staged.finish().await.map_err(staging)?;
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
        Ok(Response::new(convert::dataset_info(&self.shared.dataset(&request.into_inner().id)?)))
    }

    async fn list_datasets(&self, request: Request<pb::ListDatasetsRequest>) -> Result<Response<pb::ListDatasetsReply>, Status> {
        let r = request.into_inner();
        let name = (!r.name.is_empty()).then_some(r.name.as_str());
        let (list, next) = self.shared.list_datasets(name, token(&r.page_token), page_size(r.page_size))?;
        Ok(Response::new(pb::ListDatasetsReply { datasets: list.iter().map(convert::dataset_info).collect(), next_page_token: next.unwrap_or_default() }))
    }

    async fn delete_dataset(&self, request: Request<pb::DeleteDatasetRequest>) -> Result<Response<pb::DeleteDatasetReply>, Status> {
        self.shared.delete_dataset(&request.into_inner().id)?;
        Ok(Response::new(pb::DeleteDatasetReply {}))
    }
}
