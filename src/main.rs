//! The posgrid binary: parse, run, print an error once with its exit code.

use clap::Parser;

fn main() {
    posgrid::write::install_interrupt_handler();
    let cli = posgrid::cli::Cli::parse();
    match posgrid::cli::run(cli) {
        Ok(code) => posgrid::write::exit_process(code, None),
        Err(e) => {
            posgrid::write::exit_process(e.exit_code(), Some(&format!("posgrid: error: {e}")))
        }
    }
}
