//! The server: wires the store, workers and gRPC services, and drains on shutdown.

use std::future::Future;
use std::sync::atomic::Ordering;
use std::sync::Arc;

use tokio::net::TcpListener;
use tokio_stream::wrappers::TcpListenerStream;
use tokio_stream::StreamExt as _;
use tracing::info;

use crate::access::{self, layer::AuthLayer, Access};
use crate::clock::{Clock, SystemClock};
use crate::config::Config;
use crate::scheduler;
use crate::pb;
use crate::rpc::calls::CallsLayer;
use crate::rpc::limits::GuardLayer;
use crate::rpc::Api;
use crate::store::{Change, Storage};
use crate::worker::{self, Shared};

/// The gRPC services the server registers, by full name (also what health checks name).
pub const SERVICES: [&str; 4] = ["pollard.v1.Datasets", "pollard.v1.Runs", "pollard.v1.Models", "pollard.v1.Schedules"];

/// Serves on `listener` until `shutdown` completes, then stops taking calls, lets running
/// runs stop at their next unit (their finished units stay stored, so they resume at the
/// next start), and flushes the store.
pub async fn run(listener: TcpListener, config: Config, store: Arc<dyn Storage>, shutdown: impl Future<Output = ()> + Send + 'static) -> Result<(), String> {
    run_with_clock(listener, config, store, Arc::new(SystemClock), shutdown).await
}

