#!/usr/bin/env bash
# Consensor's load test: builds the server and the benchmark harness in release mode, then runs
# `consensor-bench load`, which starts the real `consensor serve` binary on a fresh SQLite file on a
# random loopback port, drives it with 1,000 simulated stations, dashboards and an outage burst, and
# verifies afterwards that every acknowledged reading is stored exactly once.
#
# Usage: tools/load/run.sh [--quick] [--seconds N] [--burst-batch N]
# Environment: CARGO_TARGET_DIR (where to build; default target/), CONSENSOR_BIN (a server binary
# to use instead of the one built here).
set -euo pipefail

cd "$(dirname "$0")/../.."
target="${CARGO_TARGET_DIR:-target}"
cargo build --release -p consensor-server -p consensor-bench
exec "$target/release/consensor-bench" load "$@"
