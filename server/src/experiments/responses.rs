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
use super::records::ServedResponse;

/// The most records one transaction carries.
const MAX_BATCH: usize = 1024;

struct Pending {
    served: ServedResponse,
    done: oneshot::Sender<Result<(), String>>,
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
        let pending = Pending { served, done };
        if let Some(sender) = &self.sender
            && let Err(mpsc::SendError(pending)) = sender.send(pending)
        {
            let _ = pending
                .done
                .send(Err("the response log stopped".to_owned()));
        }
        Receipt(receipt)
    }
}

fn write_batches(store: &dyn ExperimentStore, receiver: &mpsc::Receiver<Pending>) {
    while let Ok(first) = receiver.recv() {
        let mut rows = vec![first.served];
        let mut waiting = vec![first.done];
        while rows.len() < MAX_BATCH {
            let Ok(next) = receiver.try_recv() else { break };
            rows.push(next.served);
            waiting.push(next.done);
        }
        let result = store.record_responses(&rows).map_err(|e| e.to_string());
        if let Err(e) = &result {
            tracing::error!(records = rows.len(), error = %e, "response records were not written");
        }
        for done in waiting {
            let _ = done.send(result.clone());
        }
    }
}

impl Drop for ResponseLog {
    fn drop(&mut self) {
        // Closing the channel lets the writer finish what is queued and return.
        drop(self.sender.take());
        if let Some(writer) = self.writer.take() {
            let _ = writer.join();
        }
    }
}
