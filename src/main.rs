//! The `hadal` binary: a thin shell over the library's command-line layer.

fn main() {
    std::process::exit(hadal::cli::main());
}
