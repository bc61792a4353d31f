//! The `understudy` command line: parse flags, build a request, call the library, map errors to
//! exit codes (0 success, 1 a failure of the work, 2 bad input or usage).

mod cli;

use clap::Parser;

fn main() {
    let args = cli::Cli::parse();
    let code = match cli::run(args) {
        Ok(code) => code,
        Err(e) => {
            eprintln!("error: {e}");
            e.exit_code()
        }
    };
    std::process::exit(code);
}
