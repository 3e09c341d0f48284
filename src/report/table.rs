//! Tables as CSV or JSON, written row by row to a file (atomically) or to standard output.
//! The command line and the app's exports both write through here, so a table has the same
//! columns and the same numbers on both fronts.
//!
//! CSV goes through the `csv` crate (RFC 4180 quoting, `\n` line ends). Both formats carry the same column names. JSON output is one object
//! `{"rows": [{column: value, ...}, ...], ...extra keys}`.
//!
//! Numbers are printed in the shortest form that reads back to the same value of their own
//! type: an f32 as the shortest decimal that parses back to that f32 (so `0.1f32` prints
//! `0.1`, not `0.10000000149011612`), an f64 likewise as f64. Both formats use serde_json's
//! shortest round-trip float formatter for finite values.
//!
//! Non-finite numbers (a preferred-input search that diverged, a forward pass that
//! overflowed) cannot be JSON numbers: JSON writes them as `null`, CSV as `NaN`, `inf` or
//! `-inf` (spellings that Python's `float()` and numpy read back).

use crate::error::{Error, Result};
use std::io::Write;
use std::path::{Path, PathBuf};

/// Output format of the analysis commands.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum Format {
    /// Comma-separated values with a header line.
    Csv,
    /// One JSON object: {"rows": [...], ...}.
    Json,
}

/// One value of a result row.
#[derive(Debug, Clone, PartialEq)]
pub enum Cell {
    /// A count or an index.
    UInt(u64),
    /// An f32 value, printed as the shortest f32 round trip.
    F32(f32),
    /// An f64 value, printed as the shortest f64 round trip.
    F64(f64),
    /// Text.
    Str(String),
    /// Text that may be missing (JSON `null`, empty CSV field).
    OptStr(Option<String>),
    /// A count that may be missing (JSON `null`, empty CSV field).
    OptUInt(Option<u64>),
    /// An f64 that may be missing (JSON `null`, empty CSV field); a present non-finite
    /// value prints as [`Cell::F64`] does.
    OptF64(Option<f64>),
    /// A truth value (`true`/`false` in both formats).
    Bool(bool),
    /// A vector of f32: one CSV column per element (named by the table's CSV header), one
    /// JSON array under the column's name.
    F32s(Vec<f32>),
    /// A list of objects (for extra top-level JSON keys such as per-layer summaries).
    Objects(Vec<Vec<(String, Cell)>>),
}

impl From<usize> for Cell {
    fn from(v: usize) -> Self {
        Cell::UInt(v as u64)
    }
}
impl From<u64> for Cell {
    fn from(v: u64) -> Self {
        Cell::UInt(v)
    }
}
impl From<f32> for Cell {
    fn from(v: f32) -> Self {
        Cell::F32(v)
    }
}
impl From<f64> for Cell {
    fn from(v: f64) -> Self {
        Cell::F64(v)
    }
}
impl From<&str> for Cell {
    fn from(v: &str) -> Self {
        Cell::Str(v.to_string())
    }
}
impl From<String> for Cell {
    fn from(v: String) -> Self {
        Cell::Str(v)
    }
}
impl From<bool> for Cell {
    fn from(v: bool) -> Self {
        Cell::Bool(v)
    }
}

/// The shortest text that parses back to `v` as an f32; `NaN`, `inf`, `-inf` otherwise.
pub fn f32_text(v: f32) -> String {
    if v.is_finite() {
        serde_json::to_string(&v).unwrap_or_else(|_| v.to_string())
    } else {
        non_finite_text(f64::from(v)).to_string()
    }
}

/// The shortest text that parses back to `v` as an f64; `NaN`, `inf`, `-inf` otherwise.
pub fn f64_text(v: f64) -> String {
    if v.is_finite() {
        serde_json::to_string(&v).unwrap_or_else(|_| v.to_string())
    } else {
        non_finite_text(v).to_string()
    }
}

