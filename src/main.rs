//! The gradaudit binary: parse arguments, run, map errors to exit codes (see `cli::exit`).

use clap::Parser;
use gradaudit::cli::{self, Cli, exit};
use std::process::ExitCode;

fn main() -> ExitCode {
    let cli = Cli::parse();
    match cli::run(cli) {
        Ok(code) => ExitCode::from(code),
        Err(e) => {
            eprintln!("gradaudit: error: {e}");
            let mut source = std::error::Error::source(&e);
            while let Some(cause) = source {
                eprintln!("  caused by: {cause}");
                source = cause.source();
            }
            ExitCode::from(exit::BAD_INPUT)
        }
    }
}
