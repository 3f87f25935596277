//! The gradaudit binary: parse arguments, run, map errors to exit codes (see `cli::exit`).

use clap::Parser;
use gradaudit::cli::{self, Cli, exit};
use std::process::ExitCode;

fn main() -> ExitCode {
    let cli = Cli::parse();
    // Before any output is staged: a signal then removes the temporary files it leaves.
    if let Err(e) = gradaudit::output::install_signal_cleanup() {
        eprintln!("gradaudit: warning: {e}; an interrupted run may leave a temporary file");
    }
    match cli::run(cli) {
        Ok(code) => ExitCode::from(code),
        Err(e) => {
            eprintln!("gradaudit: error: {e}");
            let shown = e.to_string();
            let mut source = std::error::Error::source(&e);
            while let Some(cause) = source {
                // Our messages often quote their cause already; print only what is new.
                let text = cause.to_string();
                if !shown.contains(&text) {
                    eprintln!("  caused by: {text}");
                }
                source = cause.source();
            }
            ExitCode::from(exit::BAD_INPUT)
        }
    }
}
