//! How a command ends badly: an exit code that says what kind of failure it was, a short code
//! for scripts, and one line for people. Without `--json` the line goes to stderr as
//! `pollard: MESSAGE`; with `--json` stderr gets `{"error": {"code": …, "message": …}}` on one
//! line. Standard output carries only results, never an error.

use serde_json::json;

/// The exit codes, one per kind of failure (listed in `pollard --help` and the README).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Exit {
    /// Any other error: a file that cannot be read, a request the server refused, …
    Other = 1,
    /// The command line itself is wrong: unknown flag, bad value, bad address.
    Usage = 2,
    /// The run followed ended failed.
    RunFailed = 3,
    /// The run followed ended cancelled.
    RunCancelled = 4,
    /// The run, dataset or schedule named does not exist.
    NotFound = 5,
    /// The server cannot be reached (or went away during the call).
    Unreachable = 6,
}

/// The exit-code table shown under `pollard --help`.
pub const EXIT_CODES: &str = "\
Exit codes:
  0  success
  1  any other error (the server refused the request, a file cannot be read or written, cancel of a run that already ended)
  2  usage: an unknown flag, a bad value, a malformed --server address
  3  the run followed (follow, sweep --follow, demo) ended failed
  4  the run followed ended cancelled
  5  not found: no such run, dataset or schedule
  6  unreachable: no pollard server answers at --server

Errors are one line on stderr: `pollard: MESSAGE`, or with --json
{\"error\": {\"code\": \"...\", \"message\": \"...\"}}.";

/// A failed command.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct CliError {
    pub exit: Exit,
    /// Short, stable, snake_case: `usage`, `run_failed`, `not_found`, a gRPC code name, …
    pub code: String,
    pub message: String,
}

/// What client commands return.
pub type Res<T = ()> = Result<T, CliError>;

impl CliError {
    pub fn new(exit: Exit, code: &str, message: impl Into<String>) -> CliError {
        CliError { exit, code: code.into(), message: message.into() }
    }

    /// A wrong command line (exit 2).
    pub fn usage(message: impl Into<String>) -> CliError {
        CliError::new(Exit::Usage, "usage", message)
    }

    /// A gRPC status: its code name in snake_case, and the code as words in the message.
    pub fn status(s: tonic::Status) -> CliError {
        let exit = match s.code() {
            tonic::Code::NotFound => Exit::NotFound,
            tonic::Code::Unavailable => Exit::Unreachable,
            _ => Exit::Other,
        };
        CliError { exit, code: snake(&format!("{:?}", s.code())), message: format!("{:?}: {}", s.code(), s.message()) }
    }

    /// The error as stderr shows it (one line).
    pub fn line(&self, json_out: bool) -> String {
        let message = self.message.replace('\n', " ");
        if json_out {
            json!({"error": {"code": self.code, "message": message}}).to_string()
        } else {
            format!("pollard: {message}")
        }
    }
}

impl From<String> for CliError {
    fn from(message: String) -> CliError {
        CliError::new(Exit::Other, "error", message)
    }
}

impl From<&str> for CliError {
    fn from(message: &str) -> CliError {
        CliError::from(message.to_string())
    }
}

/// `NotFound` -> `not_found`.
fn snake(name: &str) -> String {
    let mut out = String::new();
    for (i, c) in name.chars().enumerate() {
        if c.is_ascii_uppercase() && i > 0 {
            out.push('_');
        }
        out.push(c.to_ascii_lowercase());
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn status_codes_map_to_exits_and_snake_case() {
        let e = CliError::status(tonic::Status::not_found("run x"));
        assert_eq!((e.exit, e.code.as_str(), e.message.as_str()), (Exit::NotFound, "not_found", "NotFound: run x"));
        let e = CliError::status(tonic::Status::failed_precondition("no"));
        assert_eq!((e.exit, e.code.as_str()), (Exit::Other, "failed_precondition"));
        assert_eq!(CliError::status(tonic::Status::unavailable("gone")).exit, Exit::Unreachable);
        let v: serde_json::Value = serde_json::from_str(&e.line(true)).unwrap();
        assert_eq!(v["error"]["code"], "failed_precondition");
        assert_eq!(e.line(false), "pollard: FailedPrecondition: no");
    }
}
