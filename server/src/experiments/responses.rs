//! Group commit of response records. Every request served through a split records which arm
//! record answered it; one durable transaction per request would cost each request a disk sync.
//! Instead a request hands its record to [`ResponseLog::record`] when it is admitted and gets a
//! [`Receipt`]; one writer thread takes every record waiting, writes them in one transaction, and
//! then answers all their receipts. While one batch syncs the next one gathers, so under load a
//! sync serves many requests, and the request's own compute runs while its record is written.
//! A request awaits its receipt before its answer leaves, so an id a client holds is on disk.

use std::sync::Arc;
use std::sync::mpsc;
use std::thread::JoinHandle;

use tokio::sync::oneshot;

use super::ExperimentStore;
use super::records::{FinishedRequest, ServedResponse};

/// The most records one transaction carries.
const MAX_BATCH: usize = 1024;

enum Pending {
    Served {
        served: ServedResponse,
        done: oneshot::Sender<Result<(), String>>,
    },
    /// How a request ended; nobody waits for it.
    Finished(FinishedRequest),
}

/// Watches one request an arm record serves, from its assignment: [`ArmWatch::finish`] records
/// how it ended and how long it took (the evidence of a rollout's error and latency guards).
/// Dropped unfinished (the request failed on a path that returned early), it counts as failed;
/// [`ArmWatch::abandon`] drops it without a record (the client went away).
#[derive(Debug)]
pub struct ArmWatch {
    sender: mpsc::Sender<Pending>,
    arm_id: i64,
    started: std::time::Instant,
    ended: std::sync::atomic::AtomicBool,
}

impl ArmWatch {
    /// Records the request as answered (`failed` false) or failed; only the first call counts.
    pub fn finish(&self, failed: bool) {
        if !self.ended.swap(true, std::sync::atomic::Ordering::SeqCst) {
            let _ = self.sender.send(Pending::Finished(FinishedRequest {
                arm_id: self.arm_id,
                failed,
                latency_ms: self.started.elapsed().as_secs_f64() * 1e3,
            }));
        }
    }

    /// Ends the watch without a record.
    pub fn abandon(&self) {
        self.ended.store(true, std::sync::atomic::Ordering::SeqCst);
    }
}

impl Drop for ArmWatch {
    fn drop(&mut self) {
        self.finish(true);
    }
}

/// The answer to one [`ResponseLog::record`]: ready once the record is durable (or failed).
#[derive(Debug)]
pub struct Receipt(oneshot::Receiver<Result<(), String>>);

impl Receipt {
    /// Waits until the record is on disk; the error says why it is not.
    pub async fn durable(self) -> Result<(), String> {
        self.0
            .await
            .unwrap_or_else(|_| Err("the response log stopped".to_owned()))
    }

    /// [`Receipt::durable`], for code outside the async runtime.
    pub fn wait(self) -> Result<(), String> {
        self.0
            .blocking_recv()
            .unwrap_or_else(|_| Err("the response log stopped".to_owned()))
    }
}

/// The writer of response records; dropping it writes what is queued, then stops the thread.
pub struct ResponseLog {
    sender: Option<mpsc::Sender<Pending>>,
    writer: Option<JoinHandle<()>>,
}

impl std::fmt::Debug for ResponseLog {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("ResponseLog").finish_non_exhaustive()
    }
}

impl ResponseLog {
    /// Starts the writer thread over `store`.
    pub fn start(store: Arc<dyn ExperimentStore>) -> std::io::Result<Self> {
        let (sender, receiver) = mpsc::channel::<Pending>();
        let writer = std::thread::Builder::new()
            .name("switchyard-responses".into())
            .spawn(move || write_batches(store.as_ref(), &receiver))?;
        Ok(Self {
            sender: Some(sender),
            writer: Some(writer),
        })
    }

    /// Queues one record; the receipt says when it is durable.
    pub fn record(&self, served: ServedResponse) -> Receipt {
        let (done, receipt) = oneshot::channel();
        let pending = Pending::Served { served, done };
        if let Some(sender) = &self.sender
            && let Err(mpsc::SendError(Pending::Served { done, .. })) = sender.send(pending)
        {
            let _ = done.send(Err("the response log stopped".to_owned()));
        }
        Receipt(receipt)
    }

    /// Starts watching a request arm record `arm_id` serves; `None` once the log stopped.
    pub fn watch(&self, arm_id: i64) -> Option<ArmWatch> {
        Some(ArmWatch {
            sender: self.sender.clone()?,
            arm_id,
            started: std::time::Instant::now(),
            ended: std::sync::atomic::AtomicBool::new(false),
        })
    }
}

fn write_batches(store: &dyn ExperimentStore, receiver: &mpsc::Receiver<Pending>) {
    while let Ok(first) = receiver.recv() {
        let (mut rows, mut waiting, mut finished) = (Vec::new(), Vec::new(), Vec::new());
        let mut take = |pending: Pending| match pending {
            Pending::Served { served, done } => {
                rows.push(served);
                waiting.push(done);
            }
            Pending::Finished(f) => finished.push(f),
        };
        take(first);
        for _ in 1..MAX_BATCH {
            let Ok(next) = receiver.try_recv() else { break };
            take(next);
        }
        let result = store
            .record_responses(&rows, &finished)
            .map_err(|e| e.to_string());
        if let Err(e) = &result {
            tracing::error!(records = rows.len(), finished = finished.len(), error = %e, "response records were not written");
        }
        for done in waiting {
            let _ = done.send(result.clone());
        }
    }
}

impl Drop for ResponseLog {
    fn drop(&mut self) {
        // Closing the channel lets the writer finish what is queued and return (once the
        // watches of requests still running, which hold senders too, have ended).
        drop(self.sender.take());
        if let Some(writer) = self.writer.take() {
            let _ = writer.join();
        }
    }
}
