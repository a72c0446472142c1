//! What the benchmark clients (examples/load.rs, examples/latency.rs) share: connecting,
//! uploading a CSV as client-streamed chunks, quantiles of latencies.

#![allow(dead_code)]

use std::time::Duration;

use pollard::pb;
use tonic::transport::Channel;

pub async fn connect(server: &str) -> Result<Channel, String> {
    tonic::transport::Endpoint::from_shared(server.to_string()).map_err(|e| e.to_string())?.connect().await.map_err(|e| format!("{server}: {e}"))
}

/// An Upload call's stream: a header naming the dataset and its target, then 64 KiB chunks.
pub fn upload_request(name: &str, target: &str, csv: &[u8]) -> impl tokio_stream::Stream<Item = pb::UploadChunk> {
    let header = pb::UploadChunk {
        part: Some(pb::upload_chunk::Part::Header(pb::UploadHeader { name: name.into(), format: pb::DataFormat::Csv as i32, target: target.into(), categorical: vec![] })),
    };
    let chunks: Vec<pb::UploadChunk> = csv.chunks(64 << 10).map(|c| pb::UploadChunk { part: Some(pb::upload_chunk::Part::Data(c.to_vec())) }).collect();
    tokio_stream::iter(std::iter::once(header).chain(chunks))
}

/// The `q` quantile of sorted latencies, in milliseconds (nearest rank).
pub fn quantile(sorted: &[Duration], q: f64) -> f64 {
    let i = ((sorted.len() as f64 - 1.0) * q).round() as usize;
    sorted[i].as_secs_f64() * 1000.0
}

/// A limit range of listed whole numbers.
pub fn values(v: impl IntoIterator<Item = u32>) -> pb::LimitRange {
    let one = |d: u32| pb::LimitValue { value: Some(pb::limit_value::Value::Number(d as f64)) };
    pb::LimitRange { kind: Some(pb::limit_range::Kind::Values(pb::ValueList { values: v.into_iter().map(one).collect() })) }
}

/// The value, or `tool: error` on stderr and exit with `code` (2 for bad arguments, 1 for a
/// failure).
pub fn or_exit<T>(tool: &str, r: Result<T, String>, code: i32) -> T {
    r.unwrap_or_else(|e| {
        eprintln!("{tool}: {e}");
        std::process::exit(code)
    })
}
