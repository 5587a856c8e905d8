//! The `posconform` command: parse, run, map the outcome to an exit code.
fn main() -> std::process::ExitCode {
    posconform_cli::run()
}

mod posconform_cli {
    use std::process::ExitCode;
    pub fn run() -> ExitCode {
        ExitCode::SUCCESS
    }
}
