//! The command line of `consensor`.

use std::path::PathBuf;
use std::process::ExitCode;

use anyhow::{bail, Context};

use crate::config::{Config, LogFormat};

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
  import --station-file FILE --format csv|ndjson [--area-interval I] [--batch-size N]
         [--config FILE] [--database URL] FILE...
            upsert the stations of FILE (CSV: station,area,name,lat,lon,elevation_m; areas
            must exist unless --area-interval 1m|5m|10m|15m|30m|1h creates missing ones),
            then bulk-load historical readings (CSV: station,quantity,observed_at,value,unit;
            or NDJSON reading objects) through the checks of POST /v1/readings, N (default
            5000) per transaction; a bad line stops it, earlier batches stay stored, and
            running it again is safe (stored readings count as duplicates)
  backup --to PATH [--config FILE] [--database URL]
            copy the live SQLite database, consistently, to the new file PATH while the
            server keeps running (VACUUM INTO; PostgreSQL: use pg_dump); restore: see
            deploy/README.md
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
            init_logging(config.log_format);
            block_on(crate::serve::serve(config))?;
            Ok(ExitCode::SUCCESS)
        }
        Some("demo") => {
            let options = crate::demo::DemoOptions::parse(&args[1..])
                .context("invalid demo options (see `consensor help`)")?;
            init_logging(log_format_from_env()?);
            block_on(crate::demo::run(options))?;
            Ok(ExitCode::SUCCESS)
        }
        Some("import") => {
            let (options, config_flags) = crate::import::ImportOptions::parse(&args[1..])
                .context("invalid import options (see `consensor help`)")?;
            let config = load_config(&config_flags)?;
            init_logging(config.log_format);
            let summary = block_on(crate::import::run(options, config))?;
            println!("{summary}");
            Ok(ExitCode::SUCCESS)
        }
        Some("backup") => {
            let (options, config_flags) = crate::backup::BackupOptions::parse(&args[1..])
                .context("invalid backup options (see `consensor help`)")?;
            let config = load_config(&config_flags)?;
            init_logging(config.log_format);
            let summary = block_on(crate::backup::run(options, config))?;
            println!("{summary}");
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

/// The name and value of the option `flag`, given as `--name=value` or as `--name value` (the value
/// then taken from `rest`), for the commands whose every option takes a value.
pub(crate) fn option_value<'a>(
    flag: &'a str,
    rest: &mut std::slice::Iter<'_, String>,
) -> anyhow::Result<(&'a str, String)> {
    match flag.split_once('=') {
        Some((name, value)) => Ok((name, value.to_owned())),
        None => {
            let value = rest
                .next()
                .cloned()
                .with_context(|| format!("{flag} needs a value"))?;
            Ok((flag, value))
        }
    }
}

/// `consensor demo` reads no configuration file; its log format comes from the same environment
/// variable that sets `[log] format` for `serve`.
fn log_format_from_env() -> anyhow::Result<LogFormat> {
    match std::env::var("CONSENSOR_LOG__FORMAT") {
        Err(_) => Ok(LogFormat::default()),
        Ok(text) => LogFormat::parse(&text).with_context(|| {
            format!("CONSENSOR_LOG__FORMAT: {text:?} is not one of \"text\", \"json\"")
        }),
    }
}

/// Logs to stderr; `RUST_LOG` filters (default `info`); `[log] format` (`CONSENSOR_LOG__FORMAT`)
/// chooses text lines or one JSON object per line.
fn init_logging(format: LogFormat) {
    use tracing_subscriber::EnvFilter;
    let filter = EnvFilter::try_from_default_env().unwrap_or_else(|_| EnvFilter::new("info"));
    use std::io::IsTerminal;
    let builder = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_writer(std::io::stderr);
    match format {
        // JSON lines are for machines: never colour codes inside the strings.
        LogFormat::Json => {
            let _ = builder
                .json()
                .with_ansi(false)
                .with_current_span(true)
                .try_init();
        }
        LogFormat::Text => {
            let _ = builder
                .with_ansi(std::io::stderr().is_terminal())
                .try_init();
        }
    }
}
