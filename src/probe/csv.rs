//! CSV probe files: one sample per line, columns in input order, streamed in chunks.
//!
//! - A UTF-8 byte-order mark at the start is skipped.
//! - The first line is a header when any of its fields is not a number.
//! - With a header, a column named `label` holds the class and is not an input: a cell equal
//!   to one of the model's label strings means that label, otherwise a whole number is an
//!   index (from 0) into the output units.
//! - Every input cell must be a finite number (after rounding to f32); each row must have the
//!   header's width.
//!
//! Error messages count lines as an editor shows them: `line N`, from 1, counting the header
//! line and the byte-order mark's line like any other.

use super::{ProbeChunk, ProbeSource};
use crate::error::{Error, Result};
use crate::model::Network;
use ndarray::Array2;
use std::fs::File;
use std::io::{BufReader, Cursor, Read};
use std::path::{Path, PathBuf};

/// The UTF-8 encoding of U+FEFF, which some spreadsheet programs put at the start of a file.
const UTF8_BOM: [u8; 3] = [0xEF, 0xBB, 0xBF];

type Source = std::io::Chain<Cursor<Vec<u8>>, BufReader<File>>;

/// A CSV probe file opened for reading, its header (if any) already checked against the model.
pub struct CsvProbe {
    path: PathBuf,
    reader: csv::Reader<Source>,
    /// Number of input columns, the model's input size.
    inputs: usize,
    /// Number of fields every row must have (inputs, plus one for a label column).
    width: usize,
    /// Field index of the `label` column, when there is one.
    label_col: Option<usize>,
    /// The output layer's labels (for label cells given by name), and the output unit count.
    labels: Option<Vec<String>>,
    outputs: usize,
    /// A data record read ahead while opening (to refuse a probe with no data at once).
    pending: Option<csv::StringRecord>,
    /// Data rows handed out so far.
    rows_done: usize,
    finished: bool,
}

impl std::fmt::Debug for CsvProbe {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("CsvProbe")
            .field("path", &self.path)
            .field("inputs", &self.inputs)
            .field("label_col", &self.label_col)
            .field("rows_done", &self.rows_done)
            .finish_non_exhaustive()
    }
}

/// Parses a cell as an f32; `None` when it is not a number at all.
fn parse_number(cell: &str) -> Option<f32> {
    cell.parse::<f32>().ok()
}

/// The line number (from 1) where `rec` starts, for messages.
fn line_of(rec: &csv::StringRecord) -> u64 {
    rec.position().map_or(0, csv::Position::line)
}

impl CsvProbe {
    /// Opens `path` as a probe for `net`: skips a byte-order mark, detects and checks the
    /// header, and reads ahead the first data row so that an empty or header-only file is
    /// refused here.
    pub fn open(path: &Path, net: &Network) -> Result<Self> {
        let file = File::open(path).map_err(|e| Error::io(path, "cannot open the probe", e))?;
        if file.metadata().is_ok_and(|m| m.is_dir()) {
            return Err(Error::probe(path, "is a folder, not a probe file"));
        }
        let mut buf = BufReader::with_capacity(1 << 16, file);
        let mut head = Vec::with_capacity(3);
        (&mut buf)
            .take(3)
            .read_to_end(&mut head)
            .map_err(|e| Error::io(path, "cannot read the probe", e))?;
        if head == UTF8_BOM {
            head.clear();
        }
        let source = Cursor::new(head).chain(buf);
        let reader = csv::ReaderBuilder::new()
            .has_headers(false)
            .flexible(true)
            .trim(csv::Trim::All)
            .from_reader(source);
        let out = net.output_layer();
        let mut probe = CsvProbe {
            path: path.to_path_buf(),
            reader,
            inputs: net.input().size,
            width: net.input().size,
            label_col: None,
            labels: out.labels.clone(),
            outputs: out.units(),
            pending: None,
            rows_done: 0,
            finished: false,
        };
        let Some(first) = probe.read_record()? else {
            return Err(Error::probe(
                path,
                "the probe is empty: it has no samples (no rows)",
            ));
        };
        let is_header = first.iter().any(|f| parse_number(f).is_none());
        if is_header {
            probe.check_header(&first)?;
            match probe.read_record()? {
                Some(rec) => probe.pending = Some(rec),
                None => {
                    return Err(Error::probe(
                        path,
                        "the probe has a header line but no data rows: no samples",
                    ));
                }
            }
        } else {
            probe.pending = Some(first);
        }
        Ok(probe)
    }

