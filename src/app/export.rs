//! Exports from the app: sparsity statistics (CSV or JSON, the columns of `receptor stats`),
//! the screening report (the columns of `receptor screen`), the current map or the whole
//! grid as PNG, and a pruned model. [`prepare`] copies what is needed out of the state (cheap:
//! shared handles and small images); [`write()`] does the work and writes the file atomically,
//! off the frame thread.

use super::colour::ScaleMode;
use super::state::{AppState, ScreenResult, StatsResult};
use crate::error::{Error, Result};
use crate::model::Network;
use crate::report::annotate::{self, GridKey};
use crate::report::picture::{self, Picture};
use crate::report::table::Format;
use crate::report::tables;
use std::path::Path;
use std::sync::Arc;

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
        .map_or_else(|| "model".to_string(), |n| n.name().to_string());
    let layer = state
        .net()
        .and_then(|n| n.layers().get(state.current_layer()))
        .map_or_else(String::new, |l| l.name.clone());
    match kind {
        ExportKind::StatsCsv => format!("{base}-stats.csv"),
        ExportKind::StatsJson => format!("{base}-stats.json"),
        ExportKind::ScreenCsv => format!("{base}-screen.csv"),
        ExportKind::ScreenJson => format!("{base}-screen.json"),
        ExportKind::MapPng => super::detail::current_map(state).map_or_else(
            || format!("{base}-map.png"),
            |(n, _, _)| format!("{base}-{n}.png"),
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
        ExportKind::StatsCsv | ExportKind::StatsJson => state.results.stats.is_ready(),
        ExportKind::ScreenCsv | ExportKind::ScreenJson => state.results.screen.is_ready(),
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
    /// One picture and its key.
    Image(Picture, GridKey),
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

/// Copies what `kind` needs out of `state`; `map` is the detail panel's current picture
/// with its key.
pub fn prepare(
    kind: ExportKind,
    state: &AppState,
    map: Option<(String, Picture, GridKey)>,
) -> Result<ExportData> {
    let missing = |what: &str| Error::usage(format!("nothing to export yet: {what}"));
    match kind {
        ExportKind::StatsCsv | ExportKind::StatsJson => {
            let s = state
                .results
                .stats
                .ready()
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
                .ready()
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
            .map(|(_, img, key)| ExportData::Image(img, key))
            .ok_or_else(|| missing("the map is not ready")),
        ExportKind::GridPng => {
            let net = state
                .net()
                .cloned()
                .ok_or_else(|| missing("no model is open"))?;
            let layer = state.current_layer();
            let order = match &state.order_cache {
                Some((k, o)) if k.layer == layer && k.tag == state.tag() => o.to_vec(),
                _ => (0..net.layers()[layer].units()).collect(),
            };
            let preferred = match state.results.preferred.get(&layer) {
                Some(p) => p
                    .maps
                    .iter()
                    .map(|m| m.as_ref().map(|m| m.input.clone()))
                    .collect(),
                None => vec![None; net.layers()[layer].units()],
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
        ExportData::Image(img, key) => {
            let zoom = zoom_for(img.size());
            annotate::with_key(&img.zoomed(zoom, zoom), *key)
                .0
                .write_png(path)
        }
        ExportData::Grid {
            net,
            layer,
            order,
            preferred,
            scale,
        } => grid_image(net, *layer, order, preferred, *scale)?.write_png(path),
        ExportData::Pruned(net, fraction) => {
            let pruned = crate::analysis::prune::prune_by_magnitude(net, *fraction)?;
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
    tables::write_stats(format, w, s.units.iter().flatten(), &s.layers)
}

/// The screening table, exactly the columns of `receptor screen`.
pub fn write_screen(
    w: &mut dyn std::io::Write,
    s: &ScreenResult,
    format: Format,
) -> std::io::Result<()> {
    let rare = crate::analysis::screen::DEFAULT_RARE_FRACTION;
    let extra = tables::screen_extra(s.samples, &s.probe, rare, None);
    tables::write_screen(format, w, &s.rows, &extra)
}

/// Enlargement for a single map so small inputs (12 x 12) give a usable picture.
fn zoom_for(size: [usize; 2]) -> usize {
    let longest = size[0].max(size[1]).max(1);
    (512 / longest).clamp(1, 32)
}

/// All tiles of a layer in grid order: first-layer weight maps, or preferred inputs (a
/// neutral grey tile where a search has not finished), drawn exactly as
/// `receptor prefer --png` draws them.
pub fn grid_image(
    net: &Network,
    layer: usize,
    order: &[usize],
    preferred: &[Option<Vec<f32>>],
    scale: ScaleMode,
) -> Result<Picture> {
    if layer == 0 {
        picture::weight_grid(net.input(), net.layers()[0].weights.view(), order, scale)
    } else {
        let inputs: Vec<Option<&[f32]>> = order
            .iter()
            .map(|&u| preferred.get(u).and_then(|p| p.as_deref()))
            .collect();
        picture::preferred_grid_for(net.input(), &inputs, order)
    }
}
