//! Mini-batch training of a [`NetworkParts`] with softmax cross-entropy, used to make the bundled
//! demo models (and by anyone who wants a small model to try the tool on).
//!
//! - Loss: mean softmax cross-entropy over a batch. The last layer's pre-activations are the
//!   logits; the last layer must be `softmax` or `identity`.
//! - Backward pass: the usual reverse-mode chain rule through every dense layer (weight and
//!   bias gradients, then the error signal for the layer below), batched: one matrix product
//!   per layer and direction for the whole batch.
//! - Optimisers: SGD with momentum (PyTorch's form `v = mu v + g`, `theta -= lr v`) and Adam
//!   (Kingma & Ba 2015, "Adam: A Method for Stochastic Optimization", Algorithm 1), with an
//!   optional L2 penalty on the weights (not the biases) added to the gradient.
//!
//! Determinism: for a fixed seed the result is the same bit for bit on every run. Shuffling
//! uses ChaCha8 seeded from [`TrainOptions::seed`], and every matrix product here runs in a
//! fixed summation order on one thread ([`matmul_fixed`]). The shared forward pass in
//! [`receptor::analysis::forward`] uses a parallel, run-time dispatched GEMM (FMA where the CPU
//! has it), whose rounding can depend on the machine; training with it would tie the bundled
//! demo files to the CPU that made them, so training keeps its own plain product and the
//! tests check that both passes agree within a tolerance.

use ndarray::{Array1, Array2, ArrayView1, ArrayView2, Axis};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use receptor::analysis::Progress;
use receptor::model::{Activation, InputSpec, Layer, Network, NetworkParts};

/// Why training (or building the demo files) failed.
#[derive(Debug, thiserror::Error)]
pub enum TrainError {
    /// The training problem is malformed or the run diverged; the message says how.
    #[error("{0}")]
    Problem(String),
    /// The run was cancelled through its [`Progress`].
    #[error("cancelled")]
    Cancelled,
    /// An error of the receptor core (building a network, writing a file).
    #[error(transparent)]
    Core(#[from] receptor::Error),
}

impl TrainError {
    /// A [`TrainError::Problem`] with `msg`.
    pub fn problem(msg: impl Into<String>) -> Self {
        TrainError::Problem(msg.into())
    }
}

/// Result of the trainer and the demo generator.
pub type Result<T, E = TrainError> = std::result::Result<T, E>;

/// The update rule.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Optimizer {
    /// Stochastic gradient descent with heavy-ball momentum: `v = momentum * v + g`,
    /// `theta -= learning_rate * v` (the form PyTorch's `torch.optim.SGD` uses).
    Sgd {
        /// Step size.
        learning_rate: f32,
        /// Momentum coefficient in [0, 1); 0 is plain SGD.
        momentum: f32,
    },
    /// Adam (Kingma & Ba 2015, Algorithm 1) with bias-corrected moment estimates.
    Adam {
        /// Step size (alpha in the paper; 0.001 is the paper's suggestion).
        learning_rate: f32,
        /// Decay of the first-moment estimate (paper: 0.9).
        beta1: f32,
        /// Decay of the second-moment estimate (paper: 0.999).
        beta2: f32,
        /// Added to the root of the second moment (paper: 1e-8).
        epsilon: f32,
    },
}

impl Optimizer {
    /// Adam with the paper's suggested constants and the given step size.
    pub fn adam(learning_rate: f32) -> Self {
        Optimizer::Adam {
            learning_rate,
            beta1: 0.9,
            beta2: 0.999,
            epsilon: 1e-8,
        }
    }

    /// The step size.
    pub fn learning_rate(&self) -> f32 {
        match *self {
            Optimizer::Sgd { learning_rate, .. } | Optimizer::Adam { learning_rate, .. } => {
                learning_rate
            }
        }
    }

    /// The same optimiser with another step size (for a schedule).
    pub fn with_learning_rate(self, lr: f32) -> Self {
        match self {
            Optimizer::Sgd { momentum, .. } => Optimizer::Sgd {
                learning_rate: lr,
                momentum,
            },
            Optimizer::Adam {
                beta1,
                beta2,
                epsilon,
                ..
            } => Optimizer::Adam {
                learning_rate: lr,
                beta1,
                beta2,
                epsilon,
            },
        }
    }
}

