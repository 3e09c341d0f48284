//! The report layer: what the command line and the app both show, free of any GUI crate.
//!
//! - [`table`]: tables as CSV or JSON, one number format on both fronts;
//! - [`tables`]: the columns and rows of the `stats`, `screen`, `prune-sweep` and `prefer`
//!   tables, written by the commands and by the app's exports;
//! - [`annotate`]: unit indices and the colour key with its scale drawn into exported grids
//!   with a tiny built-in digit font;
//! - [`colour`]: the diverging colour key (CIELAB stops from `assets/colour-key.json`) and
//!   the tick labels of its legend;
//! - [`format`](mod@format): numbers with a fixed count of significant digits and
//!   percentages, for both fronts;
//! - [`picture`]: the one renderer of maps, input pictures, cell grids and tile grids into
//!   RGBA buffers and PNG bytes, so `receptor prefer --png`, the app's textures and its PNG
//!   exports draw the same pixels;
//! - [`filters`]: the convolution pictures (filters, feature maps, effective receptive
//!   fields, receptive-field crops and boxes), built on [`picture`].
//!
//! Like `model/`, `probe/` and `analysis/`, nothing here names egui, eframe or rfd
//! (`.ci/run` greps); `cli/` and `app/` both build on it and never on each other.

pub mod annotate;
pub mod colour;
pub mod filters;
pub mod format;
pub mod picture;
pub mod table;
pub mod tables;
