//! The convolution views: how convolutional layers appear in the layer list (map sizes and
//! receptive field), their tiles in the unit grid (first-layer filters; deeper channels'
//! preferred inputs cropped to the receptive field), and the detail of one channel: its
//! filter, its preferred input with the receptive-field box on the whole input, its
//! effective receptive field, its feature map on a chosen probe sample, and the probe
//! samples that drive it hardest shown as the receptive-field patch around their most
//! active position.
//!
//! A "unit" of a convolutional layer is one channel; a preferred input is searched for the
//! channel's pre-activation at the centre of its map, the position whose receptive field
//! is drawn. Every picture comes from `report::filters` / `report::picture`.

use super::maps;
use super::state::{AppState, Selection};
use super::thumbs::{ConvPic, ThumbKey, ThumbKind, Thumbs};
use crate::analysis::fields::{Field, receptive_fields};
use crate::model::{LayerKind, Network, Shape};
use crate::report::colour::symmetric_max;
use crate::report::filters;
use crate::report::format;
use crate::report::picture::Picture;
use egui::{Color32, Rect, Sense, pos2, vec2};

/// Side of a picture in the detail panel, in points.
const BIG: f32 = 150.0;
/// Side of a strongest-sample patch, in points.
const PATCH: f32 = 64.0;

/// How the layer list shows one layer.
#[derive(Debug, Clone, PartialEq)]
pub struct LayerEntry {
    /// The selectable title (or, for pooling and flatten, the plain line).
    pub title: String,
    /// Small lines under the title.
    pub lines: Vec<String>,
    /// False for layers without units of their own (pooling, flatten).
    pub selectable: bool,
}

/// `kh × kw` or one number when square.
fn pair(p: [usize; 2]) -> String {
    if p[0] == p[1] {
        format!("{}", p[0])
    } else {
        format!("{}×{}", p[0], p[1])
    }
}

/// The layer list entry of a convolution, pooling or flatten layer; `None` for a dense
/// layer (the list draws those as before).
pub fn layer_entry(net: &Network, fields: &[Field], i: usize) -> Option<LayerEntry> {
    let l = net.layers().get(i)?;
    let f = fields.get(i)?;
    let map = format!("{} × {} maps", f.out_height, f.out_width);
    let rf = format!("receptive field {} × {}", f.rf[0], f.rf[1]);
    match l.kind {
        LayerKind::Dense => None,
        LayerKind::Conv2d(c) => Some(LayerEntry {
            title: format!(
                "{}  ·  conv {}×{}  ·  {} channels  ·  {}",
                l.name,
                c.kernel[0],
                c.kernel[1],
                l.units(),
                l.activation.name()
            ),
            lines: vec![format!(
                "{map} · {rf} · stride {} · padding {}",
                pair(c.stride),
                pair(c.padding)
            )],
            selectable: true,
        }),
        LayerKind::MaxPool2d(p) | LayerKind::AvgPool2d(p) => Some(LayerEntry {
            title: format!(
                "{}  ·  {} pool {}×{}",
                l.name,
                if matches!(l.kind, LayerKind::MaxPool2d(_)) {
                    "max"
                } else {
                    "average"
                },
                p.kernel[0],
                p.kernel[1]
            ),
            lines: vec![format!("{} channels · {map} · {rf}", f.out_channels)],
            selectable: false,
        }),
        LayerKind::Flatten => Some(LayerEntry {
            title: format!("{}  ·  flatten", l.name),
            lines: vec![format!("{} values", f.out_channels)],
            selectable: false,
        }),
    }
}

/// The receptive fields of `net`, for the layer list.
pub fn fields_of(net: &Network) -> Vec<Field> {
    receptive_fields(net)
}

/// The grid's note on what its tiles show, for a convolutional layer.
pub fn tiles_caption(net: &Network, layer: usize) -> Option<&'static str> {
    let LayerKind::Conv2d(c) = net.layers().get(layer)?.kind else {
        return None;
    };
    Some(if layer > 0 {
        "Tiles: preferred inputs, cropped to the receptive field of the map centre"
    } else if c.in_channels == 3 {
        "Tiles: filters in colour (0.5 + w / 2 max|w|, per filter)"
    } else {
        "Tiles: filters (signed weights, one panel per input channel)"
    })
}

