//! Consensor's benchmarks. Every figure is printed beside a baseline measured in the same run on the
//! same data, as a ratio, plus the process's peak memory; absolute times depend on the machine.
//!
//! `cargo run --release -p consensor-bench -- core [--quick]`
//! `cargo run --release -p consensor-bench -- ingest [--quick]` (PostgreSQL too when
//! `CONSENSOR_TEST_POSTGRES_URL` is set)
//! `cargo run --release -p consensor-bench -- worker [--quick] [--postgres]`
//! `consensor-bench load [--quick] [--seconds N] [--burst-batch N]` (the load test against the real server binary;
//! `tools/load/run.sh` builds release and runs it)

mod core_bench;
mod ingest_bench;
mod load_bench;
mod machine;
mod synthetic;
mod worker_bench;

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
        Some("worker") => {
            let shape = if quick {
                worker_bench::Shape {
                    areas: 4,
                    stations_per_area: 50,
                    minutes: 1440,
                }
            } else {
                worker_bench::Shape {
                    areas: 40,
                    stations_per_area: 50,
                    minutes: 5040,
                }
            };
            let postgres = args.iter().any(|a| a == "--postgres");
            tokio::runtime::Builder::new_multi_thread()
                .enable_all()
                .build()?
                .block_on(worker_bench::run(shape, postgres))
        }
        Some("load") => tokio::runtime::Builder::new_multi_thread()
            .enable_all()
            .build()?
            .block_on(load_bench::run(load_bench::Options::from_args(&args)?)),
        _ => {
            eprintln!(
                "usage: consensor-bench core|ingest|worker|load [--quick] [--postgres] [--seconds N] [--burst-batch N]"
            );
            std::process::exit(2);
        }
    }
}
