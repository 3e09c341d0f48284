//! Checkpoint series: the model files saved during one training run, in training order.
//!
//! A series is one folder (every `.json` and `.onnx` file directly in it) or a list of
//! model files. Order: by the top-level `"step"` of each file when every file has one
//! (two files with the same step are refused), else, when no file has one, by the natural
//! order of the file names (`ckpt-2` before `ckpt-10`); a series where some files have a
//! step and others do not is refused (the order would be a guess).
//!
//! Listing reads only each file's `"step"` (the JSON is parsed past, nothing else is built;
//! ONNX files carry no step). [`Series::networks`] then loads one checkpoint at a time, so
//! a caller that drops each [`Network`] before asking for the next holds one checkpoint's
//! weights. Every checkpoint must have the architecture of the first: the same input size
//! and the same layers (names, types, activations and weight shapes), else
//! [`Error::ArchitectureMismatch`] names the file and the first difference.

use super::{LoadOptions, Network, is_onnx, load};
use crate::error::{Error, Result};
use std::cmp::Ordering;
use std::path::{Path, PathBuf};

/// One checkpoint of a series: its file and its `"step"`, when the file has one.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Checkpoint {
    /// The model file, as listed or given.
    pub path: PathBuf,
    /// The file's top-level `"step"` (`None` when it has none, and for ONNX files).
    pub step: Option<u64>,
}

/// How the checkpoints of a series were ordered.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum SeriesOrder {
    /// By each file's `"step"`; a checkpoint's key is its step.
    Step,
    /// By the natural order of the file names; a checkpoint's key is its position (from 0).
    FileName,
}

impl SeriesOrder {
    /// `"step"` or `"position"`: what a checkpoint's key is.
    pub fn key_name(&self) -> &'static str {
        match self {
            SeriesOrder::Step => "step",
            SeriesOrder::FileName => "position",
        }
    }
}

/// An ordered, non-empty list of checkpoints (no weights are held).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Series {
    checkpoints: Vec<Checkpoint>,
    order: SeriesOrder,
}

impl Series {
    /// The series named on a command line: one folder (every model file in it), or one or
    /// more model files.
    ///
    /// Errors: no path; a folder among several paths; those of [`Series::from_folder`] and
    /// [`Series::from_files`].
    pub fn open(paths: &[PathBuf]) -> Result<Series> {
        match paths {
            [] => Err(Error::usage(
                "no checkpoints given: name a folder of model files or the model files",
            )),
            [one] if one.is_dir() => Series::from_folder(one),
            many => {
                if let Some(dir) = many.iter().find(|p| p.is_dir()) {
                    return Err(Error::model(
                        dir,
                        "is a folder: give one folder alone, or a list of model files",
                    ));
                }
                Series::from_files(many)
            }
        }
    }

    /// Every model file (`.json`, `.onnx`, any letter case) directly in `dir`, ordered (see
    /// the module docs). Other files and sub-folders are skipped.
    ///
    /// Errors: the folder cannot be read; it holds no model file; those of
    /// [`Series::from_files`].
    pub fn from_folder(dir: &Path) -> Result<Series> {
        let entries = std::fs::read_dir(dir).map_err(|e| Error::io(dir, "cannot list", e))?;
        let mut files = Vec::new();
        for entry in entries {
            let entry = entry.map_err(|e| Error::io(dir, "cannot list", e))?;
            let path = entry.path();
            if path.is_file() && is_model_file(&path) {
                files.push(path);
            }
        }
        if files.is_empty() {
            return Err(Error::model(
                dir,
                "holds no model files (.json or .onnx): a checkpoint series needs at least one",
            ));
        }
        Series::from_files(&files)
    }