/// Settings of one training run.
#[derive(Debug, Clone, PartialEq)]
pub struct TrainOptions {
    /// Passes over the whole training set.
    pub epochs: usize,
    /// Samples per mini-batch (the last batch of an epoch may be smaller).
    pub batch_size: usize,
    /// The update rule.
    pub optimizer: Optimizer,
    /// L2 penalty `weight_decay / 2 * ||W||^2` on every weight matrix (biases are not
    /// penalised); its gradient `weight_decay * W` is added before the update. 0 turns it off.
    pub weight_decay: f32,
    /// Step size multiplier applied after every epoch (1 = constant step size).
    pub lr_decay: f32,
    /// Seed of the mini-batch shuffling.
    pub seed: u64,
}

impl Default for TrainOptions {
    fn default() -> Self {
        TrainOptions {
            epochs: 30,
            batch_size: 64,
            optimizer: Optimizer::adam(1e-3),
            weight_decay: 0.0,
            lr_decay: 1.0,
            seed: 0,
        }
    }
}

/// Training-set loss and accuracy after one epoch.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct EpochStats {
    /// Epoch number, from 0.
    pub epoch: usize,
    /// Mean cross-entropy (nats) of the mini-batches seen in this epoch, each measured before
    /// its update.
    pub loss: f64,
    /// Fraction of the epoch's samples whose argmax was right, measured before each update.
    pub accuracy: f64,
}

/// What a training run did.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct TrainReport {
    /// One entry per epoch.
    pub epochs: Vec<EpochStats>,
}

/// Gradients of the mean cross-entropy with respect to every parameter.
#[derive(Debug, Clone, PartialEq)]
pub struct Gradients {
    /// Per layer, `[units, inputs]` like [`Layer::weights`].
    pub weights: Vec<Array2<f32>>,
    /// Per layer, `[units]` like [`Layer::bias`].
    pub bias: Vec<Array1<f32>>,
}

/// A fresh dense layer with uniform random weights and zero biases.
///
/// Rectifier layers use He et al. (2015, "Delving Deep into Rectifiers") scaling, variance
/// `2 / inputs`, i.e. uniform in `±sqrt(6 / inputs)`; every other activation uses Glorot &
/// Bengio (2010) uniform, `±sqrt(6 / (inputs + units))`.
pub fn init_layer(
    name: impl Into<String>,
    units: usize,
    inputs: usize,
    activation: Activation,
    rng: &mut ChaCha8Rng,
) -> Layer {
    let limit = if activation.is_rectifier() {
        (6.0 / inputs.max(1) as f64).sqrt()
    } else {
        (6.0 / (inputs + units).max(1) as f64).sqrt()
    } as f32;
    let weights = Array2::from_shape_fn((units, inputs), |_| rng.random_range(-limit..limit));
    Layer {
        kind: receptor::model::LayerKind::Dense,
        name: name.into(),
        activation,
        weights,
        bias: Array1::zeros(units),
        labels: None,
    }
}

/// A fresh network `input.size - sizes[0] - ... - sizes[n-1]`: hidden layers `h1, h2, ...`
/// with activation `hidden`, and a softmax output layer `out` whose units are named by
/// `labels` (`sizes` ends with the number of classes). Weights from [`init_layer`] with a
/// ChaCha8 generator seeded by `seed`.
pub fn init_network(
    name: &str,
    input: InputSpec,
    sizes: &[usize],
    hidden: Activation,
    labels: Option<Vec<String>>,
    seed: u64,
) -> Result<NetworkParts> {
    if sizes.is_empty() {
        return Err(TrainError::problem(
            "a network needs at least an output layer",
        ));
    }
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut layers = Vec::with_capacity(sizes.len());
    let mut inputs = input.size;
    for (i, &units) in sizes.iter().enumerate() {
        let last = i + 1 == sizes.len();
        let (lname, act) = if last {
            ("out".to_string(), Activation::Softmax)
        } else {
            (format!("h{}", i + 1), hidden)
        };
        let mut layer = init_layer(lname, units, inputs, act, &mut rng);
        if last {
            layer.labels = labels.clone();
        }
        layers.push(layer);
        inputs = units;
    }
    Ok(Network::new(name, name, input, layers)?.into_parts())
}

