//! The `phasewise` command; everything happens in [`phasewise::cli`].

/// Large arrays in huge-page mappings of their own (see [`phasewise::alloc`]).
#[global_allocator]
static ALLOCATOR: phasewise::alloc::LargePages = phasewise::alloc::LargePages;

fn main() {
    std::process::exit(phasewise::cli::main());
}
