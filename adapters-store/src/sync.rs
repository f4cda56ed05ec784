//! The one place the shared-state code of this crate gets its locks, condition variables and
//! atomics. Routing them through here keeps the registry's races testable in one spot (a stress
//! test, or a model checker swapped in behind these names) and gives one policy for poisoning:
//! a panic while a lock is held must not take every later request down with it, so a poisoned
//! lock is taken over as it is. The registry keeps its invariants by finishing each state change
//! inside one critical section, never by relying on a panic-free holder.

use std::time::Duration;

pub(crate) use std::sync::atomic::{AtomicU64, Ordering};
pub(crate) use std::sync::{Arc, Weak};

/// A mutex whose `lock` never fails.
#[derive(Debug, Default)]
pub(crate) struct Mutex<T>(std::sync::Mutex<T>);

pub(crate) type MutexGuard<'a, T> = std::sync::MutexGuard<'a, T>;

impl<T> Mutex<T> {
    pub(crate) fn new(value: T) -> Self {
        Self(std::sync::Mutex::new(value))
    }

    pub(crate) fn lock(&self) -> MutexGuard<'_, T> {
        self.0
            .lock()
            .unwrap_or_else(std::sync::PoisonError::into_inner)
    }
}

/// A condition variable paired with [`Mutex`].
#[derive(Debug, Default)]
pub(crate) struct Condvar(std::sync::Condvar);

impl Condvar {
    pub(crate) fn new() -> Self {
        Self(std::sync::Condvar::new())
    }

    pub(crate) fn wait<'a, T>(&self, guard: MutexGuard<'a, T>) -> MutexGuard<'a, T> {
        self.0
            .wait(guard)
            .unwrap_or_else(std::sync::PoisonError::into_inner)
    }

    /// Waits at most `timeout`; the caller re-checks its condition either way.
    pub(crate) fn wait_timeout<'a, T>(
        &self,
        guard: MutexGuard<'a, T>,
        timeout: Duration,
    ) -> MutexGuard<'a, T> {
        self.0
            .wait_timeout(guard, timeout)
            .map(|(g, _)| g)
            .unwrap_or_else(|e| e.into_inner().0)
    }

    pub(crate) fn notify_all(&self) {
        self.0.notify_all();
    }
}
