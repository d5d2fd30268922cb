//! The `keelson` command: `fit` a window from CSV, `serve` the gRPC API,
//! `call` a running server, `healthcheck` it, `backtest` a history, or run
//! the `demo`. Each command lives in its own module of [`cli`]; this file
//! only parses and dispatches.
//!
//! Exit codes: 0 success, 1 an error in the data, the computation or the
//! server's answer, 2 bad usage (unknown flag, unknown or out-of-range
//! setting, unusable server configuration).

mod cli;

use std::process::ExitCode;

use clap::Parser as _;
use cli::args::{Args, Command};

fn main() -> ExitCode {
    let args = match Args::try_parse() {
        Ok(a) => a,
        Err(e) => {
            let _ = e.print();
            return if e.use_stderr() { ExitCode::from(2) } else { ExitCode::SUCCESS };
        }
    };
    run(args).unwrap_or_else(|e| cli::exit_code(&e))
}

fn run(args: Args) -> anyhow::Result<ExitCode> {
    match args.command {
        Command::Fit(a) => cli::fit::run(a),
        Command::Demo(a) => cli::runtime()?.block_on(cli::demo::run(a)),
        Command::Serve(a) => cli::serve::run(a),
        Command::Call(a) => cli::runtime()?.block_on(cli::call::run(a)),
        Command::Healthcheck(a) => cli::runtime()?.block_on(cli::healthcheck::run(a)),
        Command::Backtest(a) => cli::backtest::run(a),
    }
}
