//! receptor: inspect trained feed-forward networks.
//!
//! The core (`model`, `probe`, `analysis`) has no GUI dependency; `report` (tables, the
//! colour key, pictures) builds on it, also without GUI; `cli` and `app` are thin layers over
//! both and never use each other.

pub mod analysis;
#[cfg(feature = "gui")]
pub mod app;
pub mod atomic;
pub mod cli;
pub mod error;
pub mod model;
pub mod probe;
pub mod report;

pub use error::{Error, Result};
pub use model::Network;
