//! The posgrid binary: parse, run, print an error once with its exit code.

use clap::Parser;

fn main() {
    posgrid::write::install_interrupt_handler();
    let cli = posgrid::cli::Cli::parse();
    match posgrid::cli::run(cli) {
        Ok(code) => posgrid::write::exit_process(code, None),
        Err(e) => {
            // The message may quote names from a hostile file: make it safe for a terminal.
            let message = format!(
                "posgrid: error: {}",
                posgrid::visible::visible(&e.to_string())
            );
            posgrid::write::exit_process(e.exit_code(), Some(&message))
        }
    }
}
