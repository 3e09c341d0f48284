//! Writing a network as a JSON file plus one safetensors side file holding every layer's
//! weights and bias as little-endian F32 tensors (`NAME.weight` `[units, inputs]`, or
//! `[out_channels, in_channels, kernel_h, kernel_w]` for conv2d,
//! `NAME.bias` `[units]`), the layout the importer reads back.

use super::network::Network;
use crate::error::{Error, Result};
use safetensors::{Dtype, tensor::TensorView};
use std::path::Path;

/// The tensor name of layer `layer`'s weights in a written side file.
pub(crate) fn weight_name(layer: &str) -> String {
    format!("{layer}.weight")
}

/// The tensor name of layer `layer`'s bias in a written side file.
pub(crate) fn bias_name(layer: &str) -> String {
    format!("{layer}.bias")
}

/// The safetensors file content of `net`'s weights and biases (F32, little-endian).
/// Names never collide: `A.weight` and `B.bias` differ in their last letter, and layer
/// names are unique. `origin` names the model in the error.
///
/// Errors: a model error when the safetensors library refuses the data (a header over its
/// size limit).
pub fn tensors_bytes(net: &Network, origin: &str) -> Result<Vec<u8>> {
    let bytes: Vec<(String, Vec<usize>, Vec<u8>)> = net
        .layers()
        .iter()
        .filter(|l| l.has_weights())
        .flat_map(|l| {
            let w: Vec<u8> = l.weights.iter().flat_map(|v| v.to_le_bytes()).collect();
            let b: Vec<u8> = l.bias.iter().flat_map(|v| v.to_le_bytes()).collect();
            // conv2d weights keep PyTorch's 4-D shape [out, in, kh, kw].
            let wshape = match l.kind {
                super::LayerKind::Conv2d(c) => {
                    vec![l.units(), c.in_channels, c.kernel[0], c.kernel[1]]
                }
                _ => vec![l.units(), l.fan_in()],
            };
            [
                (weight_name(&l.name), wshape, w),
                (bias_name(&l.name), vec![l.units()], b),
            ]
        })
        .collect();
    let mut views = Vec::with_capacity(bytes.len());
    for (name, shape, data) in &bytes {
        let view = TensorView::new(Dtype::F32, shape.clone(), data)
            .map_err(|e| Error::model(origin, format!("tensor \"{name}\": {e}")))?;
        views.push((name.clone(), view));
    }
    safetensors::serialize(views, None)
        .map_err(|e| Error::model(origin, format!("cannot build a safetensors file: {e}")))
}

/// Checks that `tensors_path` can serve as the side file of a model written to `json_path`:
/// same folder, a different file, a file name in plain text. Returns that file name.
///
/// Errors: a usage error naming `tensors_path` and the problem.
pub fn check_side_file_location<'a>(json_path: &Path, tensors_path: &'a Path) -> Result<&'a str> {
    let folder = |p: &Path| -> std::path::PathBuf {
        let parent = match p.parent() {
            Some(d) if !d.as_os_str().is_empty() => d.to_path_buf(),
            _ => std::path::PathBuf::from("."),
        };
        std::fs::canonicalize(&parent).unwrap_or(parent)
    };
    let Some(file) = tensors_path.file_name().and_then(|f| f.to_str()) else {
        return Err(Error::usage(format!(
            "{}: the tensors file needs a file name in plain text",
            tensors_path.display()
        )));
    };
    if folder(json_path) != folder(tensors_path) {
        return Err(Error::usage(format!(
            "{}: the tensors file must be in the same folder as {} (the model refers to it by file name)",
            tensors_path.display(),
            json_path.display()
        )));
    }
    if json_path.file_name() == tensors_path.file_name() {
        return Err(Error::usage(format!(
            "{}: the tensors file and the model file cannot be the same file",
            tensors_path.display()
        )));
    }
    Ok(file)
}

