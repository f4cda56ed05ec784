//! The store watcher: a thread that calls [`Registry::poll_once`] every interval, so a publish,
//! a rollback or a set-live made by another process (the `switchyard adapter` commands, another
//! server) is followed without a restart. Polling the small pointer files is cheap and works on
//! every file system, which change notifications do not.

use std::sync::atomic::AtomicBool;
use std::thread::JoinHandle;
use std::time::Duration;

use crate::registry::Registry;
use crate::sync::{Arc, Condvar, Mutex, Ordering};

/// How often the watcher reads the pointers unless told otherwise: a flip is noticed well within
/// a second.
pub const DEFAULT_POLL_INTERVAL: Duration = Duration::from_millis(200);

/// The running watcher; dropping it stops the thread.
#[derive(Debug)]
pub struct Watcher {
    stop: Arc<(Mutex<bool>, Condvar)>,
    thread: Option<JoinHandle<()>>,
    alive: Arc<AtomicBool>,
}

/// Clears the watcher's alive flag when its thread ends, however it ends (a panic included).
struct AliveGuard(Arc<AtomicBool>);

impl Drop for AliveGuard {
    fn drop(&mut self) {
        self.0.store(false, Ordering::SeqCst);
    }
}

impl Registry {
    /// Starts a thread that polls the store every `interval`. The thread holds the registry only
    /// weakly: it ends when the registry is dropped or the [`Watcher`] is.
    pub fn start_watcher(&self, interval: Duration) -> Watcher {
        let stop = Arc::new((Mutex::new(false), Condvar::new()));
        let registry = self.downgrade();
        let signal = stop.clone();
        let alive = Arc::new(AtomicBool::new(true));
        let guard = AliveGuard(alive.clone());
        let thread = std::thread::Builder::new()
            .name("switchyard-store-watcher".to_owned())
            .spawn(move || {
                let _guard = guard;
                loop {
                    {
                        let (flag, cv) = &*signal;
                        let stopped = cv.wait_timeout(flag.lock(), interval);
                        if *stopped {
                            return;
                        }
                    }
                    let Some(inner) = registry.upgrade() else {
                        return;
                    };
                    Registry::from_inner(inner).poll_once();
                }
            })
            .expect("spawn the store watcher thread");
        Watcher {
            stop,
            thread: Some(thread),
            alive,
        }
    }
}

impl Watcher {
    /// A flag that is true while the watcher's thread runs; readiness checks it.
    pub fn alive(&self) -> Arc<AtomicBool> {
        self.alive.clone()
    }

    /// Stops the thread and waits for it.
    pub fn stop(mut self) {
        self.shutdown();
    }

    fn shutdown(&mut self) {
        let (flag, cv) = &*self.stop;
        *flag.lock() = true;
        cv.notify_all();
        if let Some(t) = self.thread.take() {
            let _ = t.join();
        }
    }
}

impl Drop for Watcher {
    fn drop(&mut self) {
        self.shutdown();
    }
}
