//! `receptor prefer MODEL --layer NAME (--unit K | --all)`: the preferred input of a unit
//! (the input in the box that maximises its pre-activation), optionally drawn as a PNG.

use super::CommonArgs;
use super::output::{Cell, Stop, TableWriter, emit};
use crate::analysis::Silent;
use crate::analysis::prefer::{PreferOptions, Preferred, prefer};
use crate::error::{Error, Result};
use crate::model::{Layout, Network};
use clap::Args;
use std::path::PathBuf;
use std::process::ExitCode;

/// Arguments of `prefer`.
#[derive(Debug, Clone, Args)]
#[command(group = clap::ArgGroup::new("which").required(true).args(["unit", "all"]))]
pub struct PreferArgs {
    /// The model file (receptor-model/1 JSON).
    #[arg(value_name = "MODEL")]
    pub model: PathBuf,

    /// The layer, by name.
    #[arg(long, value_name = "NAME")]
    pub layer: String,

    /// The unit, counting from 0.
    #[arg(long, value_name = "K")]
    pub unit: Option<usize>,

    /// Every unit of the layer, optimised together as one batch.
    #[arg(long)]
    pub all: bool,

    /// Gradient-ascent steps per restart.
    #[arg(long, value_name = "N", default_value_t = PreferOptions::default().steps())]
    pub steps: usize,

    /// Starts of the search: one from the centre of the input box, the rest random.
    #[arg(long, value_name = "R", default_value_t = PreferOptions::default().restarts())]
    pub restarts: usize,

    /// Seed of the random starts.
    #[arg(long, value_name = "S", default_value_t = PreferOptions::default().seed())]
    pub seed: u64,

    /// Maximise z - LAMBDA x ||x||^2 instead of z (keeps the preferred input small).
    #[arg(
        long,
        allow_negative_numbers = true,
        value_name = "LAMBDA",
        default_value_t = PreferOptions::default().l2()
    )]
    pub l2: f32,

    /// Image layouts only: also subtract LAMBDA x the total variation of the input
    /// (favours smooth images).
    #[arg(
        long,
        allow_negative_numbers = true,
        value_name = "LAMBDA",
        default_value_t = PreferOptions::default().tv()
    )]
    pub tv: f32,

    /// Also draw the preferred input(s) as a PNG image: black is the low end of the input
    /// box, white the high end (mid grey is its centre); a grid of tiles for --all; a
    /// vector layout is drawn as one strip per unit; magenta marks a non-finite value.
    #[arg(long, value_name = "FILE")]
    pub png: Option<PathBuf>,

    #[command(flatten)]
    pub common: CommonArgs,
}

/// Runs `prefer`.
pub fn run(args: &PreferArgs) -> Result<ExitCode> {
    // The options are checked when they are made, the unit and the layout by the search.
    let opts = PreferOptions::new(args.steps, args.restarts, args.seed, args.l2, args.tv)?;
    let net = args.common.load(&args.model)?;
    let layer = net.require_layer(&args.layer)?;
    let units: Vec<usize> = match args.unit {
        Some(k) => vec![k],
        None => (0..net.layers[layer].units()).collect(),
    };
    let found = prefer(&net, layer, &units, &opts, &Silent)?;
    for p in found.iter().filter(|p| !p.finite) {
        eprintln!(
            "receptor: warning: layer '{}' unit {}: the search produced a non-finite value (NaN in CSV, null in JSON)",
            args.layer, p.unit
        );
    }
    // The image is made before anything is written, so a failure leaves no partial output.
    let png = match &args.png {
        Some(_) => Some(render_png(&net, &found)?),
        None => None,
    };
    let n = net.input.size;
    let columns: Vec<String> = [
        "layer",
        "unit",
        "preactivation",
        "activation",
        "steps",
        "input",
    ]
    .iter()
    .map(|c| c.to_string())
    .collect();
    let mut csv_header: Vec<String> = columns[..5].to_vec();
    csv_header.extend((0..n).map(|i| format!("x{i}")));
    emit(&args.common.destination(), |w| {
        let mut t = TableWriter::begin(args.common.format, w, columns, csv_header)?;
        for p in &found {
            t.row(&[
                Cell::from(args.layer.as_str()),
                Cell::from(p.unit),
                Cell::F32(p.preactivation),
                Cell::F32(p.activation),
                Cell::from(p.steps),
                Cell::F32s(p.input.clone()),
            ])?;
        }
        t.finish(&[
            ("seed", Cell::UInt(args.seed)),
            ("restarts", Cell::from(args.restarts)),
            ("l2", Cell::F32(args.l2)),
            ("tv", Cell::F32(args.tv)),
        ])?;
        Ok::<(), Stop>(())
    })?;
    if let (Some(path), Some(bytes)) = (&args.png, png) {
        crate::atomic::write_bytes_atomic(path, &bytes)?;
    }
    Ok(ExitCode::SUCCESS)
}