/// Writes `net` to `json_path` with its tensors in the side file `tensors_path`, which must
/// lie in the same folder (the JSON refers to it by file name, which the importer resolves
/// against the model's folder). The side file is written first, each file atomically
/// (temporary file, then rename); if the JSON cannot be written, a side file that did not
/// exist before is removed again.
///
/// Errors: a usage error when the two paths are in different folders or are the same file;
/// an I/O error naming the file that could not be written.
pub fn write_json_with_tensors(net: &Network, json_path: &Path, tensors_path: &Path) -> Result<()> {
    let file = check_side_file_location(json_path, tensors_path)?;
    let data = tensors_bytes(net, &json_path.display().to_string())?;
    let existed = tensors_path.exists();
    crate::atomic::write_bytes_atomic(tensors_path, &data)?;
    let r = crate::atomic::write_atomic(json_path, |w| {
        super::write::write_json_inner(net, w, Some(file))
    });
    if r.is_err() && !existed {
        let _ = std::fs::remove_file(tensors_path);
    }
    r
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::{Activation, InputSpec, Layer, Layout, LoadOptions, load};
    use ndarray::array;

    fn net() -> Network {
        let input = InputSpec {
            units: None,
            size: 3,
            layout: Layout::Vector,
            low: vec![-1.0, 0.0, 2.0],
            high: vec![1.0, 0.5, 3.0],
            names: Some(vec!["a".into(), "b".into(), "c".into()]),
        };
        let layers = vec![
            Layer {
                kind: crate::model::LayerKind::Dense,
                name: "h".into(),
                activation: Activation::LeakyRelu { alpha: 0.125 },
                weights: array![[0.1, -2.5e-7, 3.0], [1e30, -0.0, 7.25]],
                bias: array![0.3, -0.7],
                labels: None,
            },
            Layer {
                kind: crate::model::LayerKind::Dense,
                name: "out".into(),
                activation: Activation::Softmax,
                weights: array![[1.0, 2.0], [-3.0, 0.1]],
                bias: array![0.0, 0.5],
                labels: Some(vec!["no".into(), "yes".into()]),
            },
        ];
        let mut p = Network::new("test", "side", input, layers)
            .expect("valid")
            .into_parts();
        p.description = Some("round trip".into());
        Network::from_parts(p, "test").expect("valid")
    }

    #[test]
    fn json_with_side_file_round_trips_through_the_importer() {
        // Round trip through our own importer, which reads the file with the safetensors
        // crate's parser: every f32 comes back bit for bit.
        let d = tempfile::tempdir().unwrap();
        let j = d.path().join("m.json");
        let t = d.path().join("m.safetensors");
        let original = net();
        write_json_with_tensors(&original, &j, &t).expect("written");
        let text = std::fs::read_to_string(&j).unwrap();
        assert!(text.contains("\"tensor\": \"h.weight\""), "{text}");
        assert!(!text.contains("1e30"), "weights must not be inline: {text}");
        let back = load(&j, &LoadOptions::default()).expect("loads");
        assert_eq!(back, original);
        for (a, b) in back.layers().iter().zip(original.layers()) {
            for (x, y) in a.weights.iter().zip(b.weights.iter()) {
                assert_eq!(x.to_bits(), y.to_bits());
            }
        }
    }

    #[test]
    fn side_file_bytes_follow_the_safetensors_layout() {
        // safetensors format: 8-byte little-endian header length N, then N bytes of JSON
        // with dtype, shape and data_offsets per tensor, then the data.
        let bytes = tensors_bytes(&net(), "m").unwrap();
        let n = u64::from_le_bytes(bytes[..8].try_into().unwrap()) as usize;
        let header: serde_json::Value = serde_json::from_slice(&bytes[8..8 + n]).unwrap();
        assert_eq!(header["h.weight"]["dtype"], "F32");
        assert_eq!(header["h.weight"]["shape"], serde_json::json!([2, 3]));
        assert_eq!(header["out.bias"]["shape"], serde_json::json!([2]));
        let off = &header["h.bias"]["data_offsets"];
        let start = 8 + n + off[0].as_u64().unwrap() as usize;
        let first = f32::from_le_bytes(bytes[start..start + 4].try_into().unwrap());
        assert_eq!(first, 0.3);
        assert_eq!(bytes.len(), 8 + n + 4 * (6 + 2 + 4 + 2));
    }

    #[test]
    fn different_folders_and_same_file_are_refused_and_nothing_is_written() {
        let d = tempfile::tempdir().unwrap();
        let sub = d.path().join("sub");
        std::fs::create_dir(&sub).unwrap();
        let e = write_json_with_tensors(&net(), &d.path().join("m.json"), &sub.join("t.st"))
            .unwrap_err();
        assert!(e.to_string().contains("same folder"), "{e}");
        let e = write_json_with_tensors(&net(), &d.path().join("m.json"), &d.path().join("m.json"))
            .unwrap_err();
        assert!(e.to_string().contains("same file"), "{e}");
        assert_eq!(std::fs::read_dir(d.path()).unwrap().count(), 1);
    }
}
