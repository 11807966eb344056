//! Consensor's benchmarks. Every figure is printed beside a baseline measured in the same run on the
//! same data, as a ratio, plus the process's peak memory; absolute times depend on the machine.
//!
//! `cargo run --release -p consensor-bench -- core [--quick]`

mod core_bench;
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
        _ => {
            eprintln!("usage: consensor-bench core [--quick]");
            std::process::exit(2);
        }
    }
}
