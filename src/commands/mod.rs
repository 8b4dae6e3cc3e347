//! The commands of the `subwatch` binary, one module each: each parses nothing (`main`
//! does), calls the library, prints, and returns the exit code.

/// `println!` that returns the write's error instead of panicking: a reader that closed
/// the pipe (`subwatch report --json | head`) ends the command quietly (`main`).
macro_rules! outln {
    ($($arg:tt)*) => {{
        use std::io::Write as _;
        writeln!(std::io::stdout().lock(), $($arg)*)
    }};
}

/// `print!` as [`outln!`].
macro_rules! out {
    ($($arg:tt)*) => {{
        use std::io::Write as _;
        write!(std::io::stdout().lock(), $($arg)*)
    }};
}

pub mod archive;
pub mod catalogue;
pub mod daemon;
pub mod demo;
pub mod measure;
pub mod night;
pub mod render;
pub mod service;
pub mod sky;
pub mod store;
pub mod target;
