//! NumPy `.npy` probe files: a 2-D float32 or float64 array, rows = samples, in C or
//! Fortran order and either byte order, read chunk by chunk.
//!
//! The header is parsed here, following the format description of NumPy Enhancement
//! Proposal 1 (NEP 1, "A simple file format for NumPy arrays", versions 1.0, 2.0, 3.0): the
//! magic string `\x93NUMPY`, a major and minor version byte, the header length (u16
//! little-endian in 1.0, u32 in 2.0 and 3.0), then a Python dict literal with the keys
//! `descr`, `fortran_order` and `shape`, padded with spaces and ended by a newline.
//!
//! The declared shape is checked against the model and against the file's length before
//! anything is allocated, so a header claiming 10^12 rows is an error, not an allocation.

use super::{ProbeChunk, ProbeSource};
use crate::error::{Error, Result};
use crate::model::Network;
use ndarray::Array2;
use std::fs::File;
use std::io::{BufReader, Read, Seek, SeekFrom};
use std::path::{Path, PathBuf};

/// The NEP 1 magic string.
const MAGIC: &[u8; 6] = b"\x93NUMPY";
/// Largest header we accept. NumPy itself refuses headers over 10 000 bytes by default
/// (`max_header_size` of `numpy.lib.format`, from memory); we allow more but not unbounded.
const MAX_HEADER_LEN: u64 = 1 << 20;
/// Deepest nesting accepted in the header literal, so hostile input cannot overflow the stack.
const MAX_DEPTH: usize = 16;

/// Element type of the array.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Dtype {
    F32,
    F64,
}

impl Dtype {
    fn size(self) -> usize {
        match self {
            Dtype::F32 => 4,
            Dtype::F64 => 8,
        }
    }
}

/// What the header says about the array.
#[derive(Debug, Clone, PartialEq, Eq)]
struct Header {
    dtype: Dtype,
    big_endian: bool,
    fortran: bool,
    rows: usize,
    cols: usize,
    /// Byte offset of the first element.
    data_offset: u64,
}

/// A `.npy` probe file opened for reading, its header checked against the model and the
/// file's length.
#[derive(Debug)]
pub struct NpyProbe {
    path: PathBuf,
    file: BufReader<File>,
    header: Header,
    /// Rows handed out so far.
    next_row: usize,
    /// Reused read buffer.
    buf: Vec<u8>,
}

/// A value of the small Python literal subset used by NEP 1 headers.
#[derive(Debug, Clone, PartialEq)]
enum Py {
    Str(String),
    Int(u128),
    Bool(bool),
    None,
    Tuple(Vec<Py>),
    Dict(Vec<(String, Py)>),
}

/// A recursive-descent parser for the header's dict literal.
struct Lit<'a> {
    s: &'a [u8],
    i: usize,
}

