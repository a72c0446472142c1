//! The `pollard` binary: parse arguments, run the command, turn the outcome into an exit code.

fn main() -> std::process::ExitCode {
    let args: Vec<String> = std::env::args().skip(1).collect();
    match pollard::cli::run(&args) {
        Ok(()) => std::process::ExitCode::SUCCESS,
        Err(message) => {
            eprintln!("pollard: {message}");
            std::process::ExitCode::FAILURE
        }
    }
}
