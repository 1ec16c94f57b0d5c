//! The `plumb` binary: parse, run, map the outcome to an exit code
//! (0 clean, 1 drift found, 2 bad input or usage).

use clap::Parser;
use std::process::ExitCode;

fn main() -> ExitCode {
    let cli = match plumb::cli::Cli::try_parse() {
        Ok(cli) => cli,
        Err(e) => {
            let _ = e.print();
            return ExitCode::from(if e.use_stderr() {
                plumb::error::EXIT_BAD_INPUT
            } else {
                plumb::error::EXIT_CLEAN
            });
        }
    };
    match plumb::cli::run(cli) {
        Ok(code) => ExitCode::from(code),
        Err(e) => {
            eprintln!("plumb: error: {e}");
            ExitCode::from(e.code)
        }
    }
}