/// `a · b` for `a: [m, k]`, `b: [k, n]`, in a fixed summation order (k ascending for every
/// output element), accumulated in f64, on one thread.
///
/// Slower than the shared GEMM, but its result does not depend on the CPU's vector units or
/// on thread scheduling, which keeps training reproducible bit for bit.
///
/// # Panics
/// When the inner dimensions differ (a programming error; callers check shapes first).
pub fn matmul_fixed(a: ArrayView2<f32>, b: ArrayView2<f32>) -> Array2<f32> {
    let (m, k) = a.dim();
    let (k2, n) = b.dim();
    assert_eq!(k, k2, "matmul_fixed: inner dimensions {k} and {k2} differ");
    let a = a.as_standard_layout();
    let b = b.as_standard_layout();
    let (Some(a), Some(b)) = (a.as_slice(), b.as_slice()) else {
        unreachable!("standard layout arrays are contiguous")
    };
    let mut out = Array2::<f32>::zeros((m, n));
    let mut acc = vec![0.0f64; n];
    for (i, mut out_row) in out.rows_mut().into_iter().enumerate() {
        acc.iter_mut().for_each(|v| *v = 0.0);
        let a_row = &a[i * k..(i + 1) * k];
        for (p, &aip) in a_row.iter().enumerate() {
            if aip == 0.0 {
                // Skipping exact zeros (dead ReLU outputs, zero one-hot entries) changes no
                // sum: adding 0 * finite is exact.
                continue;
            }
            let aip = f64::from(aip);
            let b_row = &b[p * n..(p + 1) * n];
            for (s, &bv) in acc.iter_mut().zip(b_row) {
                *s += aip * f64::from(bv);
            }
        }
        for (o, s) in out_row.iter_mut().zip(&acc) {
            *o = *s as f32;
        }
    }
    out
}

/// Pre- and post-activations of every layer for one batch (the training-side forward pass).
struct Cache {
    /// Per layer, `[samples, units]`.
    pre: Vec<Array2<f32>>,
    /// Per layer, `[samples, units]`; the last layer holds softmax probabilities whatever
    /// the layer's declared activation (`softmax` or `identity` logits).
    post: Vec<Array2<f32>>,
}

/// Forward pass in the fixed order of [`matmul_fixed`]: `z = a_prev · Wᵀ + b`, `a = f(z)`.
fn forward_cache(net: &NetworkParts, x: ArrayView2<f32>) -> Cache {
    let mut pre = Vec::with_capacity(net.layers.len());
    let mut post: Vec<Array2<f32>> = Vec::with_capacity(net.layers.len());
    let last = net.layers.len() - 1;
    for (l, layer) in net.layers.iter().enumerate() {
        let a_prev = if l == 0 { x } else { post[l - 1].view() };
        let mut z = matmul_fixed(a_prev, layer.weights.t());
        z += &layer.bias;
        let mut a = z.clone();
        if l == last {
            Activation::Softmax.apply_rows(&mut a);
        } else {
            layer.activation.apply_rows(&mut a);
        }
        pre.push(z);
        post.push(a);
    }
    Cache { pre, post }
}

/// Checks that `net` can be trained on `x` with `labels`.
fn check_problem(net: &NetworkParts, x: ArrayView2<f32>, labels: &[usize]) -> Result<()> {
    let Some(out) = net.layers.last() else {
        return Err(TrainError::problem(
            "a network needs at least an output layer",
        ));
    };
    if !matches!(out.activation, Activation::Softmax | Activation::Identity) {
        return Err(TrainError::problem(format!(
            "training needs a softmax or identity output layer; layer '{}' is {}",
            out.name,
            out.activation.name()
        )));
    }
    if x.ncols() != net.input.size {
        return Err(TrainError::problem(format!(
            "training data has {} columns but the network takes {} inputs",
            x.ncols(),
            net.input.size
        )));
    }
    if x.nrows() != labels.len() {
        return Err(TrainError::problem(format!(
            "training data has {} rows but {} labels",
            x.nrows(),
            labels.len()
        )));
    }
    if x.nrows() == 0 {
        return Err(TrainError::problem("training data has no rows"));
    }
    if let Some((row, &c)) = labels.iter().enumerate().find(|(_, c)| **c >= out.units()) {
        return Err(TrainError::problem(format!(
            "training label {c} in row {row} is not an output unit (the network has {})",
            out.units()
        )));
    }
    if let Some(i) = x.iter().position(|v| !v.is_finite()) {
        return Err(TrainError::problem(format!(
            "training data row {} column {} is not a finite number",
            i / x.ncols(),
            i % x.ncols()
        )));
    }
    Ok(())
}

/// Mean cross-entropy (nats) of the rows of `pre_out` (logits `[samples, classes]`), computed
/// in f64 as `logsumexp(z) - z_label`, plus the number of rows whose argmax is the label.
pub fn loss_from_logits(pre_out: ArrayView2<f32>, labels: &[usize]) -> (f64, usize) {
    let mut total = 0.0f64;
    let mut correct = 0usize;
    for (row, &y) in pre_out.rows().into_iter().zip(labels) {
        let m = row.iter().copied().fold(f32::NEG_INFINITY, f32::max);
        let s: f64 = row
            .iter()
            .map(|&v| (f64::from(v) - f64::from(m)).exp())
            .sum();
        total += f64::from(m) + s.ln() - f64::from(row[y]);
        if argmax(row) == y {
            correct += 1;
        }
    }
    (total / labels.len().max(1) as f64, correct)
}