    /// The given model files, ordered (see the module docs).
    ///
    /// Errors: an empty list; a file given twice; a file that cannot be read or whose
    /// `"step"` is not a whole number; two files with the same step; some files with a step
    /// and some without.
    pub fn from_files(files: &[PathBuf]) -> Result<Series> {
        if files.is_empty() {
            return Err(Error::usage("no checkpoints given"));
        }
        let mut checkpoints = Vec::with_capacity(files.len());
        for path in files {
            if checkpoints.iter().any(|c: &Checkpoint| &c.path == path) {
                return Err(Error::model(
                    path,
                    "is given twice in the checkpoint series",
                ));
            }
            checkpoints.push(Checkpoint {
                path: path.clone(),
                step: read_step(path)?,
            });
        }
        let with_step = checkpoints.iter().filter(|c| c.step.is_some()).count();
        let order = if with_step == checkpoints.len() {
            SeriesOrder::Step
        } else if with_step == 0 {
            SeriesOrder::FileName
        } else {
            let has = checkpoints.iter().find(|c| c.step.is_some());
            let lacks = checkpoints.iter().find(|c| c.step.is_none());
            if let (Some(has), Some(lacks)) = (has, lacks) {
                return Err(Error::model(
                    &lacks.path,
                    format!(
                        "has no \"step\" but {} has one: give every checkpoint of the series a \"step\", or none (then they are ordered by file name)",
                        has.path.display()
                    ),
                ));
            }
            SeriesOrder::FileName
        };
        match order {
            SeriesOrder::Step => {
                checkpoints.sort_by(|a, b| a.step.cmp(&b.step).then_with(|| by_name(a, b)));
                if let Some(w) = checkpoints.windows(2).find(|w| w[0].step == w[1].step) {
                    return Err(Error::model(
                        &w[1].path,
                        format!(
                            "has \"step\" {} like {}: the steps of a series must differ",
                            w[1].step.unwrap_or_default(),
                            w[0].path.display()
                        ),
                    ));
                }
            }
            SeriesOrder::FileName => checkpoints.sort_by(by_name),
        }
        Ok(Series { checkpoints, order })
    }

    /// The checkpoints in training order.
    pub fn checkpoints(&self) -> &[Checkpoint] {
        &self.checkpoints
    }

    /// Number of checkpoints (at least 1).
    pub fn len(&self) -> usize {
        self.checkpoints.len()
    }

    /// Always false: a series has at least one checkpoint.
    pub fn is_empty(&self) -> bool {
        self.checkpoints.is_empty()
    }

    /// How the checkpoints were ordered.
    pub fn order(&self) -> SeriesOrder {
        self.order
    }

    /// The key of checkpoint `i` on the training axis: its step ([`SeriesOrder::Step`]) or
    /// its position from 0 ([`SeriesOrder::FileName`]).
    ///
    /// # Panics
    /// When `i >= self.len()`.
    pub fn key(&self, i: usize) -> u64 {
        match (self.order, self.checkpoints[i].step) {
            (SeriesOrder::Step, Some(s)) => s,
            _ => i as u64,
        }
    }

    /// The keys of every checkpoint, in order (see [`Series::key`]).
    pub fn keys(&self) -> Vec<u64> {
        (0..self.len()).map(|i| self.key(i)).collect()
    }

    /// Loads checkpoint `i` alone (no architecture check; see [`Series::networks`]).
    ///
    /// Errors: `i` out of range ([`Error::Internal`]); those of [`super::load`].
    pub fn load(&self, i: usize, opts: &LoadOptions) -> Result<Network> {
        let c = self.checkpoints.get(i).ok_or_else(|| {
            Error::internal(format!(
                "checkpoint {i} asked of a series of {}",
                self.len()
            ))
        })?;
        load(&c.path, opts)
    }

    /// The checkpoints loaded one at a time, in order, each as `(key, network)`; each is
    /// checked against the first's [`Architecture`] (an [`Error::ArchitectureMismatch`]
    /// naming the file otherwise). The iterator keeps no weights.
    pub fn networks<'a>(&'a self, opts: &'a LoadOptions) -> SeriesNetworks<'a> {
        SeriesNetworks {
            series: self,
            opts,
            next: 0,
            first: None,
        }
    }
}

/// The iterator of [`Series::networks`].
#[derive(Debug)]
pub struct SeriesNetworks<'a> {
    series: &'a Series,
    opts: &'a LoadOptions,
    next: usize,
    first: Option<Architecture>,
}

impl Iterator for SeriesNetworks<'_> {
    type Item = Result<(u64, Network)>;

    fn next(&mut self) -> Option<Self::Item> {
        let i = self.next;
        if i >= self.series.len() {
            return None;
        }
        self.next += 1;
        let loaded = self.series.load(i, self.opts).and_then(|net| {
            match &self.first {
                None => self.first = Some(Architecture::of(&net)),
                Some(first) => {
                    if let Some(difference) = first.difference(&Architecture::of(&net)) {
                        return Err(Error::ArchitectureMismatch {
                            file: self.series.checkpoints[i].path.display().to_string(),
                            first: self.series.checkpoints[0].path.display().to_string(),
                            difference,
                        });
                    }
                }
            }
            Ok((self.series.key(i), net))
        });
        if loaded.is_err() {
            // Stop after an error: the rest of the series is not looked at.
            self.next = self.series.len();
        }
        Some(loaded)
    }

    fn size_hint(&self) -> (usize, Option<usize>) {
        let left = self.series.len() - self.next;
        (left, Some(left))
    }
}