    /// Reads one record, mapping CSV errors (bad UTF-8, I/O) to messages naming the line.
    fn read_record(&mut self) -> Result<Option<csv::StringRecord>> {
        let mut rec = csv::StringRecord::new();
        match self.reader.read_record(&mut rec) {
            Ok(true) => Ok(Some(rec)),
            Ok(false) => Ok(None),
            Err(e) => {
                let line = e.position().map(csv::Position::line);
                let what = match e.kind() {
                    csv::ErrorKind::Utf8 { .. } => "the text is not valid UTF-8".to_string(),
                    csv::ErrorKind::Io(io) => format!("cannot read: {io}"),
                    _ => e.to_string(),
                };
                Err(Error::probe(
                    &self.path,
                    match line {
                        Some(l) => format!("line {l}: {what}"),
                        None => what,
                    },
                ))
            }
        }
    }

    /// Checks a header record: at most one `label` column, and the other columns number the
    /// model's inputs.
    fn check_header(&mut self, header: &csv::StringRecord) -> Result<()> {
        let line = line_of(header);
        let label_cols: Vec<usize> = header
            .iter()
            .enumerate()
            .filter(|(_, f)| *f == "label")
            .map(|(i, _)| i)
            .collect();
        if label_cols.len() > 1 {
            return Err(Error::probe(
                &self.path,
                format!(
                    "line {line}: the header has {} columns named 'label'; at most one is allowed",
                    label_cols.len()
                ),
            ));
        }
        self.label_col = label_cols.first().copied();
        let feature_cols = header.len() - label_cols.len();
        if feature_cols != self.inputs {
            // A data line with one stray word (or a trailing comma) is taken for a header;
            // say why, so the message is not a puzzle.
            let why = if header.iter().any(|f| parse_number(f).is_some()) {
                header
                    .iter()
                    .find(|f| parse_number(f).is_none())
                    .map(|f| {
                        format!(" (line {line} is read as a header because '{f}' is not a number)")
                    })
                    .unwrap_or_default()
            } else {
                String::new()
            };
            return Err(Error::probe(
                &self.path,
                format!(
                    "line {line}: the header names {feature_cols} input columns{} but the model has {} inputs{why}",
                    if self.label_col.is_some() {
                        " besides 'label'"
                    } else {
                        ""
                    },
                    self.inputs
                ),
            ));
        }
        self.width = header.len();
        Ok(())
    }

    /// Parses a label cell: one of the model's label strings, else a whole-number index
    /// into the output units.
    fn parse_label(&self, cell: &str, line: u64) -> Result<usize> {
        if let Some(labels) = &self.labels
            && let Some(k) = labels.iter().position(|l| l == cell)
        {
            return Ok(k);
        }
        if let Ok(k) = cell.parse::<usize>()
            && k < self.outputs
        {
            return Ok(k);
        }
        let known = match &self.labels {
            Some(l) => format!(
                "one of the model's labels ({}) or a whole number from 0 to {}",
                l.join(", "),
                self.outputs.saturating_sub(1)
            ),
            None => format!(
                "a whole number from 0 to {} (the model's output units have no labels)",
                self.outputs.saturating_sub(1)
            ),
        };
        Err(Error::probe(
            &self.path,
            format!("line {line}: label '{cell}' is not {known}"),
        ))
    }

    /// Parses one data record into `row` (length `inputs`), returning its label.
    fn parse_row(&self, rec: &csv::StringRecord, row: &mut [f32]) -> Result<Option<usize>> {
        let line = line_of(rec);
        if rec.len() != self.width {
            let hint = if self.label_col.is_none() && rec.len() == self.inputs + 1 {
                " (a label column needs a header line naming it 'label')"
            } else {
                ""
            };
            return Err(Error::probe(
                &self.path,
                format!(
                    "line {line}: expected {} columns, found {}{hint}",
                    self.width,
                    rec.len()
                ),
            ));
        }
        let mut label = None;
        let mut j = 0;
        for (i, cell) in rec.iter().enumerate() {
            if Some(i) == self.label_col {
                label = Some(self.parse_label(cell, line)?);
                continue;
            }
            let col = i + 1;
            match parse_number(cell) {
                Some(v) if v.is_finite() => row[j] = v,
                Some(_) => {
                    return Err(Error::probe(
                        &self.path,
                        format!("line {line}, column {col}: '{cell}' is not a finite number (f32)"),
                    ));
                }
                None => {
                    return Err(Error::probe(
                        &self.path,
                        format!("line {line}, column {col}: '{cell}' is not a number"),
                    ));
                }
            }
            j += 1;
        }
        Ok(label)
    }
}

impl ProbeSource for CsvProbe {
    fn describe(&self) -> String {
        self.path.display().to_string()
    }

