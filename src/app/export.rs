//! Exports from the app: sparsity statistics (CSV or JSON, the columns of `receptor stats`),
//! the screening report (the columns of `receptor screen`), the current map or the whole
//! grid as PNG, and a pruned model. [`prepare`] copies what is needed out of the state (cheap:
//! shared handles and small images); [`write`] does the work and writes the file atomically,
//! off the frame thread.

use super::colour::ScaleMode;
use super::maps;
use super::state::{AppState, ScreenResult, StatsResult};
use crate::cli::output::{Cell, Format};
use crate::error::{Error, Result};
use crate::model::Network;
use std::path::Path;
use std::sync::Arc;

/// Pixels between tiles in a grid PNG.
const GRID_GAP: u32 = 2;

/// What to export.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ExportKind {
    /// Sparsity statistics as CSV.
    StatsCsv,
    /// Sparsity statistics as JSON (with per-layer summaries).
    StatsJson,
    /// Screening report as CSV.
    ScreenCsv,
    /// Screening report as JSON.
    ScreenJson,
    /// The map shown in the detail panel, as PNG.
    MapPng,
    /// Every tile of the current layer's grid, as one PNG.
    GridPng,
    /// The model with the smallest weights zeroed (our JSON schema).
    PrunedModel,
}

impl ExportKind {
    /// Every kind, in menu order.
    pub const ALL: [ExportKind; 7] = [
        ExportKind::StatsCsv,
        ExportKind::StatsJson,
        ExportKind::ScreenCsv,
        ExportKind::ScreenJson,
        ExportKind::MapPng,
        ExportKind::GridPng,
        ExportKind::PrunedModel,
    ];

    /// Menu label.
    pub fn label(self) -> &'static str {
        match self {
            ExportKind::StatsCsv => "Sparsity statistics (CSV)…",
            ExportKind::StatsJson => "Sparsity statistics (JSON)…",
            ExportKind::ScreenCsv => "Screening report (CSV)…",
            ExportKind::ScreenJson => "Screening report (JSON)…",
            ExportKind::MapPng => "Current map (PNG)…",
            ExportKind::GridPng => "Whole grid of the layer (PNG)…",
            ExportKind::PrunedModel => "Pruned model (JSON)…",
        }
    }

    /// File-type filter of the save dialog.
    pub fn filter(self) -> (&'static str, &'static [&'static str]) {
        match self {
            ExportKind::StatsCsv | ExportKind::ScreenCsv => ("CSV", &["csv"]),
            ExportKind::StatsJson | ExportKind::ScreenJson | ExportKind::PrunedModel => {
                ("JSON", &["json"])
            }
            ExportKind::MapPng | ExportKind::GridPng => ("PNG image", &["png"]),
        }
    }
}

/// A file name to suggest in the save dialog.
pub fn default_file_name(kind: ExportKind, state: &AppState) -> String {
    let base = state
        .net()
        .map_or_else(|| "model".to_string(), |n| n.name.clone());
    let layer = state
        .net()
        .and_then(|n| n.layers.get(state.current_layer()))
        .map_or_else(String::new, |l| l.name.clone());
    match kind {
        ExportKind::StatsCsv => format!("{base}-stats.csv"),
        ExportKind::StatsJson => format!("{base}-stats.json"),
        ExportKind::ScreenCsv => format!("{base}-screen.csv"),
        ExportKind::ScreenJson => format!("{base}-screen.json"),
        ExportKind::MapPng => super::detail::current_map(state).map_or_else(
            || format!("{base}-map.png"),
            |(n, _)| format!("{base}-{n}.png"),
        ),
        ExportKind::GridPng => format!("{base}-{layer}-grid.png"),
        ExportKind::PrunedModel => {
            format!("{base}-pruned-{:.0}.json", 100.0 * state.prune_fraction)
        }
    }
}

