//! Single flight: the first request for a version that is not resident loads it, and every
//! request that arrives meanwhile waits for that one load instead of starting its own.

use crate::sync::{Arc, Condvar, Mutex};

use super::RegistryError;

/// One load in progress; waiters block until it completes.
#[derive(Debug)]
pub(crate) struct Flight<T> {
    outcome: Mutex<Option<Result<Arc<T>, RegistryError>>>,
    done: Condvar,
}

impl<T> Flight<T> {
    pub(crate) fn new() -> Self {
        Self {
            outcome: Mutex::new(None),
            done: Condvar::new(),
        }
    }

    /// Records the load's outcome and wakes every waiter.
    pub(crate) fn complete(&self, outcome: Result<Arc<T>, RegistryError>) {
        *self.outcome.lock() = Some(outcome);
        self.done.notify_all();
    }

    /// Blocks until the load completes, then shares its outcome.
    pub(crate) fn wait(&self) -> Result<Arc<T>, RegistryError> {
        let mut outcome = self.outcome.lock();
        loop {
            if let Some(o) = outcome.as_ref() {
                return o.clone();
            }
            outcome = self.done.wait(outcome);
        }
    }
}