impl Lit<'_> {
    fn ws(&mut self) {
        while self.i < self.s.len() && self.s[self.i].is_ascii_whitespace() {
            self.i += 1;
        }
    }

    fn eat(&mut self, c: u8) -> bool {
        self.ws();
        if self.s.get(self.i) == Some(&c) {
            self.i += 1;
            true
        } else {
            false
        }
    }

    fn value(&mut self, depth: usize) -> std::result::Result<Py, String> {
        if depth > MAX_DEPTH {
            return Err("the header literal is nested too deeply".into());
        }
        self.ws();
        let Some(&c) = self.s.get(self.i) else {
            return Err("the header literal ends early".into());
        };
        match c {
            b'\'' | b'"' => self.string(c).map(Py::Str),
            b'{' => self.dict(depth),
            b'(' => self.sequence(depth, b')'),
            b'[' => self.sequence(depth, b']'),
            b'0'..=b'9' => self.int(),
            _ => self.word(c),
        }
    }

    /// A dict `{'key': value, ...}` (string keys), at its opening brace.
    fn dict(&mut self, depth: usize) -> std::result::Result<Py, String> {
        self.i += 1;
        let mut items = Vec::new();
        loop {
            if self.eat(b'}') {
                break;
            }
            let key = match self.value(depth + 1)? {
                Py::Str(k) => k,
                _ => return Err("a header dict key is not a string".into()),
            };
            if !self.eat(b':') {
                return Err(format!("expected ':' after the key '{key}'"));
            }
            let v = self.value(depth + 1)?;
            items.push((key, v));
            if self.eat(b',') {
                continue;
            }
            if self.eat(b'}') {
                break;
            }
            return Err("expected ',' or '}' in the header dict".into());
        }
        Ok(Py::Dict(items))
    }

    /// A tuple or list up to `close`, at its opening bracket.
    fn sequence(&mut self, depth: usize, close: u8) -> std::result::Result<Py, String> {
        self.i += 1;
        let mut items = Vec::new();
        loop {
            if self.eat(close) {
                break;
            }
            items.push(self.value(depth + 1)?);
            if self.eat(b',') {
                continue;
            }
            if self.eat(close) {
                break;
            }
            return Err("expected ',' or a closing bracket in the shape".into());
        }
        Ok(Py::Tuple(items))
    }

    /// A non-negative integer, at its first digit.
    fn int(&mut self) -> std::result::Result<Py, String> {
        let start = self.i;
        while self.i < self.s.len() && self.s[self.i].is_ascii_digit() {
            self.i += 1;
        }
        // Python 2 wrote long integers with an L suffix.
        if self.s.get(self.i) == Some(&b'L') {
            self.i += 1;
        }
        let digits = std::str::from_utf8(&self.s[start..self.i])
            .unwrap_or("")
            .trim_end_matches('L');
        digits
            .parse::<u128>()
            .map(Py::Int)
            .map_err(|_| format!("the number {digits} in the header is too large"))
    }

    /// `True`, `False` or `None`, at the character `c`.
    fn word(&mut self, c: u8) -> std::result::Result<Py, String> {
        for (word, v) in [
            ("True", Py::Bool(true)),
            ("False", Py::Bool(false)),
            ("None", Py::None),
        ] {
            if self.s[self.i..].starts_with(word.as_bytes()) {
                self.i += word.len();
                return Ok(v);
            }
        }
        Err(format!(
            "unexpected character '{}' in the header",
            char::from(c).escape_default()
        ))
    }

    fn string(&mut self, quote: u8) -> std::result::Result<String, String> {
        self.i += 1;
        let start = self.i;
        while self.i < self.s.len() && self.s[self.i] != quote {
            if self.s[self.i] == b'\\' {
                return Err("escape sequences in header strings are not supported".into());
            }
            self.i += 1;
        }
        if self.i >= self.s.len() {
            return Err("a string in the header is not closed".into());
        }
        let text = std::str::from_utf8(&self.s[start..self.i])
            .map_err(|_| "a string in the header is not valid UTF-8".to_string())?
            .to_string();
        self.i += 1;
        Ok(text)
    }
}

