//! Mini-batch training of a small convolutional classifier, used to make the bundled
//! convolutional demo model.
//!
//! The network is a stack of blocks `conv2d (k x k, stride 1, zero padding) -> relu ->
//! max_pool2d (p x p, stride p)`, then `flatten` (PyTorch order: channel, then row, then
//! column) and one dense softmax layer: exactly the layer types of `receptor-model/2`, so
//! the trained network is written as such a file by [`Cnn::to_json`].
//!
//! - Maps are `[samples * height * width, channels]` matrices, row `(n * height + y) * width
//!   + x`: the receptor input vector (row-major, channel last) is already such a matrix.
//! - A convolution is one matrix product per batch: the `k x k` patches of every position
//!   (zero outside the map) are laid out as rows in PyTorch's weight order `(channel, row,
//!   column)` ("im2col"), so `z = patches · Wᵀ + b` with `W: [out_channels, in_channels * k
//!   * k]`, the memory layout of PyTorch's `[out, in, k, k]`.
//! - Backward pass: the chain rule through the dense layer, the flatten (a permutation), the
//!   max pool (the gradient goes to the cell that won; the first one on ties), the relu and
//!   the convolution (`dW = dZᵀ · patches`, `d patches = dZ · W`, scattered back onto the map).
//! - Loss, optimisers and determinism as in `train.rs`: softmax cross-entropy, Adam or SGD
//!   ([`Slot`]), every product through [`matmul_fixed`] on one thread, shuffling by ChaCha8.

use super::train::{Optimizer, Result, Slot, TrainError, loss_from_logits, matmul_fixed};
use ndarray::{Array1, Array2, ArrayView2, Axis};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

/// One `conv2d -> relu -> max_pool2d` block.
#[derive(Debug, Clone, PartialEq)]
pub struct ConvBlock {
    /// Layer name of the convolution in the written file (the pool is `pool{i}`).
    pub name: String,
    /// `[out_channels, in_channels * k * k]`, PyTorch's `[out, in, k, k]` in memory order.
    pub weights: Array2<f32>,
    /// `[out_channels]`.
    pub bias: Array1<f32>,
    /// Kernel side.
    pub k: usize,
    /// Zero padding on every side.
    pub pad: usize,
    /// Side of the max pool after the relu (its stride too); 1 is no pool.
    pub pool: usize,
}

/// A small convolutional classifier (see the module documentation).
#[derive(Debug, Clone, PartialEq)]
pub struct Cnn {
    /// Input `(height, width, channels)`.
    pub input: (usize, usize, usize),
    /// The convolutional blocks, bottom to top.
    pub blocks: Vec<ConvBlock>,
    /// Output layer `[classes, flat]`, columns in PyTorch's flatten order.
    pub dense: Array2<f32>,
    /// `[classes]`.
    pub dense_bias: Array1<f32>,
}

/// Map sides `(height, width)` after each block, bottom to top (the last one feeds the
/// dense layer).
fn map_sides(
    input: (usize, usize, usize),
    blocks: &[(usize, usize, usize, usize)],
) -> Vec<(usize, usize)> {
    let (mut h, mut w) = (input.0, input.1);
    let mut out = Vec::with_capacity(blocks.len());
    for &(_, k, pad, pool) in blocks {
        h = (h + 2 * pad + 1 - k) / pool;
        w = (w + 2 * pad + 1 - k) / pool;
        out.push((h, w));
    }
    out
}

