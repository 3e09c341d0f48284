//! The texture cache: every map is uploaded once and its handle kept, keyed by what it
//! shows; the whole cache is dropped when the model changes. Tiles are uploaded lazily, a
//! few per frame, so scrolling a 2048-unit grid never stalls a frame.

use std::collections::HashMap;

/// New tile textures per frame; the rest wait for the next frame.
const TILE_BUDGET: usize = 48;

/// What a texture shows (`bool`: scaled per layer rather than per unit).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum ThumbKind {
    /// Incoming weights in input layout (first layer).
    Weights(bool),
    /// Incoming weights as cells over the layer below (deeper layers).
    Cells(bool),
    /// Preferred input.
    Preferred,
    /// Sensitivity at the mean reference input.
    Sensitivity(bool),
    /// A probe sample (row index).
    Sample(usize),
    /// One facet of the preferred input (facet index).
    Facet(usize),
    /// Integrated gradients for a probe row, from the probe mean (true) or the box centre.
    Attribution(usize, bool),
    /// A picture of the convolution views.
    Conv(ConvPic),
}

/// The pictures of a convolutional channel (see `app/conv.rs`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum ConvPic {
    /// The filter as a tile (a colour picture for three input channels).
    Filter,
    /// The filter as signed panels, one per input channel.
    FilterPanels,
    /// The preferred input cropped to the receptive field of the map centre.
    PreferredCrop,
    /// The whole preferred input with the receptive-field box.
    PreferredBox,
    /// The effective receptive field (depends on the probe).
    Erf,
    /// The channel's feature map on a probe row (depends on the probe).
    FeatureMap(usize),
    /// The receptive-field patch of a probe row (depends on the probe).
    Hit(usize),
}

impl ConvPic {
    /// True for pictures computed from the probe.
    fn needs_probe(self) -> bool {
        matches!(
            self,
            ConvPic::Erf | ConvPic::FeatureMap(_) | ConvPic::Hit(_)
        )
    }

    /// True for pictures of the preferred input.
    fn needs_search(self) -> bool {
        matches!(self, ConvPic::PreferredCrop | ConvPic::PreferredBox)
    }
}

/// Key of one cached texture.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub struct ThumbKey {
    /// Layer index.
    pub layer: usize,
    /// Unit index (0 for samples).
    pub unit: usize,
    /// What it shows.
    pub kind: ThumbKind,
}

/// Cached textures of the open model.
#[derive(Default)]
pub struct Thumbs {
    tex: HashMap<ThumbKey, egui::TextureHandle>,
    budget: usize,
    deferred: bool,
}

impl Thumbs {
    /// Resets the per-frame upload budget.
    pub fn begin_frame(&mut self) {
        self.budget = TILE_BUDGET;
        self.deferred = false;
    }

    /// True when a tile was skipped this frame for lack of budget (ask for another frame).
    pub fn deferred(&self) -> bool {
        self.deferred
    }

    /// Drops every texture (the model changed).
    pub fn clear(&mut self) {
        self.tex.clear();
    }

    /// Drops textures that depend on the probe.
    pub fn clear_probe(&mut self) {
        // Preferred inputs may have used the old probe's data.
        self.tex.retain(|k, _| match k.kind {
            ThumbKind::Sensitivity(_)
            | ThumbKind::Sample(_)
            | ThumbKind::Preferred
            | ThumbKind::Facet(_)
            | ThumbKind::Attribution(..) => false,
            ThumbKind::Conv(p) => !p.needs_probe(),
            _ => true,
        });
    }

    /// Drops the preferred-input textures of one layer (searched again).
    pub fn clear_layer(&mut self, layer: usize) {
        self.tex.retain(|k, _| {
            k.layer != layer
                || match k.kind {
                    ThumbKind::Preferred | ThumbKind::Facet(_) => false,
                    ThumbKind::Conv(p) => !p.needs_search(),
                    _ => true,
                }
        });
    }

    /// The texture for `key`, made by `make` the first time. `tile` uploads count against the
    /// per-frame budget (and return `None` when it is spent); detail views always upload.
    pub fn get(
        &mut self,
        ctx: &egui::Context,
        key: ThumbKey,
        tile: bool,
        make: impl FnOnce() -> Option<egui::ColorImage>,
    ) -> Option<egui::TextureHandle> {
        if let Some(t) = self.tex.get(&key) {
            return Some(t.clone());
        }
        if tile {
            if self.budget == 0 {
                self.deferred = true;
                return None;
            }
            self.budget -= 1;
        }
        let img = make()?;
        let name = format!("{:?}", key);
        let t = ctx.load_texture(name, img, egui::TextureOptions::NEAREST);
        self.tex.insert(key, t.clone());
        Some(t)
    }
}
