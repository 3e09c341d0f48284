//! The tables of the analysis commands: their columns, in order, and how one result becomes
//! rows. The commands (`receptor stats`, `screen`, `prune-sweep`, `prefer`, `timeline`) and the app's
//! exports write through these functions, so a file from either front has the same columns
//! and the same numbers.

use super::table::{Cell, Format, TableWriter};
use crate::analysis::attribute::Attribution;
use crate::analysis::prefer::Preferred;
use crate::analysis::prune::SweepPoint;
use crate::analysis::screen::UnitScreen;
use crate::analysis::sparsity::{LayerSummary, UnitStats};
use crate::analysis::structured::{Criterion, UnitSweepPoint};
use crate::analysis::timeline::{CheckpointLayer, Timeline, UnitTimeline};
use crate::model::{InputSpec, Network};
use std::io::Write;
use std::path::Path;

/// The CSV/JSON columns of the statistics table (`receptor stats`), in order.
pub const STATS_COLUMNS: [&str; 10] = [
    "layer",
    "unit",
    "fan_in",
    "l1",
    "l2",
    "max_abs",
    "near_zero_frac",
    "hoyer",
    "gini",
    "bias",
];

/// The CSV/JSON columns of the receptive-field table (`receptor fields`), in order.
pub const FIELDS_COLUMNS: [&str; 11] = [
    "layer",
    "type",
    "out_channels",
    "out_height",
    "out_width",
    "rf_height",
    "rf_width",
    "jump_h",
    "jump_w",
    "start_h",
    "start_w",
];

/// The CSV/JSON columns of the screening table (`receptor screen`), in order.
pub const SCREEN_COLUMNS: [&str; 8] = [
    "layer",
    "unit",
    "activation",
    "active_frac",
    "mean",
    "max",
    "upper_bound",
    "status",
];

/// The CSV/JSON columns of the pruning sweep (`receptor prune-sweep`), in order.
pub const PRUNE_SWEEP_COLUMNS: [&str; 4] = ["fraction", "zeroed", "total", "accuracy"];

/// The columns of the unit-pruning sweep (`receptor prune-sweep --by unit`), in order.
pub const UNIT_SWEEP_COLUMNS: [&str; 7] = [
    "criterion",
    "layer",
    "fraction",
    "removed",
    "units",
    "parameters",
    "accuracy",
];

/// The JSON columns of the preferred-input table (`receptor prefer`), in order. In CSV the
/// vector `input` becomes one column per input element, `x0`, `x1`, ….
pub const PREFER_COLUMNS: [&str; 6] = [
    "layer",
    "unit",
    "preactivation",
    "activation",
    "steps",
    "input",
];

fn owned(columns: &[&str]) -> Vec<String> {
    columns.iter().map(|c| (*c).to_string()).collect()
}

/// Writes the statistics table: one row per unit ([`STATS_COLUMNS`]); JSON adds the
/// per-layer summaries under `"layers"`.
pub fn write_stats<'a>(
    format: Format,
    w: &mut dyn Write,
    units: impl IntoIterator<Item = &'a UnitStats>,
    layers: &[LayerSummary],
) -> std::io::Result<()> {
    let columns = owned(&STATS_COLUMNS);
    let mut t = TableWriter::begin(format, w, columns.clone(), columns)?;
    for u in units {
        t.row(&[
            Cell::from(u.layer.as_str()),
            Cell::from(u.unit),
            Cell::from(u.fan_in),
            Cell::F64(u.l1),
            Cell::F64(u.l2),
            Cell::F64(u.max_abs),
            Cell::F64(u.near_zero_frac),
            Cell::F64(u.hoyer),
            Cell::F64(u.gini),
            Cell::F32(u.bias),
        ])?;
    }
    let summaries = layers
        .iter()
        .map(|l| {
            vec![
                ("layer".to_string(), Cell::from(l.layer.as_str())),
                ("units".to_string(), Cell::from(l.units)),
                ("fan_in".to_string(), Cell::from(l.fan_in)),
                ("zero_tol".to_string(), Cell::F64(l.zero_tol)),
                ("mean_hoyer".to_string(), Cell::F64(l.mean_hoyer)),
                ("mean_gini".to_string(), Cell::F64(l.mean_gini)),
                ("near_zero_frac".to_string(), Cell::F64(l.near_zero_frac)),
                ("max_abs".to_string(), Cell::F64(l.max_abs)),
            ]
        })
        .collect();
    t.finish(&[("layers", Cell::Objects(summaries))])
}