    fn next_chunk(&mut self, max_rows: usize) -> Result<Option<ProbeChunk>> {
        if self.finished {
            return Ok(None);
        }
        let max_rows = max_rows.max(1);
        let mut values: Vec<f32> = Vec::with_capacity(max_rows.min(1 << 16) * self.inputs);
        let mut labels: Vec<usize> = Vec::new();
        let mut row = vec![0.0f32; self.inputs];
        let mut n = 0;
        while n < max_rows {
            let rec = match self.pending.take() {
                Some(r) => r,
                None => match self.read_record()? {
                    Some(r) => r,
                    None => {
                        self.finished = true;
                        break;
                    }
                },
            };
            let label = self.parse_row(&rec, &mut row)?;
            values.extend_from_slice(&row);
            if let Some(l) = label {
                labels.push(l);
            }
            n += 1;
        }
        if n == 0 {
            return Ok(None);
        }
        let inputs = Array2::from_shape_vec((n, self.inputs), values)
            .map_err(|e| Error::probe(&self.path, format!("internal shape error: {e}")))?;
        let first_row = self.rows_done;
        self.rows_done += n;
        Ok(Some(ProbeChunk {
            inputs,
            labels: self.label_col.map(|_| labels),
            first_row,
        }))
    }

    fn total_rows(&self) -> Option<usize> {
        None
    }

