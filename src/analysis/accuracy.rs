//! How well the model classifies labelled reference data: the confusion matrix (true class
//! by predicted class, the predicted class being the output unit with the largest finite
//! value), with the accuracy overall and per class read off it.

use super::forward::{argmax_rows, forward};
use crate::model::Network;
use ndarray::{ArrayView2, Axis};

/// Counts of (true class, predicted class) pairs over labelled samples.
///
/// `counts: [classes, classes]` row by row, the row the true class and the column the
/// predicted one; samples whose outputs have no finite value are counted in `no_prediction`
/// (per true class), and samples whose label is not a class of the model in `unknown_label`.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Confusion {
    classes: usize,
    counts: Vec<u64>,
    no_prediction: Vec<u64>,
    unknown_label: u64,
}

impl Confusion {
    /// Tallies `predicted[i]` (the argmax of sample `i`'s outputs, `None` when none is
    /// finite) against `labels[i]` over `classes` classes. The two slices are paired up to
    /// the shorter one's length.
    pub fn tally(predicted: &[Option<usize>], labels: &[usize], classes: usize) -> Confusion {
        let mut c = Confusion {
            classes,
            counts: vec![0; classes * classes],
            no_prediction: vec![0; classes],
            unknown_label: 0,
        };
        for (p, &t) in predicted.iter().zip(labels) {
            if t >= classes {
                c.unknown_label += 1;
                continue;
            }
            match p {
                Some(p) if *p < classes => c.counts[t * classes + p] += 1,
                _ => c.no_prediction[t] += 1,
            }
        }
        c
    }

    /// Number of classes (output units).
    pub fn classes(&self) -> usize {
        self.classes
    }

    /// Samples of true class `truth` predicted as `predicted` (0 outside the matrix).
    pub fn count(&self, truth: usize, predicted: usize) -> u64 {
        if truth < self.classes && predicted < self.classes {
            self.counts[truth * self.classes + predicted]
        } else {
            0
        }
    }

    /// Samples of class `truth` whose outputs had no finite value.
    pub fn no_prediction(&self, truth: usize) -> u64 {
        self.no_prediction.get(truth).copied().unwrap_or(0)
    }

    /// Samples whose label is not a class of the model (not counted anywhere else).
    pub fn unknown_label(&self) -> u64 {
        self.unknown_label
    }

    /// Samples of class `truth` (predicted or not).
    pub fn support(&self, truth: usize) -> u64 {
        (0..self.classes).map(|p| self.count(truth, p)).sum::<u64>() + self.no_prediction(truth)
    }

    /// Samples with a known label.
    pub fn total(&self) -> u64 {
        (0..self.classes).map(|t| self.support(t)).sum()
    }

    /// Fraction of samples with a known label that were predicted right (the trace over the
    /// total); `None` when there are none.
    pub fn accuracy(&self) -> Option<f64> {
        let total = self.total();
        let right: u64 = (0..self.classes).map(|k| self.count(k, k)).sum();
        (total > 0).then(|| right as f64 / total as f64)
    }

    /// Fraction of class `truth`'s samples predicted as `truth` (the class's recall); `None`
    /// for a class with no samples.
    pub fn class_accuracy(&self, truth: usize) -> Option<f64> {
        let n = self.support(truth);
        (n > 0).then(|| self.count(truth, truth) as f64 / n as f64)
    }
}

/// Runs `net` on `inputs: [samples, input size]` in chunks of `chunk_rows` rows and tallies
/// the predictions against `labels` (one per sample) over the output layer's units.
///
/// # Panics
/// When `inputs` does not have one column per input of `net` (the probe readers guarantee
/// it).
pub fn confusion(
    net: &Network,
    inputs: ArrayView2<'_, f32>,
    labels: &[usize],
    chunk_rows: usize,
) -> Confusion {
    let classes = net.layers().last().map_or(0, |l| l.units());
    let mut predicted = Vec::with_capacity(inputs.nrows());
    for chunk in inputs.axis_chunks_iter(Axis(0), chunk_rows.max(1)) {
        predicted.extend(argmax_rows(forward(net, chunk).view()));
    }
    Confusion::tally(&predicted, labels, classes)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::{Activation, InputSpec, Layer, Network};
    use ndarray::{Array1, Array2, array};

    #[test]
    fn tally_by_hand() {
        // Closed form: 3 classes, 8 samples. Truth 0: predicted 0, 0, 1; truth 1: 1, 1;
        // truth 2: 0, none; one label (5) outside the classes.
        let predicted = [
            Some(0),
            Some(0),
            Some(1),
            Some(1),
            Some(1),
            Some(0),
            None,
            Some(2),
        ];
        let labels = [0, 0, 0, 1, 1, 2, 2, 5];
        let c = Confusion::tally(&predicted, &labels, 3);
        assert_eq!(c.count(0, 0), 2);
        assert_eq!(c.count(0, 1), 1);
        assert_eq!(c.count(1, 1), 2);
        assert_eq!(c.count(2, 0), 1);
        assert_eq!(c.count(2, 2), 0);
        assert_eq!(c.count(7, 0), 0);
        assert_eq!(c.no_prediction(2), 1);
        assert_eq!(c.unknown_label(), 1);
        assert_eq!(c.support(2), 2);
        assert_eq!(c.total(), 7);
        // Right: 2 + 2 + 0 of 7.
        assert_eq!(c.accuracy(), Some(4.0 / 7.0));
        assert_eq!(c.class_accuracy(0), Some(2.0 / 3.0));
        assert_eq!(c.class_accuracy(1), Some(1.0));
        assert_eq!(c.class_accuracy(2), Some(0.0));
        let empty = Confusion::tally(&[], &[], 2);
        assert_eq!(empty.accuracy(), None);
        assert_eq!(empty.class_accuracy(1), None);
    }

    #[test]
    fn confusion_of_a_network_with_known_outputs() {
        // Identity network on 2 inputs: the predicted class is the larger input (closed
        // form). Rows: (1, 0) -> 0, (0, 1) -> 1, (2, 3) -> 1, (NaN, NaN) -> none.
        let layer = Layer::dense(
            "out",
            Activation::Identity,
            Array2::eye(2),
            Array1::zeros(2),
        );
        let spec = InputSpec::vector_box(2, -1.0, 1.0);
        let net = Network::new("test", "id", spec, vec![layer]).unwrap_or_else(|e| panic!("{e}"));
        let x = array![[1.0_f32, 0.0], [0.0, 1.0], [2.0, 3.0], [f32::NAN, f32::NAN]];
        for chunk in [1, 2, 3, 10] {
            let c = confusion(&net, x.view(), &[0, 0, 1, 1], chunk);
            assert_eq!(c.count(0, 0), 1);
            assert_eq!(c.count(0, 1), 1);
            assert_eq!(c.count(1, 1), 1);
            assert_eq!(c.no_prediction(1), 1);
            assert_eq!(c.accuracy(), Some(0.5));
        }
    }
}
