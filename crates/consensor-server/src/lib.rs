//! Consensor's server side: configuration, HTTP routes, the consensus worker and the command line.

pub mod auth;
pub mod backup;
pub mod cli;
pub mod config;
pub mod demo;
pub mod error;
pub mod http;
pub mod import;
pub mod ingest;
pub mod metrics;
pub mod network_fields;
pub mod rate_limit;
pub mod serve;
pub mod state;
pub mod web;
pub mod worker;