/// The top-level keys that follow the screening rows in JSON: the number of probe samples,
/// the probe's description, the `rare` threshold and, for the seeded uniform probe, its seed.
pub fn screen_extra(
    samples: usize,
    probe: &str,
    rare: f64,
    seed: Option<u64>,
) -> Vec<(&str, Cell)> {
    let mut extra = vec![
        ("samples", Cell::from(samples)),
        ("probe", Cell::from(probe)),
        ("rare", Cell::F64(rare)),
    ];
    if let Some(s) = seed {
        extra.push(("seed", Cell::UInt(s)));
    }
    extra
}

/// Writes the screening table: one row per hidden unit ([`SCREEN_COLUMNS`]); JSON adds
/// `extra` (see [`screen_extra`]) as top-level keys.
pub fn write_screen(
    format: Format,
    w: &mut dyn Write,
    units: &[UnitScreen],
    extra: &[(&str, Cell)],
) -> std::io::Result<()> {
    let columns = owned(&SCREEN_COLUMNS);
    let mut t = TableWriter::begin(format, w, columns.clone(), columns)?;
    for u in units {
        t.row(&[
            Cell::from(u.layer.as_str()),
            Cell::from(u.unit),
            Cell::from(u.activation),
            Cell::F64(u.active_frac),
            Cell::F64(u.mean),
            Cell::F64(u.max),
            Cell::F64(u.upper_bound),
            Cell::from(u.status.as_str()),
        ])?;
    }
    t.finish(extra)
}

/// Writes the pruning sweep: one row per fraction ([`PRUNE_SWEEP_COLUMNS`]); JSON adds the
/// probe's name under `"probe"`.
pub fn write_prune_sweep(
    format: Format,
    w: &mut dyn Write,
    points: &[SweepPoint],
    probe: &str,
) -> std::io::Result<()> {
    let columns = owned(&PRUNE_SWEEP_COLUMNS);
    let mut t = TableWriter::begin(format, w, columns.clone(), columns)?;
    for p in points {
        t.row(&[
            Cell::F64(p.fraction),
            Cell::from(p.zeroed),
            Cell::from(p.total),
            Cell::F64(p.accuracy),
        ])?;
    }
    t.finish(&[("probe", Cell::from(probe))])
}

/// Writes the unit-pruning sweep ([`UNIT_SWEEP_COLUMNS`]; layer `all` when every hidden
/// layer was pruned at once); JSON adds the probe's name and sample count.
pub fn write_unit_sweep(
    format: Format,
    w: &mut dyn Write,
    net: &Network,
    criterion: Criterion,
    points: &[UnitSweepPoint],
    probe_path: &Path,
) -> std::io::Result<()> {
    let columns = owned(&UNIT_SWEEP_COLUMNS);
    let mut t = TableWriter::begin(format, w, columns.clone(), columns)?;
    for p in points {
        let layer = p
            .layer
            .map_or_else(|| "all".to_string(), |l| net.layers()[l].name.clone());
        t.row(&[
            Cell::from(criterion.as_str()),
            Cell::from(layer),
            Cell::F64(p.fraction),
            Cell::from(p.removed),
            Cell::from(p.units),
            Cell::from(p.parameters),
            Cell::F64(p.accuracy),
        ])?;
    }
    let samples = points.first().map_or(0, |p| p.samples);
    t.finish(&[
        ("probe", Cell::from(probe_path.display().to_string())),
        ("samples", Cell::from(samples)),
    ])
}

/// The columns that a search with `--facets` adds: `facet` right after `unit`, and the
/// unit's facets' mean pairwise distance (`facet_spread`, in box widths) before `input`.
pub const FACET_COLUMNS: [&str; 2] = ["facet", "facet_spread"];