impl Cnn {
    /// A fresh network on an `input = (height, width, channels)` image with `blocks` given
    /// as `(out_channels, k, pad, pool)` and `classes` outputs. Uniform He et al. (2015)
    /// weights `±sqrt(6 / fan_in)` for the rectified convolutions, Glorot & Bengio (2010)
    /// `±sqrt(6 / (fan_in + fan_out))` for the output layer, biases `conv_bias`/0, from
    /// ChaCha8 seeded by `seed`.
    pub fn init(
        input: (usize, usize, usize),
        blocks: &[(usize, usize, usize, usize)],
        classes: usize,
        conv_bias: f32,
        seed: u64,
    ) -> Result<Cnn> {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let mut channels = input.2;
        let mut out = Vec::with_capacity(blocks.len());
        let sides = map_sides(input, blocks);
        for (i, &(oc, k, pad, pool)) in blocks.iter().enumerate() {
            if k == 0 || pool == 0 || sides[i].0 == 0 || sides[i].1 == 0 {
                return Err(TrainError::problem(format!(
                    "conv{}: a {k} x {k} kernel with padding {pad} and a {pool} x {pool} pool leaves no map",
                    i + 1
                )));
            }
            let fan_in = channels * k * k;
            let limit = (6.0 / fan_in as f64).sqrt() as f32;
            out.push(ConvBlock {
                name: format!("conv{}", i + 1),
                weights: Array2::from_shape_fn((oc, fan_in), |_| rng.random_range(-limit..limit)),
                bias: Array1::from_elem(oc, conv_bias),
                k,
                pad,
                pool,
            });
            channels = oc;
        }
        let (h, w) = sides.last().copied().unwrap_or((input.0, input.1));
        let flat = channels * h * w;
        let limit = (6.0 / (flat + classes) as f64).sqrt() as f32;
        Ok(Cnn {
            input,
            blocks: out,
            dense: Array2::from_shape_fn((classes, flat), |_| rng.random_range(-limit..limit)),
            dense_bias: Array1::zeros(classes),
        })
    }

    fn shape_of_blocks(&self) -> Vec<(usize, usize, usize, usize)> {
        self.blocks
            .iter()
            .map(|b| (b.weights.nrows(), b.k, b.pad, b.pool))
            .collect()
    }
}

/// `[n * h * w, c]` -> patches `[n * oh * ow, c * k * k]` in `(channel, row, column)` order,
/// zero outside the map; `oh = h + 2 pad - k + 1`.
fn im2col(a: ArrayView2<f32>, n: usize, h: usize, w: usize, k: usize, pad: usize) -> Array2<f32> {
    let c = a.ncols();
    let (oh, ow) = (h + 2 * pad + 1 - k, w + 2 * pad + 1 - k);
    let mut cols = Array2::<f32>::zeros((n * oh * ow, c * k * k));
    for s in 0..n {
        for oy in 0..oh {
            for ox in 0..ow {
                let mut row = cols.row_mut((s * oh + oy) * ow + ox);
                for i in 0..k {
                    let Some(y) = (oy + i).checked_sub(pad).filter(|&y| y < h) else {
                        continue;
                    };
                    for j in 0..k {
                        let Some(x) = (ox + j).checked_sub(pad).filter(|&x| x < w) else {
                            continue;
                        };
                        let src = a.row((s * h + y) * w + x);
                        for ch in 0..c {
                            row[(ch * k + i) * k + j] = src[ch];
                        }
                    }
                }
            }
        }
    }
    cols
}

/// The adjoint of [`im2col`]: adds every patch entry back onto its map cell.
fn col2im(
    cols: ArrayView2<f32>,
    n: usize,
    h: usize,
    w: usize,
    c: usize,
    k: usize,
    pad: usize,
) -> Array2<f32> {
    let (oh, ow) = (h + 2 * pad + 1 - k, w + 2 * pad + 1 - k);
    let mut a = Array2::<f32>::zeros((n * h * w, c));
    for s in 0..n {
        for oy in 0..oh {
            for ox in 0..ow {
                let row = cols.row((s * oh + oy) * ow + ox);
                for i in 0..k {
                    let Some(y) = (oy + i).checked_sub(pad).filter(|&y| y < h) else {
                        continue;
                    };
                    for j in 0..k {
                        let Some(x) = (ox + j).checked_sub(pad).filter(|&x| x < w) else {
                            continue;
                        };
                        let mut dst = a.row_mut((s * h + y) * w + x);
                        for ch in 0..c {
                            dst[ch] += row[(ch * k + i) * k + j];
                        }
                    }
                }
            }
        }
    }
    a
}

