//! The convolution views' work: what they ask the worker for (the strongest probe samples
//! of a layer's channels, a channel's effective receptive field, one sample's feature
//! maps), how the worker runs it (plain calls into `analysis::channels` and
//! `analysis::fields`) and where the replies go (the `conv` part of the results cache).

use super::ReceptorApp;
use super::state::{Slot, Tag};
use super::worker::Job;
use crate::analysis::Progress;
use crate::analysis::channels::{TopHits, feature_maps, top_hits};
use crate::analysis::fields::effective_receptive_field;
use crate::error::Result;
use crate::model::{LayerKind, Network};
use crate::probe::ProbeData;
use std::collections::HashMap;
use std::sync::Arc;

/// Probe samples kept per channel for the detail panel.
pub const TOP_SAMPLES: usize = 8;

/// Convolution results of the open model and probe (all depend on the probe).
#[derive(Debug, Default)]
pub struct ConvResults {
    /// The strongest samples of every channel, per layer.
    pub tops: HashMap<usize, Slot<Arc<TopHits>>>,
    /// Effective receptive fields `[input size]`, per (layer, channel).
    pub erf: HashMap<(usize, usize), Slot<Arc<Vec<f32>>>>,
    /// Pre-activations `[channels x height x width]` of one probe sample, per (layer, row).
    pub maps: HashMap<(usize, usize), Slot<Arc<Vec<f32>>>>,
}

impl ConvResults {
    /// Every slot that is not there yet becomes not-asked-for (after a cancel, or before
    /// "Run again").
    pub fn forget_unfinished(&mut self) {
        self.tops.retain(|_, s| s.is_ready());
        self.erf.retain(|_, s| s.is_ready());
        self.maps.retain(|_, s| s.is_ready());
    }
}

/// Work of the convolution views for the worker.
#[derive(Debug, Clone)]
pub enum ConvJob {
    /// [`top_hits`] of every channel of `layer` on the probe.
    Tops {
        /// Layer index.
        layer: usize,
        /// The probe.
        data: Arc<ProbeData>,
    },
    /// [`effective_receptive_field`] of one channel over the probe.
    Erf {
        /// Layer index.
        layer: usize,
        /// Channel.
        channel: usize,
        /// The probe.
        data: Arc<ProbeData>,
    },
    /// [`feature_maps`] of layer `layer` on probe row `row`.
    Maps {
        /// Layer index.
        layer: usize,
        /// Probe row.
        row: usize,
        /// The probe.
        data: Arc<ProbeData>,
    },
}

/// A finished [`ConvJob`].
#[derive(Debug)]
pub enum ConvReply {
    /// See [`ConvJob::Tops`].
    Tops(usize, Result<Arc<TopHits>>),
    /// See [`ConvJob::Erf`].
    Erf((usize, usize), Result<Arc<Vec<f32>>>),
    /// See [`ConvJob::Maps`].
    Maps((usize, usize), Result<Arc<Vec<f32>>>),
}

impl ConvJob {
    /// What the job does, for the status bar.
    pub fn title(&self, net: &Network) -> String {
        let name = |l: usize| {
            net.layers()
                .get(l)
                .map_or("?", |x| x.name.as_str())
                .to_string()
        };
        match self {
            ConvJob::Tops { layer, .. } => {
                format!(
                    "Finding the strongest reference samples of layer {}",
                    name(*layer)
                )
            }
            ConvJob::Erf { layer, channel, .. } => format!(
                "Effective receptive field of {} channel {channel}",
                name(*layer)
            ),
            ConvJob::Maps { layer, row, .. } => {
                format!("Feature maps of layer {} on sample {row}", name(*layer))
            }
        }
    }

    /// Runs the job (a call into the core). A cancelled job gives its `Cancelled` error.
    pub fn run(&self, net: &Network, progress: &dyn Progress) -> ConvReply {
        match self {
            ConvJob::Tops { layer, data } => ConvReply::Tops(
                *layer,
                top_hits(net, *layer, data.inputs.view(), TOP_SAMPLES, progress).map(Arc::new),
            ),
            ConvJob::Erf {
                layer,
                channel,
                data,
            } => ConvReply::Erf(
                (*layer, *channel),
                effective_receptive_field(net, *layer, *channel, data.inputs.view(), progress)
                    .map(Arc::new),
            ),
            ConvJob::Maps { layer, row, data } => {
                let x = data.inputs.row(*row).to_vec();
                ConvReply::Maps((*layer, *row), feature_maps(net, *layer, &x).map(Arc::new))
            }
        }
    }

    /// True when the job was cancelled before it finished (nothing worth storing).
    pub fn was_cancelled(reply: &ConvReply) -> bool {
        use crate::error::Error::Cancelled;
        matches!(
            reply,
            ConvReply::Tops(_, Err(Cancelled))
                | ConvReply::Erf(_, Err(Cancelled))
                | ConvReply::Maps(_, Err(Cancelled))
        )
    }
}

impl ReceptorApp {
    /// Queues what the convolution views of the selected channel need: its layer's
    /// strongest samples, its effective receptive field and the chosen sample's maps.
    pub(super) fn request_conv(&mut self, net: &Arc<Network>, tag: Tag) {
        let Some(sel) = self.state.selection else {
            return;
        };
        let Some(layer) = net.layers().get(sel.layer) else {
            return;
        };
        if !matches!(layer.kind, LayerKind::Conv2d(_)) || sel.unit >= layer.units() {
            return;
        }
        let Some(p) = &self.state.probe else {
            return;
        };
        let data = p.data.clone();
        let rows = data.inputs.nrows();
        let conv = &mut self.state.results.conv;
        let mut jobs = Vec::new();
        let tops = conv.tops.entry(sel.layer).or_default();
        if tops.is_empty() {
            tops.request();
            jobs.push(ConvJob::Tops {
                layer: sel.layer,
                data: data.clone(),
            });
        }
        let erf = conv.erf.entry((sel.layer, sel.unit)).or_default();
        if erf.is_empty() && rows > 0 {
            erf.request();
            jobs.push(ConvJob::Erf {
                layer: sel.layer,
                channel: sel.unit,
                data: data.clone(),
            });
        }
        let row = self.state.conv_sample.min(rows.saturating_sub(1));
        let maps = conv.maps.entry((sel.layer, row)).or_default();
        if maps.is_empty() && rows > 0 {
            maps.request();
            jobs.push(ConvJob::Maps {
                layer: sel.layer,
                row,
                data,
            });
        }
        for job in jobs {
            self.worker.submit(Job::Conv(job), net.clone(), tag);
        }
    }

    /// Stores a convolution result computed for the current model and probe.
    pub(super) fn on_conv_reply(&mut self, tag: Tag, reply: ConvReply) {
        if !self.state.results.is_current(tag) {
            return;
        }
        let conv = &mut self.state.results.conv;
        let failed = match reply {
            ConvReply::Tops(layer, r) => conv
                .tops
                .entry(layer)
                .or_default()
                .settle(r, "strongest samples"),
            ConvReply::Erf(key, r) => conv
                .erf
                .entry(key)
                .or_default()
                .settle(r, "effective receptive field"),
            ConvReply::Maps(key, r) => conv.maps.entry(key).or_default().settle(r, "feature maps"),
        };
        if let Some(text) = failed {
            self.state.fail(text);
        }
    }
}
