//! Reference data for the preferred-input search: a data prior (the data's mean and a
//! shrunk covariance) and the samples the search may start from.
//!
//! The covariance is the Ledoit-Wolf estimator (O. Ledoit & M. Wolf, "A well-conditioned
//! estimator for large-dimensional covariance matrices", Journal of Multivariate Analysis
//! 88, 2004, Lemma 3.2 and 3.3 with the normalised Frobenius norm `||A||^2 = tr(A A^T) / p`):
//! with `m` samples `x_k` centred on their mean, `S = sum_k x_k x_k^T / m`,
//! `mu = tr(S) / p`, `d^2 = ||S - mu I||^2`, `b^2 = min(d^2, sum_k ||x_k x_k^T - S||^2 / m^2)`,
//! the estimate is `(b^2 / d^2) mu I + (1 - b^2 / d^2) S`. The shrinkage `b^2 / d^2` pulls the
//! sample covariance towards a multiple of the identity, so the estimate is invertible even
//! when some inputs never vary (the border pixels of digits) or there are fewer samples than
//! inputs. The sum over samples needs no `p x p` matrix per sample:
//! `sum_k ||x_k x_k^T - S||_F^2 = sum_k ||x_k||^4 - m ||S||_F^2`.

use crate::analysis::forward::forward_trace;
use crate::error::{Error, Result};
use crate::model::Network;
use crate::probe::ProbeData;
use ndarray::{Array2, ArrayView2, s};
use std::collections::HashMap;
use std::sync::{Arc, Mutex};

/// Largest input size the data prior accepts: its precision matrix is `[inputs, inputs]`
/// (4096 inputs: 64 MiB of f32, and a few seconds to invert).
pub const PRIOR_MAX_INPUTS: usize = 4096;
/// At most this many samples (evenly spaced over the data) are used for the covariance.
const PRIOR_MAX_ROWS: usize = 20_000;
/// At most this many samples (evenly spaced) are candidates for the search's data starts:
/// the layer's pre-activations over them are computed once and kept.
const START_MAX_ROWS: usize = 2048;

/// The Ledoit-Wolf estimate of a data set's covariance (module docs).
#[derive(Debug, Clone, PartialEq)]
pub struct LedoitWolf {
    /// The column means, `[p]`.
    pub mean: Vec<f64>,
    /// The shrunk covariance, `[p, p]`.
    pub covariance: Array2<f64>,
    /// The shrinkage intensity `b^2 / d^2`, in `[0, 1]` (0 when every sample is the same).
    pub shrinkage: f64,
}

/// Evenly spaced row indices, at most `max` of `rows`.
fn spaced(rows: usize, max: usize) -> Vec<usize> {
    if rows <= max {
        return (0..rows).collect();
    }
    (0..max).map(|i| i * rows / max).collect()
}

/// The Ledoit-Wolf covariance of `data: [samples, p]` (f64 throughout).
///
/// # Errors
/// [`Error::Probe`] naming `origin` when there are fewer than 2 samples, a value is not
/// finite, or every input is constant (the estimate would be the zero matrix).
pub fn ledoit_wolf(data: ArrayView2<f32>, origin: &str) -> Result<LedoitWolf> {
    let (m, p) = data.dim();
    if m < 2 {
        return Err(Error::probe(
            origin,
            format!("a covariance needs at least 2 samples, the data has {m}"),
        ));
    }
    if data.iter().any(|v| !v.is_finite()) {
        return Err(Error::probe(origin, "the data has a NaN or infinite value"));
    }
    let mut mean = vec![0.0f64; p];
    for row in data.rows() {
        for (s, v) in mean.iter_mut().zip(row) {
            *s += f64::from(*v);
        }
    }
    mean.iter_mut().for_each(|s| *s /= m as f64);
    let xc = Array2::from_shape_fn((m, p), |(k, i)| f64::from(data[[k, i]]) - mean[i]);
    let mut sample = xc.t().dot(&xc);
    sample.mapv_inplace(|v| v / m as f64);
    let pf = p as f64;
    let mu = (0..p).map(|i| sample[[i, i]]).sum::<f64>() / pf;
    let frob2 = sample.iter().map(|v| v * v).sum::<f64>();
    // d^2 = ||S - mu I||^2 (normalised norm) = ||S||_F^2 / p - mu^2.
    let d2 = (frob2 / pf - mu * mu).max(0.0);
    let fourth: f64 = xc
        .rows()
        .into_iter()
        .map(|r| {
            let sq: f64 = r.iter().map(|v| v * v).sum();
            sq * sq
        })
        .sum();
    let bbar2 = ((fourth - m as f64 * frob2) / pf / (m as f64 * m as f64)).max(0.0);
    let b2 = bbar2.min(d2);
    if mu <= 0.0 {
        return Err(Error::probe(
            origin,
            "every input of the data is constant, so it defines no covariance",
        ));
    }
    let shrinkage = if d2 > 0.0 { b2 / d2 } else { 1.0 };
    let mut covariance = sample.mapv(|v| (1.0 - shrinkage) * v);
    for i in 0..p {
        covariance[[i, i]] += shrinkage * mu;
    }
    Ok(LedoitWolf {
        mean,
        covariance,
        shrinkage,
    })
}

