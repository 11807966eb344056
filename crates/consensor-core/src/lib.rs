//! Consensor's core: the robust statistics and the station checks that turn one area's readings for
//! one interval into a consensus value and a list of set-aside readings with their reasons.
//!
//! This crate is pure: no I/O, no async runtime, no database, no serialisation format. It depends on
//! `std`, `statrs` (distribution functions) and `thiserror` only, so every rule can be tested on
//! slices and reused by the server, the worker and the benchmarks alike.

pub mod stats;

pub mod checks;
pub mod ids;
pub mod units;