/// Index of the largest value (the first one on ties).
fn argmax(row: ArrayView1<f32>) -> usize {
    let mut best = 0;
    for (i, &v) in row.iter().enumerate() {
        if v > row[best] {
            best = i;
        }
    }
    best
}

/// Backward pass for one batch whose forward pass is `cache`.
fn backward(net: &NetworkParts, x: ArrayView2<f32>, labels: &[usize], cache: &Cache) -> Gradients {
    let n = labels.len() as f32;
    let last = net.layers.len() - 1;
    // d(mean CE)/dz_out = (softmax(z) - onehot(y)) / n.
    let mut delta = cache.post[last].clone();
    for (mut row, &y) in delta.rows_mut().into_iter().zip(labels) {
        row[y] -= 1.0;
    }
    delta.mapv_inplace(|v| v / n);
    let mut weights = vec![Array2::<f32>::zeros((0, 0)); net.layers.len()];
    let mut bias = vec![Array1::<f32>::zeros(0); net.layers.len()];
    for l in (0..=last).rev() {
        let a_prev = if l == 0 { x } else { cache.post[l - 1].view() };
        // dW = deltaᵀ · a_prev: [units, samples] · [samples, inputs].
        weights[l] = matmul_fixed(delta.t(), a_prev);
        bias[l] = delta
            .axis_iter(Axis(1))
            .map(|col| col.iter().map(|&v| f64::from(v)).sum::<f64>() as f32)
            .collect();
        if l > 0 {
            // Error signal for the layer below: (delta · W) ⊙ f'(z_below).
            let mut below = matmul_fixed(delta.view(), net.layers[l].weights.view());
            let act = net.layers[l - 1].activation;
            below.zip_mut_with(&cache.pre[l - 1], |d, &z| *d *= act.derivative_scalar(z));
            delta = below;
        }
    }
    Gradients { weights, bias }
}

/// Mean softmax cross-entropy (nats) of `net` on `x: [samples, inputs]` with class indices
/// `labels: [samples]`, and its gradient with respect to every weight and bias.
///
/// The L2 penalty of [`TrainOptions::weight_decay`] is not included.
#[cfg_attr(
    not(test),
    allow(
        dead_code,
        reason = "the generator itself only trains; the tests check the gradients through this"
    )
)]
pub fn loss_and_gradients(
    net: &NetworkParts,
    x: ArrayView2<f32>,
    labels: &[usize],
) -> Result<(f64, Gradients)> {
    check_problem(net, x, labels)?;
    let cache = forward_cache(net, x);
    let (loss, _) = loss_from_logits(cache.pre[net.layers.len() - 1].view(), labels);
    Ok((loss, backward(net, x, labels, &cache)))
}

/// Mean softmax cross-entropy (nats) of `net` on `x: [samples, inputs]` with `labels`.
#[cfg_attr(
    not(test),
    allow(dead_code, reason = "used by the trainer's tests only")
)]
pub fn cross_entropy(net: &NetworkParts, x: ArrayView2<f32>, labels: &[usize]) -> Result<f64> {
    check_problem(net, x, labels)?;
    let cache = forward_cache(net, x);
    Ok(loss_from_logits(cache.pre[net.layers.len() - 1].view(), labels).0)
}

/// Fraction of rows of `x` whose argmax output is the label.
pub fn accuracy(net: &NetworkParts, x: ArrayView2<f32>, labels: &[usize]) -> Result<f64> {
    check_problem(net, x, labels)?;
    let cache = forward_cache(net, x);
    let (_, correct) = loss_from_logits(cache.pre[net.layers.len() - 1].view(), labels);
    Ok(correct as f64 / labels.len() as f64)
}

/// Optimiser state for one parameter tensor (also used by the convolutional trainer in
/// `conv_train.rs`).
pub struct Slot<D: ndarray::Dimension> {
    m: ndarray::Array<f32, D>,
    v: ndarray::Array<f32, D>,
}

impl<D: ndarray::Dimension> Slot<D> {
    /// Zero moments for a tensor of `shape`.
    pub fn new(shape: D) -> Self {
        Slot {
            m: ndarray::Array::zeros(shape.clone()),
            v: ndarray::Array::zeros(shape),
        }
    }

