//! receptor's own diverging colour key for signed maps (weights, preferred inputs, sensitivities),
//! and the colours of the curves of line plots ([`SERIES`]).
//!
//! The stops live in `assets/colour-key.json` as CIELAB (D65) colours at positions `t` in
//! `[-1, 1]`; they are parsed once, at first use, and a lookup table of sRGB colours is built from
//! them by interpolating linearly in CIELAB. The key is designed so that
//! - `t = 0` is a warm, nearly achromatic grey that reads as "nothing";
//! - L* at `+t` and `-t` is the same and falls linearly with `|t|`, so equal magnitudes of either
//!   sign look equally far from zero;
//! - the ends stay far apart (and far from the centre) under simulated protanopia and
//!   deuteranopia (Machado, Oliveira & Fernandes 2009);
//! - the hues are our own: heather to violet for negative values, khaki to olive for positive
//!   ones. Readers with red-green colour-vision deficiency separate colours mainly along the
//!   violet-to-yellow direction, so the arms lie on either side of it; blue against orange (the
//!   pair a widely known browser demo of neural networks uses for signed weights) and red
//!   against green are avoided (`hues_avoid_blue_orange_and_red_green`).
//!
//! The tests at the bottom check these properties and the sRGB-to-CIELAB conversion itself
//! against published reference values. `scripts/check_colour_key.py` repeats the checks with an
//! independent implementation (colour-science).
//!
//! Values are mapped to `t` by dividing by a symmetric maximum `max_abs` (see [`ScaleMode`]), so
//! a legend always shows `-max_abs … 0 … +max_abs` ([`tick_labels`]). No GUI type here: the
//! app's legend widget and its egui colours live in `app/colour.rs`.

use std::sync::OnceLock;

use serde::{Deserialize, Serialize};

/// The bundled key, compiled into the binary so that the app never depends on a data directory.
const STANDARD_JSON: &str = include_str!("../../assets/colour-key.json");

/// Entries in the lookup table. Odd, so that index `LUT_SIZE / 2` is exactly `t = 0` and the
/// table is symmetric around it.
const LUT_SIZE: usize = 2049;

// ---------------------------------------------------------------------------------------------
// Colour science: sRGB (IEC 61966-2-1), CIELAB (CIE 15), colour-vision-deficiency simulation.
// ---------------------------------------------------------------------------------------------

/// Linear sRGB -> CIE XYZ (D65). IEC 61966-2-1 prints this matrix to 4 decimals; these 7-digit
/// values are the same matrix derived from the standard's primaries and D65 white point
/// (x = 0.3127, y = 0.3290), as tabulated by B. Lindbloom (quoted from memory). With them sRGB
/// white maps to exactly the white point below, so white gets a* = b* = 0.
const SRGB_TO_XYZ: [[f64; 3]; 3] = [
    [0.412_456_4, 0.357_576_1, 0.180_437_5],
    [0.212_672_9, 0.715_152_2, 0.072_175_0],
    [0.019_333_9, 0.119_192_0, 0.950_304_1],
];

/// Inverse of [`SRGB_TO_XYZ`] (same source, quoted from memory; the test
/// `matrices_are_inverse` checks the product is the identity to 1e-6).
const XYZ_TO_SRGB: [[f64; 3]; 3] = [
    [3.240_454_2, -1.537_138_5, -0.498_531_4],
    [-0.969_266_0, 1.876_010_8, 0.041_556_0],
    [0.055_643_4, -0.204_025_9, 1.057_225_2],
];

/// CIE standard illuminant D65 white point, 2° observer, Y normalised to 1 (CIE 15; the usual
/// Xn = 0.95047, Zn = 1.08883).
const D65_WHITE: [f64; 3] = [0.950_47, 1.0, 1.088_83];

/// Machado, Oliveira & Fernandes (2009), "A Physiologically-based Model for Simulation of Color
/// Vision Deficiency", IEEE TVCG 15(6), table of simulation matrices, protanopia at severity 1.0.
/// Applied to linear RGB. Quoted from memory, then checked against the table shipped in
/// colour-science 0.4.7 (`colour.blindness.matrix_cvd_Machado2009("Protanomaly", 1.0)`), which
/// matches to all 6 printed decimals (see `scripts/check_colour_key.py`).
pub const PROTANOPIA: [[f64; 3]; 3] = [
    [0.152_286, 1.052_583, -0.204_868],
    [0.114_503, 0.786_281, 0.099_216],
    [-0.003_882, -0.048_116, 1.051_998],
];

/// Machado, Oliveira & Fernandes (2009), deuteranopia at severity 1.0, applied to linear RGB.
/// Same provenance as [`PROTANOPIA`] (from memory, checked against colour-science 0.4.7).
pub const DEUTERANOPIA: [[f64; 3]; 3] = [
    [0.367_322, 0.860_646, -0.227_968],
    [0.280_085, 0.672_501, 0.047_413],
    [-0.011_820, 0.042_940, 0.968_881],
];

fn mat_vec(m: &[[f64; 3]; 3], v: [f64; 3]) -> [f64; 3] {
    [
        m[0][0] * v[0] + m[0][1] * v[1] + m[0][2] * v[2],
        m[1][0] * v[0] + m[1][1] * v[1] + m[1][2] * v[2],
        m[2][0] * v[0] + m[2][1] * v[1] + m[2][2] * v[2],
    ]
}

/// sRGB transfer function, decoding: an 8-bit sRGB channel -> linear light in `[0, 1]`
/// (IEC 61966-2-1: linear segment below 0.04045, else ((v + 0.055) / 1.055)^2.4).
pub fn srgb8_to_linear(v: u8) -> f64 {
    let v = f64::from(v) / 255.0;
    if v <= 0.040_45 {
        v / 12.92
    } else {
        ((v + 0.055) / 1.055).powf(2.4)
    }
}