/// `p x p` max pool with stride `p` of `[n * h * w, c]`: the pooled map `[n * (h / p) * (w /
/// p), c]` and, per output cell, the input row that won (the first one on ties).
fn max_pool(
    a: ArrayView2<f32>,
    n: usize,
    h: usize,
    w: usize,
    p: usize,
) -> (Array2<f32>, Vec<usize>) {
    let c = a.ncols();
    let (oh, ow) = (h / p, w / p);
    let mut out = Array2::<f32>::zeros((n * oh * ow, c));
    let mut arg = vec![0usize; n * oh * ow * c];
    for s in 0..n {
        for oy in 0..oh {
            for ox in 0..ow {
                let o = (s * oh + oy) * ow + ox;
                for ch in 0..c {
                    let mut best = (s * h + oy * p) * w + ox * p;
                    for i in 0..p {
                        for j in 0..p {
                            let r = (s * h + oy * p + i) * w + ox * p + j;
                            if a[(r, ch)] > a[(best, ch)] {
                                best = r;
                            }
                        }
                    }
                    out[(o, ch)] = a[(best, ch)];
                    arg[o * c + ch] = best;
                }
            }
        }
    }
    (out, arg)
}

/// `[n * h * w, c]` -> `[n, c * h * w]` in PyTorch's flatten order.
fn flatten(a: ArrayView2<f32>, n: usize, h: usize, w: usize) -> Array2<f32> {
    let c = a.ncols();
    Array2::from_shape_fn((n, c * h * w), |(s, f)| {
        let (ch, rest) = (f / (h * w), f % (h * w));
        a[(s * h * w + rest, ch)]
    })
}

/// The adjoint (and inverse) of [`flatten`].
fn unflatten(f: ArrayView2<f32>, h: usize, w: usize, c: usize) -> Array2<f32> {
    let n = f.nrows();
    Array2::from_shape_fn((n * h * w, c), |(r, ch)| {
        let (s, rest) = (r / (h * w), r % (h * w));
        f[(s, ch * h * w + rest)]
    })
}

/// What the backward pass needs from one block's forward pass.
struct BlockCache {
    /// Map side `(h, w)` of the block's input.
    side_in: (usize, usize),
    /// The input's patches `[n * oh * ow, c * k * k]`.
    cols: Array2<f32>,
    /// Pre-activations `[n * oh * ow, out]`.
    z: Array2<f32>,
    /// Winners of the max pool (see [`max_pool`]).
    arg: Vec<usize>,
}

struct Cache {
    blocks: Vec<BlockCache>,
    /// `[n, flat]`.
    flat: Array2<f32>,
    /// Logits `[n, classes]`.
    logits: Array2<f32>,
}

fn forward_cache(net: &Cnn, x: ArrayView2<f32>) -> Cache {
    let n = x.nrows();
    let (mut h, mut w, c) = net.input;
    let mut a = x
        .as_standard_layout()
        .into_shape_with_order((n * h * w, c))
        .map(|v| v.to_owned())
        .unwrap_or_else(|_| unreachable!("a standard-layout [n, h * w * c] reshapes"));
    let mut blocks = Vec::with_capacity(net.blocks.len());
    for b in &net.blocks {
        let cols = im2col(a.view(), n, h, w, b.k, b.pad);
        let (oh, ow) = (h + 2 * b.pad + 1 - b.k, w + 2 * b.pad + 1 - b.k);
        let mut z = matmul_fixed(cols.view(), b.weights.t());
        z += &b.bias;
        let r = z.mapv(|v| v.max(0.0));
        let (p, arg) = max_pool(r.view(), n, oh, ow, b.pool);
        blocks.push(BlockCache {
            side_in: (h, w),
            cols,
            z,
            arg,
        });
        a = p;
        (h, w) = (oh / b.pool, ow / b.pool);
    }
    let flat = flatten(a.view(), n, h, w);
    let mut logits = matmul_fixed(flat.view(), net.dense.t());
    logits += &net.dense_bias;
    Cache {
        blocks,
        flat,
        logits,
    }
}

/// Gradients of the mean cross-entropy, shaped like the parameters.
#[derive(Debug, Clone, PartialEq)]
pub struct CnnGradients {
    /// Per block, like [`ConvBlock::weights`].
    pub weights: Vec<Array2<f32>>,
    /// Per block, like [`ConvBlock::bias`].
    pub bias: Vec<Array1<f32>>,
    /// Like [`Cnn::dense`].
    pub dense: Array2<f32>,
    /// Like [`Cnn::dense_bias`].
    pub dense_bias: Array1<f32>,
}

