//! Vector inputs read as named quantities: where the reference data lies per feature (its
//! 5th, 50th and 95th percentiles), the rows of a per-feature chart (name, physical unit,
//! value, the feature's box and the reference spread, in input order or strongest first),
//! and the incoming connections of a deeper unit sorted by signed weight. Both fronts draw
//! from these rows; nothing here knows how they are drawn.

use crate::model::{InputSpec, Network};
use ndarray::ArrayView2;

/// The percentiles of the reference band: its low end, middle and high end.
pub const REFERENCE_PERCENTILES: [f64; 3] = [5.0, 50.0, 95.0];

/// The `q`-th percentile (`q` in `[0, 100]`) of `sorted` (ascending, finite) by numpy's
/// default method, `numpy.percentile(a, q, method="linear")` (Hyndman & Fan 1996,
/// definition 7): with `h = (n - 1) q / 100`, the value `a[floor h] + (h - floor h)
/// (a[floor h + 1] - a[floor h])`. `None` for an empty slice or a `q` outside `[0, 100]`.
pub fn percentile_linear(sorted: &[f64], q: f64) -> Option<f64> {
    if sorted.is_empty() || !(0.0..=100.0).contains(&q) {
        return None;
    }
    let h = (sorted.len() - 1) as f64 * q / 100.0;
    let lo = h.floor() as usize;
    let hi = (lo + 1).min(sorted.len() - 1);
    let frac = h - lo as f64;
    Some(sorted[lo] + frac * (sorted[hi] - sorted[lo]))
}

/// Where one feature's reference data lies.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FeatureSpread {
    /// 5th percentile ([`percentile_linear`]).
    pub p5: f64,
    /// Median (50th percentile).
    pub median: f64,
    /// 95th percentile.
    pub p95: f64,
}

/// The spread of every column of `inputs: [rows, features]`, `[features]`. Non-finite
/// values are left out (as `numpy.nanpercentile` leaves out NaN); a column with no finite
/// value has `None`. Sorts one column at a time, so the memory is one column of `f64`.
pub fn feature_spreads(inputs: ArrayView2<'_, f32>) -> Vec<Option<FeatureSpread>> {
    let mut col: Vec<f64> = Vec::with_capacity(inputs.nrows());
    inputs
        .columns()
        .into_iter()
        .map(|c| {
            col.clear();
            col.extend(c.iter().filter(|v| v.is_finite()).map(|&v| f64::from(v)));
            col.sort_by(f64::total_cmp);
            let [a, b, c] = REFERENCE_PERCENTILES;
            Some(FeatureSpread {
                p5: percentile_linear(&col, a)?,
                median: percentile_linear(&col, b)?,
                p95: percentile_linear(&col, c)?,
            })
        })
        .collect()
}

/// The order of a chart's rows.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, serde::Serialize, serde::Deserialize)]
pub enum FeatureOrder {
    /// The model's input order.
    #[default]
    Input,
    /// Largest |strength| first (ties and non-finite strengths keep input order, at the end
    /// for non-finite).
    Strongest,
}

/// One row of a per-feature chart.
#[derive(Debug, Clone, PartialEq)]
pub struct FeatureRow {
    /// Input index.
    pub index: usize,
    /// The feature's name (`x{i}` when the model names none).
    pub name: String,
    /// The feature's physical unit, when the model gives one.
    pub unit: Option<String>,
    /// The charted value: an input value in the feature's unit, or a weight or gradient in
    /// units of z per feature unit.
    pub value: f32,
    /// Low end of the feature's box.
    pub low: f32,
    /// High end of the feature's box.
    pub high: f32,
    /// Where the reference data lies, when there is reference data.
    pub spread: Option<FeatureSpread>,
}

impl FeatureRow {
    /// Where `v` lies in the feature's box, 0 at `low` and 1 at `high`, clamped to `[0, 1]`
    /// (0.5 for a box of zero width or a non-finite `v`).
    pub fn position(&self, v: f64) -> f32 {
        let (lo, hi) = (f64::from(self.low), f64::from(self.high));
        if hi <= lo || !v.is_finite() {
            return 0.5;
        }
        ((v - lo) / (hi - lo)).clamp(0.0, 1.0) as f32
    }

