//! The `zonetally` binary: parses the command line and dispatches.

use clap::{Parser, Subcommand};

#[derive(Parser)]
#[command(
    name = "zonetally",
    version,
    about = "Conditional zone-count distributions given an observed total"
)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand)]
enum Command {
    /// Evaluate a request document (a file, or - for standard input) and print the results.
    Eval {
        /// Path of the request document, or - for standard input.
        request: String,
    },
}

fn main() {
    let cli = Cli::parse();
    match cli.command {
        Command::Eval { request } => match zonetally::cli::eval(&request) {
            Ok(doc) => println!("{doc}"),
            Err(e) => {
                eprintln!("zonetally: {}", e.message);
                std::process::exit(e.code);
            }
        },
    }
}
