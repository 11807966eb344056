//! Consensor's server side: configuration, HTTP routes, the consensus worker and the command line.

pub mod auth;
pub mod cli;
pub mod config;
pub mod demo;
pub mod error;
pub mod http;
pub mod ingest;
pub mod serve;
pub mod state;
pub mod worker;