/// The input pixels of the receptive field of `layer`'s unit at `position` (default: the
/// centre of its map, where the preferred-input search looks).
fn centre_region(
    net: &Network,
    layer: usize,
    position: Option<(usize, usize)>,
) -> Option<(std::ops::Range<usize>, std::ops::Range<usize>)> {
    let (h, w) = image_side(net)?;
    let fields = receptive_fields(net);
    let f = fields.get(layer)?;
    let pos = position.unwrap_or_else(|| net.output_shape(layer).centre());
    Some(f.region(pos, (h, w)))
}

/// Height and width of an image input.
fn image_side(net: &Network) -> Option<(usize, usize)> {
    match net.input_shape() {
        Shape::Map { height, width, .. } => Some((height, width)),
        Shape::Vector(_) => None,
    }
}

/// The picture of a filter: a colour picture for a three-channel first layer, else the
/// signed panels on the layer's shared scale.
fn filter_picture(net: &Network, layer: usize, unit: usize, colour: bool) -> Option<Picture> {
    let l = net.layers().get(layer)?;
    let LayerKind::Conv2d(c) = l.kind else {
        return None;
    };
    let w = l.weights.row(unit).to_vec();
    Some(if colour && c.in_channels == 3 {
        filters::filter_colour(&w, c.kernel)
    } else {
        let scale = l.weights.as_slice().map_or(1.0, symmetric_max);
        filters::filter_panels(&w, c.in_channels, c.kernel, scale)
    })
}

/// The tile of a convolutional channel: `None` for other layers (the grid draws those),
/// `Some(None)` while its picture is not there yet.
pub fn tile_texture(
    ctx: &egui::Context,
    state: &AppState,
    thumbs: &mut Thumbs,
    net: &Network,
    layer: usize,
    unit: usize,
) -> Option<Option<egui::TextureHandle>> {
    if !matches!(net.layers().get(layer)?.kind, LayerKind::Conv2d(_)) {
        return None;
    }
    let key = |pic| ThumbKey {
        layer,
        unit,
        kind: ThumbKind::Conv(pic),
    };
    if layer == 0 {
        return Some(thumbs.get(ctx, key(ConvPic::Filter), true, || {
            filter_picture(net, layer, unit, true).map(|p| maps::to_color_image(&p))
        }));
    }
    let Some(pref) = state
        .preferred_of(layer, unit)
        .filter(|p| p.input.len() == net.input().size)
    else {
        return Some(None);
    };
    let input = pref.input.clone();
    let position = pref.position;
    Some(thumbs.get(ctx, key(ConvPic::PreferredCrop), true, || {
        let (rows, cols) = centre_region(net, layer, position)?;
        let p = filters::input_crop(net.input(), &input, rows, cols);
        Some(maps::to_color_image(&p))
    }))
}

/// Draws a texture scaled to fit `side` points (keeping its aspect), labelled for screen
/// readers and tests, with `hover` as its tooltip.
fn picture_ui(
    ui: &mut egui::Ui,
    tex: Option<egui::TextureHandle>,
    side: f32,
    label: &str,
    hover: &str,
) {
    let Some(t) = tex else {
        ui.weak("…");
        return;
    };
    let size = t.size_vec2();
    let s = side / size.x.max(size.y).max(1.0);
    let (r, resp) = ui.allocate_exact_size(size * s, Sense::hover());
    ui.painter().image(
        t.id(),
        r,
        Rect::from_min_max(pos2(0.0, 0.0), pos2(1.0, 1.0)),
        Color32::WHITE,
    );
    resp.widget_info(|| egui::WidgetInfo::labeled(egui::Role::Image, true, label));
    if !hover.is_empty() {
        resp.on_hover_text(hover);
    }
}