fn column_sums(a: ArrayView2<f32>) -> Array1<f32> {
    a.axis_iter(Axis(1))
        .map(|col| col.iter().map(|&v| f64::from(v)).sum::<f64>() as f32)
        .collect()
}

fn backward(net: &Cnn, labels: &[usize], cache: &Cache) -> CnnGradients {
    let n = labels.len();
    // d(mean CE)/d logits = (softmax - onehot) / n.
    let mut delta = cache.logits.clone();
    receptor::model::Activation::Softmax.apply_rows(&mut delta);
    for (mut row, &y) in delta.rows_mut().into_iter().zip(labels) {
        row[y] -= 1.0;
    }
    delta.mapv_inplace(|v| v / n as f32);
    let dense = matmul_fixed(delta.t(), cache.flat.view());
    let dense_bias = column_sums(delta.view());
    let dflat = matmul_fixed(delta.view(), net.dense.view());
    let shapes = net.shape_of_blocks();
    let sides = map_sides(net.input, &shapes);
    let last = net.blocks.len() - 1;
    let out_c = net.blocks[last].weights.nrows();
    let mut dmap = unflatten(dflat.view(), sides[last].0, sides[last].1, out_c);
    let mut weights = vec![Array2::zeros((0, 0)); net.blocks.len()];
    let mut bias = vec![Array1::zeros(0); net.blocks.len()];
    for (l, b) in net.blocks.iter().enumerate().rev() {
        let bc = &cache.blocks[l];
        let (h, w) = bc.side_in;
        // Scatter through the max pool, then through the relu.
        let mut dz = Array2::<f32>::zeros(bc.z.raw_dim());
        let c = dz.ncols();
        for (o, row) in dmap.rows().into_iter().enumerate() {
            for (ch, &g) in row.iter().enumerate() {
                dz[(bc.arg[o * c + ch], ch)] += g;
            }
        }
        dz.zip_mut_with(&bc.z, |d, &z| {
            if z <= 0.0 {
                *d = 0.0;
            }
        });
        weights[l] = matmul_fixed(dz.t(), bc.cols.view());
        bias[l] = column_sums(dz.view());
        if l > 0 {
            let dcols = matmul_fixed(dz.view(), b.weights.view());
            let in_c = b.weights.ncols() / (b.k * b.k);
            dmap = col2im(dcols.view(), n, h, w, in_c, b.k, b.pad);
        }
    }
    CnnGradients {
        weights,
        bias,
        dense,
        dense_bias,
    }
}

fn check(net: &Cnn, x: ArrayView2<f32>, labels: &[usize]) -> Result<()> {
    let (h, w, c) = net.input;
    if x.ncols() != h * w * c || x.nrows() != labels.len() || x.nrows() == 0 {
        return Err(TrainError::problem(format!(
            "training data is {} x {} with {} labels but the network takes {h} x {w} x {c} inputs",
            x.nrows(),
            x.ncols(),
            labels.len()
        )));
    }
    if net.blocks.is_empty() {
        return Err(TrainError::problem("the network has no convolution"));
    }
    if let Some(&c) = labels.iter().find(|&&c| c >= net.dense.nrows()) {
        return Err(TrainError::problem(format!(
            "label {c} is not an output unit"
        )));
    }
    Ok(())
}

/// Mean softmax cross-entropy (nats) of `net` on `x: [samples, h * w * c]` and its gradient.
#[cfg_attr(not(test), allow(dead_code))]
pub fn loss_and_gradients(
    net: &Cnn,
    x: ArrayView2<f32>,
    labels: &[usize],
) -> Result<(f64, CnnGradients)> {
    check(net, x, labels)?;
    let cache = forward_cache(net, x);
    let (loss, _) = loss_from_logits(cache.logits.view(), labels);
    Ok((loss, backward(net, labels, &cache)))
}

/// Logits `[samples, classes]` of `net` on `x: [samples, h * w * c]`.
pub fn logits(net: &Cnn, x: ArrayView2<f32>) -> Array2<f32> {
    forward_cache(net, x).logits
}

/// Mean cross-entropy and accuracy of `net` on `x` with `labels`.
pub fn evaluate(net: &Cnn, x: ArrayView2<f32>, labels: &[usize]) -> Result<(f64, f64)> {
    check(net, x, labels)?;
    let (loss, right) = loss_from_logits(logits(net, x).view(), labels);
    Ok((loss, right as f64 / labels.len() as f64))
}