/// sRGB transfer function, encoding: linear light -> 8-bit sRGB channel (IEC 61966-2-1).
/// Values outside `[0, 1]` are clipped (out-of-gamut colours); NaN becomes 0.
pub fn linear_to_srgb8(c: f64) -> u8 {
    let c = if c.is_nan() { 0.0 } else { c.clamp(0.0, 1.0) };
    let v = if c <= 0.003_130_8 {
        12.92 * c
    } else {
        1.055 * c.powf(1.0 / 2.4) - 0.055
    };
    // In [0, 255] after the clamp, so the cast cannot wrap.
    (v * 255.0).round().clamp(0.0, 255.0) as u8
}

/// CIE 15 lightness function f(t), with the exact constants δ = 6/29 (CIE 15:2004 prints their
/// rounded forms 0.008856 and 7.787).
fn lab_f(t: f64) -> f64 {
    const DELTA: f64 = 6.0 / 29.0;
    if t > DELTA * DELTA * DELTA {
        t.cbrt()
    } else {
        t / (3.0 * DELTA * DELTA) + 4.0 / 29.0
    }
}

/// Inverse of [`lab_f`].
fn lab_f_inv(u: f64) -> f64 {
    const DELTA: f64 = 6.0 / 29.0;
    if u > DELTA {
        u * u * u
    } else {
        3.0 * DELTA * DELTA * (u - 4.0 / 29.0)
    }
}

/// Linear sRGB `[r, g, b]` -> CIELAB `[L*, a*, b*]` (D65), via CIE XYZ (CIE 15 formulas).
pub fn linear_srgb_to_lab(rgb: [f64; 3]) -> [f64; 3] {
    let xyz = mat_vec(&SRGB_TO_XYZ, rgb);
    let fx = lab_f(xyz[0] / D65_WHITE[0]);
    let fy = lab_f(xyz[1] / D65_WHITE[1]);
    let fz = lab_f(xyz[2] / D65_WHITE[2]);
    [116.0 * fy - 16.0, 500.0 * (fx - fy), 200.0 * (fy - fz)]
}

/// CIELAB `[L*, a*, b*]` (D65) -> linear sRGB, unclipped (components may leave `[0, 1]` for
/// colours outside the sRGB gamut).
pub fn lab_to_linear_srgb(lab: [f64; 3]) -> [f64; 3] {
    let fy = (lab[0] + 16.0) / 116.0;
    let fx = fy + lab[1] / 500.0;
    let fz = fy - lab[2] / 200.0;
    let xyz = [
        D65_WHITE[0] * lab_f_inv(fx),
        D65_WHITE[1] * lab_f_inv(fy),
        D65_WHITE[2] * lab_f_inv(fz),
    ];
    mat_vec(&XYZ_TO_SRGB, xyz)
}

/// 8-bit sRGB -> CIELAB (D65).
pub fn srgb8_to_lab(rgb: [u8; 3]) -> [f64; 3] {
    linear_srgb_to_lab(rgb.map(srgb8_to_linear))
}

/// CIELAB (D65) -> 8-bit sRGB, clipping out-of-gamut components.
pub fn lab_to_srgb8(lab: [f64; 3]) -> [u8; 3] {
    lab_to_linear_srgb(lab).map(linear_to_srgb8)
}

/// CIE76 colour difference ΔE*ab: Euclidean distance in CIELAB.
pub fn delta_e76(p: [f64; 3], q: [f64; 3]) -> f64 {
    ((p[0] - q[0]).powi(2) + (p[1] - q[1]).powi(2) + (p[2] - q[2]).powi(2)).sqrt()
}

/// How an 8-bit sRGB colour looks under a colour-vision-deficiency simulation matrix such as
/// [`PROTANOPIA`] or [`DEUTERANOPIA`], returned as CIELAB. The matrix is applied to linear RGB
/// (as Machado et al. 2009 specify) and the result clipped to the gamut.
pub fn simulate_lab(matrix: &[[f64; 3]; 3], rgb: [u8; 3]) -> [f64; 3] {
    let sim = mat_vec(matrix, rgb.map(srgb8_to_linear));
    linear_srgb_to_lab(sim.map(|c| c.clamp(0.0, 1.0)))
}

// ---------------------------------------------------------------------------------------------
// The key.
// ---------------------------------------------------------------------------------------------

/// One stop of the key: the CIELAB (D65) colour at position `t` in `[-1, 1]`.
#[derive(Clone, Copy, Debug, PartialEq, Deserialize, Serialize)]
pub struct Stop {
    /// Position on the key, `-1` (most negative) to `+1` (most positive), `0` is the centre.
    pub t: f32,
    /// CIELAB lightness L*, 0 to 100.
    pub l: f32,
    /// CIELAB a* (green-red axis).
    pub a: f32,
    /// CIELAB b* (blue-yellow axis).
    pub b: f32,
}

impl Stop {
    fn lab(&self) -> [f64; 3] {
        [f64::from(self.l), f64::from(self.a), f64::from(self.b)]
    }
}

/// The on-disk form of `assets/colour-key.json`.
#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct KeyFile {
    name: String,
    #[serde(default)]
    #[allow(dead_code, reason = "documentation for people reading the file")]
    about: String,
    space: String,
    no_value: [u8; 3],
    stops: Vec<Stop>,
}

