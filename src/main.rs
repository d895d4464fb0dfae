//! The posgrid binary: parse, run, print an error once with its exit code.

use clap::Parser;

fn main() {
    posgrid::write::install_interrupt_handler();
    let cli = posgrid::cli::Cli::parse();
    let code = match posgrid::cli::run(cli) {
        Ok(code) => code,
        Err(e) => {
            // The message may quote names from a hostile file: make it safe for a terminal.
            eprintln!(
                "posgrid: error: {}",
                posgrid::visible::visible(&e.to_string())
            );
            e.exit_code()
        }
    };
    std::process::exit(code);
}
