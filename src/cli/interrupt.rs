//! Ctrl-C. For studies (`convchain montecarlo`, `convchain sweep`): the first interrupt sets a flag the study's
//! run loop reads before starting each item ([`convchain::study::shard::run_in_order`]), so the finished rows
//! are written; a second one stops the process at once. For the other commands that write a folder (`run`,
//! `static`, `limit`): the first interrupt stops at once. Either way the temporary files not yet renamed into
//! place are removed first ([`convchain::report::outdir::interrupt_cleanup`]) and the exit code is 130.

use std::sync::atomic::{AtomicBool, Ordering};

/// Exit code after Ctrl-C (128 + SIGINT, the shell's convention).
pub const INTERRUPTED_EXIT: u8 = 130;

/// A study stopped by Ctrl-C; its finished rows were written. The message says how many items were done.
#[derive(Debug)]
pub struct Interrupted(pub String);

impl std::fmt::Display for Interrupted {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(&self.0)
    }
}

impl std::error::Error for Interrupted {}

/// Set by the first Ctrl-C; the study stops starting new items.
pub static CANCEL: AtomicBool = AtomicBool::new(false);

/// Install the handler of Ctrl-C for a study whose items are called `items` ("runs", "points"). On the first
/// Ctrl-C no new item starts and the finished rows are written; a second one stops at once.
pub fn install_handler(items: &'static str) {
    let _ = ctrlc::set_handler(move || {
        if CANCEL.swap(true, Ordering::SeqCst) {
            convchain::report::outdir::interrupt_cleanup();
            eprintln!("\nsecond interrupt: stopping now, nothing more is written");
            std::process::exit(i32::from(INTERRUPTED_EXIT));
        }
        eprintln!(
            "\ninterrupt: no new {items} start; the {items} in progress finish and the finished rows are \
             written (Ctrl-C again stops at once)"
        );
    });
}

/// Install the handler of Ctrl-C for a command that writes one folder at its end (`run`, `static`, `limit`):
/// it removes this process's temporary files (and a folder it created that holds nothing yet), says so, and
/// exits with code 130. Files already renamed into place stay: each is complete.
pub fn install_stop_handler(command: &'static str) {
    let _ = ctrlc::set_handler(move || {
        convchain::report::outdir::interrupt_cleanup();
        eprintln!("\ninterrupt: {command} stopped; its temporary files were removed");
        std::process::exit(i32::from(INTERRUPTED_EXIT));
    });
}
