//! `receptor forward MODEL --probe DATA`: the network's outputs for every probe sample.

use super::CommonArgs;
use super::output::{Cell, Stop, TableWriter, emit};
use crate::analysis::forward::{argmax_rows, forward};
use crate::error::Result;
use crate::probe;
use clap::Args;
use std::num::NonZeroUsize;
use std::path::PathBuf;
use std::process::ExitCode;

/// Arguments of `forward`.
#[derive(Debug, Clone, Args)]
pub struct ForwardArgs {
    /// The model file (receptor-model/1 JSON).
    #[arg(value_name = "MODEL")]
    pub model: PathBuf,

    /// Probe data: a .csv or .npy file, one sample per row, columns in input order.
    #[arg(long, value_name = "DATA")]
    pub probe: PathBuf,

    /// Rows read and run through the network at a time (memory use grows with it).
    #[arg(long, value_name = "N", value_parser = super::parse_count,
          default_value_t = probe::DEFAULT_CHUNK_ROWS_NONZERO)]
    pub chunk_rows: NonZeroUsize,

    /// Output and loading options shared by every command.
    #[command(flatten)]
    pub common: CommonArgs,
}

/// Runs `forward`: streams the probe chunk by chunk, one output row per sample.
pub fn run(args: &ForwardArgs) -> Result<ExitCode> {
    let net = args.common.load(&args.model)?;
    let mut source = probe::open(&args.probe, &net)?;
    let names = net.output_names();
    let mut columns = vec!["row".to_string()];
    columns.extend(names.iter().cloned());
    columns.push("predicted".to_string());
    emit(&args.common.destination(), |w| {
        let mut t = TableWriter::begin(args.common.format, w, columns.clone(), columns)?;
        let mut cells: Vec<Cell> = Vec::with_capacity(names.len() + 2);
        let origin = source.describe();
        while let Some(chunk) = source.next_chunk(args.chunk_rows.get())? {
            chunk.check_width(&net, &origin)?;
            let out = forward(&net, chunk.inputs.view());
            let best = argmax_rows(out.view());
            for (r, row) in out.rows().into_iter().enumerate() {
                cells.clear();
                cells.push(Cell::from(chunk.first_row + r));
                cells.extend(row.iter().map(|&v| Cell::F32(v)));
                cells.push(Cell::OptStr(best[r].map(|k| names[k].clone())));
                t.row(&cells)?;
            }
        }
        t.finish(&[])?;
        Ok::<(), Stop>(())
    })?;
    Ok(ExitCode::SUCCESS)
}