fn non_finite_text(v: f64) -> &'static str {
    if v.is_nan() {
        "NaN"
    } else if v > 0.0 {
        "inf"
    } else {
        "-inf"
    }
}

fn write_json_value(w: &mut dyn Write, cell: &Cell) -> std::io::Result<()> {
    let to_io = std::io::Error::other;
    match cell {
        Cell::UInt(v) => write!(w, "{v}"),
        // serde_json writes non-finite floats as null and finite ones in shortest form.
        Cell::F32(v) => serde_json::to_writer(&mut *w, v).map_err(to_io),
        Cell::F64(v) => serde_json::to_writer(&mut *w, v).map_err(to_io),
        Cell::Str(s) => serde_json::to_writer(&mut *w, s).map_err(to_io),
        Cell::OptStr(s) => serde_json::to_writer(&mut *w, s).map_err(to_io),
        Cell::OptUInt(v) => serde_json::to_writer(&mut *w, v).map_err(to_io),
        Cell::OptF64(v) => serde_json::to_writer(&mut *w, v).map_err(to_io),
        Cell::Bool(b) => write!(w, "{b}"),
        Cell::F32s(v) => serde_json::to_writer(&mut *w, v).map_err(to_io),
        Cell::Objects(list) => {
            w.write_all(b"[")?;
            for (i, obj) in list.iter().enumerate() {
                if i > 0 {
                    w.write_all(b",")?;
                }
                w.write_all(b"\n")?;
                write_json_object(w, obj.iter().map(|(k, v)| (k.as_str(), v)))?;
            }
            w.write_all(b"\n]")
        }
    }
}

fn write_json_object<'a>(
    w: &mut dyn Write,
    fields: impl Iterator<Item = (&'a str, &'a Cell)>,
) -> std::io::Result<()> {
    w.write_all(b"{")?;
    for (i, (k, v)) in fields.enumerate() {
        if i > 0 {
            w.write_all(b",")?;
        }
        serde_json::to_writer(&mut *w, k).map_err(std::io::Error::other)?;
        w.write_all(b":")?;
        write_json_value(w, v)?;
    }
    w.write_all(b"}")
}

/// Passes writes through and leaves flushing to the owner of the writer: the `csv` crate
/// flushes its writer when dropped, and a table abandoned after an error must not push what
/// [`emit`] holds back for standard output.
struct NoFlush<'w>(&'w mut dyn Write);

impl Write for NoFlush<'_> {
    fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
        self.0.write(buf)
    }

    fn write_all(&mut self, buf: &[u8]) -> std::io::Result<()> {
        self.0.write_all(buf)
    }

    fn flush(&mut self) -> std::io::Result<()> {
        Ok(())
    }
}

/// A CSV writer over `w`: RFC 4180 quoting by the `csv` crate (a field holding the delimiter,
/// a quote or a line feed is enclosed in quotes, inner quotes doubled), `\n` line ends, and
/// no check that every line has the header's number of fields (the caller sizes the header
/// for vector columns).
fn csv_writer(w: &mut dyn Write) -> csv::Writer<NoFlush<'_>> {
    csv::WriterBuilder::new()
        .has_headers(false)
        .flexible(true)
        .from_writer(NoFlush(w))
}

/// Where rows go: a CSV writer (which buffers) or the raw writer for JSON.
enum Sink<'w> {
    // Boxed: the CSV writer carries its buffer state, the JSON side one pointer.
    Csv(Box<csv::Writer<NoFlush<'w>>>),
    Json(&'w mut dyn Write),
}

/// Writes a table row by row in one format.
///
/// `columns` are the JSON keys, in order. A column holding [`Cell::F32s`] becomes several
/// CSV columns; `csv_header` lists the CSV column names (equal to `columns` when no vector
/// column is used).
pub struct TableWriter<'w> {
    sink: Sink<'w>,
    columns: Vec<String>,
    rows: usize,
}