/// Settings of a training run (the meaning of every field as in `train::TrainOptions`).
#[derive(Debug, Clone, PartialEq)]
pub struct CnnTrainOptions {
    /// Passes over the training set.
    pub epochs: usize,
    /// Samples per mini-batch.
    pub batch_size: usize,
    /// The update rule.
    pub optimizer: Optimizer,
    /// L2 penalty on the weights (not the biases).
    pub weight_decay: f32,
    /// Step size multiplier after every epoch.
    pub lr_decay: f32,
    /// Seed of the shuffling.
    pub seed: u64,
}

/// Trains `net` in place; returns the last epoch's mean training loss (each batch measured
/// before its update). Stops with an error when the loss or a parameter stops being finite.
pub fn train(
    net: &mut Cnn,
    x: ArrayView2<f32>,
    labels: &[usize],
    opts: &CnnTrainOptions,
) -> Result<f64> {
    check(net, x, labels)?;
    if opts.batch_size == 0 {
        return Err(TrainError::problem(
            "training batch size must be at least 1",
        ));
    }
    let samples = x.nrows();
    let mut rng = ChaCha8Rng::seed_from_u64(opts.seed);
    let mut order: Vec<usize> = (0..samples).collect();
    let mut w_slots: Vec<Slot<ndarray::Ix2>> = net
        .blocks
        .iter()
        .map(|b| Slot::new(b.weights.raw_dim()))
        .collect();
    let mut b_slots: Vec<Slot<ndarray::Ix1>> = net
        .blocks
        .iter()
        .map(|b| Slot::new(b.bias.raw_dim()))
        .collect();
    let mut d_slot = Slot::new(net.dense.raw_dim());
    let mut db_slot = Slot::new(net.dense_bias.raw_dim());
    let mut opt = opts.optimizer;
    let mut t: i32 = 0;
    let mut last_loss = f64::NAN;
    for epoch in 0..opts.epochs {
        for i in (1..samples).rev() {
            let j = rng.random_range(0..=i);
            order.swap(i, j);
        }
        let mut loss_sum = 0.0f64;
        for batch in order.chunks(opts.batch_size) {
            let xb = x.select(Axis(0), batch);
            let yb: Vec<usize> = batch.iter().map(|&i| labels[i]).collect();
            let cache = forward_cache(net, xb.view());
            let (loss, _) = loss_from_logits(cache.logits.view(), &yb);
            if !loss.is_finite() {
                return Err(TrainError::problem(format!(
                    "convolutional training diverged in epoch {epoch}: the loss is {loss}"
                )));
            }
            loss_sum += loss * batch.len() as f64;
            let mut g = backward(net, &yb, &cache);
            t = t.saturating_add(1);
            let wd = opts.weight_decay;
            for (l, b) in net.blocks.iter_mut().enumerate() {
                if wd != 0.0 {
                    g.weights[l].zip_mut_with(&b.weights, |g, &w| *g += wd * w);
                }
                w_slots[l].step(&mut b.weights, &g.weights[l], opt, t);
                b_slots[l].step(&mut b.bias, &g.bias[l], opt, t);
            }
            if wd != 0.0 {
                g.dense.zip_mut_with(&net.dense, |g, &w| *g += wd * w);
            }
            d_slot.step(&mut net.dense, &g.dense, opt, t);
            db_slot.step(&mut net.dense_bias, &g.dense_bias, opt, t);
        }
        let finite = net
            .blocks
            .iter()
            .flat_map(|b| b.weights.iter().chain(&b.bias))
            .chain(net.dense.iter().chain(&net.dense_bias))
            .all(|v| v.is_finite());
        if !finite {
            return Err(TrainError::problem(format!(
                "convolutional training diverged in epoch {epoch}: a parameter is no longer finite"
            )));
        }
        last_loss = loss_sum / samples as f64;
        opt = opt.with_learning_rate(opt.learning_rate() * opts.lr_decay);
    }
    Ok(last_loss)
}

#[cfg(test)]
mod tests {
    use super::*;
    use approx::assert_abs_diff_eq;