    /// The value as an input quantity: "3.3 degC".
    pub fn value_text(&self) -> String {
        quantity_text(f64::from(self.value), self.unit.as_deref())
    }

    /// The value as a rate per feature unit: "+0.2606 per degC" (a weight or dz/dx).
    pub fn rate_text(&self) -> String {
        let v = signed_text(f64::from(self.value));
        match &self.unit {
            Some(u) => format!("{v} per {u}"),
            None => v,
        }
    }

    /// The box: "box -5 to 20 degC".
    pub fn box_text(&self) -> String {
        format!(
            "box {} to {}",
            number_text(f64::from(self.low)),
            quantity_text(f64::from(self.high), self.unit.as_deref())
        )
    }

    /// The reference spread: "reference data 5-95% 1.2 to 6.8, median 3.4 degC" (empty
    /// without reference data).
    pub fn spread_text(&self) -> String {
        self.spread.map_or_else(String::new, |s| {
            format!(
                "reference data 5-95% {} to {}, median {}",
                number_text(s.p5),
                number_text(s.p95),
                quantity_text(s.median, self.unit.as_deref())
            )
        })
    }
}

/// The rows of a chart of `values: [input size]` (one per feature of `spec`), with the
/// reference `spreads: [input size]` when there are any, in `order`; `Strongest` sorts by
/// `|strength[i]|` (`strength: [input size]`; the values themselves for a weight chart).
/// Extra or missing entries of `values`, `spreads` or `strength` are not read past the
/// input size; a feature without a value is left out.
pub fn feature_rows(
    spec: &InputSpec,
    values: &[f32],
    spreads: Option<&[Option<FeatureSpread>]>,
    order: FeatureOrder,
    strength: &[f32],
) -> Vec<FeatureRow> {
    let n = spec.size.min(values.len());
    let mut idx: Vec<usize> = (0..n).collect();
    if order == FeatureOrder::Strongest {
        let key = |i: usize| {
            strength
                .get(i)
                .map(|s| s.abs())
                .filter(|s| s.is_finite())
                .unwrap_or(-1.0)
        };
        // Stable: equal strengths keep input order.
        idx.sort_by(|&a, &b| key(b).total_cmp(&key(a)));
    }
    idx.into_iter()
        .map(|i| FeatureRow {
            index: i,
            name: spec.feature_name(i),
            unit: spec.feature_unit(i).map(str::to_owned),
            value: values[i],
            low: spec.low[i],
            high: spec.high[i],
            spread: spreads.and_then(|s| s.get(i).copied().flatten()),
        })
        .collect()
}

/// How far each value of `values: [spec.size]` lies from the reference median, in box
/// widths (from the box centre where a feature has no reference data), `[spec.size]`: the
/// sort key "furthest from the data first" of an input chart. 0 for a box of zero width.
pub fn distance_from_data(
    spec: &InputSpec,
    values: &[f32],
    spreads: Option<&[Option<FeatureSpread>]>,
) -> Vec<f32> {
    (0..spec.size.min(values.len()))
        .map(|i| {
            let (lo, hi) = (f64::from(spec.low[i]), f64::from(spec.high[i]));
            let mid = spreads
                .and_then(|s| s.get(i).copied().flatten())
                .map_or((lo + hi) / 2.0, |s| s.median);
            if hi > lo {
                ((f64::from(values[i]) - mid).abs() / (hi - lo)) as f32
            } else {
                0.0
            }
        })
        .collect()
}

/// The incoming connections of `unit` of layer `layer` (a dense layer above another layer)
/// as `(unit below, weight)`, most positive weight first (equal weights in unit order).
/// Empty for the first layer, a unit out of range or a layer without a weight per unit below.
pub fn incoming_by_weight(net: &Network, layer: usize, unit: usize) -> Vec<(usize, f32)> {
    let Some(l) = net.layers().get(layer) else {
        return Vec::new();
    };
    if layer == 0 || unit >= l.units() || l.kind != crate::model::LayerKind::Dense {
        return Vec::new();
    }
    let mut rows: Vec<(usize, f32)> = l.weights.row(unit).iter().copied().enumerate().collect();
    rows.sort_by(|a, b| b.1.total_cmp(&a.1));
    rows
}