/// [`run`] with a given clock (tests move a [`crate::clock::TestClock`] by hand).
pub async fn run_with_clock(listener: TcpListener, config: Config, store: Arc<dyn Storage>, clock: Arc<dyn Clock>, shutdown: impl Future<Output = ()> + Send + 'static) -> Result<(), String> {
    let addr = listener.local_addr().map_err(|e| e.to_string())?;
    let mut access = Access::load(&config.access, addr)?;
    let shared = Shared::with_clock(store, config, clock)?;
    access.spawn_watcher(shared.shutdown.subscribe());
    let mut workers = Vec::new();
    worker::queue_resumes(&shared);
    for _ in 0..shared.config.concurrent_runs {
        workers.push(tokio::spawn(worker::worker_loop(shared.clone())));
    }
    workers.push(tokio::spawn(scheduler::scheduler_loop(shared.clone())));
    let api = Api { shared: shared.clone() };
    let (health_reporter, health) = tonic_health::server::health_reporter();
    for name in SERVICES {
        health_reporter.set_service_status(name, tonic_health::ServingStatus::Serving).await;
    }
    let reflection = match shared.config.access.reflection {
        true => Some(tonic_reflection::server::Builder::configure().register_encoded_file_descriptor_set(pb::DESCRIPTOR).build_v1().map_err(|e| format!("reflection: {e}"))?),
        false => None,
    };
    spawn_store_health(&shared, health_reporter.clone());
    if shared.store.shared() {
        spawn_leases(&shared);
        let woken = Arc::downgrade(&shared);
        shared.store.watch_changes(Arc::new(move |change| {
            let Some(s) = woken.upgrade() else { return };
            match change {
                Change::Runs => {
                    s.announce();
                    s.queued.notify_waiters();
                }
                Change::Schedules => s.schedules_changed.notify_one(),
            }
        }));
    }
    info!(%addr, store = %shared.store.describe(), tls = access.tls.is_some(), tokens = access.gate.needs_tokens(), "pollard serving");
    let stop = {
        let shared = shared.clone();
        async move {
            shutdown.await;
            info!("shutting down: no new calls; running runs stop at their next unit");
            shared.stopping.store(true, Ordering::SeqCst);
            for flag in shared.cancels.lock().unwrap().values() {
                flag.store(true, Ordering::SeqCst);
            }
            let _ = shared.shutdown.send(true);
        }
    };
    if let Some(at) = shared.config.access.health_listen {
        let health_only = tonic::transport::Server::builder().add_service(health.clone());
        let listener = TcpListener::bind(at).await.map_err(|e| format!("cannot listen on {at} (health_listen): {e}"))?;
        let mut stop = shared.shutdown.subscribe();
        info!(addr = %at, "health checks served in plain text");
        tokio::spawn(health_only.serve_with_incoming_shutdown(TcpListenerStream::new(listener), async move {
            let _ = stop.changed().await;
        }));
    }
    // The web view on its own address, with the same gate; it stops when the shutdown flag
    // flips, and its live streams end themselves then.
    let web = match shared.config.web_listen {
        None => None,
        Some(at) => {
            access::check_open(&shared.config.access, at)?;
            let listener = TcpListener::bind(at).await.map_err(|e| format!("cannot listen on {at} (web_listen): {e}"))?;
            let web_addr = listener.local_addr().map_err(|e| e.to_string())?;
            if access.tls.is_some() && !web_addr.ip().is_loopback() {
                tracing::warn!(addr = %web_addr, "the web view speaks plain HTTP: put it behind a TLS proxy, or keep web_listen on loopback");
            }
            info!(addr = %web_addr, "web view serving");
            Some(tokio::spawn(crate::web::serve(listener, shared.clone(), access.gate.clone())))
        }
    };
    let m = shared.config.messages;
    // Every call is counted for /metrics, refused ones too; the caller is checked first (a
    // refused caller takes no upload slot), then the transport guard counts the bytes.
    let router = tonic::transport::Server::builder()
        .layer(CallsLayer::new(shared.clone()))
        .layer(AuthLayer::new(access.gate.clone()))
        .layer(GuardLayer::new(&shared.config))
        .add_service(health)
        .add_optional_service(reflection)
        .add_service(pb::datasets_server::DatasetsServer::new(api.clone()).max_decoding_message_size(m.datasets.request).max_encoding_message_size(m.datasets.reply))
        .add_service(pb::runs_server::RunsServer::new(api.clone()).max_decoding_message_size(m.runs.request).max_encoding_message_size(m.runs.reply))
        .add_service(pb::schedules_server::SchedulesServer::new(api.clone()).max_decoding_message_size(m.schedules.request).max_encoding_message_size(m.schedules.reply))
        .add_service(pb::models_server::ModelsServer::new(api.clone()).max_decoding_message_size(m.models.request).max_encoding_message_size(m.models.reply));
    // With TLS, connections come through our accept loop (which swaps certificates on
    // reload); a connection that is not TLS never reaches the router.
    let served = match access.tls.clone() {
        Some(tls) => until_drained(&shared, router.serve_with_incoming_shutdown(access::tls::incoming(listener, tls), stop)).await,
        None => until_drained(&shared, router.serve_with_incoming_shutdown(TcpListenerStream::new(listener).map(no_delay), stop)).await,
    }
    .map_err(|e| format!("server: {e}"));
    if let Some(web) = web {
        let ended = until_drained(&shared, async { web.await.map_err(|e| e.to_string()).and_then(|r| r) }).await;
        if let Err(e) = ended {
            tracing::error!("{e}");
        }
    }
    drain(&shared, workers).await;
    served
}

/// How often the store's health is looked at.
const STORE_HEALTH_EVERY: std::time::Duration = std::time::Duration::from_secs(2);

/// Reports every service NOT_SERVING while the store cannot be used (a database that cannot
/// be reached), and SERVING again once it can; calls meanwhile fail with UNAVAILABLE.
fn spawn_store_health(shared: &Arc<Shared>, reporter: tonic_health::server::HealthReporter) {
    let shared = shared.clone();
    tokio::spawn(async move {
        let mut stop = shared.shutdown.subscribe();
        let mut serving = true;
        loop {
            let store = shared.store.clone();
            let checked = tokio::task::spawn_blocking(move || store.check()).await.unwrap_or_else(|e| Err(crate::store::StoreError::Io(e.to_string())));
            if checked.is_ok() != serving {
                serving = checked.is_ok();
                let status = if serving { tonic_health::ServingStatus::Serving } else { tonic_health::ServingStatus::NotServing };
                match &checked {
                    Ok(()) => info!("the store can be used again: serving"),
                    Err(e) => tracing::warn!(error = %e, "the store cannot be used: not serving"),
                }
                for name in SERVICES.into_iter().chain([""]) {
                    reporter.set_service_status(name, status).await;
                }
            }
            tokio::select! {
                _ = tokio::time::sleep(STORE_HEALTH_EVERY) => {}
                _ = stop.changed() => return,
            }
        }
    });
}

