//! The `nephocast` binary: parse arguments, call the library, map the outcome to an exit status.
use std::process::ExitCode;

use clap::Parser;

fn main() -> ExitCode {
    let cli = nephocast::cli::Cli::parse();
    match nephocast::cli::run(cli) {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            // A closed pipe (e.g. `| head`) is not an error.
            if let Some(io) = e.downcast_ref::<std::io::Error>()
                && io.kind() == std::io::ErrorKind::BrokenPipe {
                    return ExitCode::SUCCESS;
                }
            eprintln!("error: {}", nephocast::cli::error_message(&e));
            ExitCode::from(nephocast::cli::exit_status(&e))
        }
    }
}
