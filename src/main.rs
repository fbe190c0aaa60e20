//! The `phasewise` command; everything happens in [`phasewise::cli`].

fn main() {
    std::process::exit(phasewise::cli::main());
}
