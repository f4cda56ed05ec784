//! switchyard's load generator, which speaks HTTP only. [`workload`] says which adapter each
//! request names (Zipf popularity) and when it is sent (Poisson arrivals); [`mix`] which endpoint;
//! [`driver`] sends the requests through [`client`] in a closed or an open loop, with the
//! [`progress`] line; [`results`] and [`stats`] summarise them; [`scrape`] reads /metrics;
//! [`synthetic`] builds adapters for a run; [`cpu_time`] reads the CPU time the host took; [`proc_status`] a process's memory by kind; [`report`] writes JSON and HTML with [`charts`];
//! [`overhead`] is the built-in swap-overhead scenario and [`fairness`] the built-in fairness
//! scenario, which start their own servers ([`server`]); [`soak`] is the long run at a steady load
//! with live publishes and rollbacks; [`serving`] measures the decoder scheduler (chunked
//! prefill, decoding over adapters, the prefix cache).

pub mod charts;
pub mod cli;
pub mod client;
pub mod cpu_time;
pub mod driver;
pub mod fairness;
pub mod mix;
pub mod overhead;
pub mod proc_status;
pub mod progress;
pub mod report;
pub mod results;
pub mod scrape;
pub mod server;
pub mod serving;
pub mod soak;
pub mod stats;
pub mod synthetic;
pub mod workload;