/// True when the data for `kind` is there.
pub fn available(kind: ExportKind, state: &AppState) -> bool {
    match kind {
        ExportKind::StatsCsv | ExportKind::StatsJson => state.results.stats.is_some(),
        ExportKind::ScreenCsv | ExportKind::ScreenJson => state.results.screen.is_some(),
        ExportKind::MapPng => super::detail::current_map(state).is_some(),
        ExportKind::GridPng | ExportKind::PrunedModel => state.model.is_some(),
    }
}

/// Everything an export needs, taken out of the state.
pub enum ExportData {
    /// Statistics in one format.
    Stats(Arc<StatsResult>, Format),
    /// Screening in one format.
    Screen(Arc<ScreenResult>, Format),
    /// One picture.
    Image(egui::ColorImage),
    /// The tiles of a layer in grid order.
    Grid {
        /// The model.
        net: Arc<Network>,
        /// Layer index.
        layer: usize,
        /// Units in grid order.
        order: Vec<usize>,
        /// Preferred inputs of the layer (deeper layers), per unit.
        preferred: Vec<Option<Vec<f32>>>,
        /// Scale of first-layer weight maps.
        scale: ScaleMode,
    },
    /// A pruned copy of the model.
    Pruned(Arc<Network>, f64),
}

/// Copies what `kind` needs out of `state`; `map` is the detail panel's current picture.
pub fn prepare(
    kind: ExportKind,
    state: &AppState,
    map: Option<(String, egui::ColorImage)>,
) -> Result<ExportData> {
    let missing = |what: &str| Error::usage(format!("nothing to export yet: {what}"));
    match kind {
        ExportKind::StatsCsv | ExportKind::StatsJson => {
            let s = state
                .results
                .stats
                .clone()
                .ok_or_else(|| missing("the statistics are still being computed"))?;
            Ok(ExportData::Stats(
                s,
                if kind == ExportKind::StatsCsv {
                    Format::Csv
                } else {
                    Format::Json
                },
            ))
        }
        ExportKind::ScreenCsv | ExportKind::ScreenJson => {
            let s = state
                .results
                .screen
                .clone()
                .ok_or_else(|| missing("screening is still running"))?;
            Ok(ExportData::Screen(
                s,
                if kind == ExportKind::ScreenCsv {
                    Format::Csv
                } else {
                    Format::Json
                },
            ))
        }
        ExportKind::MapPng => map
            .map(|(_, img)| ExportData::Image(img))
            .ok_or_else(|| missing("the map is not ready")),
        ExportKind::GridPng => {
            let net = state
                .net()
                .cloned()
                .ok_or_else(|| missing("no model is open"))?;
            let layer = state.current_layer();
            let order = match &state.order_cache {
                Some((k, o)) if k.layer == layer && k.tag == state.tag => o.to_vec(),
                _ => (0..net.layers[layer].units()).collect(),
            };
            let preferred = match state.results.preferred.get(&layer) {
                Some(p) => p
                    .maps
                    .iter()
                    .map(|m| m.as_ref().map(|m| m.input.clone()))
                    .collect(),
                None => vec![None; net.layers[layer].units()],
            };
            Ok(ExportData::Grid {
                net,
                layer,
                order,
                preferred,
                scale: state.prefs.scale,
            })
        }
        ExportKind::PrunedModel => {
            let net = state
                .net()
                .cloned()
                .ok_or_else(|| missing("no model is open"))?;
            Ok(ExportData::Pruned(net, state.prune_fraction))
        }
    }
}

/// Writes `data` to `path` atomically (temporary file in the same folder, then renamed).
pub fn write(data: &ExportData, path: &Path) -> Result<()> {
    match data {
        ExportData::Stats(s, format) => {
            crate::atomic::write_atomic(path, |w| write_stats(w, s, *format))
        }
        ExportData::Screen(s, format) => {
            crate::atomic::write_atomic(path, |w| write_screen(w, s, *format))
        }
        ExportData::Image(img) => write_png(path, &maps::to_rgba(img, zoom_for(img.size))),
        ExportData::Grid {
            net,
            layer,
            order,
            preferred,
            scale,
        } => write_png(path, &grid_image(net, *layer, order, preferred, *scale)),
        ExportData::Pruned(net, fraction) => {
            let pruned = crate::analysis::prune::prune_by_magnitude(net, *fraction);
            crate::model::write_json(&pruned, path)
        }
    }
}