/// A diverging colour key: stops in CIELAB plus a lookup table of their sRGB interpolation.
///
/// `t` runs from `-1` to `+1`, `0` is the neutral centre. Out-of-range `t` is clamped (so `±inf`
/// gives the end colours) and NaN gives [`ColourKey::no_value_rgb`].
#[derive(Clone, Debug)]
pub struct ColourKey {
    name: String,
    stops: Vec<Stop>,
    no_value: [u8; 3],
    /// `LUT_SIZE` sRGB colours at `t = -1 + 2 i / (LUT_SIZE - 1)`.
    lut: Vec<[u8; 3]>,
}

impl ColourKey {
    /// The bundled key (`assets/colour-key.json`), parsed on first use and shared afterwards.
    ///
    /// # Panics
    /// Only if the bundled asset itself is malformed, which is fixed at compile time and ruled
    /// out by the unit test `bundled_key_is_valid`; no user input reaches this.
    pub fn standard() -> &'static ColourKey {
        static KEY: OnceLock<ColourKey> = OnceLock::new();
        KEY.get_or_init(
            || match ColourKey::from_json(STANDARD_JSON, "assets/colour-key.json") {
                Ok(key) => key,
                Err(problem) => panic!("bundled colour key is invalid: {problem}"),
            },
        )
    }

    /// Parses and validates a key file. `origin` names the file in error messages.
    ///
    /// Requirements: `space` is `"CIELAB D65"`; an odd number (at least 3) of stops with finite
    /// values, `t` strictly increasing from exactly `-1` to exactly `+1`, the middle stop at
    /// `t = 0`, positions mirrored (`t[i] = -t[n-1-i]`), and `0 <= L* <= 100`.
    pub fn from_json(text: &str, origin: &str) -> Result<ColourKey, String> {
        let file: KeyFile =
            serde_json::from_str(text).map_err(|e| format!("colour key '{origin}': {e}"))?;
        if file.space != "CIELAB D65" {
            return Err(format!(
                "colour key '{origin}': space is '{}', expected 'CIELAB D65'",
                file.space
            ));
        }
        Self::from_stops(file.name, file.stops, file.no_value)
            .map_err(|problem| format!("colour key '{origin}': {problem}"))
    }

    /// Builds a key from stops (see [`ColourKey::from_json`] for the requirements) and the sRGB
    /// colour shown for NaN.
    pub fn from_stops(
        name: String,
        stops: Vec<Stop>,
        no_value: [u8; 3],
    ) -> Result<ColourKey, String> {
        let n = stops.len();
        if n < 3 || n.is_multiple_of(2) {
            return Err(format!(
                "needs an odd number of stops (at least 3), found {n}"
            ));
        }
        for (i, s) in stops.iter().enumerate() {
            if ![s.t, s.l, s.a, s.b].iter().all(|v| v.is_finite()) {
                return Err(format!("stop {i} has a non-finite value: {s:?}"));
            }
            if !(0.0..=100.0).contains(&s.l) {
                return Err(format!("stop {i}: L* = {} is outside 0..=100", s.l));
            }
            if i > 0 && s.t <= stops[i - 1].t {
                return Err(format!(
                    "stop {i}: t = {} does not increase (previous t = {})",
                    s.t,
                    stops[i - 1].t
                ));
            }
            let mirror = stops[n - 1 - i].t;
            if (s.t + mirror).abs() > 1e-6 {
                return Err(format!(
                    "stop {i}: t = {} is not mirrored by stop {} (t = {mirror})",
                    s.t,
                    n - 1 - i
                ));
            }
        }
        if stops[0].t != -1.0 || stops[n - 1].t != 1.0 {
            return Err(format!(
                "stops must run from t = -1 to t = +1, found {} to {}",
                stops[0].t,
                stops[n - 1].t
            ));
        }
        if stops[n / 2].t != 0.0 {
            return Err(format!(
                "the middle stop must be at t = 0, found {}",
                stops[n / 2].t
            ));
        }
        let mut key = ColourKey {
            name,
            stops,
            no_value,
            lut: Vec::new(),
        };
        key.lut = (0..LUT_SIZE)
            .map(|i| lab_to_srgb8(key.lab_at(lut_t(i))))
            .collect();
        Ok(key)
    }

    /// The key's name from its file.
    pub fn name(&self) -> &str {
        &self.name
    }

    /// The stops, in increasing `t`.
    pub fn stops(&self) -> &[Stop] {
        &self.stops
    }

    /// The exact CIELAB colour at `t` (clamped to `[-1, 1]`), interpolated linearly between
    /// stops; `None` for NaN.
    pub fn lab(&self, t: f32) -> Option<[f64; 3]> {
        if t.is_nan() {
            None
        } else {
            Some(self.lab_at(f64::from(t.clamp(-1.0, 1.0))))
        }
    }

    fn lab_at(&self, t: f64) -> [f64; 3] {
        let t = t.clamp(-1.0, 1.0);
        // Stops are few (9), a linear scan is simplest; this runs only when building the LUT.
        let upper = self
            .stops
            .iter()
            .position(|s| f64::from(s.t) >= t)
            .unwrap_or(self.stops.len() - 1)
            .max(1);
        let (s0, s1) = (&self.stops[upper - 1], &self.stops[upper]);
        let (t0, t1) = (f64::from(s0.t), f64::from(s1.t));
        let w = ((t - t0) / (t1 - t0)).clamp(0.0, 1.0);
        let (p, q) = (s0.lab(), s1.lab());
        [0, 1, 2].map(|k| p[k] + w * (q[k] - p[k]))
    }

    /// The 8-bit sRGB colour for `t` in `[-1, 1]` (clamped; `0` is the neutral centre; NaN gives
    /// [`ColourKey::no_value_rgb`]). A table lookup, cheap enough for every pixel of a map.
    pub fn rgb(&self, t: f32) -> [u8; 3] {
        if t.is_nan() {
            return self.no_value;
        }
        let t = f64::from(t.clamp(-1.0, 1.0));
        // In [0, LUT_SIZE - 1] after the clamp.
        let i = ((t + 1.0) * 0.5 * (LUT_SIZE - 1) as f64).round() as usize;
        self.lut[i.min(LUT_SIZE - 1)]
    }

    /// The 8-bit sRGB colour for a raw value `v` on a symmetric scale `[-max_abs, +max_abs]`:
    /// `v / max_abs` through [`ColourKey::rgb`]. When `max_abs` is zero or not finite every
    /// finite value maps to the centre (an all-zero map shows as "nothing"); NaN values give the
    /// no-value colour.
    pub fn rgb_scaled(&self, v: f32, max_abs: f32) -> [u8; 3] {
        self.rgb(normalise(v, max_abs))
    }

    /// The sRGB colour shown for NaN ("no value"): a vivid yellow, far from every colour of the
    /// key also under simulated protanopia and deuteranopia (checked in the tests).
    pub fn no_value_rgb(&self) -> [u8; 3] {
        self.no_value
    }
}

