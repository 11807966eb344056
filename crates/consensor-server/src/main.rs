//! The `consensor` command. It stays thin: parsing the command line and handing over to the library.

fn main() -> std::process::ExitCode {
    let args: Vec<String> = std::env::args().skip(1).collect();
    match consensor_server::cli::run(&args) {
        Ok(code) => code,
        Err(error) => {
            eprintln!("consensor: {error:#}");
            std::process::ExitCode::from(2)
        }
    }
}