/// The name of unit `i` of the layer below `layer` in an incoming-connection chart: "h1 unit
/// 12", "h1 unit 3 (door open)" for a labelled layer, and for a flattened map the place it
/// came from, "flat unit 37 (channel 2, row 1, column 5)" (channel first, then row, then
/// column: the order of `Shape::Map`). `layer` must be at least 1 and a layer of `net`.
pub fn lower_unit_name(net: &Network, layer: usize, i: usize) -> String {
    let lower = &net.layers()[layer - 1];
    if lower.labels.is_some() {
        return format!("{} unit {i} ({})", lower.name, lower.unit_name(i, ""));
    }
    if lower.kind == crate::model::LayerKind::Flatten
        && let crate::model::Shape::Map { height, width, .. } = net.input_shape_of(layer - 1)
        && height * width > 0
    {
        let (c, p) = (i / (height * width), i % (height * width));
        return format!(
            "{} unit {i} (channel {c}, row {}, column {})",
            lower.name,
            p / width,
            p % width
        );
    }
    format!("{} unit {i}", lower.name)
}

/// A number with 4 significant digits, no trailing zeros, scientific notation below 0.001
/// and from 1e6 up: "3.3", "2700", "0.0015", "1.235e6".
pub fn number_text(v: f64) -> String {
    if v == 0.0 {
        return "0".into();
    }
    if !v.is_finite() {
        return format!("{v}");
    }
    let m = v.abs();
    if !(1e-3..1e6).contains(&m) {
        let t = format!("{v:.3e}");
        return match t.split_once('e') {
            Some((mant, exp)) => format!("{}e{exp}", trim_zeros(mant)),
            None => t,
        };
    }
    let decimals = (3 - m.log10().floor() as i32).max(0) as usize;
    trim_zeros(&format!("{v:.decimals$}")).to_owned()
}

/// [`number_text`] with an explicit sign ("+0.2606", "-1.5"; "0" for zero).
pub fn signed_text(v: f64) -> String {
    let t = number_text(v);
    if v > 0.0 { format!("+{t}") } else { t }
}

/// A number and its unit: "3.3 degC", "45 %", or the bare number without a unit.
pub fn quantity_text(v: f64, unit: Option<&str>) -> String {
    match unit {
        Some(u) => format!("{} {u}", number_text(v)),
        None => number_text(v),
    }
}