/// `t` of lookup-table entry `i`.
fn lut_t(i: usize) -> f64 {
    -1.0 + 2.0 * i as f64 / (LUT_SIZE - 1) as f64
}

/// `v / max_abs`, or 0 when `max_abs` is zero, negative or not finite; NaN stays NaN so that it
/// still shows as "no value".
pub fn normalise(v: f32, max_abs: f32) -> f32 {
    if v.is_nan() {
        f32::NAN
    } else if max_abs.is_finite() && max_abs > 0.0 {
        v / max_abs
    } else {
        0.0
    }
}

/// Largest finite `|v|` in `values` (0 for an empty or all-NaN/inf slice): the symmetric scale of
/// a map. Accumulated in f32, exact for a maximum.
pub fn symmetric_max(values: &[f32]) -> f32 {
    values
        .iter()
        .filter(|v| v.is_finite())
        .fold(0.0_f32, |m, v| m.max(v.abs()))
}

/// Where the symmetric scale of a map comes from.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Deserialize, Serialize)]
pub enum ScaleMode {
    /// Each unit's map is scaled by its own largest `|value|`: shows the pattern of every unit at
    /// full contrast, but colours cannot be compared between units (a dead unit with weights of
    /// 3e-4 looks as vivid as the strongest one).
    PerUnit,
    /// All units of a layer share the layer's largest `|value|`: colours are comparable across
    /// the layer, weak units look faint. The default, because it does not mislead.
    #[default]
    SharedLayer,
}

impl ScaleMode {
    /// Both modes, for a toggle.
    pub const ALL: [ScaleMode; 2] = [ScaleMode::PerUnit, ScaleMode::SharedLayer];

    /// Short plain label for a toggle.
    pub fn label(self) -> &'static str {
        match self {
            ScaleMode::PerUnit => "Scale per unit",
            ScaleMode::SharedLayer => "Scale shared by layer",
        }
    }

    /// How a legend's caption names the scale of the map of `unit` in `layer`: "scale shared
    /// by layer h1" or "scale of h1 unit 5 alone".
    pub fn caption(self, layer: &str, unit: usize) -> String {
        match self {
            ScaleMode::PerUnit => format!("scale of {layer} unit {unit} alone"),
            ScaleMode::SharedLayer => format!("scale shared by layer {layer}"),
        }
    }

    /// The `max_abs` to use: the unit's own or the layer's.
    pub fn pick(self, unit_max_abs: f32, layer_max_abs: f32) -> f32 {
        match self {
            ScaleMode::PerUnit => unit_max_abs,
            ScaleMode::SharedLayer => layer_max_abs,
        }
    }
}

// ---------------------------------------------------------------------------------------------
// Legend text (the widget that draws it is the app's).
// ---------------------------------------------------------------------------------------------

/// Formats one tick value: "0" for zero, an explicit sign otherwise, at most 3 significant
/// digits without trailing zeros ("+0.42", "-1.5", "+250"), and scientific notation for
/// magnitudes below 0.01 or from 10 000 up ("+4.2e-3").
pub fn format_tick(v: f32) -> String {
    let body = super::format::sig_between(f64::from(v), 3, 0.01, 10_000.0);
    if v > 0.0 { format!("+{body}") } else { body }
}

/// The five tick labels of a legend, from most negative to most positive:
/// `-max, -max/2, 0, +max/2, +max`. For a zero or non-finite `max_abs` only "0" is meaningful
/// and the other four are empty.
pub fn tick_labels(max_abs: f32) -> [String; 5] {
    if !(max_abs.is_finite() && max_abs > 0.0) {
        return [
            String::new(),
            String::new(),
            "0".to_owned(),
            String::new(),
            String::new(),
        ];
    }
    [-1.0, -0.5, 0.0, 0.5, 1.0].map(|f| format_tick(f * max_abs))
}

/// The accessible description of a legend, also its hover text: "`label` colour key, -0.42 to
/// +0.42" (or "… all values zero" when there is no scale).
pub fn legend_description(max_abs: f32, label: &str) -> String {
    let ticks = tick_labels(max_abs);
    // A caption may run over two lines in the legend; its description is one line.
    let label = label.replace('\n', ", ");
    let head = if label.is_empty() {
        "colour key".to_owned()
    } else {
        format!("{label} colour key")
    };
    if ticks[0].is_empty() {
        format!("{head}, all values zero")
    } else {
        format!("{head}, {} to {}", ticks[0], ticks[4])
    }
}