/// Gap between tiles, in pixels.
const GAP: u32 = 2;
/// Colour of the gaps: a muted blue, distinct from every grey.
const GAP_RGB: [u8; 3] = [40, 60, 90];
/// Colour of a non-finite value.
const NON_FINITE_RGB: [u8; 3] = [255, 0, 255];

/// Maps `x` from `[low, high]` to 0..=255; the centre of a degenerate box is mid grey.
fn level(x: f32, low: f32, high: f32) -> Option<u8> {
    if !x.is_finite() {
        return None;
    }
    let span = high - low;
    let t = if span > 0.0 { (x - low) / span } else { 0.5 };
    Some((t.clamp(0.0, 1.0) * 255.0).round() as u8)
}

/// Draws preferred inputs as an RGB image and encodes it as PNG.
///
/// Image layouts: one tile per unit (height x width, grey for one channel, colour for
/// three), tiles in a near-square grid in unit order, row by row. Vector layouts: one
/// horizontal strip per unit, strips stacked top to bottom.
pub fn render_png(net: &Network, found: &[Preferred]) -> Result<Vec<u8>> {
    let spec = &net.input;
    let units = found.len().max(1) as u32;
    // (tile height, tile width in input cells, pixels per cell across and down, grid columns)
    let (th, tw, sx, sy, cols) = match spec.layout {
        Layout::Image { height, width, .. } => {
            let (h, w) = (height as u32, width as u32);
            let s = (64 / h.max(w).max(1)).clamp(1, 16);
            let cols = (f64::from(units).sqrt().ceil() as u32).max(1);
            (h, w, s, s, cols)
        }
        Layout::Vector => {
            let n = spec.size as u32;
            let sx = (1024 / n.max(1)).clamp(1, 16);
            let sy = (4096 / units).clamp(1, 16);
            (1, n, sx, sy, 1)
        }
    };
    let rows = units.div_ceil(cols);
    let tile_w = tw * sx;
    let tile_h = th * sy;
    let width = u64::from(cols) * u64::from(tile_w + GAP) + u64::from(GAP);
    let height = u64::from(rows) * u64::from(tile_h + GAP) + u64::from(GAP);
    if width * height > 1 << 28 {
        return Err(Error::usage(format!(
            "the image would be {width} x {height} pixels, too large to write"
        )));
    }
    let mut img = image::RgbImage::from_pixel(width as u32, height as u32, image::Rgb(GAP_RGB));
    for (t, p) in found.iter().enumerate() {
        let t = t as u32;
        let (gx, gy) = (t % cols, t / cols);
        let x0 = GAP + gx * (tile_w + GAP);
        let y0 = GAP + gy * (tile_h + GAP);
        for r in 0..th {
            for c in 0..tw {
                let rgb = match spec.layout {
                    Layout::Image {
                        width, channels, ..
                    } => {
                        let base = (r as usize * width + c as usize) * channels;
                        let ch = |k: usize| {
                            let i = base + k.min(channels - 1);
                            level(p.input[i], spec.low[i], spec.high[i])
                        };
                        match (ch(0), ch(1), ch(2)) {
                            (Some(a), Some(b), Some(d)) => [a, b, d],
                            _ => NON_FINITE_RGB,
                        }
                    }
                    Layout::Vector => {
                        let i = c as usize;
                        match level(p.input[i], spec.low[i], spec.high[i]) {
                            Some(g) => [g, g, g],
                            None => NON_FINITE_RGB,
                        }
                    }
                };
                for dy in 0..sy {
                    for dx in 0..sx {
                        img.put_pixel(x0 + c * sx + dx, y0 + r * sy + dy, image::Rgb(rgb));
                    }
                }
            }
        }
    }
    let mut bytes = std::io::Cursor::new(Vec::new());
    img.write_to(&mut bytes, image::ImageFormat::Png)
        .map_err(|e| Error::internal(format!("cannot encode the PNG image: {e}")))?;
    Ok(bytes.into_inner())
}