/// Parses the header dict literal into the array description (data offset left at 0).
fn parse_dict(text: &[u8]) -> std::result::Result<Header, String> {
    let mut p = Lit { s: text, i: 0 };
    let Py::Dict(items) = p.value(0)? else {
        return Err("the header is not a dict literal".into());
    };
    p.ws();
    if p.i != text.len() {
        return Err("unexpected text after the header dict".into());
    }
    let get = |k: &str| items.iter().find(|(key, _)| key == k).map(|(_, v)| v);
    let descr = match get("descr") {
        Some(Py::Str(s)) => s.as_str(),
        Some(_) => {
            return Err(
                "'descr' is not a simple type string (structured arrays are not probe data)".into(),
            );
        }
        None => return Err("the header has no 'descr'".into()),
    };
    let (big_endian, dtype) = match descr {
        "<f4" => (false, Dtype::F32),
        ">f4" => (true, Dtype::F32),
        "<f8" => (false, Dtype::F64),
        ">f8" => (true, Dtype::F64),
        "=f4" => (cfg!(target_endian = "big"), Dtype::F32),
        "=f8" => (cfg!(target_endian = "big"), Dtype::F64),
        other => {
            return Err(format!(
                "element type '{other}' is not supported: use float32 or float64 ('<f4', '>f4', '<f8', '>f8')"
            ));
        }
    };
    let fortran = match get("fortran_order") {
        Some(Py::Bool(b)) => *b,
        Some(_) => return Err("'fortran_order' is not True or False".into()),
        None => return Err("the header has no 'fortran_order'".into()),
    };
    let dims: Vec<u128> = match get("shape") {
        Some(Py::Tuple(t)) => t
            .iter()
            .map(|d| match d {
                Py::Int(n) => Ok(*n),
                _ => Err("'shape' holds something other than whole numbers".to_string()),
            })
            .collect::<std::result::Result<_, _>>()?,
        Some(_) => return Err("'shape' is not a tuple".into()),
        None => return Err("the header has no 'shape'".into()),
    };
    if dims.len() != 2 {
        return Err(format!(
            "the array has {} dimensions (shape {:?}); a probe must be 2-D: [samples, inputs]",
            dims.len(),
            dims
        ));
    }
    let to_usize = |d: u128| {
        usize::try_from(d)
            .map_err(|_| format!("the declared size {d} is too large for this machine"))
    };
    Ok(Header {
        dtype,
        big_endian,
        fortran,
        rows: to_usize(dims[0])?,
        cols: to_usize(dims[1])?,
        data_offset: 0,
    })
}

/// Reads and checks the preamble and header of a `.npy` stream.
fn read_header(r: &mut impl Read) -> std::result::Result<Header, String> {
    let mut pre = [0u8; 8];
    r.read_exact(&mut pre)
        .map_err(|_| "too short to be a .npy file (no NumPy header)".to_string())?;
    if &pre[..6] != MAGIC {
        return Err("not a .npy file: it does not start with the NumPy magic string".into());
    }
    let (major, minor) = (pre[6], pre[7]);
    let (len, prefix) = match major {
        1 => {
            let mut b = [0u8; 2];
            r.read_exact(&mut b)
                .map_err(|_| "the header length is cut off".to_string())?;
            (u64::from(u16::from_le_bytes(b)), 10u64)
        }
        2 | 3 => {
            let mut b = [0u8; 4];
            r.read_exact(&mut b)
                .map_err(|_| "the header length is cut off".to_string())?;
            (u64::from(u32::from_le_bytes(b)), 12u64)
        }
        _ => {
            return Err(format!(
                ".npy format version {major}.{minor} is not supported (1.0, 2.0 and 3.0 are)"
            ));
        }
    };
    if len > MAX_HEADER_LEN {
        return Err(format!(
            "the header claims {len} bytes, more than the {MAX_HEADER_LEN} accepted"
        ));
    }
    let mut text = Vec::new();
    r.take(len)
        .read_to_end(&mut text)
        .map_err(|e| format!("cannot read the header: {e}"))?;
    if text.len() as u64 != len {
        return Err(format!(
            "the header is cut off: {len} bytes declared, {} present",
            text.len()
        ));
    }
    // Version 1 and 2 headers are latin-1; every character of a valid probe header is ASCII.
    let trimmed: &[u8] = {
        let mut end = text.len();
        while end > 0 && matches!(text[end - 1], b'\n' | b' ' | b'\0') {
            end -= 1;
        }
        &text[..end]
    };
    let mut h = parse_dict(trimmed)?;
    h.data_offset = prefix + len;
    Ok(h)
}

