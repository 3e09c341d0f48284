//! `receptor prefer MODEL --layer NAME (--unit K | --all)`: the preferred input of a unit
//! (the input in the box that maximises its pre-activation), optionally drawn as a PNG.

use super::CommonArgs;
use crate::analysis::Silent;
use crate::analysis::fields::{crop, effective_receptive_field, receptive_fields};
use crate::analysis::prefer::{PreferOptions, Preferred, Reference, prefer_with};
use crate::error::Result;
use crate::model::Network;
use crate::probe::memory::read_probe;
use crate::report::picture;
use crate::report::table::{Cell, Stop, emit};
use crate::report::tables;
use clap::Args;
use std::path::PathBuf;
use std::process::ExitCode;

/// Arguments of `prefer`.
#[derive(Debug, Clone, Args)]
#[command(group = clap::ArgGroup::new("which").required(true).args(["unit", "all"]))]
pub struct PreferArgs {
    /// The model file (receptor-model/1 or /2 JSON).
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

    /// Convolutional layers: maximise the channel at this map position (row, column, from
    /// 0) instead of at the centre of its map.
    #[arg(long, value_name = "ROW,COL", value_parser = parse_position)]
    pub position: Option<(usize, usize)>,

    /// Also compute each unit's effective receptive field over this probe (.csv or .npy):
    /// the mean |gradient| of the unit's pre-activation (a channel's at the centre of its
    /// map) with respect to the input (Luo et al. 2016). JSON output only: key "erf".
    #[arg(long, value_name = "DATA")]
    pub erf_probe: Option<PathBuf>,

    /// Reference data (CSV or .npy, like a probe): the search also starts from each unit's
    /// top-activating samples, and a data prior keeps the preferred input near the data
    /// (its mean and Ledoit-Wolf covariance; see --prior-weight).
    #[arg(long, value_name = "DATA")]
    pub prior: Option<PathBuf>,

    /// Weight W of the data prior: the search maximises z - W s (x - mean)^T Sigma^-1
    /// (x - mean) / n, s the spread of the unit's z over the data (0: data starts only).
    /// Needs --prior.
    #[arg(
        long,
        allow_negative_numbers = true,
        value_name = "W",
        requires = "prior",
        default_value_t = PreferOptions::default().prior_weight()
    )]
    pub prior_weight: f32,

    /// K distinct preferred inputs per unit (facets), each from its own cluster of the
    /// unit's top-activating samples and pushed apart from the others; adds the columns
    /// `facet` and `facet_spread` (the facets' mean pairwise distance in box widths).
    #[arg(long, value_name = "K")]
    pub facets: Option<usize>,

    /// Also draw the preferred input(s) as a PNG image (on a convolutional layer cropped to
    /// the receptive field of the chosen position): black is the low end of the input
    /// box, white the high end (mid grey is its centre); a grid of tiles for --all; a
    /// vector layout is drawn as one strip per unit; yellow marks a non-finite value. Each
    /// tile carries its unit index, and the grey key with the box's ends is drawn below. The
    /// app's export of a layer's grid draws the same picture.
    #[arg(long, value_name = "FILE")]
    pub png: Option<PathBuf>,

    /// Output and loading options shared by every command.
    #[command(flatten)]
    pub common: CommonArgs,
}