    fn has_labels(&self) -> bool {
        self.label_col.is_some()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::{Activation, InputSpec, Layer};
    use ndarray::{Array1, Array2};

    /// A 3-input network whose output layer has 2 units, labelled `labels` if given.
    fn net(labels: Option<Vec<&str>>) -> Network {
        Network::new(
            "test",
            "t",
            InputSpec::vector_box(3, -1.0, 1.0),
            vec![Layer {
                kind: crate::model::LayerKind::Dense,
                name: "out".into(),
                activation: Activation::Softmax,
                weights: Array2::zeros((2, 3)),
                bias: Array1::zeros(2),
                labels: labels.map(|l| l.into_iter().map(String::from).collect()),
            }],
        )
        .unwrap()
    }

    fn write(dir: &tempfile::TempDir, name: &str, bytes: &[u8]) -> PathBuf {
        let p = dir.path().join(name);
        std::fs::write(&p, bytes).unwrap();
        p
    }

    fn read(p: &Path, n: &Network) -> Result<super::super::ProbeData> {
        let mut probe = CsvProbe::open(p, n)?;
        super::super::read_all(&mut probe)
    }

    #[test]
    fn plain_rows_without_header() {
        let d = tempfile::tempdir().unwrap();
        let p = write(&d, "p.csv", b"1,2,3\n-0.5, 0.25 ,1e-3\n");
        let data = read(&p, &net(None)).unwrap();
        assert_eq!(
            data.inputs,
            ndarray::arr2(&[[1.0, 2.0, 3.0], [-0.5, 0.25, 0.001]])
        );
        assert!(data.labels.is_none());
    }

    #[test]
    fn byte_order_mark_and_header_are_skipped() {
        let d = tempfile::tempdir().unwrap();
        let p = write(&d, "p.csv", b"\xEF\xBB\xBFa,b,c\r\n1,2,3\r\n4,5,6\r\n");
        let data = read(&p, &net(None)).unwrap();
        assert_eq!(
            data.inputs,
            ndarray::arr2(&[[1.0, 2.0, 3.0], [4.0, 5.0, 6.0]])
        );
        // A BOM before a numeric first row must not turn it into a "header".
        let p = write(&d, "q.csv", b"\xEF\xBB\xBF1,2,3\n");
        let data = read(&p, &net(None)).unwrap();
        assert_eq!(data.inputs, ndarray::arr2(&[[1.0, 2.0, 3.0]]));
    }

    #[test]
    fn label_by_name_or_index_in_any_column() {
        let d = tempfile::tempdir().unwrap();
        let p = write(&d, "p.csv", b"x,label,y,z\n1,cat,2,3\n4,1,5,6\n7,0,8,9\n");
        let data = read(&p, &net(Some(vec!["cat", "dog"]))).unwrap();
        assert_eq!(
            data.inputs,
            ndarray::arr2(&[[1.0, 2.0, 3.0], [4.0, 5.0, 6.0], [7.0, 8.0, 9.0]])
        );
        assert_eq!(data.labels, Some(vec![0, 1, 0]));
    }

    #[test]
    fn label_string_that_is_a_number_means_the_label() {
        // Labels "1" and "0" in swapped order: a cell equal to a label string wins over
        // reading it as an index, as the contract says.
        let d = tempfile::tempdir().unwrap();
        let p = write(&d, "p.csv", b"label,a,b,c\n1,0,0,0\n");
        let data = read(&p, &net(Some(vec!["1", "0"]))).unwrap();
        assert_eq!(data.labels, Some(vec![0]));
    }

    #[test]
    fn errors_name_the_line_and_the_problem() {
        let d = tempfile::tempdir().unwrap();
        let n = net(Some(vec!["cat", "dog"]));
        let cases: &[(&[u8], &str)] = &[
            (b"", "empty"),
            (b"\n\n", "empty"),
            (b"a,b,c\n", "header line but no data rows"),
            (b"1,2,3\n1,2\n", "line 2: expected 3 columns, found 2"),
            (
                b"1,2,3\n1,2,3,4\n",
                "line 2: expected 3 columns, found 4 (a label column",
            ),
            (
                b"a,b,c\n1,2,3\n1,NaN,3\n",
                "line 3, column 2: 'NaN' is not a finite number",
            ),
            (
                b"1,2,inf\n",
                "line 1, column 3: 'inf' is not a finite number",
            ),
            (b"1,2,1e39\n", "'1e39' is not a finite number"),
            (b"a,b,c\n1,x,3\n", "line 2, column 2: 'x' is not a number"),
            (
                b"a,b,c,label\n1,2,3,bird\n",
                "line 2: label 'bird' is not one of the model's labels (cat, dog)",
            ),
            (b"a,b,c,label\n1,2,3,2\n", "label '2' is not"),
            (b"a,b,c,label\n1,2,3,-1\n", "label '-1' is not"),
            (
                b"a,b\n1,2\n",
                "line 1: the header names 2 input columns but the model has 3 inputs",
            ),
            (b"a,b,label,label\n1,2,0,0\n", "2 columns named 'label'"),
            (
                b"1,2,3,\n1,2,3\n",
                "the header names 4 input columns but the model has 3 inputs (line 1 is read as a header because '' is not a number)",
            ),
            (b"1,2,3\n\xFF,2,3\n", "line 2: the text is not valid UTF-8"),
        ];
        for (i, (bytes, want)) in cases.iter().enumerate() {
            let p = write(&d, &format!("bad{i}.csv"), bytes);
            let err = read(&p, &n).unwrap_err().to_string();
            assert!(err.contains(&format!("bad{i}.csv")), "case {i}: {err}");
            assert!(err.contains(want), "case {i}: want {want:?}, got {err}");
        }
    }

    #[test]
    fn unlabelled_model_accepts_only_indices() {
        let d = tempfile::tempdir().unwrap();
        let p = write(&d, "p.csv", b"label,a,b,c\n1,0,0,0\ncat,0,0,0\n");
        let err = read(&p, &net(None)).unwrap_err().to_string();
        assert!(
            err.contains("line 3: label 'cat' is not a whole number from 0 to 1"),
            "{err}"
        );
    }

    #[test]
    fn streams_in_chunks_with_row_offsets() {
        let d = tempfile::tempdir().unwrap();
        let mut text = String::from("a,b,c,label\n");
        for i in 0..10 {
            text.push_str(&format!("{i},{i},{i},{}\n", i % 2));
        }
        let p = write(&d, "p.csv", text.as_bytes());
        let mut probe = CsvProbe::open(&p, &net(None)).unwrap();
        assert!(probe.has_labels());
        let mut seen = 0;
        while let Some(c) = probe.next_chunk(4).unwrap() {
            assert_eq!(c.first_row, seen);
            assert!(c.inputs.nrows() <= 4);
            for (r, row) in c.inputs.rows().into_iter().enumerate() {
                assert_eq!(row[0], (seen + r) as f32);
            }
            let labels = c.labels.unwrap();
            assert_eq!(labels.len(), c.inputs.nrows());
            seen += c.inputs.nrows();
        }
        assert_eq!(seen, 10);
        assert!(probe.next_chunk(4).unwrap().is_none());
    }

    proptest::proptest! {
        #![proptest_config(proptest::prelude::ProptestConfig::with_cases(256))]
        /// Any text built from CSV-ish pieces reads or is refused with a message naming the
        /// file, never panics (common practice for parsers, no source).
        #[test]
        fn arbitrary_text_never_panics(
            cells in proptest::collection::vec(
                proptest::prop_oneof![
                    proptest::prelude::Just("1".to_string()),
                    proptest::prelude::Just("-2.5e3".to_string()),
                    proptest::prelude::Just("label".to_string()),
                    proptest::prelude::Just("cat".to_string()),
                    proptest::prelude::Just("NaN".to_string()),
                    proptest::prelude::Just(",".to_string()),
                    proptest::prelude::Just("\n".to_string()),
                    proptest::prelude::Just("\"".to_string()),
                    proptest::prelude::Just("\u{feff}".to_string()),
                    "[ -~]{0,4}",
                ],
                0..40,
            ),
        ) {
            let d = tempfile::tempdir().unwrap();
            let p = write(&d, "fuzz.csv", cells.concat().as_bytes());
            if let Err(e) = read(&p, &net(Some(vec!["cat", "dog"]))) {
                proptest::prop_assert!(e.to_string().contains("fuzz.csv"), "{}", e);
            }
        }
    }
}