    /// Applies one update to `theta` with gradient `g` at step `t` (from 1).
    pub fn step(
        &mut self,
        theta: &mut ndarray::Array<f32, D>,
        g: &ndarray::Array<f32, D>,
        opt: Optimizer,
        t: i32,
    ) {
        match opt {
            Optimizer::Sgd {
                learning_rate,
                momentum,
            } => {
                ndarray::Zip::from(theta)
                    .and(&mut self.m)
                    .and(g)
                    .for_each(|w, m, &g| {
                        *m = momentum * *m + g;
                        *w -= learning_rate * *m;
                    });
            }
            Optimizer::Adam {
                learning_rate,
                beta1,
                beta2,
                epsilon,
            } => {
                let c1 = 1.0 - beta1.powi(t);
                let c2 = 1.0 - beta2.powi(t);
                ndarray::Zip::from(theta)
                    .and(&mut self.m)
                    .and(&mut self.v)
                    .and(g)
                    .for_each(|w, m, v, &g| {
                        *m = beta1 * *m + (1.0 - beta1) * g;
                        *v = beta2 * *v + (1.0 - beta2) * g * g;
                        let m_hat = *m / c1;
                        let v_hat = *v / c2;
                        *w -= learning_rate * m_hat / (v_hat.sqrt() + epsilon);
                    });
            }
        }
    }
}

/// Trains `net` in place on `x: [samples, inputs]` with class indices `labels: [samples]`.
///
/// Each epoch visits the samples in a fresh random order (ChaCha8 seeded by `opts.seed`) in
/// mini-batches of `opts.batch_size`. Returns per-epoch training loss and accuracy. A loss
/// or parameter that stops being finite ends the run with a usage error naming the epoch
/// (a learning rate far too high), leaving `net` as it was before that update.
pub fn train(
    net: &mut NetworkParts,
    x: ArrayView2<f32>,
    labels: &[usize],
    opts: &TrainOptions,
    progress: &dyn Progress,
) -> Result<TrainReport> {
    train_observed(net, x, labels, opts, progress, &mut |_, _, _| Ok(()))
}

/// [`train`], calling `observe(epochs_done, updates_done, net)` once before the first
/// update (with `0, 0`) and after every epoch, so a caller can save checkpoints of the run.
/// Observing reads the network only, so the run is the same with or without it.
pub fn train_observed(
    net: &mut NetworkParts,
    x: ArrayView2<f32>,
    labels: &[usize],
    opts: &TrainOptions,
    progress: &dyn Progress,
    observe: &mut dyn FnMut(usize, u64, &NetworkParts) -> Result<()>,
) -> Result<TrainReport> {
    check_problem(net, x, labels)?;
    if opts.batch_size == 0 {
        return Err(TrainError::problem(
            "training batch size must be at least 1",
        ));
    }
    let samples = x.nrows();
    let mut rng = ChaCha8Rng::seed_from_u64(opts.seed);
    let mut order: Vec<usize> = (0..samples).collect();
    let mut w_slots: Vec<Slot<ndarray::Ix2>> = net
        .layers
        .iter()
        .map(|l| Slot::new(l.weights.raw_dim()))
        .collect();
    let mut b_slots: Vec<Slot<ndarray::Ix1>> = net
        .layers
        .iter()
        .map(|l| Slot::new(l.bias.raw_dim()))
        .collect();
    let mut report = TrainReport::default();
    let mut opt = opts.optimizer;
    let mut t: i32 = 0;
    observe(0, 0, net)?;
    for epoch in 0..opts.epochs {
        // Fisher-Yates with our own seeded generator.
        for i in (1..samples).rev() {
            let j = rng.random_range(0..=i);
            order.swap(i, j);
        }
        let mut loss_sum = 0.0f64;
        let mut correct = 0usize;
        for batch in order.chunks(opts.batch_size) {
            if progress.cancelled() {
                return Err(TrainError::Cancelled);
            }
            let xb = x.select(Axis(0), batch);
            let yb: Vec<usize> = batch.iter().map(|&i| labels[i]).collect();
            let cache = forward_cache(net, xb.view());
            let (loss, ok) = loss_from_logits(cache.pre[net.layers.len() - 1].view(), &yb);
            if !loss.is_finite() {
                return Err(TrainError::problem(format!(
                    "training diverged in epoch {epoch}: the loss is {loss} (learning rate {} too high?)",
                    opt.learning_rate()
                )));
            }
            loss_sum += loss * batch.len() as f64;
            correct += ok;
            let mut grads = backward(net, xb.view(), &yb, &cache);
            t = t.saturating_add(1);
            let before = net.layers.clone();
            for (l, layer) in net.layers.iter_mut().enumerate() {
                if opts.weight_decay != 0.0 {
                    let wd = opts.weight_decay;
                    grads.weights[l].zip_mut_with(&layer.weights, |g, &w| *g += wd * w);
                }
                w_slots[l].step(&mut layer.weights, &grads.weights[l], opt, t);
                b_slots[l].step(&mut layer.bias, &grads.bias[l], opt, t);
            }
            let finite = net
                .layers
                .iter()
                .all(|l| l.weights.iter().chain(l.bias.iter()).all(|v| v.is_finite()));
            if !finite {
                net.layers = before;
                return Err(TrainError::problem(format!(
                    "training diverged in epoch {epoch}: a parameter is no longer finite (learning rate {} too high?)",
                    opt.learning_rate()
                )));
            }
        }
        report.epochs.push(EpochStats {
            epoch,
            loss: loss_sum / samples as f64,
            accuracy: correct as f64 / samples as f64,
        });
        opt = opt.with_learning_rate(opt.learning_rate() * opts.lr_decay);
        observe(epoch + 1, u64::try_from(t).unwrap_or(0), net)?;
        progress.set((epoch + 1) as f32 / opts.epochs.max(1) as f32);
    }
    Ok(report)
}

