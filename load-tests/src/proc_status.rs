//! A local process's memory by kind and its thread count, read from `/proc/PID/status` (Linux)
//! while a run goes on: the soak samples its server with it, so that a resident set that grows
//! can be told apart as anonymous memory (the heap), file-backed pages (mapped files) or more
//! threads.

use std::time::{Duration, Instant};

use crate::scrape::Periodic;

/// One reading, in bytes (and a count of threads).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ProcSample {
    pub at_s: f64,
    pub anon: f64,
    pub file: f64,
    pub threads: f64,
}

/// Reads `RssAnon`, `RssFile` and `Threads` from the text of a status file.
pub fn parse_status(text: &str, at_s: f64) -> Option<ProcSample> {
    let field = |name: &str| {
        text.lines()
            .find_map(|l| l.strip_prefix(name))
            .and_then(|rest| rest.split_whitespace().next())
            .and_then(|v| v.parse::<f64>().ok())
    };
    Some(ProcSample {
        at_s,
        anon: field("RssAnon:")? * 1024.0,
        file: field("RssFile:")? * 1024.0,
        threads: field("Threads:")?,
    })
}

/// Reads `/proc/PID/status` every `period` on its own thread until stopped.
#[derive(Debug)]
pub struct ProcSampler(Periodic<ProcSample>);

impl ProcSampler {
    /// Starts sampling process `pid`; times are seconds since `origin`. Where there is no such
    /// file (not Linux, or the process ended) it collects nothing.
    pub fn start(pid: u32, origin: Instant, period: Duration) -> Self {
        let path = format!("/proc/{pid}/status");
        Self(Periodic::start(origin, period, move |at| {
            std::fs::read_to_string(&path)
                .ok()
                .and_then(|t| parse_status(&t, at))
        }))
    }

    /// Stops and returns the samples.
    pub fn finish(self) -> Vec<ProcSample> {
        self.0.finish()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn anonymous_file_backed_and_threads_are_read_in_bytes() {
        // The layout proc(5) documents for /proc/PID/status (kB units).
        let text = "Name:\tswitchyard\nVmRSS:\t  372000 kB\nRssAnon:\t  300000 kB\n\
                    RssFile:\t   70000 kB\nRssShmem:\t    2000 kB\nThreads:\t17\n";
        assert_eq!(
            parse_status(text, 2.0),
            Some(ProcSample {
                at_s: 2.0,
                anon: 300_000.0 * 1024.0,
                file: 70_000.0 * 1024.0,
                threads: 17.0
            })
        );
        assert_eq!(parse_status("Name:\tx\n", 0.0), None);
    }

    #[cfg(target_os = "linux")]
    #[test]
    fn this_process_can_be_sampled() {
        let sampler =
            ProcSampler::start(std::process::id(), Instant::now(), Duration::from_millis(5));
        std::thread::sleep(Duration::from_millis(30));
        let samples = sampler.finish();
        assert!(!samples.is_empty());
        assert!(samples.iter().all(|s| s.anon > 0.0 && s.threads >= 2.0));
    }
}
