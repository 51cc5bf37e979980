//! The `tapmap` binary: the command line in `cli/`, the work in the library.

mod cli;

fn main() {
    std::process::exit(cli::main());
}