#[cfg(test)]
mod tests {
    use super::*;
    use approx::assert_abs_diff_eq;
    use ndarray::array;

    fn tiny_input(size: usize) -> InputSpec {
        InputSpec {
            units: None,
            size,
            layout: receptor::model::Layout::Vector,
            low: vec![-1.0; size],
            high: vec![1.0; size],
            names: None,
        }
    }

    /// A 3-5-4-3 net with the given hidden activations and output, random weights.
    fn tiny_net(h1: Activation, h2: Activation, out: Activation) -> NetworkParts {
        let mut rng = ChaCha8Rng::seed_from_u64(7);
        let mut layers = vec![
            init_layer("h1", 5, 3, h1, &mut rng),
            init_layer("h2", 4, 5, h2, &mut rng),
            init_layer("out", 3, 4, out, &mut rng),
        ];
        for l in &mut layers {
            l.bias = Array1::from_shape_fn(l.units(), |_| rng.random_range(-0.3..0.3));
        }
        Network::new("tiny", "tiny", tiny_input(3), layers)
            .unwrap()
            .into_parts()
    }

    fn tiny_batch() -> (Array2<f32>, Vec<usize>) {
        let x = array![
            [0.3f32, -0.7, 0.9],
            [-0.2, 0.5, 0.1],
            [0.8, 0.4, -0.6],
            [-0.9, -0.1, 0.35],
            [0.05, 0.95, -0.45],
        ];
        (x, vec![0, 2, 1, 2, 0])
    }

    /// The weight and bias gradients of the backward pass against central finite
    /// differences of the cross-entropy loss, (L(w + h) - L(w - h)) / 2h (common practice,
    /// no source; the error of the central difference is O(h^2)).
    #[test]
    fn gradients_match_central_differences() {
        let cases = [
            (Activation::Tanh, Activation::Sigmoid, Activation::Softmax),
            (
                Activation::Relu,
                Activation::LeakyRelu { alpha: 0.1 },
                Activation::Identity,
            ),
            (Activation::Identity, Activation::Tanh, Activation::Softmax),
        ];
        let (x, y) = tiny_batch();
        for (h1, h2, out) in cases {
            let net = tiny_net(h1, h2, out);
            let (_, g) = loss_and_gradients(&net, x.view(), &y).unwrap();
            let h = 1e-3f32;
            for l in 0..net.layers.len() {
                let (units, inputs) = net.layers[l].weights.dim();
                for u in 0..units {
                    for i in 0..=inputs {
                        // i == inputs stands for the bias.
                        fn get(n: &mut NetworkParts, l: usize, u: usize, i: usize) -> &mut f32 {
                            if i == n.layers[l].fan_in() {
                                &mut n.layers[l].bias[u]
                            } else {
                                &mut n.layers[l].weights[(u, i)]
                            }
                        }
                        let mut plus = net.clone();
                        let mut minus = net.clone();
                        let w0 = *get(&mut plus, l, u, i);
                        *get(&mut plus, l, u, i) = w0 + h;
                        *get(&mut minus, l, u, i) = w0 - h;
                        // The step actually taken after rounding to f32.
                        let step = f64::from(*get(&mut plus, l, u, i))
                            - f64::from(*get(&mut minus, l, u, i));
                        let lp = cross_entropy(&plus, x.view(), &y).unwrap();
                        let lm = cross_entropy(&minus, x.view(), &y).unwrap();
                        let fd = (lp - lm) / step;
                        let an = if i == inputs {
                            g.bias[l][u]
                        } else {
                            g.weights[l][(u, i)]
                        };
                        assert_abs_diff_eq!(f64::from(an), fd, epsilon = 2e-4);
                    }
                }
            }
        }
    }

