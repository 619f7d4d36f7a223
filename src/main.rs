//! The `probity` binary: parse arguments, run the subcommand, map errors to exit codes.
#![deny(clippy::unwrap_used, clippy::expect_used)]

fn main() {
    let code = probity::cli::main();
    std::process::exit(code);
}
