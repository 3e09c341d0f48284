//! The table writer of the commands, from the report layer ([`crate::report::table`]), where
//! the app's exports find it too.

pub use crate::report::table::{
    Cell, Destination, Format, Stop, TableWriter, emit, f32_text, f64_text,
};
