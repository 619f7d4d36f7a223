//! The `probity` binary: parse arguments, run the subcommand, map errors to exit codes.

fn main() {
    let code = probity::cli::main();
    std::process::exit(code);
}
