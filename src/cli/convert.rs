//! `receptor convert`: any model receptor reads (ONNX or receptor-model/1) written in the
//! receptor-model/1 JSON schema, tensors inline or in a safetensors side file.

use super::{BoxArgs, load_model};
use crate::error::{Error, Result};
use clap::Args;
use std::path::PathBuf;
use std::process::ExitCode;

/// Arguments of `convert`.
#[derive(Debug, Clone, Args)]
pub struct ConvertArgs {
    /// The model file (.onnx, or receptor-model/1 .json).
    #[arg(value_name = "MODEL")]
    pub model: PathBuf,

    /// Where to write the model (receptor-model/1 JSON). Must differ from MODEL. Written to
    /// a temporary file and renamed, so it is never half-written.
    #[arg(long, value_name = "FILE")]
    pub out: PathBuf,

    /// Store the weights and biases in this safetensors file (F32) instead of inline in the
    /// JSON. It must be in the same folder as --out.
    #[arg(long, value_name = "FILE")]
    pub tensors: Option<PathBuf>,

    /// Allow the model's side files (safetensors, ONNX external data) to be absolute paths
    /// or to lie outside the model's folder.
    #[arg(long)]
    pub allow_outside_paths: bool,

    /// The input box written into the schema (ONNX models carry none).
    #[command(flatten)]
    pub input_box: BoxArgs,
}

/// Runs `convert`: loads and validates MODEL, then writes it.
pub fn run(args: &ConvertArgs) -> Result<ExitCode> {
    if crate::model::is_onnx(&args.out) {
        return Err(Error::usage(format!(
            "--out {}: convert writes the receptor-model/1 JSON schema; name the output .json",
            args.out.display()
        )));
    }
    crate::model::refuse_overwriting_model(&args.model, &args.out, "--out")?;
    if let Some(t) = &args.tensors {
        crate::model::refuse_overwriting_model(&args.model, t, "--tensors")?;
    }
    let net = load_model(&args.model, args.allow_outside_paths, &args.input_box)?;
    match &args.tensors {
        Some(t) => crate::model::write_json_with_tensors(&net, &args.out, t)?,
        None => crate::model::write_json(&net, &args.out)?,
    }
    eprintln!(
        "receptor: wrote {} ({} layers, {} parameters)",
        args.out.display(),
        net.layers().len(),
        net.parameter_count()
    );
    Ok(ExitCode::SUCCESS)
}