/// The detail of a convolutional channel (see the module documentation).
pub fn detail_ui(
    ui: &mut egui::Ui,
    state: &mut AppState,
    thumbs: &mut Thumbs,
    net: &Network,
    sel: Selection,
) {
    let l = &net.layers()[sel.layer];
    let LayerKind::Conv2d(c) = l.kind else {
        return;
    };
    let fields = receptive_fields(net);
    let f = &fields[sel.layer];
    let shape = net.output_shape(sel.layer);
    let centre = shape.centre();
    ui.heading(format!("Channel {} of layer {}", sel.unit, l.name));
    if let Some(s) = state.screen_of(sel.layer, sel.unit) {
        ui.label(super::state::status_words(s.status));
    }
    ui.label(format!(
        "conv {}×{}, stride {}, padding {}, {} input channels · {} × {} map · receptive field {} × {} input pixels{}",
        c.kernel[0],
        c.kernel[1],
        pair(c.stride),
        pair(c.padding),
        c.in_channels,
        f.out_height,
        f.out_width,
        f.rf[0],
        f.rf[1],
        f.jump
            .map_or(String::new(), |j| format!(", {} apart", pair(j)))
    ));
    ui.add_space(6.0);
    let key = |pic| ThumbKey {
        layer: sel.layer,
        unit: sel.unit,
        kind: ThumbKind::Conv(pic),
    };
    let ctx = ui.ctx().clone();
    let name = format!("{} channel {}", l.name, sel.unit);

    ui.strong("Filter");
    ui.horizontal(|ui| {
        if c.in_channels == 3 {
            let colour = thumbs.get(&ctx, key(ConvPic::Filter), false, || {
                filter_picture(net, sel.layer, sel.unit, true).map(|p| maps::to_color_image(&p))
            });
            picture_ui(
                ui,
                colour,
                90.0,
                &format!("filter of {name} in colour"),
                "Colour picture normalised per filter: each channel 0.5 + w / (2 max|w|); mid grey is zero weight",
            );
        }
        let panels = thumbs.get(&ctx, key(ConvPic::FilterPanels), false, || {
            filter_picture(net, sel.layer, sel.unit, false).map(|p| maps::to_color_image(&p))
        });
        picture_ui(
            ui,
            panels,
            if c.in_channels == 3 { 200.0 } else { BIG },
            &format!("filter of {name}"),
            "Signed weights through the colour key, one panel per input channel, on the layer's shared scale",
        );
    });
    ui.weak(if c.in_channels == 3 {
        "Left: colour (normalised per filter). Right: red, green and blue weights, signed."
    } else {
        "Signed weights, one panel per input channel (left to right, then down)."
    });
    ui.add_space(6.0);

    ui.strong(format!(
        "Preferred input at the map centre ({}, {})",
        centre.0, centre.1
    ));
    match (state.preferred_of(sel.layer, sel.unit), image_side(net)) {
        (Some(p), _) if p.input.len() != net.input().size => {
            ui.weak("Not available: the search gave no input of the model's size.");
        }
        (Some(p), Some(_)) => {
            let input = p.input.clone();
            let value = p.preactivation;
            let position = p.position;
            let tex = thumbs.get(&ctx, key(ConvPic::PreferredBox), false, || {
                let (rows, cols) = centre_region(net, sel.layer, position)?;
                let pic = filters::input_with_box(net.input(), &input, rows, cols, 4);
                Some(maps::to_color_image(&pic))
            });
            picture_ui(
                ui,
                tex,
                BIG,
                &format!("preferred input of {name}"),
                &format!(
                    "The whole preferred input; the yellow box is the receptive field of the centre position. Pre-activation z = {}",
                    format::sig32(value, 4)
                ),
            );
        }
        _ => {
            ui.weak("Searching…");
        }
    }
    ui.add_space(6.0);

    ui.strong("Effective receptive field");
    match state
        .results
        .conv
        .erf
        .get(&(sel.layer, sel.unit))
        .and_then(|s| s.ready())
    {
        Some(erf) => {
            let tex = thumbs.get(&ctx, key(ConvPic::Erf), false, || {
                Some(maps::to_color_image(
                    &filters::erf_map(net.input(), &erf).zoomed(4, 4),
                ))
            });
            picture_ui(
                ui,
                tex,
                BIG,
                &format!("effective receptive field of {name}"),
                "Mean |gradient| of the centre pre-activation over the reference data (Luo et al. 2016), channels summed, scaled to its largest value",
            );
        }
        None => {
            ui.weak("Computing over the reference data…");
        }
    }
    ui.add_space(6.0);

    feature_map_ui(ui, state, thumbs, net, sel, shape);
    ui.add_space(6.0);
    strongest_ui(ui, state, thumbs, net, sel, f);
}