/// The statistics table, exactly the columns and number format of `receptor stats`.
pub fn write_stats(
    w: &mut dyn std::io::Write,
    s: &StatsResult,
    format: Format,
) -> std::io::Result<()> {
    crate::cli::stats::write_table(format, w, s.units.iter().flatten(), &s.layers)
}

/// The screening table, exactly the columns of `receptor screen`.
pub fn write_screen(
    w: &mut dyn std::io::Write,
    s: &ScreenResult,
    format: Format,
) -> std::io::Result<()> {
    let rare = crate::analysis::screen::DEFAULT_RARE_FRACTION;
    crate::cli::screen::write_table(
        format,
        w,
        &s.rows,
        &[
            ("samples", Cell::from(s.samples)),
            ("probe", Cell::from(s.probe.as_str())),
            ("rare", Cell::F64(rare)),
        ],
    )
}

/// Enlargement for a single map so small inputs (12 x 12) give a usable picture.
fn zoom_for(size: [usize; 2]) -> usize {
    let longest = size[0].max(size[1]).max(1);
    (512 / longest).clamp(1, 32)
}

/// All tiles of a layer in grid order: first-layer weight maps, or preferred inputs (a
/// neutral grey tile where a search has not finished).
fn grid_image(
    net: &Network,
    layer: usize,
    order: &[usize],
    preferred: &[Option<Vec<f32>>],
    scale: ScaleMode,
) -> image::RgbaImage {
    let l = &net.layers[layer];
    let layer_max = maps::max_abs(l.weights.as_slice().unwrap_or(&[]));
    let tile = |u: usize| -> egui::ColorImage {
        if layer == 0 {
            let w = l.weights.row(u).to_vec();
            maps::signed_input_map(&net.input, &w, scale.pick(maps::max_abs(&w), layer_max))
        } else {
            match preferred.get(u).and_then(|p| p.as_ref()) {
                Some(x) => maps::input_picture(&net.input, x),
                None => {
                    let (w, h) = maps::input_dims(&net.input, false);
                    egui::ColorImage::filled([w, h], egui::Color32::from_gray(128))
                }
            }
        }
    };
    let first = tile(order.first().copied().unwrap_or(0));
    let zoom = (64 / first.size[0].max(first.size[1]).max(1)).clamp(1, 8);
    let (tw, th) = ((first.size[0] * zoom) as u32, (first.size[1] * zoom) as u32);
    let cols = maps::cell_columns(order.len()) as u32;
    let rows = (order.len() as u32).div_ceil(cols).max(1);
    let mut out = image::RgbaImage::from_pixel(
        cols * (tw + GRID_GAP) + GRID_GAP,
        rows * (th + GRID_GAP) + GRID_GAP,
        image::Rgba([255, 255, 255, 255]),
    );
    for (k, &u) in order.iter().enumerate() {
        let img = maps::to_rgba(&tile(u), zoom);
        let x0 = GRID_GAP + (k as u32 % cols) * (tw + GRID_GAP);
        let y0 = GRID_GAP + (k as u32 / cols) * (th + GRID_GAP);
        image::imageops::overlay(&mut out, &img, i64::from(x0), i64::from(y0));
    }
    out
}

fn write_png(path: &Path, img: &image::RgbaImage) -> Result<()> {
    let mut bytes = Vec::new();
    img.write_to(
        &mut std::io::Cursor::new(&mut bytes),
        image::ImageFormat::Png,
    )
    .map_err(|e| Error::io(path, "cannot encode the PNG", std::io::Error::other(e)))?;
    crate::atomic::write_bytes_atomic(path, &bytes)
}
