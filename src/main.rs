//! The `packbench` binary: parse, dispatch, exit code.

fn main() {
    std::process::exit(packbench::cli::main());
}
