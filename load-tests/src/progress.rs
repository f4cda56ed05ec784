//! The progress line on stderr while a run goes on: requests done, rate, errors and the
//! latency percentiles so far. On a terminal it is one line rewritten in place; otherwise (a log
//! file, a test) a plain line every few seconds.

use std::io::{IsTerminal, Write};
use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};
use std::sync::{Arc, Mutex, OnceLock};
use std::thread::JoinHandle;
use std::time::{Duration, Instant};

use crate::stats::{percentile, sorted};

/// Counters the workers update as answers come in.
#[derive(Debug)]
pub struct Tally {
    start: Instant,
    /// When the first answer was recorded: the rate counts from there, past the warm-up.
    first: OnceLock<Instant>,
    done: AtomicUsize,
    errors: AtomicUsize,
    latencies_ms: Mutex<Vec<f64>>,
}

impl Tally {
    pub fn new() -> Self {
        Self {
            start: Instant::now(),
            first: OnceLock::new(),
            done: AtomicUsize::new(0),
            errors: AtomicUsize::new(0),
            latencies_ms: Mutex::new(Vec::new()),
        }
    }

    pub fn record(&self, latency_ms: f64, ok: bool) {
        self.first.get_or_init(Instant::now);
        self.done.fetch_add(1, Ordering::Relaxed);
        if !ok {
            self.errors.fetch_add(1, Ordering::Relaxed);
        }
        self.latencies_ms.lock().unwrap().push(latency_ms);
    }

    /// The progress line after `elapsed`.
    pub fn line(&self, label: &str, elapsed: Duration) -> String {
        let done = self.done.load(Ordering::Relaxed);
        let errors = self.errors.load(Ordering::Relaxed);
        let s = sorted(&self.latencies_ms.lock().unwrap());
        progress_line(label, done, errors, elapsed.as_secs_f64(), &s)
    }
}

impl Default for Tally {
    fn default() -> Self {
        Self::new()
    }
}

/// `label: N done, R/s, E errors, p50 X ms, p99 Y ms` from ascending latencies.
pub fn progress_line(
    label: &str,
    done: usize,
    errors: usize,
    elapsed_s: f64,
    sorted_ms: &[f64],
) -> String {
    let rate = if elapsed_s > 0.0 {
        done as f64 / elapsed_s
    } else {
        0.0
    };
    let pct = |q| percentile(sorted_ms, q).map_or("-".to_owned(), |v| format!("{v:.1}"));
    format!(
        "{label}: {done} done, {rate:.1}/s, {errors} errors, p50 {} ms, p99 {} ms",
        pct(0.5),
        pct(0.99)
    )
}

/// Prints the tally's line on stderr until stopped.
#[derive(Debug)]
pub struct ProgressLine {
    stop: Arc<AtomicBool>,
    thread: JoinHandle<()>,
}

impl ProgressLine {
    pub fn start(label: String, tally: Arc<Tally>) -> Self {
        let stop = Arc::new(AtomicBool::new(false));
        let flag = Arc::clone(&stop);
        let thread = std::thread::spawn(move || {
            let terminal = std::io::stderr().is_terminal();
            let period = if terminal {
                Duration::from_millis(250)
            } else {
                Duration::from_secs(5)
            };
            let mut last = Instant::now();
            loop {
                let stopping = flag.load(Ordering::Relaxed);
                if stopping || last.elapsed() >= period {
                    last = Instant::now();
                    let since = tally.first.get().unwrap_or(&tally.start).elapsed();
                    let line = tally.line(&label, since);
                    let mut err = std::io::stderr().lock();
                    if terminal {
                        let _ = write!(err, "\r{line}\x1b[K");
                        if stopping {
                            let _ = writeln!(err);
                        }
                    } else {
                        let _ = writeln!(err, "{line}");
                    }
                }
                if stopping {
                    break;
                }
                std::thread::sleep(Duration::from_millis(20));
            }
        });
        Self { stop, thread }
    }

    /// Prints the last line and stops.
    pub fn finish(self) {
        self.stop.store(true, Ordering::Relaxed);
        let _ = self.thread.join();
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_line_shows_count_rate_errors_and_percentiles() {
        // 40 requests in 2 s are 20/s; of 1..=100 ms, p50 = 50, p99 = 99 (nearest rank).
        let lat: Vec<f64> = (1..=100).map(f64::from).collect();
        assert_eq!(
            progress_line("mixed-10", 40, 1, 2.0, &lat),
            "mixed-10: 40 done, 20.0/s, 1 errors, p50 50.0 ms, p99 99.0 ms"
        );
        assert_eq!(
            progress_line("base", 0, 0, 0.0, &[]),
            "base: 0 done, 0.0/s, 0 errors, p50 - ms, p99 - ms"
        );
        let t = Tally::new();
        t.record(3.0, true);
        t.record(5.0, false);
        assert_eq!(
            t.line("x", Duration::from_secs(1)),
            "x: 2 done, 2.0/s, 1 errors, p50 3.0 ms, p99 5.0 ms"
        );
    }
}