/// One layer as far as the architecture goes.
#[derive(Debug, Clone, PartialEq)]
struct LayerShape {
    name: String,
    kind: super::LayerKind,
    activation: &'static str,
    weights: [usize; 2],
    bias: usize,
}

/// The architecture of a network without its weights: the input size and, per layer, the
/// name, type (with its convolution or pooling geometry), activation and weight shape.
/// Two checkpoints of one series must have equal architectures.
#[derive(Debug, Clone, PartialEq)]
pub struct Architecture {
    input: usize,
    layers: Vec<LayerShape>,
}

impl Architecture {
    /// The architecture of `net`.
    pub fn of(net: &Network) -> Architecture {
        Architecture {
            input: net.input().size,
            layers: net
                .layers()
                .iter()
                .map(|l| LayerShape {
                    name: l.name.clone(),
                    kind: l.kind,
                    activation: l.activation.name(),
                    weights: [l.weights.nrows(), l.weights.ncols()],
                    bias: l.bias.len(),
                })
                .collect(),
        }
    }

    /// The first difference of `other` from `self`, worded with `other` as "here" and
    /// `self` as the first checkpoint (`layer 'h1' (2 of 3): weights [64, 784] here but
    /// [32, 784] in the first`), or `None` when they are equal.
    pub fn difference(&self, other: &Architecture) -> Option<String> {
        if self.input != other.input {
            return Some(format!(
                "{} inputs here but {} in the first",
                other.input, self.input
            ));
        }
        if self.layers.len() != other.layers.len() {
            return Some(format!(
                "{} layers here but {} in the first",
                other.layers.len(),
                self.layers.len()
            ));
        }
        let n = self.layers.len();
        for (i, (a, b)) in self.layers.iter().zip(&other.layers).enumerate() {
            let at = format!("layer {} of {n}", i + 1);
            if a.name != b.name {
                return Some(format!(
                    "{at} is named '{}' here but '{}' in the first",
                    b.name, a.name
                ));
            }
            let at = format!("layer '{}' ({} of {n})", a.name, i + 1);
            if a.kind != b.kind {
                return Some(format!(
                    "{at} is {} here but {} in the first",
                    describe_kind(&b.kind),
                    describe_kind(&a.kind)
                ));
            }
            if a.activation != b.activation {
                return Some(format!(
                    "{at} has activation {} here but {} in the first",
                    b.activation, a.activation
                ));
            }
            if a.weights != b.weights {
                return Some(format!(
                    "{at}: weights [{}, {}] here but [{}, {}] in the first",
                    b.weights[0], b.weights[1], a.weights[0], a.weights[1]
                ));
            }
            if a.bias != b.bias {
                return Some(format!(
                    "{at}: bias [{}] here but [{}] in the first",
                    b.bias, a.bias
                ));
            }
        }
        None
    }
}

/// A layer type with its geometry, for messages.
fn describe_kind(kind: &super::LayerKind) -> String {
    match kind {
        super::LayerKind::Dense | super::LayerKind::Flatten => kind.name().to_string(),
        other => format!("{} {other:?}", other.name()),
    }
}

/// True for the files a folder listing takes: `.json` and `.onnx` (any letter case).
fn is_model_file(path: &Path) -> bool {
    is_onnx(path)
        || path
            .extension()
            .and_then(|e| e.to_str())
            .is_some_and(|e| e.eq_ignore_ascii_case("json"))
}

/// Orders two checkpoints by the natural order of their file names, then by whole path.
fn by_name(a: &Checkpoint, b: &Checkpoint) -> Ordering {
    let name = |c: &Checkpoint| {
        c.path
            .file_name()
            .map(|n| n.to_string_lossy().into_owned())
            .unwrap_or_default()
    };
    natural_cmp(&name(a), &name(b)).then_with(|| a.path.cmp(&b.path))
}

/// Natural order of two names: runs of ASCII digits compare as whole numbers (of any
/// length, without parsing them into a machine integer), other characters one by one, so
/// `ckpt-2` < `ckpt-10` and `a9b` < `a10a`. Equal numbers with more leading zeros come
/// later (`ckpt-02` after `ckpt-2`), so the order is total.
pub fn natural_cmp(a: &str, b: &str) -> Ordering {
    let (a, b) = (a.as_bytes(), b.as_bytes());
    let (mut i, mut j) = (0, 0);
    let mut zeros = Ordering::Equal;
    while i < a.len() && j < b.len() {
        if a[i].is_ascii_digit() && b[j].is_ascii_digit() {
            let run = |s: &[u8], k: usize| {
                let end = s[k..]
                    .iter()
                    .position(|c| !c.is_ascii_digit())
                    .map_or(s.len(), |p| k + p);
                let lead = s[k..end].iter().take_while(|c| **c == b'0').count();
                (k + lead, end)
            };
            let ((sa, ea), (sb, eb)) = (run(a, i), run(b, j));
            let by_value = (ea - sa)
                .cmp(&(eb - sb))
                .then_with(|| a[sa..ea].cmp(&b[sb..eb]));
            if by_value != Ordering::Equal {
                return by_value;
            }
            if zeros == Ordering::Equal {
                zeros = (sa - i).cmp(&(sb - j));
            }
            i = ea;
            j = eb;
        } else {
            match a[i].cmp(&b[j]) {
                Ordering::Equal => {
                    i += 1;
                    j += 1;
                }
                other => return other,
            }
        }
    }
    (a.len() - i).cmp(&(b.len() - j)).then(zeros)
}

