//! Standard output for the subcommands' results.
//!
//! `println!` panics when the reader has gone away (`plumb replay … | head`
//! closes the pipe early). [`outln!`](crate::outln) and [`out!`](macro@crate::out)
//! print the same text but end the process quietly instead, with status
//! 141 (128 + SIGPIPE), the status a Unix tool killed by that signal
//! reports. Any other write error ends it with status 2 and a message.

use std::io::Write;

/// Writes `args` (and a newline when `newline`) to standard output.
pub fn write(args: std::fmt::Arguments<'_>, newline: bool) {
    let mut o = std::io::stdout().lock();
    let r = o
        .write_fmt(args)
        .and_then(|()| if newline { o.write_all(b"\n") } else { Ok(()) })
        .and_then(|()| o.flush());
    if let Err(e) = r {
        if e.kind() == std::io::ErrorKind::BrokenPipe {
            std::process::exit(141);
        }
        eprintln!("plumb: error: cannot write to standard output: {e}");
        std::process::exit(i32::from(crate::error::EXIT_BAD_INPUT));
    }
}

/// `println!` for results: see [the module](mod@crate::out).
#[macro_export]
macro_rules! outln {
    () => { $crate::out::write(format_args!(""), true) };
    ($($arg:tt)*) => { $crate::out::write(format_args!($($arg)*), true) };
}

/// `print!` for results: see [the module](mod@crate::out).
#[macro_export]
macro_rules! out {
    ($($arg:tt)*) => { $crate::out::write(format_args!($($arg)*), false) };
}
