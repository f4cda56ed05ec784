//! The written report of a run: `report.json` (every scenario's numbers and the memory samples),
//! one self-contained `report.html` with the charts inline, and each chart as its own SVG file
//! (for a README to link).

use std::path::{Path, PathBuf};

use anyhow::Context;
use serde_json::{Value, json};

use crate::charts::{Axis, Series, SeriesLabelPosition, histogram_chart, line_chart};
use crate::results::Scenario;
use crate::scrape::MemorySample;
use crate::stats::{cdf, log_histogram, round3};

/// Everything a report shows.
#[derive(Debug, Clone, Default)]
pub struct Report {
    pub title: String,
    /// The command line that made it.
    pub command: String,
    /// Sentences printed above the table (machine, pacing, caveats).
    pub notes: Vec<String>,
    pub scenarios: Vec<Scenario>,
    /// Indices into `scenarios` plotted against their number of adapters.
    pub by_adapters: Vec<usize>,
    /// Index of the scenario drawn as a flat reference line on those charts (base only).
    pub baseline: Option<usize>,
    /// The summary table: header, then rows.
    pub table: Vec<Vec<String>>,
    /// Memory samples of each server process, by a label.
    pub memory: Vec<(String, Vec<MemorySample>)>,
    /// Further top-level JSON fields (settings, ratios, cold start).
    pub extra: serde_json::Map<String, Value>,
    /// Only the latency chart: no swap-time or memory chart (a run of the base model alone).
    pub latency_only: bool,
}

/// One chart: its file name, caption and SVG text.
#[derive(Debug, Clone)]
pub struct Chart {
    pub file: String,
    pub caption: String,
    pub svg: String,
}

const MIB: f64 = 1024.0 * 1024.0;

impl Report {
    pub fn json(&self) -> Value {
        let memory: Vec<Value> = self
            .memory
            .iter()
            .map(|(label, samples)| {
                let rows: Vec<Value> = thin_memory(samples)
                    .iter()
                    .map(|m| {
                        json!({"at_s": round3(m.at_s), "factors_bytes": m.factors,
                               "merged_bytes": m.merged, "process_bytes": m.process})
                    })
                    .collect();
                json!({"server": label, "samples": rows})
            })
            .collect();
        let mut out = serde_json::Map::new();
        out.insert("title".to_owned(), json!(self.title));
        out.insert("command".to_owned(), json!(self.command));
        out.insert("notes".to_owned(), json!(self.notes));
        out.extend(self.extra.clone());
        out.insert(
            "scenarios".to_owned(),
            Value::Array(self.scenarios.iter().map(Scenario::to_json).collect()),
        );
        out.insert("memory".to_owned(), Value::Array(memory));
        Value::Object(out)
    }

    pub fn charts(&self) -> anyhow::Result<Vec<Chart>> {
        let mut charts = Vec::new();
        let curves: Vec<Series> = self
            .scenarios
            .iter()
            .map(|s| Series {
                label: s.name.clone(),
                points: cdf(&s.latencies_ms(), 300),
            })
            .collect();
        charts.push(Chart {
            file: "latency-cdf.svg".to_owned(),
            caption: "Share of requests answered within a latency, per scenario".to_owned(),
            svg: line_chart(
                "Latency CDF per scenario",
                "latency (ms, log scale)",
                "share of requests",
                Axis::Log,
                &curves,
                false,
                SeriesLabelPosition::LowerRight,
            )?,
        });
        let picked: Vec<&Scenario> = self
            .by_adapters
            .iter()
            .filter_map(|&i| self.scenarios.get(i))
            .collect();
        if !picked.is_empty() {
            let baseline = self.baseline.and_then(|i| self.scenarios.get(i));
            let point = |f: &dyn Fn(&Scenario) -> f64| -> Vec<Series> {
                let xs: Vec<f64> = picked.iter().map(|s| s.adapters.max(1) as f64).collect();
                let mut series = vec![Series {
                    label: "adapters mixed".to_owned(),
                    points: xs.iter().zip(&picked).map(|(&x, s)| (x, f(s))).collect(),
                }];
                if let Some(b) = baseline {
                    series.push(Series {
                        label: b.name.clone(),
                        points: xs.iter().map(|&x| (x, f(b))).collect(),
                    });
                }
                series
            };
            charts.push(Chart {
                file: "adapters-throughput.svg".to_owned(),
                caption: "Answered requests per second against the number of distinct adapters"
                    .to_owned(),
                svg: line_chart(
                    "Throughput against distinct adapters",
                    "distinct adapters (log scale)",
                    "requests per second",
                    Axis::Log,
                    &point(&|s| s.throughput()),
                    true,
                    SeriesLabelPosition::LowerRight,
                )?,
            });
            charts.push(Chart {
                file: "adapters-p99.svg".to_owned(),
                caption: "99th-percentile latency against the number of distinct adapters"
                    .to_owned(),
                svg: line_chart(
                    "p99 latency against distinct adapters",
                    "distinct adapters (log scale)",
                    "p99 latency (ms)",
                    Axis::Log,
                    &point(&|s| s.latency().map_or(0.0, |l| l.p99_ms)),
                    true,
                    SeriesLabelPosition::LowerRight,
                )?,
            });
        }
        if self.latency_only {
            return Ok(charts);
        }
        // Requests to the base model alone swap nothing.
        let swaps: Vec<f64> = self
            .scenarios
            .iter()
            .filter(|s| s.adapters > 0)
            .flat_map(|s| s.swap_ms())
            .collect();
        charts.push(Chart {
            file: "swap-histogram.svg".to_owned(),
            caption: "Adapter swap time per request (elapsed_ms.swap of every answer: a resident \
                      adapter takes microseconds, a load from the store milliseconds)"
                .to_owned(),
            svg: histogram_chart(
                "Swap latency",
                "swap time (ms, log scale)",
                &log_histogram(&swaps, 0.001, 4),
            )?,
        });
        let mut lines = Vec::new();
        for (label, samples) in &self.memory {
            let samples = &thin_memory(samples);
            let tier = |name: &str, f: &dyn Fn(&MemorySample) -> Option<f64>| Series {
                label: format!("{label}: {name}"),
                points: samples
                    .iter()
                    .filter_map(|m| f(m).map(|v| (m.at_s, v / MIB)))
                    .collect(),
            };
            lines.push(tier("factors", &|m| Some(m.factors)));
            lines.push(tier("merged", &|m| Some(m.merged)));
            let process = tier("process", &|m| m.process);
            if !process.points.is_empty() {
                lines.push(process);
            }
        }
        charts.push(Chart {
            file: "memory.svg".to_owned(),
            caption: "Memory held over time, scraped from /metrics every 250 ms \
                      (switchyard_resident_bytes by tier, and the process's resident set)"
                .to_owned(),
            svg: line_chart(
                "Memory held",
                "time (s)",
                "MiB",
                Axis::Linear,
                &lines,
                false,
                SeriesLabelPosition::UpperLeft,
            )?,
        });
        Ok(charts)
    }

