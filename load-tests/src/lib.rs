//! The workload side of switchyard's load tests: which adapter each request names (Zipf
//! popularity over N adapters) and when it is sent (open-loop Poisson arrivals). The HTTP
//! driver and the swap-overhead report build on these.

pub mod workload;