    /// The loss itself against a hand computation: a net with zero weights gives uniform
    /// softmax outputs, so the cross-entropy is ln(classes) for every label (definition of
    /// softmax cross-entropy).
    #[test]
    fn zero_network_loss_is_log_classes() {
        let mut net = tiny_net(Activation::Relu, Activation::Relu, Activation::Softmax);
        for l in &mut net.layers {
            l.weights.fill(0.0);
            l.bias.fill(0.0);
        }
        let (x, y) = tiny_batch();
        let loss = cross_entropy(&net, x.view(), &y).unwrap();
        assert_abs_diff_eq!(loss, 3f64.ln(), epsilon = 1e-12);
    }

    /// The fixed-order product against ndarray's `dot` (matrixmultiply).
    #[test]
    fn fixed_matmul_matches_ndarray_dot() {
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        let a = Array2::from_shape_fn((7, 13), |_| rng.random_range(-1.0f32..1.0));
        let b = Array2::from_shape_fn((13, 5), |_| rng.random_range(-1.0f32..1.0));
        let ours = matmul_fixed(a.view(), b.view());
        let reference = a.dot(&b);
        for (p, q) in ours.iter().zip(&reference) {
            assert_abs_diff_eq!(*p, *q, epsilon = 1e-5);
        }
        // Transposed (non-contiguous) views work too.
        let ours_t = matmul_fixed(b.t(), a.t());
        for (p, q) in ours_t.iter().zip(&reference.t()) {
            assert_abs_diff_eq!(*p, *q, epsilon = 1e-5);
        }
    }

    /// The training forward pass agrees with the shared one in `analysis::forward` (a
    /// different product, so only within rounding).
    #[test]
    fn training_forward_matches_shared_forward() {
        let (x, _) = tiny_batch();
        for out in [Activation::Softmax, Activation::Identity] {
            let net = tiny_net(Activation::Relu, Activation::Tanh, out);
            let cache = forward_cache(&net, x.view());
            let checked = Network::from_parts(net.clone(), "tiny").unwrap();
            let shared = receptor::analysis::forward::forward_trace(&checked, x.view(), 2);
            for l in 0..3 {
                for (p, q) in cache.pre[l].iter().zip(&shared.pre[l]) {
                    assert_abs_diff_eq!(*p, *q, epsilon = 1e-5);
                }
            }
            if out == Activation::Softmax {
                let probs = receptor::analysis::forward::forward(&checked, x.view());
                for (p, q) in cache.post[2].iter().zip(&probs) {
                    assert_abs_diff_eq!(*p, *q, epsilon = 1e-6);
                }
            }
        }
    }

    /// Three well separated blobs in 2-D (linearly separable): training must lower the loss
    /// well below its start and classify (almost) everything right.
    fn blobs(seed: u64) -> (Array2<f32>, Vec<usize>) {
        let centres = [(-0.6f32, -0.5f32), (0.6, -0.5), (0.0, 0.6)];
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let n = 150;
        let mut x = Array2::zeros((n, 2));
        let mut y = Vec::with_capacity(n);
        for i in 0..n {
            let c = i % 3;
            x[(i, 0)] = centres[c].0 + rng.random_range(-0.2..0.2);
            x[(i, 1)] = centres[c].1 + rng.random_range(-0.2..0.2);
            y.push(c);
        }
        (x, y)
    }

    fn blob_net(seed: u64) -> NetworkParts {
        init_network(
            "blobs",
            tiny_input(2),
            &[8, 3],
            Activation::Relu,
            None,
            seed,
        )
        .unwrap()
    }

    #[test]
    fn training_lowers_the_loss_on_separable_data() {
        let (x, y) = blobs(1);
        for optimizer in [
            Optimizer::adam(0.02),
            Optimizer::Sgd {
                learning_rate: 0.1,
                momentum: 0.9,
            },
        ] {
            let mut net = blob_net(2);
            let before = cross_entropy(&net, x.view(), &y).unwrap();
            let opts = TrainOptions {
                epochs: 60,
                batch_size: 16,
                optimizer,
                ..TrainOptions::default()
            };
            let report = train(&mut net, x.view(), &y, &opts, &receptor::analysis::Silent).unwrap();
            assert_eq!(report.epochs.len(), 60);
            let after = cross_entropy(&net, x.view(), &y).unwrap();
            assert!(after < 0.2 * before, "{optimizer:?}: {before} -> {after}");
            assert!(accuracy(&net, x.view(), &y).unwrap() >= 0.98);
        }
    }

