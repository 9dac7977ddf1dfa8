//! What the commands print on standard output, and how a closed output ends them.
//!
//! `println!` panics when stdout is gone (`apportion simulate … | head -3` closes the pipe
//! while the table is still being written). Every command writes through [`out`] instead, which
//! returns [`Closed`] for a closed pipe so that the command can stop quietly with status 0, as
//! command-line tools do when a reader has had enough.

use std::fmt;
use std::io::{ErrorKind, Write};
use std::process::ExitCode;

/// Why printing stopped.
#[derive(Debug)]
pub enum Unwritable {
    /// The reader closed the pipe: not an error, the command just stops.
    Closed,
    /// Anything else (a full disk, a revoked terminal): worth a message.
    Failed(std::io::Error),
}

impl fmt::Display for Unwritable {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Unwritable::Closed => f.write_str("standard output was closed"),
            Unwritable::Failed(e) => write!(f, "cannot write to standard output: {e}"),
        }
    }
}

impl std::error::Error for Unwritable {}

/// Writes `args` to stdout through one lock and flushes, so that a closed pipe is seen at once.
pub fn out(args: fmt::Arguments<'_>) -> Result<(), Unwritable> {
    let mut stdout = std::io::stdout().lock();
    stdout.write_fmt(args).and_then(|()| stdout.flush()).map_err(|e| match e.kind() {
        ErrorKind::BrokenPipe => Unwritable::Closed,
        _ => Unwritable::Failed(e),
    })
}

/// The exit status of a command that could not print: 0 for a closed pipe, else 1 with a message.
pub fn exit_code(command: &str, e: &Unwritable) -> ExitCode {
    match e {
        Unwritable::Closed => ExitCode::SUCCESS,
        Unwritable::Failed(_) => {
            eprintln!("apportion {command}: {e}");
            ExitCode::FAILURE
        }
    }
}

/// Whether an error chain ends in a closed stdout (for commands that return `anyhow` errors).
pub fn is_closed(e: &anyhow::Error) -> bool {
    e.chain().any(|c| matches!(c.downcast_ref::<Unwritable>(), Some(Unwritable::Closed)))
}

/// `print!` through [`out`]: evaluates to `Result<(), Unwritable>`.
#[macro_export]
macro_rules! say {
    ($($arg:tt)*) => { $crate::console::out(format_args!($($arg)*)) };
}

/// `println!` through [`out`]: evaluates to `Result<(), Unwritable>`.
#[macro_export]
macro_rules! sayln {
    () => { $crate::console::out(format_args!("\n")) };
    ($($arg:tt)*) => { $crate::console::out(format_args!("{}\n", format_args!($($arg)*))) };
}