impl<'w> TableWriter<'w> {
    /// Starts a table: writes the CSV header line or the opening of the JSON object.
    pub fn begin(
        format: Format,
        w: &'w mut dyn Write,
        columns: Vec<String>,
        csv_header: Vec<String>,
    ) -> std::io::Result<Self> {
        let sink = match format {
            Format::Csv => {
                let mut c = csv_writer(w);
                c.write_record(&csv_header)?;
                Sink::Csv(Box::new(c))
            }
            Format::Json => {
                w.write_all(b"{\"rows\":[")?;
                Sink::Json(w)
            }
        };
        Ok(TableWriter {
            sink,
            columns,
            rows: 0,
        })
    }

    /// Writes one row; `cells` follow the order of `columns`.
    pub fn row(&mut self, cells: &[Cell]) -> std::io::Result<()> {
        match &mut self.sink {
            Sink::Csv(c) => {
                for cell in cells {
                    match cell {
                        Cell::UInt(v) => c.write_field(v.to_string())?,
                        Cell::F32(v) => c.write_field(f32_text(*v))?,
                        Cell::F64(v) => c.write_field(f64_text(*v))?,
                        Cell::Str(s) => c.write_field(s)?,
                        Cell::OptStr(s) => c.write_field(s.as_deref().unwrap_or_default())?,
                        Cell::OptUInt(v) => {
                            c.write_field(v.map(|v| v.to_string()).unwrap_or_default())?;
                        }
                        Cell::OptF64(v) => {
                            c.write_field(v.map(f64_text).unwrap_or_default())?;
                        }
                        Cell::Bool(b) => c.write_field(b.to_string())?,
                        Cell::F32s(v) => {
                            for x in v {
                                c.write_field(f32_text(*x))?;
                            }
                        }
                        Cell::Objects(_) => c.write_field("")?,
                    }
                }
                c.write_record(None::<&[u8]>)?;
            }
            Sink::Json(w) => {
                if self.rows > 0 {
                    w.write_all(b",")?;
                }
                w.write_all(b"\n")?;
                write_json_object(
                    &mut **w,
                    self.columns.iter().map(String::as_str).zip(cells.iter()),
                )?;
            }
        }
        self.rows += 1;
        Ok(())
    }

    /// Ends the table. In JSON, `extra` keys follow `"rows"` at the top level; CSV has no
    /// place for them and ignores them.
    pub fn finish(self, extra: &[(&str, Cell)]) -> std::io::Result<()> {
        match self.sink {
            Sink::Csv(mut c) => c.flush(),
            Sink::Json(w) => {
                w.write_all(if self.rows > 0 { b"\n]" } else { b"]" })?;
                for (k, v) in extra {
                    w.write_all(b",\n")?;
                    serde_json::to_writer(&mut *w, k).map_err(std::io::Error::other)?;
                    w.write_all(b":")?;
                    write_json_value(w, v)?;
                }
                w.write_all(b"}\n")
            }
        }
    }
}

/// Where a command's main output goes: `--out FILE` or standard output.
#[derive(Debug, Clone)]
pub enum Destination {
    /// Standard output.
    Stdout,
    /// A file, written atomically.
    File(PathBuf),
}

impl Destination {
    /// `Some(path)` → that file, `None` → standard output.
    pub fn from_arg(out: Option<&Path>) -> Self {
        match out {
            Some(p) => Destination::File(p.to_path_buf()),
            None => Destination::Stdout,
        }
    }
}

/// Why filling an output stopped early: the writer failed, or the work itself did (a bad
/// probe row found while streaming).
#[derive(Debug)]
pub enum Stop {
    /// Writing to the destination failed.
    Write(std::io::Error),
    /// The work failed; reported as itself, not as a write failure.
    Error(Error),
}

impl From<std::io::Error> for Stop {
    fn from(e: std::io::Error) -> Self {
        Stop::Write(e)
    }
}