/// The inverse of a symmetric positive definite matrix by its Cholesky factor (f64); `None`
/// when a pivot is not positive (not positive definite in floating point).
fn spd_inverse(a: &Array2<f64>) -> Option<Array2<f64>> {
    let n = a.nrows();
    // Lower-triangular L with a = L L^T (Cholesky-Banachiewicz, row by row).
    let mut l = Array2::<f64>::zeros((n, n));
    for i in 0..n {
        for j in 0..=i {
            let mut sum = a[[i, j]];
            for k in 0..j {
                sum -= l[[i, k]] * l[[j, k]];
            }
            if i == j {
                if sum.is_nan() || sum <= 0.0 {
                    return None;
                }
                l[[i, i]] = sum.sqrt();
            } else {
                l[[i, j]] = sum / l[[j, j]];
            }
        }
    }
    // L^-1 by forward substitution, column by column of the identity.
    let mut linv = Array2::<f64>::zeros((n, n));
    for c in 0..n {
        for i in c..n {
            let mut sum = if i == c { 1.0 } else { 0.0 };
            for k in c..i {
                sum -= l[[i, k]] * linv[[k, c]];
            }
            linv[[i, c]] = sum / l[[i, i]];
        }
    }
    // a^-1 = L^-T L^-1.
    Some(linv.t().dot(&linv))
}

/// The data prior: the penalty `(x - mean)^T Sigma^-1 (x - mean) / p` with `Sigma` the
/// Ledoit-Wolf covariance of the reference data (p inputs; a typical sample scores about 1).
#[derive(Debug, Clone)]
pub struct Prior {
    /// The data's mean, `[inputs]`.
    pub mean: Vec<f32>,
    /// `Sigma^-1`, `[inputs, inputs]`, symmetric.
    pub precision: Array2<f32>,
    /// The Ledoit-Wolf shrinkage intensity of `Sigma`.
    pub shrinkage: f64,
}

impl Prior {
    /// Fits the prior to `data: [samples, inputs]`.
    ///
    /// # Errors
    /// As [`ledoit_wolf`], and [`Error::Probe`] when there are more than
    /// [`PRIOR_MAX_INPUTS`] inputs or the covariance cannot be inverted.
    pub fn fit(data: ArrayView2<f32>, origin: &str) -> Result<Prior> {
        let p = data.ncols();
        if p > PRIOR_MAX_INPUTS {
            return Err(Error::probe(
                origin,
                format!(
                    "a data prior needs a {p} x {p} matrix; at most {PRIOR_MAX_INPUTS} inputs are supported"
                ),
            ));
        }
        let rows = spaced(data.nrows(), PRIOR_MAX_ROWS);
        let sub = data.select(ndarray::Axis(0), &rows);
        let lw = ledoit_wolf(sub.view(), origin)?;
        let inv = spd_inverse(&lw.covariance)
            .ok_or_else(|| Error::probe(origin, "the data's covariance cannot be inverted"))?;
        Ok(Prior {
            mean: lw.mean.iter().map(|&v| v as f32).collect(),
            precision: inv.mapv(|v| v as f32),
            shrinkage: lw.shrinkage,
        })
    }