/// Writes the preferred inputs of units of layer `layer` ([`PREFER_COLUMNS`]; `input_size`
/// CSV columns `x0`, `x1`, … for the input); with `facets`, also the [`FACET_COLUMNS`].
/// JSON adds the search settings in `extra`.
pub fn write_prefer(
    format: Format,
    w: &mut dyn Write,
    layer: &str,
    input_size: usize,
    found: &[Preferred],
    facets: bool,
    extra: &[(&str, Cell)],
) -> std::io::Result<()> {
    let mut columns = owned(&PREFER_COLUMNS);
    if facets {
        columns.insert(2, FACET_COLUMNS[0].to_string());
        let at = columns.len() - 1;
        columns.insert(at, FACET_COLUMNS[1].to_string());
    }
    let mut csv_header: Vec<String> = columns[..columns.len() - 1].to_vec();
    csv_header.extend((0..input_size).map(|i| format!("x{i}")));
    let mut t = TableWriter::begin(format, w, columns, csv_header)?;
    for p in found {
        let mut cells = vec![
            Cell::from(layer),
            Cell::from(p.unit),
            Cell::F32(p.preactivation),
            Cell::F32(p.activation),
            Cell::from(p.steps),
        ];
        if facets {
            cells.insert(2, Cell::from(p.facet));
            cells.push(Cell::F32(p.spread));
        }
        cells.push(Cell::F32s(p.input.clone()));
        t.row(&cells)?;
    }
    t.finish(extra)
}

/// The columns of the attribution table (`receptor attribute`), in order.
pub const ATTRIBUTE_COLUMNS: [&str; 5] = ["input", "name", "value", "baseline", "attribution"];

/// Writes integrated gradients: one row per input ([`ATTRIBUTE_COLUMNS`]); JSON adds
/// `extra` (the unit, the sample's row, z at both ends, the sum and its gap).
pub fn write_attribute(
    format: Format,
    w: &mut dyn Write,
    input: &InputSpec,
    sample: &[f32],
    baseline: &[f32],
    a: &Attribution,
    extra: &[(&str, Cell)],
) -> std::io::Result<()> {
    let columns = owned(&ATTRIBUTE_COLUMNS);
    let mut t = TableWriter::begin(format, w, columns.clone(), columns)?;
    for (i, ((x, b), v)) in sample.iter().zip(baseline).zip(&a.values).enumerate() {
        t.row(&[
            Cell::from(i),
            Cell::from(input.feature_name(i)),
            Cell::F32(*x),
            Cell::F32(*b),
            Cell::F32(*v),
        ])?;
    }
    t.finish(extra)
}

/// Writes the theoretical receptive field of every layer ([`FIELDS_COLUMNS`]); `jump_h`
/// and `jump_w` are empty in CSV and null in JSON for a layer with a vector output (it
/// sees the whole input).
pub fn write_fields(
    format: Format,
    w: &mut dyn Write,
    fields: &[crate::analysis::fields::Field],
) -> std::io::Result<()> {
    let columns = owned(&FIELDS_COLUMNS);
    let mut t = TableWriter::begin(format, w, columns.clone(), columns)?;
    for f in fields {
        let jump = |a: usize| Cell::OptUInt(f.jump.map(|j| j[a] as u64));
        t.row(&[
            Cell::from(f.layer.as_str()),
            Cell::from(f.kind),
            Cell::from(f.out_channels),
            Cell::from(f.out_height),
            Cell::from(f.out_width),
            Cell::from(f.rf[0]),
            Cell::from(f.rf[1]),
            jump(0),
            jump(1),
            Cell::F64(f.start[0]),
            Cell::F64(f.start[1]),
        ])?;
    }
    t.finish(&[])
}

/// The columns of the per-unit timeline table (`receptor timeline`, the default), in order.
pub const TIMELINE_UNIT_COLUMNS: [&str; 7] = [
    "layer",
    "unit",
    "first_dead_proven",
    "first_dead_on_probe",
    "last_status",
    "drift",
    "final_l2",
];

/// The columns of the per-checkpoint timeline table (`receptor timeline --per checkpoint`),
/// in order; [`TIMELINE_ACCURACY_COLUMN`] follows with a labelled probe.
pub const TIMELINE_CHECKPOINT_COLUMNS: [&str; 9] = [
    "step",
    "layer",
    "units",
    "dead_proven",
    "dead_on_probe",
    "rarely_active",
    "mean_hoyer",
    "near_zero_frac",
    "mean_abs_update",
];

/// The last column of the per-checkpoint timeline table with a labelled probe.
pub const TIMELINE_ACCURACY_COLUMN: &str = "accuracy";