/// A shared store's heartbeat: renews this replica's leases every third of `lease_secs`,
/// and lines up the running runs whose replica is gone for the workers to resume.
fn spawn_leases(shared: &Arc<Shared>) {
    let shared = shared.clone();
    tokio::spawn(async move {
        let mut stop = shared.shutdown.subscribe();
        let every = std::time::Duration::from_millis(shared.config.lease_secs * 1000 / 3);
        loop {
            tokio::select! {
                _ = tokio::time::sleep(every) => {}
                _ = stop.changed() => return,
            }
            let s = shared.clone();
            let turn = tokio::task::spawn_blocking(move || {
                s.store.renew_leases()?;
                if s.stopping.load(Ordering::SeqCst) {
                    return Ok(Vec::new());
                }
                s.store.take_abandoned()
            });
            match turn.await {
                Ok(Ok(runs)) if !runs.is_empty() => {
                    info!(runs = runs.len(), "taking over runs whose replica stopped renewing its lease");
                    shared.resumable.lock().unwrap().extend(runs.into_iter().map(|r| r.id));
                    shared.queued.notify_waiters();
                }
                Ok(Ok(_)) => {}
                Ok(Err(e)) => tracing::warn!(error = %e, "cannot renew the run leases"),
                Err(e) => tracing::warn!(error = %e, "the lease turn failed"),
            }
        }
    });
}

/// Sends small writes at once: with Nagle's algorithm on, a reply written in pieces waits for
/// the caller's delayed ACK (about 40 ms on Linux).
fn no_delay(s: std::io::Result<tokio::net::TcpStream>) -> std::io::Result<tokio::net::TcpStream> {
    if let Ok(s) = &s {
        let _ = s.set_nodelay(true);
    }
    s
}

/// Waits for the server to end, but no longer than `drain_secs` after shutdown began: open
/// streams end themselves with UNAVAILABLE when the shutdown flag flips, and whatever is
/// still open at the deadline is dropped with its connection.
async fn until_drained<E>(shared: &Arc<Shared>, served: impl Future<Output = Result<(), E>>) -> Result<(), E> {
    let mut stopping = shared.shutdown.subscribe();
    let deadline = async move {
        let _ = stopping.wait_for(|s| *s).await;
        tokio::time::sleep(std::time::Duration::from_secs(shared.config.drain_secs)).await;
    };
    tokio::select! {
        r = served => r,
        _ = deadline => {
            tracing::warn!(drain_secs = shared.config.drain_secs, "calls still open at the drain deadline are closed");
            Ok(())
        }
    }
}

/// Awaits the worker tasks, then flushes the store. Every run executes inside a worker task
/// (`worker::execute`, called only by `worker_loop`, resumed runs included) and the task
/// awaits the run's CPU job before it takes the next one, so once every task has ended no
/// run is executing: nothing is left to wait for.
async fn drain(shared: &Arc<Shared>, workers: Vec<tokio::task::JoinHandle<()>>) {
    for w in workers {
        if let Err(e) = w.await {
            tracing::error!("a worker task ended abnormally: {e}");
        }
    }
    // A run still registered here lost its task to a panic outside its CPU job; it is not
    // executing, stays `running` and resumes at the next start.
    let left: Vec<String> = shared.cancels.lock().unwrap().keys().cloned().collect();
    if !left.is_empty() {
        tracing::error!(runs = ?left, "runs whose worker task ended without them; they resume at the next start");
    }
    if let Err(e) = shared.store.flush() {
        tracing::error!("flushing the store: {e}");
    }
    info!("stopped");
}
