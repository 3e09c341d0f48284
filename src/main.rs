//! The `receptor` binary: parses the command line, then runs one analysis command or opens
//! the desktop app. All the work lives in the library.

use clap::Parser;
use receptor::cli::{self, Cli, EXIT_BAD_INPUT};
use std::process::ExitCode;

fn main() -> ExitCode {
    let cli = match Cli::try_parse() {
        Ok(c) => c,
        Err(e) => {
            // clap prints help and version to standard output with exit code 0, and usage
            // errors to standard error with exit code 2.
            let _ = e.print();
            return ExitCode::from(u8::try_from(e.exit_code()).unwrap_or(EXIT_BAD_INPUT));
        }
    };
    match cli.command {
        None => open_app(
            cli.model,
            cli.probe,
            cli.allow_outside_paths,
            cli.input_box.to_input_box(),
        ),
        Some(command) => match cli::run(command) {
            Ok(code) => code,
            Err(e) => {
                // One line, worded for the command line (flags by name).
                eprintln!("receptor: {}", cli::message(&e));
                ExitCode::from(EXIT_BAD_INPUT)
            }
        },
    }
}

/// Opens the desktop app (built with the default `gui` feature).
#[cfg(feature = "gui")]
fn open_app(
    model: Option<std::path::PathBuf>,
    probe: Option<std::path::PathBuf>,
    allow_outside_paths: bool,
    input_box: receptor::model::InputBox,
) -> ExitCode {
    receptor::app::run(receptor::app::Start {
        model,
        probe,
        allow_outside_paths,
        input_box,
    })
}

/// Without the `gui` feature there is no window; say so.
#[cfg(not(feature = "gui"))]
fn open_app(
    model: Option<std::path::PathBuf>,
    probe: Option<std::path::PathBuf>,
    allow_outside_paths: bool,
    input_box: receptor::model::InputBox,
) -> ExitCode {
    let _ = (model, probe, allow_outside_paths, input_box);
    eprintln!(
        "receptor: the desktop app is not available in this build; see `receptor --help` for the commands"
    );
    ExitCode::from(EXIT_BAD_INPUT)
}
