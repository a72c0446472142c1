//! Command-line entry point.

/// Runs the command named by `args` (without the program name).
pub fn run(args: &[String]) -> Result<(), String> {
    match args.first().map(String::as_str) {
        Some("demo") => {
            println!("pollard demo: not built yet; the demo arrives with the command-line issue");
            Ok(())
        }
        _ => Err("usage: pollard demo".to_string()),
    }
}
