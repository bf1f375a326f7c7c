//! The `dovetail` binary: parses arguments, calls the library, prints one error line and picks
//! the exit code (0 success, 1 error, 2 usage, 3 stopped because the linkage is infeasible, 4 stopped
//! before blocking because the estimated peak memory is over the memory budget).

mod cmd;

use clap::Parser;
use std::process::ExitCode;

fn main() -> ExitCode {
    let cli = cmd::Cli::parse();
    match cmd::run(cli) {
        Ok(code) => code,
        Err(e) => {
            let code = match e.kind() {
                dovetail::ErrorKind::Infeasible => 3,
                dovetail::ErrorKind::OverBudget => 4,
                _ => 1,
            };
            eprintln!("error: {e}");
            ExitCode::from(code)
        }
    }
}