    pub fn html(&self, charts: &[Chart]) -> String {
        let mut h = String::new();
        h.push_str("<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n");
        h.push_str(&format!("<title>{}</title>\n", escape(&self.title)));
        h.push_str(
            "<style>body{font-family:sans-serif;max-width:820px;margin:2em auto;color:#222}\
             table{border-collapse:collapse}td,th{border:1px solid #ccc;padding:4px 8px;\
             text-align:right}th:first-child,td:first-child{text-align:left}\
             figure{margin:1.5em 0}code{background:#f3f3f3;padding:1px 4px}</style>\n",
        );
        h.push_str("</head>\n<body>\n");
        h.push_str(&format!("<h1>{}</h1>\n", escape(&self.title)));
        h.push_str(&format!(
            "<p>Command: <code>{}</code></p>\n",
            escape(&self.command)
        ));
        for note in &self.notes {
            h.push_str(&format!("<p>{}</p>\n", escape(note)));
        }
        if let Some((header, rows)) = self.table.split_first() {
            h.push_str("<table>\n<tr>");
            for cell in header {
                h.push_str(&format!("<th>{}</th>", escape(cell)));
            }
            h.push_str("</tr>\n");
            for row in rows {
                h.push_str("<tr>");
                for cell in row {
                    h.push_str(&format!("<td>{}</td>", escape(cell)));
                }
                h.push_str("</tr>\n");
            }
            h.push_str("</table>\n");
        }
        for c in charts {
            h.push_str(&format!(
                "<figure>\n{}\n<figcaption>{}</figcaption>\n</figure>\n",
                c.svg,
                escape(&c.caption)
            ));
        }
        h.push_str("</body>\n</html>\n");
        h
    }

    /// Writes report.json, report.html and the SVG files into `dir` (created when missing);
    /// returns the paths written.
    pub fn write(&self, dir: &Path) -> anyhow::Result<Vec<PathBuf>> {
        std::fs::create_dir_all(dir).with_context(|| format!("creating {}", dir.display()))?;
        let charts = self.charts()?;
        let mut written = Vec::new();
        let mut put = |name: &str, text: &str| -> anyhow::Result<()> {
            let path = dir.join(name);
            std::fs::write(&path, text).with_context(|| format!("writing {}", path.display()))?;
            written.push(path);
            Ok(())
        };
        put(
            "report.json",
            &(serde_json::to_string_pretty(&self.json())? + "\n"),
        )?;
        put("report.html", &self.html(&charts))?;
        for c in &charts {
            put(&c.file, &c.svg)?;
        }
        Ok(written)
    }