impl NpyProbe {
    /// Opens `path` as a probe for `net`: parses the header, checks the second dimension
    /// against the model's input size and the declared size against the file's length.
    pub fn open(path: &Path, net: &Network) -> Result<Self> {
        let file = File::open(path).map_err(|e| Error::io(path, "cannot open the probe", e))?;
        let meta = file
            .metadata()
            .map_err(|e| Error::io(path, "cannot read the probe", e))?;
        if meta.is_dir() {
            return Err(Error::probe(path, "is a folder, not a probe file"));
        }
        let file_len = meta.len();
        let mut file = BufReader::with_capacity(1 << 16, file);
        let header = read_header(&mut file).map_err(|m| Error::probe(path, m))?;
        if header.cols != net.input().size {
            return Err(Error::probe(
                path,
                format!(
                    "the array has shape ({}, {}) but the model has {} inputs: expected ({}, {})",
                    header.rows,
                    header.cols,
                    net.input().size,
                    header.rows,
                    net.input().size
                ),
            ));
        }
        let expected = (header.rows as u128) * (header.cols as u128) * header.dtype.size() as u128;
        let present = u128::from(file_len.saturating_sub(header.data_offset));
        if expected != present {
            return Err(Error::probe(
                path,
                format!(
                    "the header declares shape ({}, {}) of {}-byte numbers, {expected} bytes of data, but the file holds {present}",
                    header.rows,
                    header.cols,
                    header.dtype.size()
                ),
            ));
        }
        if header.rows == 0 {
            return Err(Error::probe(
                path,
                "the probe is empty: the array has 0 rows, so no samples",
            ));
        }
        Ok(NpyProbe {
            path: path.to_path_buf(),
            file,
            header,
            next_row: 0,
            buf: Vec::new(),
        })
    }

    /// Decodes the elements in `bytes` into `out` as f32 (f64 values are rounded to
    /// nearest). One tight loop per dtype and byte order, so the conversion vectorises.
    fn decode_into(h: &Header, bytes: &[u8], out: &mut [f32]) {
        match (h.dtype, h.big_endian) {
            (Dtype::F32, false) => {
                for (o, b) in out.iter_mut().zip(bytes.chunks_exact(4)) {
                    *o = f32::from_le_bytes([b[0], b[1], b[2], b[3]]);
                }
            }
            (Dtype::F32, true) => {
                for (o, b) in out.iter_mut().zip(bytes.chunks_exact(4)) {
                    *o = f32::from_be_bytes([b[0], b[1], b[2], b[3]]);
                }
            }
            // A finite f64 beyond f32's range becomes infinite here and is refused later.
            (Dtype::F64, false) => {
                for (o, b) in out.iter_mut().zip(bytes.chunks_exact(8)) {
                    *o =
                        f64::from_le_bytes([b[0], b[1], b[2], b[3], b[4], b[5], b[6], b[7]]) as f32;
                }
            }
            (Dtype::F64, true) => {
                for (o, b) in out.iter_mut().zip(bytes.chunks_exact(8)) {
                    *o =
                        f64::from_be_bytes([b[0], b[1], b[2], b[3], b[4], b[5], b[6], b[7]]) as f32;
                }
            }
        }
    }

    fn io_err(&self, e: std::io::Error) -> Error {
        if e.kind() == std::io::ErrorKind::UnexpectedEof {
            Error::probe(
                &self.path,
                "the file ended early (it was shortened while being read)",
            )
        } else {
            Error::io(&self.path, "cannot read the probe", e)
        }
    }
}

impl ProbeSource for NpyProbe {
    fn describe(&self) -> String {
        self.path.display().to_string()
    }

