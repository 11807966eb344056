//! Consensor's server side: configuration, HTTP routes, the consensus worker and the command line.

pub mod cli;