    /// The table as aligned plain text, for the terminal.
    pub fn table_text(&self) -> String {
        let widths: Vec<usize> = (0..self.table.first().map_or(0, Vec::len))
            .map(|c| {
                self.table
                    .iter()
                    .map(|r| r.get(c).map_or(0, |s| s.chars().count()))
                    .max()
                    .unwrap_or(0)
            })
            .collect();
        let mut out = String::new();
        for row in &self.table {
            let cells: Vec<String> = row
                .iter()
                .enumerate()
                .map(|(c, s)| {
                    if c == 0 {
                        format!("{s:<w$}", w = widths[c])
                    } else {
                        format!("{s:>w$}", w = widths[c])
                    }
                })
                .collect();
            out.push_str(cells.join("  ").trim_end());
            out.push('\n');
        }
        out
    }
}

/// The samples where memory moved: the first, the last, and each one where a figure differs
/// by more than 256 KiB (less than one rank-8 adapter's factors on MiniLM), or to or from zero,
/// from the last one kept. Memory moves in steps, so this loses nothing a chart or a reader
/// would see, and keeps the report small.
pub fn thin_memory(samples: &[MemorySample]) -> Vec<MemorySample> {
    let moved = |a: f64, b: f64| (a - b).abs() > MIB / 4.0 || ((a == 0.0) != (b == 0.0));
    let mut kept: Vec<MemorySample> = Vec::new();
    for (i, m) in samples.iter().enumerate() {
        let keep = match kept.last() {
            None => true,
            Some(k) => {
                i + 1 == samples.len()
                    || moved(m.factors, k.factors)
                    || moved(m.merged, k.merged)
                    || moved(m.process.unwrap_or(0.0), k.process.unwrap_or(0.0))
            }
        };
        if keep {
            kept.push(*m);
        }
    }
    kept
}

/// Escapes text for HTML.
pub fn escape(text: &str) -> String {
    text.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
        .replace('"', "&quot;")
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::driver::{Record, RunRecords};
    use crate::mix::Kind;

    #[test]
    fn memory_is_kept_where_it_moved() {
        let at = |at_s: f64, factors: f64, process: f64| MemorySample {
            at_s,
            factors,
            merged: 0.0,
            process: Some(process),
        };
        let samples = [
            at(0.0, 0.0, 100.0 * MIB),
            at(0.25, 0.0, 100.1 * MIB),
            at(0.5, 1000.0, 100.2 * MIB),
            at(0.75, 1000.0, 100.3 * MIB),
            at(1.0, 1000.0, 102.0 * MIB),
            at(1.25, 1000.0, 102.1 * MIB),
            at(1.5, 1000.0, 102.2 * MIB),
        ];
        // Kept: the first; 0.5 (factors leave zero); 1.0 (process moved 1.8 MiB); the last.
        let kept: Vec<f64> = thin_memory(&samples).iter().map(|m| m.at_s).collect();
        assert_eq!(kept, vec![0.0, 0.5, 1.0, 1.5]);
    }

    #[test]
    fn a_report_is_written_with_its_charts_inline() {
        let rec = |sent_s: f64, latency_ms: f64| Record {
            sent_s,
            latency_ms,
            kind: Kind::Embed,
            target: 0,
            status: 200,
            swap_ms: Some(0.02),
            queue_ms: None,
            server_ms: None,
            merged: Some(false),
            error: None,
            retry_after_s: None,
            replica: None,
            warmup: false,
        };
        let run = RunRecords {
            records: vec![rec(0.0, 10.0), rec(0.01, 12.0), rec(0.02, 30.0)],
            warmup_s: 0.0,
        };
        let report = Report {
            title: "t <1>".to_owned(),
            command: "switchyard-load run".to_owned(),
            scenarios: vec![Scenario::new("mixed-10", 10, &run)],
            by_adapters: vec![0],
            table: vec![
                vec!["scenario".to_owned(), "ratio".to_owned()],
                vec!["mixed-10".to_owned(), "0.95".to_owned()],
            ],
            memory: vec![(
                "server".to_owned(),
                vec![MemorySample {
                    at_s: 0.0,
                    factors: MIB,
                    merged: 0.0,
                    process: Some(100.0 * MIB),
                }],
            )],
            ..Report::default()
        };
        let dir = tempfile::tempdir().unwrap();
        let written = report.write(dir.path()).unwrap();
        let names: Vec<String> = written
            .iter()
            .map(|p| p.file_name().unwrap().to_string_lossy().into_owned())
            .collect();
        assert_eq!(
            names,
            [
                "report.json",
                "report.html",
                "latency-cdf.svg",
                "adapters-throughput.svg",
                "adapters-p99.svg",
                "swap-histogram.svg",
                "memory.svg"
            ]
        );
        let html = std::fs::read_to_string(dir.path().join("report.html")).unwrap();
        assert_eq!(html.matches("<svg").count(), 5);
        assert!(html.contains("<h1>t &lt;1&gt;</h1>"));
        let json: Value =
            serde_json::from_str(&std::fs::read_to_string(dir.path().join("report.json")).unwrap())
                .unwrap();
        assert_eq!(json["scenarios"][0]["requests"], 3);
        assert_eq!(json["memory"][0]["samples"][0]["factors_bytes"], MIB);
        assert_eq!(report.table_text(), "scenario  ratio\nmixed-10   0.95\n");
    }
}
