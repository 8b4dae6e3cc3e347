//! The commands of the `subwatch` binary, one module each: each parses nothing (`main`
//! does), calls the library, prints, and returns the exit code.

pub mod catalogue;
pub mod daemon;
pub mod demo;
pub mod measure;
pub mod night;
pub mod render;
pub mod sky;
pub mod store;
