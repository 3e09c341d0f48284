//! The analysis core: forward and backward passes, preferred inputs, sensitivity, sparsity
//! statistics and |w| histograms, per-unit activity over a probe, interval bounds,
//! screening for dead units, magnitude pruning, the timeline of a checkpoint series, and
//! the per-feature rows and optimum summaries the fronts show. Takes `&Network` and
//! arrays, never paths; nothing here depends on the GUI.

pub mod accuracy;
pub mod activity;
pub mod attribute;
pub mod bounds;
pub mod channels;
pub mod compact;
pub(crate) mod conv;
pub mod features;
pub mod fields;
pub mod forward;
pub mod gradient;
pub mod optimum;
pub mod prefer;
pub mod prune;
pub mod screen;
pub mod sparsity;
pub mod structured;
#[cfg(test)]
mod test_nets;
pub mod timeline;

/// Progress reporting and cancellation for long work.
///
/// The command line passes [`Silent`]; the app passes a reporter that forwards the fraction
/// to its status bar and reads its cancel button.
pub trait Progress: Sync {
    /// Work done so far, from 0 to 1.
    fn set(&self, fraction: f32);
    /// True once the user asked to stop; long loops check it and return
    /// [`crate::Error::Cancelled`].
    fn cancelled(&self) -> bool {
        false
    }
}

/// A [`Progress`] that reports nowhere and never cancels.
#[derive(Debug, Default, Clone, Copy)]
pub struct Silent;

impl Progress for Silent {
    fn set(&self, _fraction: f32) {}
}

/// Maps one step's own 0..1 progress into `lo..hi` of the whole job's, and passes the
/// cancel request through (for core functions that run several steps).
pub struct SubProgress<'a> {
    inner: &'a dyn Progress,
    lo: f32,
    hi: f32,
}

impl<'a> SubProgress<'a> {
    /// Reports `inner`'s fraction `lo + f x (hi - lo)` for this step's fraction `f`.
    pub fn new(inner: &'a dyn Progress, lo: f32, hi: f32) -> Self {
        SubProgress { inner, lo, hi }
    }
}

impl Progress for SubProgress<'_> {
    fn set(&self, fraction: f32) {
        self.inner
            .set(self.lo + fraction.clamp(0.0, 1.0) * (self.hi - self.lo));
    }

    fn cancelled(&self) -> bool {
        self.inner.cancelled()
    }
}
