//! The `ballast` binary: parse the command line, run it, print any error once, exit with the documented code.

use std::process::ExitCode;

use clap::Parser;

fn main() -> ExitCode {
    let cli = match ballast::cli::Cli::try_parse() {
        Ok(cli) => cli,
        Err(e) => {
            if !e.use_stderr() {
                let _ = e.print();
                return ExitCode::from(0);
            }
            // A value the parser cannot read (a word for a number, a sign on a count) gets the one
            // line naming the flag; other usage errors keep clap's usage hint.
            match e.kind() {
                clap::error::ErrorKind::ValueValidation | clap::error::ErrorKind::InvalidValue => {
                    let text = e.render().to_string();
                    eprintln!("{}", text.lines().next().unwrap_or("error: invalid value"));
                }
                _ => {
                    let _ = e.print();
                }
            }
            return ExitCode::from(ballast::cli::EXIT_INPUT_ERROR);
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
