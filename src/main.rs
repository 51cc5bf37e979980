fn main() {
    std::process::exit(tapmap::cli::main());
}
