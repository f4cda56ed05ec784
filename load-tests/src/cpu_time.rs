//! The machine's CPU time by kind, read from `/proc/stat` (Linux): on a virtual machine, the
//! share the host took for other guests (`steal`) while a phase ran. Latency percentiles of a
//! phase with much stolen time are not comparable with those of a phase without; the reports
//! print the share next to them.

use serde_json::{Value, json};

/// Cumulative CPU time of all cores since boot, in clock ticks.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct CpuTimes {
    pub busy: u64,
    pub idle: u64,
    pub steal: u64,
}

impl CpuTimes {
    /// Reads the first (`cpu`, all cores) line of `/proc/stat`; `None` where there is none.
    pub fn now() -> Option<Self> {
        parse_stat(&std::fs::read_to_string("/proc/stat").ok()?)
    }

    /// The time from `earlier` to `self`.
    pub fn since(&self, earlier: &CpuTimes) -> CpuTimes {
        CpuTimes {
            busy: self.busy.saturating_sub(earlier.busy),
            idle: self.idle.saturating_sub(earlier.idle),
            steal: self.steal.saturating_sub(earlier.steal),
        }
    }

    pub fn plus(&self, other: &CpuTimes) -> CpuTimes {
        CpuTimes {
            busy: self.busy + other.busy,
            idle: self.idle + other.idle,
            steal: self.steal + other.steal,
        }
    }

    fn total(&self) -> u64 {
        self.busy + self.idle + self.steal
    }

    /// The share of all CPU time that was stolen, busy and idle; null when nothing was counted.
    pub fn to_json(&self) -> Value {
        let total = self.total();
        if total == 0 {
            return Value::Null;
        }
        let share = |v: u64| (v as f64 / total as f64 * 1000.0).round() / 1000.0;
        json!({"stolen": share(self.steal), "busy": share(self.busy), "idle": share(self.idle)})
    }

    /// The stolen share, as a percentage for a table cell; `-` when nothing was counted.
    pub fn stolen_percent(&self) -> String {
        match self.total() {
            0 => "-".to_owned(),
            t => format!("{:.0}%", self.steal as f64 / t as f64 * 100.0),
        }
    }
}

/// The `cpu` line's fields: user nice system idle iowait irq softirq steal (guest time is
/// already counted in user and nice).
fn parse_stat(text: &str) -> Option<CpuTimes> {
    let line = text.lines().find(|l| l.starts_with("cpu "))?;
    let f: Vec<u64> = line
        .split_whitespace()
        .skip(1)
        .map(|v| v.parse().ok())
        .collect::<Option<_>>()?;
    let at = |i: usize| f.get(i).copied().unwrap_or(0);
    Some(CpuTimes {
        busy: at(0) + at(1) + at(2) + at(5) + at(6),
        idle: at(3) + at(4),
        steal: at(7),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_cpu_line_is_split_into_busy_idle_and_stolen() {
        // The layout proc(5) documents: user nice system idle iowait irq softirq steal guest
        // guest_nice.
        let text = "cpu  100 20 30 400 5 1 2 50 0 0\ncpu0 50 10 15 200 2 0 1 25 0 0\n";
        let t = parse_stat(text).unwrap();
        assert_eq!(
            t,
            CpuTimes {
                busy: 153,
                idle: 405,
                steal: 50
            }
        );
        let later = CpuTimes {
            busy: 253,
            idle: 405,
            steal: 150,
        };
        let d = later.since(&t);
        assert_eq!(d.stolen_percent(), "50%");
        assert_eq!(d.to_json()["stolen"], 0.5);
        assert_eq!(CpuTimes::default().to_json(), Value::Null);
    }

    #[cfg(target_os = "linux")]
    #[test]
    fn this_machine_reports_cpu_time() {
        let t = CpuTimes::now().expect("/proc/stat");
        assert!(t.busy + t.idle > 0);
    }
}