fn trim_zeros(t: &str) -> &str {
    if t.contains('.') {
        t.trim_end_matches('0').trim_end_matches('.')
    } else {
        t
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::{Activation, Layer, LayerKind, Layout};
    use approx::assert_abs_diff_eq;
    use ndarray::{Array1, Array2, array};

    #[test]
    fn percentiles_match_numpy_linear() {
        // numpy 2.4.6: np.percentile([3, 1, 4, 1, 5, 9, 2, 6], [0, 5, 25, 50, 95, 100])
        // (method="linear", the default) = [1, 1, 1.75, 3.5, 7.95, 9]. By hand with
        // h = 7 q / 100 on the sorted [1, 1, 2, 3, 4, 5, 6, 9]: q = 25 -> h = 1.75 ->
        // 1 + 0.75 (2 - 1) = 1.75; q = 95 -> h = 6.65 -> 6 + 0.65 (9 - 6) = 7.95.
        let s = [1.0, 1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 9.0];
        assert_abs_diff_eq!(percentile_linear(&s, 5.0).unwrap(), 1.0, epsilon = 1e-12);
        assert_abs_diff_eq!(percentile_linear(&s, 25.0).unwrap(), 1.75, epsilon = 1e-12);
        assert_abs_diff_eq!(percentile_linear(&s, 50.0).unwrap(), 3.5, epsilon = 1e-12);
        assert_abs_diff_eq!(percentile_linear(&s, 95.0).unwrap(), 7.95, epsilon = 1e-12);
        assert_abs_diff_eq!(percentile_linear(&s, 100.0).unwrap(), 9.0, epsilon = 1e-12);
        assert_abs_diff_eq!(percentile_linear(&s, 0.0).unwrap(), 1.0, epsilon = 1e-12);
        // One value: every percentile is that value; none of an empty column.
        assert_eq!(percentile_linear(&[2.5], 95.0), Some(2.5));
        assert_eq!(percentile_linear(&[], 50.0), None);
        assert_eq!(percentile_linear(&s, 101.0), None);
    }

    #[test]
    fn spreads_per_column_skip_non_finite_values() {
        // Column 0 is 0..=20 (numpy 2.4.6: np.percentile(np.arange(21), [5, 50, 95]) =
        // [1, 10, 19]);
        // column 1 holds a NaN among 1..=4 (np.nanpercentile([1, nan, 2, 3, 4], [5, 50, 95])
        // = [1.15, 2.5, 3.85]); column 2 has only NaN.
        let mut x = Array2::<f32>::from_elem((21, 3), f32::NAN);
        for r in 0..21 {
            x[[r, 0]] = r as f32;
        }
        for (r, v) in [1.0, f32::NAN, 2.0, 3.0, 4.0].into_iter().enumerate() {
            x[[r, 1]] = v;
        }
        let s = feature_spreads(x.view());
        let a = s[0].unwrap();
        assert_abs_diff_eq!(a.p5, 1.0, epsilon = 1e-12);
        assert_abs_diff_eq!(a.median, 10.0, epsilon = 1e-12);
        assert_abs_diff_eq!(a.p95, 19.0, epsilon = 1e-12);
        let b = s[1].unwrap();
        assert_abs_diff_eq!(b.p5, 1.15, epsilon = 1e-9);
        assert_abs_diff_eq!(b.median, 2.5, epsilon = 1e-9);
        assert_abs_diff_eq!(b.p95, 3.85, epsilon = 1e-9);
        assert_eq!(s[2], None);
    }

    fn spec() -> InputSpec {
        InputSpec {
            size: 3,
            layout: Layout::Vector,
            low: vec![-5.0, 0.0, 300.0],
            high: vec![20.0, 100.0, 3000.0],
            names: Some(vec!["air".into(), "rh".into(), "co2".into()]),
            units: Some(vec!["degC".into(), "".into(), "ppm".into()]),
        }
    }

    #[test]
    fn rows_carry_name_unit_box_and_sort_by_strength() {
        let values = [0.5, -2.0, 0.001];
        let rows = feature_rows(&spec(), &values, None, FeatureOrder::Input, &values);
        assert_eq!(rows.iter().map(|r| r.index).collect::<Vec<_>>(), [0, 1, 2]);
        assert_eq!(rows[0].unit.as_deref(), Some("degC"));
        assert_eq!(rows[1].unit, None, "an empty unit counts as none");
        assert_eq!(rows[2].rate_text(), "+0.001 per ppm");
        assert_eq!(rows[0].box_text(), "box -5 to 20 degC");
        let rows = feature_rows(&spec(), &values, None, FeatureOrder::Strongest, &values);
        assert_eq!(rows.iter().map(|r| r.index).collect::<Vec<_>>(), [1, 0, 2]);
        // A NaN strength goes last; ties keep input order.
        let rows = feature_rows(
            &spec(),
            &values,
            None,
            FeatureOrder::Strongest,
            &[f32::NAN, 1.0, -1.0],
        );
        assert_eq!(rows.iter().map(|r| r.index).collect::<Vec<_>>(), [1, 2, 0]);
        // Position in the box: 7.5 degC is half way from -5 to 20; clamped outside.
        assert_abs_diff_eq!(rows[2].position(7.5), 0.5, epsilon = 1e-6);
        assert_eq!(rows[2].position(-50.0), 0.0);
        assert_eq!(rows[2].position(f64::NAN), 0.5);
    }

    #[test]
    fn distance_from_data_is_in_box_widths() {
        let spread = FeatureSpread {
            p5: 0.0,
            median: 10.0,
            p95: 20.0,
        };
        // Feature 0: |15 - 10| / 25 = 0.2 from its median; feature 1 has no data: |0 - 50|
        // / 100 = 0.5 from the box centre; feature 2: |300 - 1650| / 2700 = 0.5.
        let d = distance_from_data(
            &spec(),
            &[15.0, 0.0, 300.0],
            Some(&[Some(spread), None, None]),
        );
        assert_abs_diff_eq!(d[0], 0.2, epsilon = 1e-6);
        assert_abs_diff_eq!(d[1], 0.5, epsilon = 1e-6);
        assert_abs_diff_eq!(d[2], 0.5, epsilon = 1e-6);
    }

    #[test]
    fn incoming_connections_sort_by_signed_weight() {
        let layer = |w: Array2<f32>| Layer {
            kind: LayerKind::Dense,
            name: "l".into(),
            activation: Activation::Relu,
            bias: Array1::zeros(w.nrows()),
            weights: w,
            labels: None,
        };
        let mut a = layer(Array2::zeros((4, 2)));
        a.name = "a".into();
        let b = layer(array![[0.5, -3.0, 2.0, 0.0]]);
        let input = InputSpec {
            size: 2,
            layout: Layout::Vector,
            low: vec![0.0; 2],
            high: vec![1.0; 2],
            names: None,
            units: None,
        };
        let net = Network::new("t", "t", input, vec![a, b]).unwrap();
        assert_eq!(
            incoming_by_weight(&net, 1, 0),
            vec![(2, 2.0), (0, 0.5), (3, 0.0), (1, -3.0)]
        );
        assert_eq!(lower_unit_name(&net, 1, 3), "a unit 3");
        assert!(incoming_by_weight(&net, 0, 0).is_empty());
        assert!(incoming_by_weight(&net, 1, 9).is_empty());
    }

    #[test]
    fn flattened_units_are_named_by_channel_row_and_column() {
        // A 2 x 3 x 1 image, a 1x1 conv to 2 channels, flatten (2 x 3 x 1 -> 6), dense.
        use crate::model::LayerKind::Conv2d;
        let input = InputSpec {
            size: 6,
            layout: Layout::Image {
                height: 3,
                width: 2,
                channels: 1,
            },
            low: vec![0.0; 6],
            high: vec![1.0; 6],
            names: None,
            units: None,
        };
        let conv = Layer {
            kind: Conv2d(crate::model::Conv2d {
                in_channels: 1,
                kernel: [1, 1],
                stride: [1, 1],
                padding: [0, 0],
                dilation: [1, 1],
            }),
            name: "c".into(),
            activation: Activation::Relu,
            weights: Array2::ones((2, 1)),
            bias: Array1::zeros(2),
            labels: None,
        };
        let flat = Layer::flatten("flat");
        let fc = Layer {
            kind: LayerKind::Dense,
            name: "fc".into(),
            activation: Activation::Identity,
            weights: Array2::ones((2, 12)),
            bias: Array1::zeros(2),
            labels: None,
        };
        let net = Network::new("t", "t", input, vec![conv, flat, fc]).unwrap();
        // Channel first: 12 = 2 channels x 3 rows x 2 columns; unit 9 = channel 1
        // (9 / 6), place 3 = row 1, column 1.
        assert_eq!(
            lower_unit_name(&net, 2, 9),
            "flat unit 9 (channel 1, row 1, column 1)"
        );
    }

    #[test]
    fn numbers_keep_four_significant_digits() {
        assert_eq!(number_text(3.3), "3.3");
        assert_eq!(number_text(2700.0), "2700");
        assert_eq!(number_text(0.26058125), "0.2606");
        assert_eq!(number_text(-0.0015530525), "-0.001553");
        assert_eq!(number_text(1_234_567.0), "1.235e6");
        assert_eq!(number_text(0.0), "0");
        assert_eq!(signed_text(0.5), "+0.5");
        assert_eq!(quantity_text(-5.0, Some("degC")), "-5 degC");
    }
}
