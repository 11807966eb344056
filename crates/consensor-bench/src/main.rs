//! Consensor's benchmarks. Every figure is printed beside a baseline measured in the same run on the
//! same data, as a ratio, plus the process's peak memory; absolute times depend on the machine.
//!
//! `cargo run --release -p consensor-bench -- core [--quick]`
//! `cargo run --release -p consensor-bench -- ingest [--quick]` (PostgreSQL too when
//! `CONSENSOR_TEST_POSTGRES_URL` is set)

mod core_bench;
mod ingest_bench;
mod machine;
mod synthetic;

use stats_alloc::{StatsAlloc, INSTRUMENTED_SYSTEM};
use std::alloc::System;

/// Counts allocations so the benchmark can show that the interval loop allocates nothing.
#[global_allocator]
static GLOBAL: &StatsAlloc<System> = &INSTRUMENTED_SYSTEM;

fn main() -> anyhow::Result<()> {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let quick = args.iter().any(|a| a == "--quick");
    match args.first().map(String::as_str) {
        Some("core") => core_bench::run(quick, GLOBAL),
        Some("ingest") => tokio::runtime::Builder::new_multi_thread()
            .enable_all()
            .build()?
            .block_on(ingest_bench::run(quick)),
        _ => {
            eprintln!("usage: consensor-bench core|ingest [--quick]");
            std::process::exit(2);
        }
    }
}
