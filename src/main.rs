//! The `hadal` binary: a thin shell over the library's command-line layer.

// Many small allocations (syntax trees, report rows): a faster allocator
// than the C library's.
#[global_allocator]
static ALLOCATOR: mimalloc::MiMalloc = mimalloc::MiMalloc;

fn main() {
    // Die quietly on a closed pipe (`hadal run ... | head`), as Unix tools do.
    #[cfg(unix)]
    unsafe {
        libc::signal(libc::SIGPIPE, libc::SIG_DFL);
    }
    std::process::exit(hadal::cli::main());
}