    /// The penalty at `x`: `(x - mean)^T Sigma^-1 (x - mean) / p` (f64).
    pub fn penalty(&self, x: &[f32]) -> f64 {
        let d: Vec<f64> = x
            .iter()
            .zip(&self.mean)
            .map(|(a, b)| f64::from(*a) - f64::from(*b))
            .collect();
        let mut q = 0.0f64;
        for (i, row) in self.precision.rows().into_iter().enumerate() {
            let s: f64 = row.iter().zip(&d).map(|(p, dj)| f64::from(*p) * dj).sum();
            q += d[i] * s;
        }
        q / x.len().max(1) as f64
    }
}

/// Reference data for the search: the data prior and the samples it may start from (the
/// unit's top-activating samples). Shared between searches; the layer's pre-activations
/// over the start candidates are computed on first use and kept.
#[derive(Debug)]
pub struct Reference {
    prior: Prior,
    /// Start candidates, `[rows, inputs]`, clamped into the input box.
    candidates: Array2<f32>,
    /// Pre-activations of each layer over `candidates`, `[rows, units]`, by layer index.
    z: Mutex<HashMap<usize, Arc<Array2<f32>>>>,
    origin: String,
}

impl Reference {
    /// Reference data from `data` for `net` (its rows must have one value per input).
    ///
    /// # Errors
    /// [`Error::Probe`] naming the data when its width differs from the model's input,
    /// and as [`Prior::fit`].
    pub fn new(net: &Network, data: &ProbeData) -> Result<Reference> {
        let origin = data.origin.as_str();
        if data.inputs.ncols() != net.input().size {
            return Err(Error::probe(
                origin,
                format!(
                    "the data has {} columns but the model has {} inputs",
                    data.inputs.ncols(),
                    net.input().size
                ),
            ));
        }
        let prior = Prior::fit(data.inputs.view(), origin)?;
        let rows = spaced(data.inputs.nrows(), START_MAX_ROWS);
        let mut candidates = data.inputs.select(ndarray::Axis(0), &rows);
        for mut row in candidates.rows_mut() {
            for ((v, lo), hi) in row.iter_mut().zip(&net.input().low).zip(&net.input().high) {
                *v = v.clamp(*lo, *hi);
            }
        }
        Ok(Reference {
            prior,
            candidates,
            z: Mutex::new(HashMap::new()),
            origin: origin.to_string(),
        })
    }

    /// The data prior.
    pub fn prior(&self) -> &Prior {
        &self.prior
    }

    /// Where the data came from.
    pub fn origin(&self) -> &str {
        &self.origin
    }

    /// The start candidates, `[rows, inputs]`, inside the box.
    pub fn candidates(&self) -> ArrayView2<'_, f32> {
        self.candidates.view()
    }

    /// The pre-activations of `layer` over the start candidates, `[rows, units]`.
    ///
    /// # Panics
    /// When `layer` is not a layer of the network the reference was made for.
    pub fn layer_z(&self, net: &Network, layer: usize) -> Arc<Array2<f32>> {
        if let Ok(cache) = self.z.lock()
            && let Some(z) = cache.get(&layer)
        {
            return z.clone();
        }
        let mut t = forward_trace(net, self.candidates.view(), layer);
        let z = Arc::new(t.pre.swap_remove(layer));
        if let Ok(mut cache) = self.z.lock() {
            cache.insert(layer, z.clone());
        }
        z
    }
}

/// The standard deviation of each column of `z: [rows, units]` over its rows (f64 sums),
/// 0 for fewer than 2 rows.
pub(super) fn column_spread(z: ArrayView2<f32>, units: &[usize]) -> Vec<f32> {
    let m = z.nrows();
    units
        .iter()
        .map(|&u| {
            if m < 2 {
                return 0.0;
            }
            let col = z.slice(s![.., u]);
            let mean = col.iter().map(|v| f64::from(*v)).sum::<f64>() / m as f64;
            let var = col
                .iter()
                .map(|v| (f64::from(*v) - mean).powi(2))
                .sum::<f64>()
                / m as f64;
            var.sqrt() as f32
        })
        .collect()
}
