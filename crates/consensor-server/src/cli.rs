//! The command line of `consensor`.

use std::process::ExitCode;

const USAGE: &str = "\
usage: consensor <command> [options]

commands:
  serve     run the HTTP server and the consensus worker
  help      print this text
";

/// Runs the command named by `args` (without the program name).
pub fn run(args: &[String]) -> anyhow::Result<ExitCode> {
    match args.first().map(String::as_str) {
        None | Some("help") | Some("--help") | Some("-h") => {
            print!("{USAGE}");
            Ok(ExitCode::SUCCESS)
        }
        Some("serve") => {
            eprintln!(
                "consensor serve: the HTTP server is not built yet (it arrives with the ingest issue); \
                 nothing was started"
            );
            Ok(ExitCode::from(3))
        }
        Some(other) => anyhow::bail!("unknown command {other:?}\n{USAGE}"),
    }
}
