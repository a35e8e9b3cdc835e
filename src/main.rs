//! The `convchain` command: parses arguments, calls the library, prints. Exit codes: 0 success, 1 run failure,
//! 2 bad input (scenario, arguments, files given).

use std::process::ExitCode;

mod cli;

fn main() -> ExitCode {
    cli::main()
}
