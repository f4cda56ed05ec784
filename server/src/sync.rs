//! The one place the server's shared-state code gets its locks. Routing them through here gives
//! one policy for poisoning: a panic while a lock is held must not take every later request down
//! with it (a poisoned split lock once made every split call fail until a restart), so a poisoned
//! lock is taken over as it is. Code that holds one of these locks keeps its invariants by making
//! each state change inside one critical section, computing first and assigning last, never by
//! relying on a panic-free holder.

pub(crate) use std::sync::MutexGuard;
use std::sync::{PoisonError, RwLockReadGuard, RwLockWriteGuard};

/// A mutex whose `lock` never fails.
#[derive(Debug, Default)]
pub(crate) struct Mutex<T>(std::sync::Mutex<T>);

impl<T> Mutex<T> {
    pub(crate) fn new(value: T) -> Self {
        Self(std::sync::Mutex::new(value))
    }

    pub(crate) fn lock(&self) -> MutexGuard<'_, T> {
        self.0.lock().unwrap_or_else(PoisonError::into_inner)
    }
}

/// A reader-writer lock whose `read` and `write` never fail.
#[derive(Debug, Default)]
pub(crate) struct RwLock<T>(std::sync::RwLock<T>);

impl<T> RwLock<T> {
    pub(crate) fn new(value: T) -> Self {
        Self(std::sync::RwLock::new(value))
    }

    pub(crate) fn read(&self) -> RwLockReadGuard<'_, T> {
        self.0.read().unwrap_or_else(PoisonError::into_inner)
    }

    pub(crate) fn write(&self) -> RwLockWriteGuard<'_, T> {
        self.0.write().unwrap_or_else(PoisonError::into_inner)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_panic_while_holding_a_lock_does_not_poison_it() {
        let lock = std::sync::Arc::new(Mutex::new(1));
        let held = lock.clone();
        let result = std::thread::spawn(move || {
            let _guard = held.lock();
            panic!("a handler panicked while holding the lock");
        })
        .join();
        assert!(result.is_err());
        *lock.lock() += 1;
        assert_eq!(*lock.lock(), 2);

        let rw = std::sync::Arc::new(RwLock::new(1));
        let held = rw.clone();
        let result = std::thread::spawn(move || {
            let _guard = held.write();
            panic!("a handler panicked while writing");
        })
        .join();
        assert!(result.is_err());
        assert_eq!(*rw.read(), 1);
        *rw.write() = 3;
        assert_eq!(*rw.read(), 3);
    }
}
