//! The `posconform` command: parse the arguments, run one subcommand, map its outcome
//! to an exit code (0 conforming, 1 nonconforming, 2 could not run).

mod cli;

fn main() -> std::process::ExitCode {
    cli::run()
}