    fn next_chunk(&mut self, max_rows: usize) -> Result<Option<ProbeChunk>> {
        let h = self.header.clone();
        let n = max_rows.max(1).min(h.rows - self.next_row);
        if n == 0 {
            return Ok(None);
        }
        let size = h.dtype.size();
        let r0 = self.next_row;
        let mut buf = std::mem::take(&mut self.buf);
        let mut values = vec![0f32; n * h.cols];
        if h.fortran {
            // Column-major: column c of rows r0..r0+n is one contiguous slice.
            buf.resize(n * size, 0);
            let mut column = vec![0f32; n];
            for c in 0..h.cols {
                let offset =
                    h.data_offset + ((c as u64) * (h.rows as u64) + r0 as u64) * size as u64;
                self.file
                    .seek(SeekFrom::Start(offset))
                    .map_err(|e| self.io_err(e))?;
                self.file.read_exact(&mut buf).map_err(|e| self.io_err(e))?;
                Self::decode_into(&h, &buf, &mut column);
                for (r, v) in column.iter().enumerate() {
                    values[r * h.cols + c] = *v;
                }
            }
        } else {
            buf.resize(n * h.cols * size, 0);
            let offset = h.data_offset + (r0 as u64) * (h.cols as u64) * size as u64;
            self.file
                .seek(SeekFrom::Start(offset))
                .map_err(|e| self.io_err(e))?;
            self.file.read_exact(&mut buf).map_err(|e| self.io_err(e))?;
            Self::decode_into(&h, &buf, &mut values);
        }
        self.buf = buf;
        if let Some(i) = values.iter().position(|v| !v.is_finite()) {
            let (r, c, v) = (i / h.cols, i % h.cols, values[i]);
            return Err(Error::probe(
                &self.path,
                format!(
                    "row {} (from 0), column {c} (from 0): {v} is not a finite number (f32)",
                    r0 + r
                ),
            ));
        }
        let inputs = Array2::from_shape_vec((n, h.cols), values)
            .map_err(|e| Error::probe(&self.path, e.to_string()))?;
        self.next_row += n;
        Ok(Some(ProbeChunk {
            inputs,
            labels: None,
            first_row: r0,
        }))
    }

    fn total_rows(&self) -> Option<usize> {
        Some(self.header.rows)
    }

