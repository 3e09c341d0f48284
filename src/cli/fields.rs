//! `receptor fields MODEL`: the theoretical receptive field of every layer on the input
//! (size, jump between neighbouring units, centre of unit (0, 0)), by the recurrences of
//! Araujo, Norris & Sim (Distill 2019); see [`crate::analysis::fields`].

use super::CommonArgs;
use crate::analysis::fields::receptive_fields;
use crate::error::Result;
use crate::report::table::{Stop, emit};
use crate::report::tables;
use clap::Args;
use std::path::PathBuf;
use std::process::ExitCode;

/// Arguments of `fields`.
#[derive(Debug, Clone, Args)]
pub struct FieldsArgs {
    /// The model file (receptor-model/1 or /2 JSON).
    #[arg(value_name = "MODEL")]
    pub model: PathBuf,

    /// Output format and file, as for every table command.
    #[command(flatten)]
    pub common: CommonArgs,
}

/// Runs `fields`.
pub fn run(args: &FieldsArgs) -> Result<ExitCode> {
    let net = args.common.load(&args.model)?;
    let fields = receptive_fields(&net);
    emit(&args.common.destination(), |w| {
        tables::write_fields(args.common.format, w, &fields)?;
        Ok::<(), Stop>(())
    })?;
    Ok(ExitCode::SUCCESS)
}
