//! The `pathfold` command: parses arguments and hands them to the library's driver.

use clap::Parser;

fn main() -> std::process::ExitCode {
    pathfold::driver::run(pathfold::driver::Cli::parse())
}
