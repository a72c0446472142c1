//! A real pollard server on 127.0.0.1 (port 0) for integration tests, with the clock the
//! test chooses; shared by the test targets through `#[path]`.

use std::sync::Arc;
use std::time::{Duration, Instant};

use pollard::clock::{Clock, SystemClock};
use pollard::config::Config;
use pollard::store::Storage;
use tokio::sync::oneshot;
use tonic::transport::Channel;

/// Interval between polls of a condition (never a wait for its own sake).
pub const POLL: Duration = Duration::from_millis(20);

pub struct Server {
    pub addr: std::net::SocketAddr,
    pub stop: Option<oneshot::Sender<()>>,
    pub done: tokio::task::JoinHandle<Result<(), String>>,
}

/// A server on the system clock.
#[allow(dead_code)]
pub async fn start(store: Arc<dyn Storage>, config: Config) -> Server {
    start_with_clock(store, config, Arc::new(SystemClock)).await
}

pub async fn start_with_clock(store: Arc<dyn Storage>, config: Config, clock: Arc<dyn Clock>) -> Server {
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let addr = listener.local_addr().unwrap();
    let (tx, rx) = oneshot::channel();
    let done = tokio::spawn(pollard::server::run_with_clock(listener, config, store, clock, async move {
        let _ = rx.await;
    }));
    Server { addr, stop: Some(tx), done }
}

impl Server {
    pub async fn channel(&self) -> Channel {
        let url = format!("http://{}", self.addr);
        let deadline = Instant::now() + Duration::from_secs(10);
        loop {
            if let Ok(c) = Channel::from_shared(url.clone()).unwrap().connect().await {
                return c;
            }
            assert!(Instant::now() < deadline, "server did not come up");
            tokio::time::sleep(POLL).await;
        }
    }

    /// Drops the shutdown oneshot: the server stops taking calls and drains.
    pub fn signal_stop(&mut self) {
        drop(self.stop.take());
    }

    pub async fn stop(mut self) {
        self.signal_stop();
        tokio::time::timeout(Duration::from_secs(30), self.done).await.expect("the server did not drain").unwrap().unwrap();
    }
}

/// Waits (up to `patience`) until the schedule has `n` fire records; returns them oldest first.
#[allow(dead_code)]
pub async fn wait_fires(ch: &Channel, id: &str, n: usize, patience: Duration) -> Vec<pollard::pb::Fire> {
    use pollard::pb;
    let deadline = Instant::now() + patience;
    loop {
        let mut f = pb::schedules_client::SchedulesClient::new(ch.clone()).list_fires(pb::ListFiresRequest { schedule_id: id.into(), page_size: 500, page_token: String::new() }).await.unwrap().into_inner().fires;
        if f.len() >= n {
            f.reverse();
            return f;
        }
        assert!(Instant::now() < deadline, "schedule {id} has {} fires, waited for {n}", f.len());
        tokio::time::sleep(POLL).await;
    }
}
