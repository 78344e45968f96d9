//! The `ballast` binary: parse the command line, run it, print any error once, exit with the documented code.

use std::process::ExitCode;

use clap::Parser;

fn main() -> ExitCode {
    let cli = match ballast::cli::Cli::try_parse() {
        Ok(cli) => cli,
        Err(e) => {
            let code = if e.use_stderr() {
                ballast::cli::EXIT_INPUT_ERROR
            } else {
                0
            };
            let _ = e.print();
            return ExitCode::from(code);
        }
    };
    match ballast::cli::run(cli) {
        Ok(outcome) => ExitCode::from(outcome.exit_code()),
        Err(error) => {
            eprintln!("error: {error:#}");
            ExitCode::from(ballast::cli::EXIT_INPUT_ERROR)
        }
    }
}