    fn has_labels(&self) -> bool {
        false
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::{Activation, InputSpec, Layer};
    use ndarray::{Array1, Array2};

    fn net(inputs: usize) -> Network {
        Network::new(
            "test",
            "t",
            InputSpec::vector_box(inputs, -1.0, 1.0),
            vec![Layer {
                kind: crate::model::LayerKind::Dense,
                name: "out".into(),
                activation: Activation::Identity,
                weights: Array2::zeros((1, inputs)),
                bias: Array1::zeros(1),
                labels: None,
            }],
        )
        .unwrap()
    }

    /// Builds a .npy file by hand following NEP 1: magic, version, header length, the dict
    /// padded with spaces to a multiple of 64 bytes and ended by '\n', then `data`.
    fn npy(major: u8, dict: &str, data: &[u8]) -> Vec<u8> {
        let prefix = if major == 1 { 10 } else { 12 };
        let mut header = dict.as_bytes().to_vec();
        while !(prefix + header.len() + 1).is_multiple_of(64) {
            header.push(b' ');
        }
        header.push(b'\n');
        let mut out = MAGIC.to_vec();
        out.extend_from_slice(&[major, 0]);
        if major == 1 {
            out.extend_from_slice(&(header.len() as u16).to_le_bytes());
        } else {
            out.extend_from_slice(&(header.len() as u32).to_le_bytes());
        }
        out.extend_from_slice(&header);
        out.extend_from_slice(data);
        out
    }

    fn read(bytes: &[u8], inputs: usize, chunk: usize) -> Result<Array2<f32>> {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("probe.npy");
        std::fs::write(&p, bytes).unwrap();
        let mut probe = NpyProbe::open(&p, &net(inputs))?;
        let mut rows: Vec<f32> = Vec::new();
        let mut n = 0;
        while let Some(c) = probe.next_chunk(chunk)? {
            assert_eq!(c.first_row, n);
            n += c.inputs.nrows();
            rows.extend(c.inputs.iter());
        }
        Ok(Array2::from_shape_vec((n, inputs), rows).unwrap())
    }

    #[test]
    fn c_order_little_endian_f32_exact_bytes() {
        // np.array([[1, 2, 3], [4, 5, 6]], dtype='<f4'): 1.0f32 is 0x3F800000, so its
        // little-endian bytes are 00 00 80 3F (IEEE 754 binary32).
        let mut data = Vec::new();
        for v in [1.0f32, 2.0, 3.0, 4.0, 5.0, 6.0] {
            data.extend_from_slice(&v.to_le_bytes());
        }
        assert_eq!(&data[..4], &[0x00, 0x00, 0x80, 0x3F]);
        let f = npy(
            1,
            "{'descr': '<f4', 'fortran_order': False, 'shape': (2, 3), }",
            &data,
        );
        // NEP 1: the data starts on a 64-byte boundary; 6 x 4 data bytes follow.
        assert!((f.len() - 24).is_multiple_of(64));
        let a = read(&f, 3, 1).unwrap();
        assert_eq!(a, ndarray::arr2(&[[1.0, 2.0, 3.0], [4.0, 5.0, 6.0]]));
    }

    #[test]
    fn fortran_order_big_endian_f8() {
        // The same 2x3 matrix stored column by column as big-endian float64: 1.0f64 is
        // 0x3FF0000000000000 (IEEE 754 binary64).
        let mut data = Vec::new();
        for v in [1.0f64, 4.0, 2.0, 5.0, 3.0, 6.0] {
            data.extend_from_slice(&v.to_be_bytes());
        }
        assert_eq!(&data[..8], &[0x3F, 0xF0, 0, 0, 0, 0, 0, 0]);
        let f = npy(
            2,
            "{'descr': '>f8', 'fortran_order': True, 'shape': (2, 3)}",
            &data,
        );
        for chunk in [1, 2, 5] {
            let a = read(&f, 3, chunk).unwrap();
            assert_eq!(a, ndarray::arr2(&[[1.0, 2.0, 3.0], [4.0, 5.0, 6.0]]));
        }
    }

    #[test]
    fn big_endian_f4_and_little_f8_and_v3() {
        let mut be = Vec::new();
        for v in [0.5f32, -0.25] {
            be.extend_from_slice(&v.to_be_bytes());
        }
        let f = npy(
            3,
            "{\"descr\": \">f4\", \"fortran_order\": False, \"shape\": (1, 2)}",
            &be,
        );
        assert_eq!(read(&f, 2, 10).unwrap(), ndarray::arr2(&[[0.5, -0.25]]));
        let mut le = Vec::new();
        for v in [0.5f64, -0.25] {
            le.extend_from_slice(&v.to_le_bytes());
        }
        let f = npy(
            1,
            "{'descr': '<f8', 'fortran_order': False, 'shape': (2L, 1L), }",
            &le,
        );
        assert_eq!(read(&f, 1, 10).unwrap(), ndarray::arr2(&[[0.5], [-0.25]]));
    }

    #[test]
    fn lying_shapes_and_bad_cells_are_errors() {
        let six = vec![0u8; 24];
        let cases: Vec<(Vec<u8>, usize, &str)> = vec![
            // 10^12 rows declared with 24 bytes present: refused from the length, no allocation.
            (
                npy(
                    1,
                    "{'descr': '<f4', 'fortran_order': False, 'shape': (1000000000000, 3), }",
                    &six,
                ),
                3,
                "12000000000000 bytes of data, but the file holds 24",
            ),
            (
                npy(
                    1,
                    "{'descr': '<f4', 'fortran_order': False, 'shape': (99999999999999999999, 3), }",
                    &six,
                ),
                3,
                "too large",
            ),
            (
                npy(
                    1,
                    "{'descr': '<f4', 'fortran_order': False, 'shape': (2, 3), }",
                    &six[..20],
                ),
                3,
                "but the file holds 20",
            ),
            (
                npy(
                    1,
                    "{'descr': '<f4', 'fortran_order': False, 'shape': (2, 3), }",
                    &six,
                ),
                4,
                "the model has 4 inputs",
            ),
            (
                npy(
                    1,
                    "{'descr': '<f4', 'fortran_order': False, 'shape': (6,), }",
                    &six,
                ),
                3,
                "1 dimensions",
            ),
            (
                npy(
                    1,
                    "{'descr': '<i4', 'fortran_order': False, 'shape': (2, 3), }",
                    &six,
                ),
                3,
                "'<i4' is not supported",
            ),
            (
                npy(
                    1,
                    "{'descr': '<f4', 'fortran_order': False, 'shape': (0, 3), }",
                    &[],
                ),
                3,
                "empty",
            ),
            (
                npy(1, "{'descr': '<f4', 'shape': (2, 3), }", &six),
                3,
                "no 'fortran_order'",
            ),
            (
                npy(
                    1,
                    "{'descr': '<f4', 'fortran_order': False, 'shape': (2, 3)",
                    &six,
                ),
                3,
                "header",
            ),
            (npy(9, "{}", &six), 3, "version 9.0"),
            (b"\x93NUMPY\x01\x00\xff".to_vec(), 3, "cut off"),
            (b"hello".to_vec(), 3, "too short"),
            (b"PK\x03\x04hello world".to_vec(), 3, "magic"),
            (
                npy(1, &format!("{}{}", "(".repeat(100), ")".repeat(100)), &six),
                3,
                "nested too deeply",
            ),
        ];
        for (i, (bytes, inputs, want)) in cases.iter().enumerate() {
            let err = read(bytes, *inputs, 10).unwrap_err().to_string();
            assert!(err.contains("probe.npy"), "case {i}: {err}");
            assert!(err.contains(want), "case {i}: want {want:?}, got {err}");
        }
        // NaN at row 1, column 2 (C order) and +inf in a Fortran array at row 0, column 1.
        let mut data = Vec::new();
        for v in [0.0f32, 0.0, 0.0, 0.0, 0.0, f32::NAN] {
            data.extend_from_slice(&v.to_le_bytes());
        }
        let f = npy(
            1,
            "{'descr': '<f4', 'fortran_order': False, 'shape': (2, 3), }",
            &data,
        );
        let err = read(&f, 3, 10).unwrap_err().to_string();
        assert!(
            err.contains("row 1 (from 0), column 2 (from 0): NaN"),
            "{err}"
        );
        let mut data = Vec::new();
        for v in [0.0f64, 0.0, f64::INFINITY, 0.0] {
            data.extend_from_slice(&v.to_le_bytes());
        }
        let f = npy(
            1,
            "{'descr': '<f8', 'fortran_order': True, 'shape': (2, 2), }",
            &data,
        );
        let err = read(&f, 2, 10).unwrap_err().to_string();
        assert!(
            err.contains("row 0 (from 0), column 1 (from 0): inf"),
            "{err}"
        );
        // A finite f64 beyond the f32 range is refused too.
        let f = npy(
            1,
            "{'descr': '<f8', 'fortran_order': False, 'shape': (1, 1), }",
            &1e300f64.to_le_bytes(),
        );
        assert!(
            read(&f, 1, 10)
                .unwrap_err()
                .to_string()
                .contains("not a finite number")
        );
    }

    proptest::proptest! {
        #![proptest_config(proptest::prelude::ProptestConfig::with_cases(256))]
        /// Any file made from a valid one by overwriting some bytes reads or is refused,
        /// never panics (common practice for parsers, no source).
        #[test]
        fn mutated_files_never_panic(
            edits in proptest::collection::vec((0usize..200, proptest::prelude::any::<u8>()), 1..8),
            cut in 0usize..200,
        ) {
            let mut data = Vec::new();
            for v in [1.0f32, -2.0, 3.5, 0.25, 8.0, -0.5] {
                data.extend_from_slice(&v.to_le_bytes());
            }
            let mut f = npy(1, "{'descr': '<f4', 'fortran_order': True, 'shape': (3, 2), }", &data);
            for (at, b) in edits {
                let n = f.len();
                f[at % n] = b;
            }
            if cut < f.len() && cut % 3 == 0 {
                f.truncate(cut);
            }
            let _ = read(&f, 2, 2);
        }
    }
}
