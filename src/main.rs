//! The `posconform` command: parse the arguments, run one subcommand, map its outcome
//! to an exit code (0 conforming, 1 nonconforming, 2 could not run).

mod cli;

fn main() -> std::process::ExitCode {
    keep_freed_memory();
    cli::run()
}

/// A check allocates and frees arrays of many megabytes, case after case. By default
/// glibc returns each of them to the system when it is freed and the next one is
/// faulted in page by page again (a third of a large case's time); these settings keep
/// freed memory in the process for the next array.
#[cfg(all(target_os = "linux", target_env = "gnu"))]
fn keep_freed_memory() {
    // SAFETY: mallopt only changes allocator tuning; called before any thread starts.
    unsafe {
        libc::mallopt(libc::M_MMAP_THRESHOLD, 1 << 30);
        libc::mallopt(libc::M_TRIM_THRESHOLD, 1 << 30);
    }
}

#[cfg(not(all(target_os = "linux", target_env = "gnu")))]
fn keep_freed_memory() {}