/// Only the `"step"` of a model file.
#[derive(serde::Deserialize)]
struct StepOnly {
    #[serde(default)]
    step: Option<serde_json::Value>,
}

/// The top-level `"step"` of the model file at `path`, read without keeping anything else
/// (every other value is skipped, not built). ONNX files have none.
///
/// Errors: the file cannot be opened; it is not JSON; its `"step"` is not a whole number
/// from 0 (the rule of the model reader).
pub fn read_step(path: &Path) -> Result<Option<u64>> {
    if is_onnx(path) {
        std::fs::metadata(path).map_err(|e| Error::io(path, "cannot read", e))?;
        return Ok(None);
    }
    // Parsing from the bytes is several times faster than from a reader; the bytes are
    // dropped before the next file is read.
    let bytes = std::fs::read(path).map_err(|e| Error::io(path, "cannot read", e))?;
    let raw: StepOnly = serde_json::from_slice(&bytes)
        .map_err(|e| Error::model(path, format!("not a JSON model file: {e}")))?;
    super::json::parse_step(raw.step.as_ref()).map_err(|p| Error::model(path, p))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::{Activation, InputSpec, Layer, LayerKind, write_json};
    use ndarray::{Array1, Array2};

    /// A 2-input network with one hidden relu layer `h` of `units` units and a softmax
    /// output `out` of 2 units, saved at `step`.
    fn net(units: usize, step: Option<u64>) -> Network {
        let input = InputSpec::vector_box(2, 0.0, 1.0);
        let layer = |name: &str, act, rows, cols| Layer {
            kind: LayerKind::Dense,
            name: name.into(),
            activation: act,
            weights: Array2::from_elem((rows, cols), 0.5),
            bias: Array1::zeros(rows),
            labels: None,
        };
        let n = Network::new(
            "t",
            "t",
            input,
            vec![
                layer("h", Activation::Relu, units, 2),
                layer("out", Activation::Softmax, 2, units),
            ],
        )
        .expect("valid");
        let mut p = n.into_parts();
        p.step = step;
        Network::from_parts(p, "t").expect("valid")
    }

    fn save(dir: &Path, name: &str, n: &Network) -> PathBuf {
        let p = dir.join(name);
        write_json(n, &p).expect("write");
        p
    }

    fn names(s: &Series) -> Vec<String> {
        s.checkpoints()
            .iter()
            .map(|c| {
                c.path
                    .file_name()
                    .unwrap_or_default()
                    .to_string_lossy()
                    .into()
            })
            .collect()
    }

    #[test]
    fn natural_order_compares_digit_runs_as_numbers() {
        let mut v = vec![
            "ckpt-10.json",
            "ckpt-2.json",
            "ckpt-1.json",
            "ckpt-02.json",
            "a10a",
            "a9b",
            "ckpt-100000000000000000000000.json",
            "ckpt-99999999999999999999999.json",
        ];
        v.sort_by(|a, b| natural_cmp(a, b));
        assert_eq!(
            v,
            vec![
                "a9b",
                "a10a",
                "ckpt-1.json",
                "ckpt-2.json",
                "ckpt-02.json",
                "ckpt-10.json",
                "ckpt-99999999999999999999999.json",
                "ckpt-100000000000000000000000.json",
            ]
        );
        assert_eq!(natural_cmp("x", "x"), Ordering::Equal);
        assert_eq!(natural_cmp("x1", "x1a"), Ordering::Less);
    }

    #[test]
    fn a_folder_is_ordered_by_step_else_by_name() {
        let d = tempfile::tempdir().expect("temp dir");
        // Steps disagree with the names: steps win.
        save(d.path(), "ckpt-10.json", &net(3, Some(5)));
        save(d.path(), "ckpt-2.json", &net(3, Some(700)));
        save(d.path(), "ckpt-1.json", &net(3, Some(60)));
        std::fs::write(d.path().join("notes.txt"), "not a model").expect("write");
        let s = Series::open(&[d.path().to_path_buf()]).expect("series");
        assert_eq!(s.order(), SeriesOrder::Step);
        assert_eq!(
            names(&s),
            vec!["ckpt-10.json", "ckpt-1.json", "ckpt-2.json"]
        );
        assert_eq!(s.keys(), vec![5, 60, 700]);
        // Without steps: natural order of the names, keys are positions.
        let e = tempfile::tempdir().expect("temp dir");
        let files: Vec<PathBuf> = ["ckpt-10.json", "ckpt-2.json", "ckpt-1.json"]
            .iter()
            .map(|n| save(e.path(), n, &net(3, None)))
            .collect();
        let s = Series::open(&files).expect("series");
        assert_eq!(s.order(), SeriesOrder::FileName);
        assert_eq!(
            names(&s),
            vec!["ckpt-1.json", "ckpt-2.json", "ckpt-10.json"]
        );
        assert_eq!(s.keys(), vec![0, 1, 2]);
        let loaded: Vec<u64> = s
            .networks(&LoadOptions::default())
            .map(|r| r.expect("loads").0)
            .collect();
        assert_eq!(loaded, vec![0, 1, 2]);
    }

    #[test]
    fn a_different_architecture_names_the_file_the_layer_and_the_shapes() {
        let d = tempfile::tempdir().expect("temp dir");
        save(d.path(), "ckpt-1.json", &net(3, Some(1)));
        let bad = save(d.path(), "ckpt-2.json", &net(4, Some(2)));
        save(d.path(), "ckpt-3.json", &net(3, Some(3)));
        let s = Series::from_folder(d.path()).expect("listing reads only the steps");
        let lo = LoadOptions::default();
        let mut it = s.networks(&lo);
        assert!(it.next().expect("first").is_ok());
        let e = it.next().expect("second").expect_err("refused");
        match &e {
            Error::ArchitectureMismatch { file, .. } => {
                assert_eq!(file, &bad.display().to_string());
            }
            other => panic!("unexpected {other:?}"),
        }
        let text = e.to_string();
        assert!(
            text.contains("ckpt-2.json")
                && text.contains("ckpt-1.json")
                && text.contains("layer 'h'")
                && text.contains("[4, 2]")
                && text.contains("[3, 2]"),
            "{text}"
        );
        assert!(it.next().is_none(), "the iterator stops after an error");
    }

    #[test]
    fn bad_series_are_refused_with_the_file_named() {
        let d = tempfile::tempdir().expect("temp dir");
        // An empty folder.
        let e = Series::open(&[d.path().to_path_buf()]).expect_err("empty");
        assert!(e.to_string().contains("no model files"), "{e}");
        // Some files with a step, some without.
        let a = save(d.path(), "a.json", &net(3, Some(1)));
        let b = save(d.path(), "b.json", &net(3, None));
        let e = Series::from_files(&[a.clone(), b]).expect_err("mixed");
        assert!(e.to_string().contains("b.json") && e.to_string().contains("\"step\""));
        // Two files with the same step.
        let c = save(d.path(), "c.json", &net(3, Some(1)));
        let e = Series::from_files(&[a.clone(), c]).expect_err("same step");
        assert!(e.to_string().contains("c.json") && e.to_string().contains("a.json"));
        // A file given twice, a missing file, a bad step, a folder among files.
        let e = Series::from_files(&[a.clone(), a.clone()]).expect_err("twice");
        assert!(e.to_string().contains("twice"));
        let e = Series::open(&[a.clone(), d.path().join("missing.json")]).expect_err("missing");
        assert!(e.to_string().contains("missing.json"));
        let bad = d.path().join("bad.json");
        std::fs::write(&bad, r#"{"schema": "receptor-model/1", "step": -3}"#).expect("write");
        let e = Series::from_files(&[bad]).expect_err("bad step");
        assert!(e.to_string().contains("bad.json") && e.to_string().contains("whole number"));
        let e = Series::open(&[a, d.path().to_path_buf()]).expect_err("folder");
        assert!(e.to_string().contains("is a folder"));
        assert!(Series::open(&[]).is_err());
    }

    #[test]
    fn one_checkpoint_is_a_series() {
        let d = tempfile::tempdir().expect("temp dir");
        let a = save(d.path(), "only.json", &net(3, None));
        let s = Series::open(&[a]).expect("series");
        assert_eq!((s.len(), s.keys()), (1, vec![0]));
        assert!(s.load(1, &LoadOptions::default()).is_err());
    }
}
