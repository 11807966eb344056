//! The command line of `consensor`.

use std::path::PathBuf;
use std::process::ExitCode;

use anyhow::{bail, Context};

use crate::config::Config;

const USAGE: &str = "\
usage: consensor <command> [options]

commands:
  serve [--config FILE] [--listen ADDR] [--database URL]
            run the HTTP server and the consensus worker
  demo [--listen ADDR] [--database PATH] [--days N] [--seed S]
            create an invented demo network with planted faults in a fresh SQLite file
            (default: a temporary file, removed on exit; PATH must not exist), feed it
            N days (default 3, at most 14) of one-minute readings, compute everything,
            print what was planted and found, and serve it until Ctrl-C
  help      print this text

environment: CONSENSOR_LISTEN, CONSENSOR_DATABASE_URL, CONSENSOR_ADMIN_TOKEN, CONSENSOR_CONFIG,
and any configuration key as CONSENSOR_<KEY> (nested keys joined by __); see
deploy/consensor.example.toml.
";

/// Runs the command named by `args` (without the program name).
pub fn run(args: &[String]) -> anyhow::Result<ExitCode> {
    match args.first().map(String::as_str) {
        None | Some("help") | Some("--help") | Some("-h") => {
            print!("{USAGE}");
            Ok(ExitCode::SUCCESS)
        }
        Some("serve") => {
            let config = load_config(&args[1..])?;
            init_logging();
            block_on(crate::serve::serve(config))?;
            Ok(ExitCode::SUCCESS)
        }
        Some("demo") => {
            let options = crate::demo::DemoOptions::parse(&args[1..])
                .context("invalid demo options (see `consensor help`)")?;
            init_logging();
            block_on(crate::demo::run(options))?;
            Ok(ExitCode::SUCCESS)
        }
        Some(other) => bail!("unknown command {other:?}\n{USAGE}"),
    }
}

/// Runs `future` to completion on a fresh multi-threaded runtime.
fn block_on<T>(future: impl std::future::Future<Output = anyhow::Result<T>>) -> anyhow::Result<T> {
    tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()
        .context("could not start the async runtime")?
        .block_on(future)
}

/// Parses `[--config FILE] [--listen ADDR] [--database URL]` and loads the layered configuration.
fn load_config(args: &[String]) -> anyhow::Result<Config> {
    let mut file: Option<PathBuf> = std::env::var_os("CONSENSOR_CONFIG").map(PathBuf::from);
    let mut flags: Vec<(&str, String)> = Vec::new();
    let mut rest = args.iter();
    while let Some(flag) = rest.next() {
        let (name, inline) = match flag.split_once('=') {
            Some((name, value)) => (name, Some(value.to_owned())),
            None => (flag.as_str(), None),
        };
        let mut value = || -> anyhow::Result<String> {
            match &inline {
                Some(v) => Ok(v.clone()),
                None => rest
                    .next()
                    .cloned()
                    .with_context(|| format!("{name} needs a value")),
            }
        };
        match name {
            "--config" => file = Some(PathBuf::from(value()?)),
            "--listen" => flags.push(("listen", value()?)),
            "--database" => flags.push(("database_url", value()?)),
            other => bail!("unknown option {other:?}\n{USAGE}"),
        }
    }
    Config::load(file.as_deref(), std::env::vars(), &flags)
}

/// Logs to stderr; `RUST_LOG` filters (default `info`), `CONSENSOR_LOG_FORMAT=json` for JSON lines.
fn init_logging() {
    use tracing_subscriber::EnvFilter;
    let filter = EnvFilter::try_from_default_env().unwrap_or_else(|_| EnvFilter::new("info"));
    use std::io::IsTerminal;
    let builder = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_ansi(std::io::stderr().is_terminal())
        .with_writer(std::io::stderr);
    if std::env::var("CONSENSOR_LOG_FORMAT").as_deref() == Ok("json") {
        let _ = builder.json().try_init();
    } else {
        let _ = builder.try_init();
    }
}
