//! The `plumbline` binary: parse the command line, set up logging, dispatch.

use clap::Parser;

fn main() -> std::process::ExitCode {
    let cli = plumbline::cli::Cli::parse();
    plumbline::telemetry::init_cli();
    match plumbline::cli::run(cli) {
        Ok(()) => std::process::ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("error: {e:#}");
            std::process::ExitCode::FAILURE
        }
    }
}
