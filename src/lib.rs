//! subwatch: grades every sub of an imaging night as it lands and flags what is unusual.
//!
//! The library is a pure core (`measure`, `sim`, and the header/WCS parsing in `frame`)
//! wrapped by thin I/O shells (`frame::fits` decoding, `pipeline`, the binary's CLI).
//! See ARCHITECTURE.md for the map and the invariants.

pub mod actions;
pub mod archive;
pub mod astrometry;
pub mod batch;
pub mod buffer;
pub mod catalogue;
pub mod catalogue_import;
pub mod clock;
pub mod config;
pub mod contract;
pub mod demo;
pub mod events;
pub mod finite;
pub mod frame;
pub mod linalg;
pub mod lists;
pub mod live;
pub mod logging;
pub mod mail;
pub mod measure;
pub mod morning;
pub mod night;
pub mod os;
pub mod outbox;
pub mod pairs;
pub mod pipeline;
pub mod reader;
pub mod record;
pub mod report;
pub mod rules;
pub mod season;
pub mod sim;
pub mod sky;
pub mod sky_fit;
pub mod store;
pub mod targets;
pub mod text;
pub mod voevent;
pub mod walk;
pub mod watch;