    fn tiny() -> (Cnn, Array2<f32>, Vec<usize>) {
        // 5 x 4 x 2 input; conv 3x3 pad 1 -> 5 x 4 x 3, pool 2 -> 2 x 2 x 3; conv 2x2 pad 0
        // -> 1 x 1 x 2, pool 1; dense 2 -> 3.
        let mut net = Cnn::init((5, 4, 2), &[(3, 3, 1, 2), (2, 2, 0, 1)], 3, 0.1, 4).unwrap();
        let mut rng = ChaCha8Rng::seed_from_u64(5);
        for b in &mut net.blocks {
            b.bias.mapv_inplace(|_| rng.random_range(-0.2..0.3));
        }
        net.dense_bias.mapv_inplace(|_| rng.random_range(-0.2..0.2));
        let x = Array2::from_shape_fn((4, 40), |_| rng.random_range(-1.0f32..1.0));
        (net, x, vec![0, 2, 1, 2])
    }

    /// Every gradient against central finite differences of the loss, (L(p + h) - L(p -
    /// h)) / 2h (common practice; the relu kinks and max-pool ties are not hit at these
    /// random points, which the agreement itself shows).
    #[test]
    fn gradients_match_central_differences() {
        let (net, x, y) = tiny();
        let (_, g) = loss_and_gradients(&net, x.view(), &y).unwrap();
        let h = 1e-3f32;
        let loss = |n: &Cnn| evaluate(n, x.view(), &y).unwrap().0;
        let fd = |edit: &dyn Fn(&mut Cnn, f32)| {
            let mut p = net.clone();
            let mut m = net.clone();
            edit(&mut p, h);
            edit(&mut m, -h);
            (loss(&p) - loss(&m)) / f64::from(2.0 * h)
        };
        let mut checked = 0;
        for l in 0..net.blocks.len() {
            for (idx, &an) in g.weights[l].indexed_iter() {
                let num = fd(&|n: &mut Cnn, d| n.blocks[l].weights[idx] += d);
                assert_abs_diff_eq!(f64::from(an), num, epsilon = 2e-4);
                checked += 1;
            }
            for (i, &an) in g.bias[l].iter().enumerate() {
                let num = fd(&|n: &mut Cnn, d| n.blocks[l].bias[i] += d);
                assert_abs_diff_eq!(f64::from(an), num, epsilon = 2e-4);
                checked += 1;
            }
        }
        for (idx, &an) in g.dense.indexed_iter() {
            let num = fd(&|n: &mut Cnn, d| n.dense[idx] += d);
            assert_abs_diff_eq!(f64::from(an), num, epsilon = 2e-4);
            checked += 1;
        }
        // 3*2*9 + 3 + 2*3*4 + 2 + 3*2 = 89 parameters.
        assert_eq!(checked, 89);
    }

    /// The convolution by patches against the definition of cross-correlation written out
    /// directly: z[o, y, x] = b[o] + sum_{c,i,j} W[o, c, i, j] * in[c, y + i - pad, x + j - pad].
    #[test]
    fn patch_convolution_matches_the_definition() {
        let (net, x, _) = tiny();
        let b = &net.blocks[0];
        let cache = forward_cache(&net, x.view());
        let (h, w, c) = net.input;
        for s in 0..x.nrows() {
            for o in 0..3 {
                for y in 0..h {
                    for xx in 0..w {
                        let mut z = f64::from(b.bias[o]);
                        for ch in 0..c {
                            for i in 0..3 {
                                for j in 0..3 {
                                    let (yy, xj) =
                                        (y as isize + i as isize - 1, xx as isize + j as isize - 1);
                                    if yy < 0 || xj < 0 || yy >= h as isize || xj >= w as isize {
                                        continue;
                                    }
                                    let v = x[(s, (yy as usize * w + xj as usize) * c + ch)];
                                    z += f64::from(b.weights[(o, (ch * 3 + i) * 3 + j)])
                                        * f64::from(v);
                                }
                            }
                        }
                        let got = cache.blocks[0].z[((s * h + y) * w + xx, o)];
                        assert_abs_diff_eq!(f64::from(got), z, epsilon = 1e-5);
                    }
                }
            }
        }
    }
}