/// Which timeline table is the main one (CSV holds one table; JSON holds both).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, clap::ValueEnum)]
pub enum TimelineTable {
    /// One row per unit ([`TIMELINE_UNIT_COLUMNS`]).
    #[default]
    Unit,
    /// One row per checkpoint and layer ([`TIMELINE_CHECKPOINT_COLUMNS`]).
    Checkpoint,
}

/// The per-checkpoint columns for a timeline with or without a labelled probe.
pub fn timeline_checkpoint_columns(labelled: bool) -> Vec<String> {
    let mut c = owned(&TIMELINE_CHECKPOINT_COLUMNS);
    if labelled {
        c.push(TIMELINE_ACCURACY_COLUMN.to_string());
    }
    c
}

/// One per-unit row's cells ([`TIMELINE_UNIT_COLUMNS`]); a missing first step is an empty
/// CSV field and JSON `null`.
pub fn timeline_unit_cells(u: &UnitTimeline) -> Vec<Cell> {
    vec![
        Cell::from(u.layer.as_str()),
        Cell::from(u.unit),
        Cell::OptUInt(u.first_dead_proven),
        Cell::OptUInt(u.first_dead_on_probe),
        Cell::from(u.last_status.as_str()),
        Cell::F64(u.drift),
        Cell::F64(u.final_l2),
    ]
}

/// One per-checkpoint row's cells ([`timeline_checkpoint_columns`]); `mean_abs_update` is
/// empty (CSV) / `null` (JSON) for the first checkpoint.
pub fn timeline_checkpoint_cells(r: &CheckpointLayer, labelled: bool) -> Vec<Cell> {
    let mut cells = vec![
        Cell::UInt(r.step),
        Cell::from(r.layer.as_str()),
        Cell::from(r.units),
        Cell::from(r.dead_proven),
        Cell::from(r.dead_on_probe),
        Cell::from(r.rarely_active),
        Cell::F64(r.mean_hoyer),
        Cell::F64(r.near_zero_frac),
        Cell::OptF64(r.mean_abs_update),
    ];
    if labelled {
        cells.push(Cell::OptF64(r.accuracy));
    }
    cells
}

/// Writes a timeline: the `main` table as rows; in JSON, the other table follows under
/// `"checkpoints"` (per checkpoint and layer) or `"units"` (per unit), then `extra`.
/// `key_name` (`"step"` or `"position"`) says what the `step` column holds and is written
/// as the JSON key `"key"`.
pub fn write_timeline(
    format: Format,
    w: &mut dyn Write,
    t: &Timeline,
    main: TimelineTable,
    key_name: &str,
    extra: &[(&str, Cell)],
) -> std::io::Result<()> {
    let labelled = t.labelled();
    let unit_columns = owned(&TIMELINE_UNIT_COLUMNS);
    let checkpoint_columns = timeline_checkpoint_columns(labelled);
    let objects = |columns: &[String], rows: Vec<Vec<Cell>>| {
        Cell::Objects(
            rows.into_iter()
                .map(|cells| columns.iter().cloned().zip(cells).collect())
                .collect(),
        )
    };
    let mut keys: Vec<(&str, Cell)> = vec![("key", Cell::from(key_name))];
    match main {
        TimelineTable::Unit => {
            let mut tw = TableWriter::begin(format, w, unit_columns.clone(), unit_columns.clone())?;
            for u in &t.units {
                tw.row(&timeline_unit_cells(u))?;
            }
            if format == Format::Json {
                let rows = t
                    .checkpoints
                    .iter()
                    .map(|r| timeline_checkpoint_cells(r, labelled))
                    .collect();
                keys.push(("checkpoints", objects(&checkpoint_columns, rows)));
            }
            keys.extend(extra.iter().cloned());
            tw.finish(&keys)
        }
        TimelineTable::Checkpoint => {
            let mut tw = TableWriter::begin(
                format,
                w,
                checkpoint_columns.clone(),
                checkpoint_columns.clone(),
            )?;
            for r in &t.checkpoints {
                tw.row(&timeline_checkpoint_cells(r, labelled))?;
            }
            if format == Format::Json {
                let rows = t.units.iter().map(timeline_unit_cells).collect();
                keys.push(("units", objects(&unit_columns, rows)));
            }
            keys.extend(extra.iter().cloned());
            tw.finish(&keys)
        }
    }
}
