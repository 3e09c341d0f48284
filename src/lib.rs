//! receptor: inspect trained feed-forward networks.
//!
//! The core (`model`, `probe`, `analysis`) has no GUI dependency; `cli` and `app` are thin
//! layers over it.

pub mod analysis;
#[cfg(feature = "gui")]
pub mod app;
pub mod atomic;
pub mod cli;
pub mod error;
pub mod model;
pub mod probe;

pub use error::{Error, Result};
pub use model::Network;