impl From<Error> for Stop {
    fn from(e: Error) -> Self {
        Stop::Error(e)
    }
}

/// Output buffered for standard output before anything is written to it.
const STDOUT_BUFFER: usize = 1 << 20;

/// Runs `fill` on the destination's writer.
///
/// On standard output, up to 1 MiB is held back, so a command that fails prints nothing
/// unless its output was already larger than that (a probe error found late in a large
/// streamed probe); use `--out` for all-or-nothing output.
/// When `fill` fails with [`Stop::Error`] that error is returned as is. When writing to a
/// file nothing is left behind on any failure: the temporary file is removed and an earlier
/// file at the path keeps its content. A closed pipe on standard output
/// (`receptor ... | head`) ends the command quietly, as is common practice for command-line
/// filters (no source).
pub fn emit<F>(dest: &Destination, fill: F) -> Result<()>
where
    F: FnOnce(&mut dyn Write) -> std::result::Result<(), Stop>,
{
    // The crate error is kept aside while the atomic writer sees a plain io error.
    let mut inner: Option<Error> = None;
    let run = |w: &mut dyn Write| -> std::io::Result<()> {
        match fill(w) {
            Ok(()) => Ok(()),
            Err(Stop::Write(e)) => Err(e),
            Err(Stop::Error(e)) => {
                inner = Some(e);
                Err(std::io::Error::other("stopped by an earlier error"))
            }
        }
    };
    match dest {
        Destination::File(path) => {
            let r = crate::atomic::write_atomic(path, run);
            match inner.take() {
                Some(e) => Err(e),
                None => r,
            }
        }
        Destination::Stdout => {
            let stdout = std::io::stdout();
            let mut w = std::io::BufWriter::with_capacity(STDOUT_BUFFER, stdout.lock());
            let r = run(&mut w).and_then(|()| w.flush());
            if let Some(e) = inner.take() {
                // Drop what is still buffered instead of flushing it: a failed command
                // should print nothing, which holds whenever the output fits the buffer.
                let _ = w.into_parts();
                return Err(e);
            }
            match r {
                Ok(()) => Ok(()),
                Err(e) if e.kind() == std::io::ErrorKind::BrokenPipe => Ok(()),
                Err(e) => Err(Error::io("standard output", "cannot write", e)),
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn table(format: Format, rows: &[Vec<Cell>], extra: &[(&str, Cell)]) -> String {
        let mut out = Vec::new();
        let mut t = TableWriter::begin(
            format,
            &mut out,
            vec!["name".into(), "v32".into(), "v64".into(), "input".into()],
            vec![
                "name".into(),
                "v32".into(),
                "v64".into(),
                "x0".into(),
                "x1".into(),
            ],
        )
        .unwrap();
        for r in rows {
            t.row(r).unwrap();
        }
        t.finish(extra).unwrap();
        String::from_utf8(out).unwrap()
    }

    #[test]
    fn floats_print_shortest_in_their_own_type() {
        // 0.1f32 is 13421773 * 2^-27 = 0.100000001490116...; its shortest f32 round trip is
        // "0.1" while the same value widened to f64 needs 17 digits (IEEE 754 binary32/64).
        assert_eq!(f32_text(0.1), "0.1");
        assert_eq!(f64_text(f64::from(0.1f32)), "0.10000000149011612");
        assert_eq!(f64_text(0.1), "0.1");
        assert_eq!(f32_text(1.0), "1.0");
        assert_eq!(f32_text(f32::NAN), "NaN");
        assert_eq!(f32_text(f32::NEG_INFINITY), "-inf");
        for v in [1e-30f32, f32::MAX, f32::MIN_POSITIVE, 123456.79, -2.5e-7] {
            assert_eq!(f32_text(v).parse::<f32>().unwrap(), v);
        }
    }

    #[test]
    fn csv_and_json_carry_the_same_rows() {
        let rows = vec![
            vec![
                Cell::from("a,b"),
                Cell::F32(0.1),
                Cell::F64(0.1),
                Cell::F32s(vec![1.5, f32::NAN]),
            ],
            vec![
                Cell::from("c"),
                Cell::F32(f32::INFINITY),
                Cell::F64(-2.0),
                Cell::F32s(vec![0.0, -1.0]),
            ],
        ];
        let csv = table(Format::Csv, &rows, &[("seed", Cell::UInt(7))]);
        assert_eq!(
            csv,
            "name,v32,v64,x0,x1\n\"a,b\",0.1,0.1,1.5,NaN\nc,inf,-2.0,0.0,-1.0\n"
        );
        let json = table(Format::Json, &rows, &[("seed", Cell::UInt(7))]);
        let v: serde_json::Value = serde_json::from_str(&json).unwrap();
        assert_eq!(
            v,
            serde_json::json!({
                "rows": [
                    {"name": "a,b", "v32": 0.1, "v64": 0.1, "input": [1.5, null]},
                    {"name": "c", "v32": null, "v64": -2.0, "input": [0.0, -1.0]}
                ],
                "seed": 7
            })
        );
        // The f32 is written as 0.1, not as its f64 widening.
        assert!(json.contains("\"v32\":0.1,"), "{json}");
        let empty = table(Format::Json, &[], &[]);
        assert_eq!(
            serde_json::from_str::<serde_json::Value>(&empty).unwrap(),
            serde_json::json!({"rows": []})
        );
    }

    #[test]
    fn csv_quoting_follows_rfc_4180() {
        // RFC 4180, section 2, rules 6 and 7: a field holding a comma, a double quote or a
        // line break is enclosed in double quotes, and a quote inside it is doubled.
        let mut out = Vec::new();
        let cols = vec!["a".to_string(), "b".to_string()];
        let mut t = TableWriter::begin(Format::Csv, &mut out, cols.clone(), cols).unwrap();
        t.row(&[Cell::from("say \"hi\""), Cell::from("two\nlines")])
            .unwrap();
        t.row(&[Cell::OptStr(None), Cell::Bool(true)]).unwrap();
        t.finish(&[]).unwrap();
        assert_eq!(
            String::from_utf8(out).unwrap(),
            "a,b\n\"say \"\"hi\"\"\",\"two\nlines\"\n,true\n"
        );
    }

    /// A writer that records what reaches it and how often it is flushed.
    #[derive(Default)]
    struct Recorder {
        bytes: Vec<u8>,
        flushes: usize,
    }

    impl Write for Recorder {
        fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
            self.bytes.extend_from_slice(buf);
            Ok(buf.len())
        }
        fn flush(&mut self) -> std::io::Result<()> {
            self.flushes += 1;
            Ok(())
        }
    }

    #[test]
    fn an_abandoned_table_never_flushes_the_destination() {
        // emit() holds standard output back so that a failed command prints nothing; a table
        // dropped after an error (without finish) must not flush it through.
        for format in [Format::Csv, Format::Json] {
            let mut rec = Recorder::default();
            {
                let cols = vec!["a".to_string()];
                let mut t = TableWriter::begin(format, &mut rec, cols.clone(), cols).unwrap();
                t.row(&[Cell::UInt(1)]).unwrap();
            }
            assert_eq!(rec.flushes, 0, "{format:?}");
            let mut rec = Recorder::default();
            let cols = vec!["a".to_string()];
            let mut t = TableWriter::begin(format, &mut rec, cols.clone(), cols).unwrap();
            t.row(&[Cell::UInt(1)]).unwrap();
            t.finish(&[]).unwrap();
            assert_eq!(rec.flushes, 0, "{format:?}");
            assert!(
                String::from_utf8_lossy(&rec.bytes).contains('1'),
                "{format:?}"
            );
        }
    }
}