/// Colours of the series of a line plot, one per curve: the palette of M. Okabe and K. Ito,
/// "Color Universal Design (CUD): how to make figures and presentations that are friendly to
/// colorblind people" (2008), in the order sky blue, orange, bluish green, vermillion,
/// reddish purple, blue, yellow. Their black is left out: it vanishes on a dark background.
/// The test `series_colours_stay_apart` checks the pairwise CIELAB distances, also under
/// simulated protanopia and deuteranopia.
pub const SERIES: [[u8; 3]; 7] = [
    [0x56, 0xB4, 0xE9],
    [0xE6, 0x9F, 0x00],
    [0x00, 0x9E, 0x73],
    [0xD5, 0x5E, 0x00],
    [0xCC, 0x79, 0xA7],
    [0x00, 0x72, 0xB2],
    [0xF0, 0xE4, 0x42],
];

/// The colour of series `i` (the palette repeats after [`SERIES`]`.len()` series; a plot with
/// more curves tells the repeats apart by line style).
pub fn series_rgb(i: usize) -> [u8; 3] {
    SERIES[i % SERIES.len()]
}

#[cfg(test)]
mod tests {
    use super::*;
    use approx::assert_abs_diff_eq;

    fn key() -> &'static ColourKey {
        ColourKey::standard()
    }

    /// `t` values -1, -1 + 1/200, ..., 1.
    fn samples() -> impl Iterator<Item = f32> {
        (0..=400).map(|i| -1.0 + i as f32 / 200.0)
    }

    fn chroma(lab: [f64; 3]) -> f64 {
        lab[1].hypot(lab[2])
    }

    // --- sRGB / CIELAB conversion against published values --------------------------------

    #[test]
    fn matrices_are_inverse() {
        for col in 0..3 {
            let mut e = [0.0; 3];
            e[col] = 1.0;
            let back = mat_vec(&XYZ_TO_SRGB, mat_vec(&SRGB_TO_XYZ, e));
            for (row, got) in back.iter().enumerate() {
                let want = if row == col { 1.0 } else { 0.0 };
                assert_abs_diff_eq!(*got, want, epsilon = 1e-6);
            }
        }
    }

    #[test]
    fn srgb_transfer_function_matches_iec_61966_2_1() {
        // IEC 61966-2-1: the two segments meet at 0.04045 (encoded) / 0.0031308 (linear).
        assert_abs_diff_eq!(srgb8_to_linear(0), 0.0, epsilon = 1e-12);
        assert_abs_diff_eq!(srgb8_to_linear(255), 1.0, epsilon = 1e-12);
        // 128/255 -> 0.21586 (value quoted from memory, tolerance 1e-5).
        assert_abs_diff_eq!(srgb8_to_linear(128), 0.215_86, epsilon = 1e-5);
        // 10/255 = 0.0392 lies on the linear segment: 0.0392157 / 12.92.
        assert_abs_diff_eq!(srgb8_to_linear(10), 10.0 / 255.0 / 12.92, epsilon = 1e-12);
        // Encoding inverts decoding for every 8-bit value.
        for v in 0..=255_u8 {
            assert_eq!(linear_to_srgb8(srgb8_to_linear(v)), v);
        }
        assert_eq!(linear_to_srgb8(-0.5), 0);
        assert_eq!(linear_to_srgb8(1.5), 255);
        assert_eq!(linear_to_srgb8(f64::NAN), 0);
    }

    #[test]
    fn srgb_to_lab_matches_reference_values() {
        // CIE 15 CIELAB with D65 white (Xn = 0.95047, Yn = 1, Zn = 1.08883) and IEC 61966-2-1
        // sRGB. Reference values are the commonly quoted ones, from memory, given to 2 decimals;
        // tolerance 0.01. colour-science 0.4.7 gives 53.23 / 80.11 / 67.22 for red because it
        // rounds the sRGB matrix to the 4 decimals printed in the standard.
        let cases: [([u8; 3], [f64; 3]); 5] = [
            ([255, 255, 255], [100.0, 0.0, 0.0]),
            ([0, 0, 0], [0.0, 0.0, 0.0]),
            ([255, 0, 0], [53.24, 80.09, 67.20]),
            ([0, 255, 0], [87.73, -86.18, 83.18]),
            ([0, 0, 255], [32.30, 79.19, -107.86]),
        ];
        for (rgb, want) in cases {
            let lab = srgb8_to_lab(rgb);
            for k in 0..3 {
                assert_abs_diff_eq!(lab[k], want[k], epsilon = 0.01);
            }
        }
        // Mid grey 119 is the usual "L* = 50" grey (from memory: 50.03); greys have a* = b* = 0.
        let grey = srgb8_to_lab([119, 119, 119]);
        assert_abs_diff_eq!(grey[0], 50.03, epsilon = 0.02);
        assert_abs_diff_eq!(grey[1], 0.0, epsilon = 0.01);
        assert_abs_diff_eq!(grey[2], 0.0, epsilon = 0.01);
    }

    #[test]
    fn lab_round_trip() {
        for rgb in [[12, 200, 99], [250, 3, 140], [77, 77, 200], [1, 2, 3]] {
            assert_eq!(lab_to_srgb8(srgb8_to_lab(rgb)), rgb);
        }
    }

    #[test]
    fn stops_agree_with_colour_science() {
        // sRGB of the nine stops of assets/colour-key.json as computed by colour-science 0.4.7
        // (`scripts/check_colour_key.py`, Lab_to_XYZ with D65 then XYZ_to_sRGB). colour-science
        // uses the 4-decimal sRGB matrix, so channels may differ by 1.
        let fixture: [[u8; 3]; 9] = FIXTURE_STOP_SRGB;
        for (stop, want) in key().stops().iter().zip(fixture) {
            let got = lab_to_srgb8(stop.lab());
            for k in 0..3 {
                assert!(
                    (i32::from(got[k]) - i32::from(want[k])).abs() <= 1,
                    "stop t = {}: {got:?} vs colour-science {want:?}",
                    stop.t
                );
            }
        }
    }

    /// Generated by `scripts/check_colour_key.py` (colour-science 0.4.7, numpy 2.4).
    const FIXTURE_STOP_SRGB: [[u8; 3]; 9] = [
        [88, 56, 120],
        [113, 92, 154],
        [140, 130, 182],
        [172, 169, 202],
        [215, 209, 202],
        [180, 173, 138],
        [148, 138, 83],
        [114, 103, 43],
        [81, 71, 10],
    ];

    // --- the stops file -----------------------------------------------------------------------

    #[test]
    fn bundled_key_is_valid() {
        let key = ColourKey::from_json(STANDARD_JSON, "assets/colour-key.json");
        let key = match key {
            Ok(k) => k,
            Err(e) => panic!("{e}"),
        };
        let stops = key.stops();
        assert_eq!(stops.len() % 2, 1, "odd number of stops");
        assert!(stops.len() >= 5);
        let n = stops.len();
        assert_eq!(stops[n / 2].t, 0.0);
        for i in 0..n {
            assert_abs_diff_eq!(stops[i].t, -stops[n - 1 - i].t, epsilon = 1e-6);
            // Lightness is mirrored exactly in the file (to its 2 decimals).
            assert_abs_diff_eq!(stops[i].l, stops[n - 1 - i].l, epsilon = 0.005);
        }
        assert!(!key.name().is_empty());
    }

    #[test]
    fn malformed_keys_are_rejected_with_a_reason() {
        let good = r#"{"name":"x","space":"CIELAB D65","no_value":[0,0,0],"stops":[
            {"t":-1,"l":30,"a":0,"b":-30},{"t":0,"l":80,"a":0,"b":0},{"t":1,"l":30,"a":0,"b":30}]}"#;
        assert!(ColourKey::from_json(good, "good.json").is_ok());
        let cases = [
            (
                good.replace(r#"{"t":0,"l":80,"a":0,"b":0},"#, ""),
                "odd number",
            ),
            (good.replace(r#""t":0,"#, r#""t":0.1,"#), "not mirrored"),
            (good.replace(r#""t":1,"#, r#""t":0.9,"#), "not mirrored"),
            (good.replace(r#""l":80"#, r#""l":180"#), "outside 0..=100"),
            (good.replace("CIELAB D65", "sRGB"), "expected 'CIELAB D65'"),
            (good.replace(r#""name":"x","#, ""), "missing field `name`"),
            ("{".to_owned(), "EOF"),
        ];
        for (text, needle) in cases {
            match ColourKey::from_json(&text, "bad.json") {
                Ok(_) => panic!("accepted: {text}"),
                Err(e) => {
                    assert!(e.contains("bad.json"), "{e}");
                    assert!(e.contains(needle), "expected '{needle}' in: {e}");
                }
            }
        }
        let decreasing = vec![
            Stop {
                t: -1.0,
                l: 30.0,
                a: 0.0,
                b: 0.0,
            },
            Stop {
                t: 0.5,
                l: 50.0,
                a: 0.0,
                b: 0.0,
            },
            Stop {
                t: 0.0,
                l: 80.0,
                a: 0.0,
                b: 0.0,
            },
            Stop {
                t: -0.5,
                l: 50.0,
                a: 0.0,
                b: 0.0,
            },
            Stop {
                t: 1.0,
                l: 30.0,
                a: 0.0,
                b: 0.0,
            },
        ];
        let err = ColourKey::from_stops("d".into(), decreasing, [0; 3]).err();
        assert!(err.is_some_and(|e| e.contains("does not increase")));
    }

    // --- perceptual properties ----------------------------------------------------------------

    #[test]
    fn lightness_is_symmetric_and_monotone() {
        // Design requirement of issue 3: equal |t| gives equal L*; checked on the 8-bit output
        // the user actually sees (quantisation costs up to ~0.3 L*), tolerance 1 L*.
        let centre = srgb8_to_lab(key().rgb(0.0))[0];
        let mut previous = 0.0;
        for i in 0..=200 {
            let t = i as f32 / 200.0;
            let lp = srgb8_to_lab(key().rgb(t))[0];
            let ln = srgb8_to_lab(key().rgb(-t))[0];
            assert!(
                (lp - ln).abs() < 1.0,
                "t = {t}: L*(+t) = {lp:.2}, L*(-t) = {ln:.2}"
            );
            // |ΔL*| from the centre grows with |t| (0.5 allowance for 8-bit rounding).
            let dl = centre - 0.5 * (lp + ln);
            assert!(
                dl >= previous - 0.5,
                "t = {t}: |ΔL*| {dl:.2} fell below {previous:.2}"
            );
            previous = previous.max(dl);
            // The exact interpolation is strictly monotone along each arm.
            if i > 0 {
                let before = key().lab(t - 0.005).map(|l| l[0]).unwrap_or(f64::NAN);
                let here = key().lab(t).map(|l| l[0]).unwrap_or(f64::NAN);
                assert!(here < before, "L* not decreasing at t = {t}");
                let before_n = key().lab(-(t - 0.005)).map(|l| l[0]).unwrap_or(f64::NAN);
                let here_n = key().lab(-t).map(|l| l[0]).unwrap_or(f64::NAN);
                assert!(here_n < before_n, "L* not decreasing at t = -{t}");
            }
        }
        // A usable range: the ends are at least 40 L* darker than the centre.
        assert!(previous > 40.0, "lightness range only {previous:.1}");
    }

    #[test]
    fn key_stays_inside_the_srgb_gamut() {
        // Clipping would distort the designed lightness; allow only rounding-level excess.
        for t in samples() {
            let lab = key().lab(t).unwrap_or([f64::NAN; 3]);
            let lin = lab_to_linear_srgb(lab);
            for c in lin {
                assert!(
                    (-1e-3..=1.0 + 1e-3).contains(&c),
                    "t = {t}: linear sRGB {lin:?}"
                );
            }
            let seen = srgb8_to_lab(key().rgb(t));
            assert!(
                delta_e76(seen, lab) < 1.0,
                "t = {t}: shown {seen:?}, designed {lab:?}"
            );
        }
    }

    #[test]
    fn centre_is_a_neutral_light_grey() {
        let lab = srgb8_to_lab(key().rgb(0.0));
        // "Reads as nothing": nearly achromatic (C* < 5, common practice, no source) and light.
        assert!(chroma(lab) < 5.0, "centre chroma {:.2}", chroma(lab));
        assert!(lab[0] > 75.0 && lab[0] < 92.0, "centre L* {:.2}", lab[0]);
        // Warm: a slight yellow-red tint rather than blue.
        assert!(lab[2] > 0.0 && lab[1] >= 0.0);
        // Not plain black/white: the ends are chromatic.
        assert!(chroma(srgb8_to_lab(key().rgb(-1.0))) > 30.0);
        assert!(chroma(srgb8_to_lab(key().rgb(1.0))) > 30.0);
    }

    #[test]
    fn ends_stay_distinct_under_simulated_colour_blindness() {
        // Machado, Oliveira & Fernandes (2009) at severity 1.0; ΔE is CIE76. Threshold 40 is
        // the issue's requirement (a common-practice "clearly different" margin, no source).
        let (neg, mid, pos) = (key().rgb(-1.0), key().rgb(0.0), key().rgb(1.0));
        let visions: [(&str, [[f64; 3]; 3]); 3] = [
            (
                "normal",
                [[1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]],
            ),
            ("protanopia", PROTANOPIA),
            ("deuteranopia", DEUTERANOPIA),
        ];
        for (name, m) in visions {
            let (n, c, p) = (
                simulate_lab(&m, neg),
                simulate_lab(&m, mid),
                simulate_lab(&m, pos),
            );
            let ends = delta_e76(n, p);
            let neg_c = delta_e76(n, c);
            let pos_c = delta_e76(p, c);
            println!(
                "{name}: ends {ends:.1}, negative-centre {neg_c:.1}, positive-centre {pos_c:.1}"
            );
            assert!(ends > 40.0, "{name}: ends only ΔE {ends:.1} apart");
            assert!(
                neg_c > 40.0,
                "{name}: negative end only ΔE {neg_c:.1} from centre"
            );
            assert!(
                pos_c > 40.0,
                "{name}: positive end only ΔE {pos_c:.1} from centre"
            );
            // Equal magnitudes of opposite sign stay apart along the whole outer part.
            for i in 0..=15 {
                let t = 0.25 + 0.05 * i as f32;
                let d = delta_e76(
                    simulate_lab(&m, key().rgb(t)),
                    simulate_lab(&m, key().rgb(-t)),
                );
                assert!(d > 30.0, "{name}: ±{t} only ΔE {d:.1} apart");
            }
        }
    }

    #[test]
    fn machado_matrices_keep_white_white() {
        // Each row of the published matrices sums to 1 (achromatic colours are unchanged);
        // a typo in a digit would break this.
        for m in [PROTANOPIA, DEUTERANOPIA] {
            for row in m {
                assert_abs_diff_eq!(row.iter().sum::<f64>(), 1.0, epsilon = 2e-6);
            }
        }
    }

    #[test]
    fn no_value_colour_is_far_from_the_key() {
        let nan = key().rgb(f32::NAN);
        assert_eq!(nan, key().no_value_rgb());
        for m in [
            [[1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]],
            PROTANOPIA,
            DEUTERANOPIA,
        ] {
            let v = simulate_lab(&m, nan);
            let closest = samples()
                .map(|t| delta_e76(v, simulate_lab(&m, key().rgb(t))))
                .fold(f64::INFINITY, f64::min);
            assert!(
                closest > 40.0,
                "no-value colour within ΔE {closest:.1} of the key"
            );
        }
    }

    #[test]
    fn hues_avoid_blue_orange_and_red_green() {
        // CIELAB hue angle h = atan2(b*, a*) (CIE 15). Common-practice hue ranges, no source:
        // blue about 250-290 degrees, orange 35-75, red 15-45, green 120-180. Each end of the
        // key (and every stop with chroma above 10) keeps out of blue and orange; the two arms
        // are not red against green; and neither arm is the other's blue/orange partner.
        let hue = |lab: [f64; 3]| lab[2].atan2(lab[1]).to_degrees().rem_euclid(360.0);
        let in_range = |h: f64, lo: f64, hi: f64| (lo..=hi).contains(&h);
        for s in key().stops() {
            let lab = s.lab();
            if chroma(lab) < 10.0 {
                continue;
            }
            let h = hue(lab);
            assert!(
                !in_range(h, 250.0, 290.0),
                "stop t = {}: blue hue {h:.0}",
                s.t
            );
            assert!(
                !in_range(h, 35.0, 75.0),
                "stop t = {}: orange hue {h:.0}",
                s.t
            );
        }
        let neg = hue(srgb8_to_lab(key().rgb(-1.0)));
        let pos = hue(srgb8_to_lab(key().rgb(1.0)));
        let red = |h: f64| in_range(h, 15.0, 45.0) || in_range(h, 345.0, 360.0);
        let green = |h: f64| in_range(h, 120.0, 180.0);
        assert!(!((red(neg) && green(pos)) || (green(neg) && red(pos))));
        // The arms sit on either side of the violet-yellow direction that red-green deficient
        // readers keep: b* negative on the negative arm, positive on the positive arm.
        assert!(srgb8_to_lab(key().rgb(-1.0))[2] < -20.0);
        assert!(srgb8_to_lab(key().rgb(1.0))[2] > 20.0);
        assert_eq!(key().name(), "heather and olive");
    }

    // --- mapping ------------------------------------------------------------------------------

    #[test]
    fn clamping_and_special_values() {
        let k = key();
        assert_eq!(k.rgb(3.0), k.rgb(1.0));
        assert_eq!(k.rgb(-7.5), k.rgb(-1.0));
        assert_eq!(k.rgb(f32::INFINITY), k.rgb(1.0));
        assert_eq!(k.rgb(f32::NEG_INFINITY), k.rgb(-1.0));
        assert_eq!(k.rgb(-0.0), k.rgb(0.0));
        assert_ne!(k.rgb(1.0), k.rgb(-1.0));
        assert_ne!(k.rgb(0.0), k.rgb(1.0));
        assert!(k.lab(f32::NAN).is_none());
        // The table reproduces the stops themselves.
        for s in k.stops() {
            assert_eq!(k.rgb(s.t), lab_to_srgb8(s.lab()));
        }
        // Scaling: value / max_abs, zero or bad max maps everything finite to the centre.
        assert_eq!(k.rgb_scaled(0.21, 0.42), k.rgb(0.5));
        assert_eq!(k.rgb_scaled(-0.84, 0.42), k.rgb(-1.0));
        assert_eq!(k.rgb_scaled(5.0, 0.0), k.rgb(0.0));
        assert_eq!(k.rgb_scaled(-0.21, 0.42), k.rgb(-0.5));
        assert_eq!(k.rgb_scaled(f32::NAN, 0.42), k.no_value_rgb());
        assert_eq!(k.rgb_scaled(5.0, f32::NAN), k.rgb(0.0));
        assert_eq!(k.rgb_scaled(f32::NAN, 1.0), k.rgb(f32::NAN));
    }

    #[test]
    fn symmetric_max_and_scale_mode() {
        assert_eq!(symmetric_max(&[]), 0.0);
        assert_eq!(symmetric_max(&[0.1, -0.42, 0.3]), 0.42);
        assert_eq!(symmetric_max(&[f32::NAN, f32::INFINITY, -2.0]), 2.0);
        assert_eq!(ScaleMode::PerUnit.pick(0.1, 0.9), 0.1);
        assert_eq!(ScaleMode::SharedLayer.pick(0.1, 0.9), 0.9);
        assert_eq!(ScaleMode::default(), ScaleMode::SharedLayer);
        assert_eq!(
            ScaleMode::SharedLayer.caption("h1", 5),
            "scale shared by layer h1"
        );
        assert_eq!(
            ScaleMode::PerUnit.caption("h1", 5),
            "scale of h1 unit 5 alone"
        );
        assert_ne!(ScaleMode::PerUnit.label(), ScaleMode::SharedLayer.label());
    }

    // --- legend -------------------------------------------------------------------------------

    #[test]
    fn tick_labels_are_symmetric() {
        assert_eq!(
            tick_labels(0.42),
            ["-0.42", "-0.21", "0", "+0.21", "+0.42"].map(String::from)
        );
        assert_eq!(
            tick_labels(3.0),
            ["-3", "-1.5", "0", "+1.5", "+3"].map(String::from)
        );
        assert_eq!(tick_labels(0.4237)[4], "+0.424");
        assert_eq!(tick_labels(25_000.0)[4], "+2.5e4");
        assert_eq!(tick_labels(100.0)[0], "-100");
        assert_eq!(tick_labels(250.0)[4], "+250");
        assert_eq!(tick_labels(0.0042)[0], "-4.2e-3");
        assert_eq!(tick_labels(0.0)[2], "0");
        assert!(tick_labels(0.0)[0].is_empty());
        assert!(tick_labels(f32::NAN)[4].is_empty());
        assert_eq!(
            legend_description(0.42, "weight"),
            "weight colour key, -0.42 to +0.42"
        );
        assert_eq!(legend_description(0.0, ""), "colour key, all values zero");
    }

    #[test]
    fn series_colours_stay_apart() {
        // Pairwise CIELAB distance (CIE 1976) of the plot series colours, with normal vision
        // and under Machado et al. (2009) protanopia and deuteranopia; and each colour's
        // distance from egui's dark panel grey (27, 27, 27). Measured minima: 26.4 (sky
        // blue / blue), 20.7 (protanopia), 17.0 (deuteranopia, orange / yellow), 55.0.
        let normal = |c: [u8; 3]| srgb8_to_lab(c);
        let prot = |c: [u8; 3]| simulate_lab(&PROTANOPIA, c);
        let deut = |c: [u8; 3]| simulate_lab(&DEUTERANOPIA, c);
        for (vision, lab, least) in [
            ("normal", &normal as &dyn Fn([u8; 3]) -> [f64; 3], 25.0),
            ("protanopia", &prot, 15.0),
            ("deuteranopia", &deut, 15.0),
        ] {
            for (i, a) in SERIES.iter().enumerate() {
                for b in &SERIES[i + 1..] {
                    let d = delta_e76(lab(*a), lab(*b));
                    assert!(d >= least, "{vision}: {a:?} and {b:?} only {d:.1} apart");
                }
            }
        }
        let dark = srgb8_to_lab([27, 27, 27]);
        for c in SERIES {
            assert!(
                delta_e76(srgb8_to_lab(c), dark) >= 50.0,
                "{c:?} on dark grey"
            );
        }
        assert_eq!(series_rgb(SERIES.len()), SERIES[0]);
    }
}