    #[test]
    fn same_seed_gives_identical_weights() {
        let (x, y) = blobs(1);
        let opts = TrainOptions {
            epochs: 5,
            batch_size: 10,
            seed: 9,
            ..TrainOptions::default()
        };
        let run = |opts: &TrainOptions| {
            let mut net = blob_net(2);
            train(&mut net, x.view(), &y, opts, &receptor::analysis::Silent).unwrap();
            net
        };
        let a = run(&opts);
        let b = run(&opts);
        // Bit for bit, not within a tolerance: this is the reproducibility promise.
        assert_eq!(a.layers, b.layers);
        let c = run(&TrainOptions { seed: 10, ..opts });
        assert_ne!(a.layers, c.layers);
    }

    /// First update of each optimiser in closed form. SGD: `w - lr g`. Adam (Kingma & Ba
    /// 2015, Algorithm 1): after one step m_hat = g and v_hat = g^2, so the step is
    /// `lr * g / (|g| + eps)`, i.e. `lr * sign(g)` up to eps.
    #[test]
    fn first_step_matches_the_update_rules() {
        let (x, y) = tiny_batch();
        let net0 = tiny_net(Activation::Tanh, Activation::Tanh, Activation::Softmax);
        let (_, g) = loss_and_gradients(&net0, x.view(), &y).unwrap();
        let lr = 0.01f32;
        for optimizer in [
            Optimizer::Sgd {
                learning_rate: lr,
                momentum: 0.9,
            },
            Optimizer::adam(lr),
        ] {
            let mut net = net0.clone();
            let opts = TrainOptions {
                epochs: 1,
                batch_size: x.nrows(),
                optimizer,
                ..TrainOptions::default()
            };
            train(&mut net, x.view(), &y, &opts, &receptor::analysis::Silent).unwrap();
            for l in 0..net.layers.len() {
                for ((w1, w0), gw) in net.layers[l]
                    .weights
                    .iter()
                    .zip(&net0.layers[l].weights)
                    .zip(&g.weights[l])
                {
                    let expected = match optimizer {
                        Optimizer::Sgd { .. } => w0 - lr * gw,
                        Optimizer::Adam { epsilon, .. } => w0 - lr * gw / (gw.abs() + epsilon),
                    };
                    assert_abs_diff_eq!(*w1, expected, epsilon = 1e-6);
                }
            }
        }
    }

    #[test]
    fn bad_problems_are_usage_errors() {
        let (x, y) = tiny_batch();
        let net = tiny_net(Activation::Tanh, Activation::Tanh, Activation::Softmax);
        let wide = Array2::<f32>::zeros((5, 4));
        let e = cross_entropy(&net, wide.view(), &y)
            .unwrap_err()
            .to_string();
        assert!(e.contains("4 columns") && e.contains("3 inputs"), "{e}");
        let e = cross_entropy(&net, x.view(), &[0, 1])
            .unwrap_err()
            .to_string();
        assert!(e.contains("5 rows but 2 labels"), "{e}");
        let e = cross_entropy(&net, x.view(), &[0, 1, 2, 3, 0])
            .unwrap_err()
            .to_string();
        assert!(e.contains("label 3 in row 3"), "{e}");
        let mut nan = x.clone();
        nan[(1, 2)] = f32::NAN;
        let e = cross_entropy(&net, nan.view(), &y).unwrap_err().to_string();
        assert!(e.contains("row 1 column 2"), "{e}");
        let sig = tiny_net(Activation::Tanh, Activation::Tanh, Activation::Sigmoid);
        let e = cross_entropy(&sig, x.view(), &y).unwrap_err().to_string();
        assert!(e.contains("softmax or identity output"), "{e}");
        let mut n = net.clone();
        let opts = TrainOptions {
            batch_size: 0,
            ..TrainOptions::default()
        };
        assert!(train(&mut n, x.view(), &y, &opts, &receptor::analysis::Silent).is_err());
    }

    /// A step size far too large overflows the parameters; the run must stop with an error
    /// and leave finite parameters behind, never NaN weights.
    #[test]
    fn divergence_is_an_error_and_keeps_finite_weights() {
        let (x, y) = tiny_batch();
        let mut net = tiny_net(Activation::Relu, Activation::Relu, Activation::Softmax);
        let opts = TrainOptions {
            epochs: 50,
            batch_size: 5,
            optimizer: Optimizer::Sgd {
                learning_rate: 1e37,
                momentum: 0.9,
            },
            ..TrainOptions::default()
        };
        let e = train(&mut net, x.view(), &y, &opts, &receptor::analysis::Silent).unwrap_err();
        assert!(e.to_string().contains("diverged"), "{e}");
        assert!(
            net.layers
                .iter()
                .all(|l| l.weights.iter().chain(&l.bias).all(|v| v.is_finite()))
        );
    }
}
