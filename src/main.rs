//! The `riskbound` binary: parses the command line and dispatches to the mode's file in
//! `cmd/`; the exit code follows the error's type (`cmd/error.rs`).

use std::process::ExitCode;

use clap::Parser;

use riskbound::cmd::cli::{Cli, Command};
use riskbound::cmd::{self, error};

fn main() -> ExitCode {
    let cli = Cli::parse();
    let result = match &cli.command {
        Command::Bound(a) => cmd::bound::main(a),
        Command::Track(a) => cmd::track::main(a),
        Command::Slices(a) => cmd::slices::main(a),
        Command::Run(a) => cmd::run::main(a),
        Command::Reset(a) => cmd::reset::main(a),
        Command::Rules(a) => cmd::rules::main(a),
        Command::HashPassword(a) => cmd::hash_password::main(a),
        Command::CheckConfig(a) => cmd::check_config::main(a),
        Command::Fleet(a) => cmd::fleet::main(a),
        Command::InputShift(a) => cmd::input_shift::main(a),
        Command::Report(a) => cmd::report::main(a),
        Command::Replay(a) => cmd::replay::main(a),
        Command::Demo(a) => cmd::demo::main(a),
    };
    match result {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("{}", error::message(&e));
            ExitCode::from(error::exit_code(&e))
        }
    }
}