/// The channel's feature map on the chosen probe sample, beside the sample.
fn feature_map_ui(
    ui: &mut egui::Ui,
    state: &mut AppState,
    thumbs: &mut Thumbs,
    net: &Network,
    sel: Selection,
    shape: Shape,
) {
    let Some(probe) = state.probe.clone() else {
        return;
    };
    let rows = probe.data.inputs.nrows();
    if rows == 0 {
        return;
    }
    ui.horizontal(|ui| {
        ui.strong("Feature map on reference sample");
        let label = ui.label("Sample");
        let mut row = state.conv_sample.min(rows - 1);
        ui.add(egui::DragValue::new(&mut row).range(0..=rows - 1))
            .labelled_by(label.id);
        state.conv_sample = row;
    });
    let row = state.conv_sample;
    let Shape::Map { height, width, .. } = shape else {
        return;
    };
    let ctx = ui.ctx().clone();
    let name = format!("{} channel {}", net.layers()[sel.layer].name, sel.unit);
    ui.horizontal(|ui| {
        let sample = thumbs.get(
            &ctx,
            ThumbKey {
                layer: 0,
                unit: 0,
                kind: ThumbKind::Sample(row),
            },
            false,
            || {
                let x = probe.data.inputs.row(row).to_vec();
                Some(maps::input_picture(net.input(), &x))
            },
        );
        picture_ui(ui, sample, 100.0, &format!("reference sample {row}"), "");
        match state
            .results
            .conv
            .maps
            .get(&(sel.layer, row))
            .and_then(|s| s.ready())
        {
            Some(all) => {
                let n = height * width;
                let from = sel.unit * n;
                let values = all.get(from..from + n).unwrap_or(&[]).to_vec();
                let scale = symmetric_max(&values);
                let tex = thumbs.get(
                    &ctx,
                    ThumbKey {
                        layer: sel.layer,
                        unit: sel.unit,
                        kind: ThumbKind::Conv(ConvPic::FeatureMap(row)),
                    },
                    false,
                    || {
                        let p = filters::signed_map(&values, height, width, scale);
                        Some(maps::to_color_image(&p))
                    },
                );
                picture_ui(
                    ui,
                    tex,
                    100.0,
                    &format!("feature map of {name} on sample {row}"),
                    &format!(
                        "Pre-activation z at every map position, signed, |z| up to {} at the key's ends",
                        format::sig32(scale, 3)
                    ),
                );
            }
            None => {
                ui.weak("…");
            }
        }
    });
}

/// The probe samples with the strongest response of the channel, each as the
/// receptive-field patch around its most active position.
fn strongest_ui(
    ui: &mut egui::Ui,
    state: &AppState,
    thumbs: &mut Thumbs,
    net: &Network,
    sel: Selection,
    f: &Field,
) {
    ui.strong(
        "Reference samples that drive it hardest (receptive-field patch at the strongest position)",
    );
    let (Some(tops), Some(probe)) = (
        state
            .results
            .conv
            .tops
            .get(&sel.layer)
            .and_then(|s| s.ready()),
        state.probe.as_ref(),
    ) else {
        ui.weak("Scanning the reference data…");
        return;
    };
    let Some(hits) = tops.channels.get(sel.unit) else {
        return;
    };
    let Some((h, w)) = image_side(net) else {
        return;
    };
    let labels = probe.data.labels.as_ref();
    let names = net.output_names();
    let ctx = ui.ctx().clone();
    egui::Grid::new(("conv-top", sel.layer, sel.unit))
        .num_columns(4)
        .spacing(vec2(8.0, 8.0))
        .show(ui, |ui| {
            for (k, hit) in hits.iter().enumerate() {
                ui.vertical(|ui| {
                    ui.set_width(PATCH + 12.0);
                    let (rows, cols) = f.region(hit.position, (h, w));
                    let tex = thumbs.get(
                        &ctx,
                        ThumbKey {
                            layer: sel.layer,
                            unit: sel.unit,
                            kind: ThumbKind::Conv(ConvPic::Hit(hit.row)),
                        },
                        false,
                        || {
                            let x = probe.data.inputs.row(hit.row).to_vec();
                            let p = filters::input_crop(net.input(), &x, rows, cols);
                            Some(maps::to_color_image(&p))
                        },
                    );
                    picture_ui(
                        ui,
                        tex,
                        PATCH,
                        &format!(
                            "patch of sample {} for {} channel {}",
                            hit.row,
                            net.layers()[sel.layer].name,
                            sel.unit
                        ),
                        &format!(
                            "reference row {} at map position ({}, {}): pre-activation z = {}",
                            hit.row,
                            hit.position.0,
                            hit.position.1,
                            format::sig32(hit.value, 4)
                        ),
                    );
                    let small = |ui: &mut egui::Ui, text: String| {
                        ui.add(egui::Label::new(egui::RichText::new(text).small()).truncate());
                    };
                    small(
                        ui,
                        format!(
                            "row {} at ({}, {})",
                            hit.row, hit.position.0, hit.position.1
                        ),
                    );
                    if let Some(c) = labels
                        .and_then(|l| l.get(hit.row))
                        .and_then(|c| names.get(*c))
                    {
                        small(ui, c.clone());
                    }
                    small(
                        ui,
                        format!("pre-activation {}", format::sig32(hit.value, 3)),
                    );
                });
                if k % 4 == 3 {
                    ui.end_row();
                }
            }
        });
}