/// Runs `prefer`.
pub fn run(args: &PreferArgs) -> Result<ExitCode> {
    // The options are checked when they are made, the unit and the layout by the search.
    let opts = PreferOptions::new(args.steps, args.restarts, args.seed, args.l2, args.tv)?
        .with_prior_weight(args.prior_weight)?
        .with_facets(args.facets.unwrap_or(1))?
        .with_position(args.position);
    let net = args.common.load(&args.model)?;
    let reference = match &args.prior {
        Some(path) => {
            let data = read_probe(&net, Some(path))?;
            Some(Reference::new(&net, &data)?)
        }
        None => None,
    };
    let layer = net.require_layer(&args.layer)?;
    let units: Vec<usize> = match args.unit {
        Some(k) => vec![k],
        None => (0..net.layers()[layer].units()).collect(),
    };
    let found = prefer_with(&net, layer, &units, &opts, reference.as_ref(), &Silent)?;
    for p in found.iter().filter(|p| !p.finite) {
        eprintln!(
            "receptor: warning: layer '{}' unit {}: the search produced a non-finite value (NaN in CSV, null in JSON)",
            args.layer, p.unit
        );
    }
    // The image is made before anything is written, so a failure leaves no partial output.
    let png = match &args.png {
        Some(_) => Some(render_png(&net, layer, &found)?),
        None => None,
    };
    let erf = match &args.erf_probe {
        Some(path) => {
            let mut source = crate::probe::open(path, &net)?;
            let data = crate::probe::read_all(source.as_mut())?;
            let mut maps = Vec::with_capacity(units.len());
            for &u in &units {
                let map = effective_receptive_field(&net, layer, u, data.inputs.view(), &Silent)?;
                maps.push(vec![
                    ("unit".to_string(), Cell::from(u)),
                    ("map".to_string(), Cell::F32s(map)),
                ]);
            }
            Some(maps)
        }
        None => None,
    };
    let field = found
        .first()
        .and_then(|p| p.position)
        .map(|pos| receptive_fields(&net)[layer].region(pos, input_hw(&net)));
    emit(&args.common.destination(), |w| {
        let mut extra = vec![
            ("seed", Cell::UInt(args.seed)),
            ("restarts", Cell::from(args.restarts)),
            ("l2", Cell::F32(args.l2)),
            ("tv", Cell::F32(args.tv)),
        ];
        if let (Some(pos), Some((rows, cols))) = (found.first().and_then(|p| p.position), &field) {
            extra.push((
                "position",
                Cell::Objects(vec![vec![
                    ("row".to_string(), Cell::from(pos.0)),
                    ("col".to_string(), Cell::from(pos.1)),
                ]]),
            ));
            extra.push((
                "receptive_field",
                Cell::Objects(vec![vec![
                    ("row_start".to_string(), Cell::from(rows.start)),
                    ("row_end".to_string(), Cell::from(rows.end)),
                    ("col_start".to_string(), Cell::from(cols.start)),
                    ("col_end".to_string(), Cell::from(cols.end)),
                ]]),
            ));
        }
        if let Some(maps) = &erf {
            extra.push(("erf", Cell::Objects(maps.clone())));
        }
        if let Some(r) = &reference {
            extra.push(("prior", Cell::from(r.origin())));
            extra.push(("prior_weight", Cell::F32(args.prior_weight)));
            extra.push(("prior_shrinkage", Cell::F64(r.prior().shrinkage)));
        }
        let size = net.input().size;
        let facets = args.facets.is_some();
        tables::write_prefer(
            args.common.format,
            w,
            &args.layer,
            size,
            &found,
            facets,
            &extra,
        )?;
        Ok::<(), Stop>(())
    })?;
    if let (Some(path), Some(bytes)) = (&args.png, png) {
        crate::atomic::write_bytes_atomic(path, &bytes)?;
    }
    Ok(ExitCode::SUCCESS)
}

/// Draws preferred inputs as a PNG image: the report layer's grid of preferred inputs
/// ([`picture::preferred_grid`]), the same pixels as the app's grid export.
///
/// Image layouts: one tile per unit (height x width, grey for one channel, colour for
/// three), tiles in a near-square grid in unit order, row by row, each under its unit index.
/// Vector layouts: one horizontal strip per unit, strips stacked top to bottom, the index
/// to the left. The grey key of the input box (low end, centre, high end) is drawn below.
/// On a convolutional layer each tile is cropped to the receptive field of the maximised
/// position ([`crate::analysis::fields::Field::region`]).
pub fn render_png(net: &Network, layer: usize, found: &[Preferred]) -> Result<Vec<u8>> {
    let units: Vec<usize> = found.iter().map(|p| p.unit).collect();
    if let Some(pos) = found.first().and_then(|p| p.position) {
        let (rows, cols) = receptive_fields(net)[layer].region(pos, input_hw(net));
        let crops: Vec<(crate::model::InputSpec, Vec<f32>)> = found
            .iter()
            .map(|p| crop(net.input(), &p.input, rows.clone(), cols.clone()))
            .collect();
        let Some(spec) = crops.first().map(|c| c.0.clone()) else {
            return picture::preferred_grid(net.input(), &[])?.png_bytes();
        };
        let inputs: Vec<Option<&[f32]>> = crops.iter().map(|c| Some(c.1.as_slice())).collect();
        return picture::preferred_grid_for(&spec, &inputs, &units)?.png_bytes();
    }
    let inputs: Vec<Option<&[f32]>> = found.iter().map(|p| Some(p.input.as_slice())).collect();
    picture::preferred_grid_for(net.input(), &inputs, &units)?.png_bytes()
}

/// The input image's `(height, width)`, `(1, size)` for a vector layout.
fn input_hw(net: &Network) -> (usize, usize) {
    match net.input().layout {
        crate::model::Layout::Image { height, width, .. } => (height, width),
        crate::model::Layout::Vector => (1, net.input().size),
    }
}

/// Parses `ROW,COL` (two whole numbers).
fn parse_position(s: &str) -> std::result::Result<(usize, usize), String> {
    let bad = || format!("expected ROW,COL (two whole numbers, e.g. 3,4), found \"{s}\"");
    let (r, c) = s.split_once(',').ok_or_else(bad)?;
    Ok((
        r.trim().parse().map_err(|_| bad())?,
        c.trim().parse().map_err(|_| bad())?,
    ))
}
