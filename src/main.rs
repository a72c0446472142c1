//! The `pollard` binary: parse arguments, run the command, turn the outcome into an exit code.

fn main() -> std::process::ExitCode {
    let args: Vec<String> = std::env::args().skip(1).collect();
    // Client commands end quietly when their output pipe closes (`pollard runs | head`), as
    // command-line tools do; the server keeps Rust's default, where a closed socket is an
    // error value, not a signal.
    #[cfg(unix)]
    if !matches!(args.first().map(String::as_str), Some("serve" | "demo")) {
        // SAFETY: restoring the default disposition of one signal before any thread starts.
        unsafe {
            libc::signal(libc::SIGPIPE, libc::SIG_DFL);
        }
    }
    match pollard::cli::run(&args) {
        Ok(()) => std::process::ExitCode::SUCCESS,
        Err(e) => {
            // One line on stderr (JSON with --json); the exit code says what kind of failure.
            eprintln!("{}", e.line(pollard::cli::wants_json(&args)));
            std::process::ExitCode::from(e.exit as u8)
        }
    }
}
