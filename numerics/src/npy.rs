//! NumPy `.npy` input and output (format versions 1.0, 2.0 and 3.0; C order).
//!
//! Owns the one reader and writer of numeric arrays used by rondo's built-in stages
//! (mixing, output validation) and by the reference model engine. The format is the open
//! NumPy format described in NEP 1 ("A simple file format for NumPy arrays"): a magic
//! string `\x93NUMPY`, a version, a little header length, a Python-literal header dict
//! with `descr`, `fortran_order` and `shape`, then the raw data.
//!
//! Reading accepts little-endian `f8` and `c16` as they are, and `f4`, `c8`, `i8`, `i4`
//! converted to `f64` / `Complex64`. Writing produces version 1.0 `<f8` or `<c16`, C order,
//! written to a temporary file in the target's folder and renamed into place, so a reader
//! never sees a half-written array.

use num_complex::Complex64;
use std::fs;
use std::io::Write;
use std::path::{Path, PathBuf};

/// The magic prefix of every `.npy` file (NEP 1).
const MAGIC: &[u8; 6] = b"\x93NUMPY";

/// What went wrong reading or writing an `.npy` file; every variant names the file.
#[derive(Debug, thiserror::Error)]
pub enum NpyError {
    /// The file could not be opened, read, written or renamed.
    #[error("{path}: {action}: {source}")]
    Io {
        /// The file concerned.
        path: PathBuf,
        /// What was being done ("cannot read", "cannot write", ...).
        action: &'static str,
        /// The operating system's error.
        #[source]
        source: std::io::Error,
    },
    /// The bytes are not a valid `.npy` array this reader supports.
    #[error("{path}: not a valid .npy array: {message}")]
    Format {
        /// The file concerned.
        path: PathBuf,
        /// What is wrong, in words.
        message: String,
    },
    /// The caller asked to write data whose length does not match the shape.
    #[error("{path}: cannot write: shape {shape:?} needs {expected} elements, got {got}")]
    ShapeMismatch {
        /// The file concerned.
        path: PathBuf,
        /// The requested shape.
        shape: Vec<usize>,
        /// Product of the shape.
        expected: usize,
        /// Number of elements supplied.
        got: usize,
    },
}

/// The element data of an array, in C (row-major) order.
#[derive(Debug, Clone, PartialEq)]
pub enum NpyData {
    /// Real values (stored as `<f8`, or converted from `f4`/integers on reading).
    Real(Vec<f64>),
    /// Complex values (stored as `<c16`, or converted from `c8` on reading).
    Complex(Vec<Complex64>),
}

/// An array read from or to be written to an `.npy` file.
#[derive(Debug, Clone, PartialEq)]
pub struct NpyArray {
    /// The shape; an empty shape is a scalar (one element).
    pub shape: Vec<usize>,
    /// The elements in C order.
    pub data: NpyData,
}

impl NpyArray {
    /// Number of elements (product of the shape).
    pub fn len(&self) -> usize {
        match &self.data {
            NpyData::Real(v) => v.len(),
            NpyData::Complex(v) => v.len(),
        }
    }

    /// True when the array holds no element.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// True when the elements are complex.
    pub fn is_complex(&self) -> bool {
        matches!(self.data, NpyData::Complex(_))
    }

    /// True when any element (real or imaginary part) is NaN or infinite.
    pub fn has_nonfinite(&self) -> bool {
        match &self.data {
            NpyData::Real(v) => v.iter().any(|x| !x.is_finite()),
            NpyData::Complex(v) => v.iter().any(|z| !z.re.is_finite() || !z.im.is_finite()),
        }
    }

    /// The elements as one real vector; complex elements become `re, im` pairs.
    pub fn to_flat_f64(&self) -> Vec<f64> {
        match &self.data {
            NpyData::Real(v) => v.clone(),
            NpyData::Complex(v) => v.iter().flat_map(|z| [z.re, z.im]).collect(),
        }
    }

    /// Inverse of [`NpyArray::to_flat_f64`]: rebuild an array of `shape` from a flat real
    /// vector (`re, im` pairs when `is_complex`). Returns `None` when the length does not
    /// match the shape.
    pub fn from_flat_f64(shape: Vec<usize>, is_complex: bool, flat: Vec<f64>) -> Option<Self> {
        let n: usize = shape.iter().product();
        if is_complex {
            if flat.len() != 2 * n {
                return None;
            }
            let data = flat
                .chunks_exact(2)
                .map(|p| Complex64::new(p[0], p[1]))
                .collect();
            Some(Self {
                shape,
                data: NpyData::Complex(data),
            })
        } else {
            if flat.len() != n {
                return None;
            }
            Some(Self {
                shape,
                data: NpyData::Real(flat),
            })
        }
    }

    /// The real elements, or `None` for a complex array.
    pub fn as_real(&self) -> Option<&[f64]> {
        match &self.data {
            NpyData::Real(v) => Some(v),
            NpyData::Complex(_) => None,
        }
    }

    /// The complex elements, or `None` for a real array.
    pub fn as_complex(&self) -> Option<&[Complex64]> {
        match &self.data {
            NpyData::Complex(v) => Some(v),
            NpyData::Real(_) => None,
        }
    }

    /// Write this array to `path` atomically (temporary file + rename).
    pub fn write(&self, path: &Path) -> Result<(), NpyError> {
        match &self.data {
            NpyData::Real(v) => write_real(path, &self.shape, v),
            NpyData::Complex(v) => write_complex(path, &self.shape, v),
        }
    }
}

fn format_err(path: &Path, message: impl Into<String>) -> NpyError {
    NpyError::Format {
        path: path.to_path_buf(),
        message: message.into(),
    }
}

/// Element types the reader understands.
#[derive(Debug, Clone, Copy)]
enum Dtype {
    F8,
    F4,
    C16,
    C8,
    I8,
    I4,
}

impl Dtype {
    fn size(self) -> usize {
        match self {
            Dtype::F8 | Dtype::I8 | Dtype::C8 => 8,
            Dtype::F4 | Dtype::I4 => 4,
            Dtype::C16 => 16,
        }
    }
}

fn parse_descr(path: &Path, descr: &str) -> Result<Dtype, NpyError> {
    let (order, code) = descr.split_at(descr.len().min(1));
    if order == ">" {
        return Err(format_err(
            path,
            format!("big-endian dtype '{descr}' is not supported; save as little-endian"),
        ));
    }
    if order != "<" && order != "|" && order != "=" {
        return Err(format_err(path, format!("unsupported dtype '{descr}'")));
    }
    match code {
        "f8" => Ok(Dtype::F8),
        "f4" => Ok(Dtype::F4),
        "c16" => Ok(Dtype::C16),
        "c8" => Ok(Dtype::C8),
        "i8" => Ok(Dtype::I8),
        "i4" => Ok(Dtype::I4),
        _ => Err(format_err(
            path,
            format!("unsupported dtype '{descr}' (expected float64 or complex128)"),
        )),
    }
}

/// Find the value text after `'key':` in a Python dict literal.
fn dict_value<'a>(header: &'a str, key: &str) -> Option<&'a str> {
    let pat1 = format!("'{key}'");
    let pat2 = format!("\"{key}\"");
    let start = header
        .find(&pat1)
        .map(|i| i + pat1.len())
        .or_else(|| header.find(&pat2).map(|i| i + pat2.len()))?;
    let rest = header[start..].trim_start();
    let rest = rest.strip_prefix(':')?;
    Some(rest.trim_start())
}

fn parse_header(path: &Path, header: &str) -> Result<(Dtype, bool, Vec<usize>), NpyError> {
    let descr_text = dict_value(header, "descr")
        .ok_or_else(|| format_err(path, "header has no 'descr' entry"))?;
    let quote = descr_text
        .chars()
        .next()
        .filter(|c| *c == '\'' || *c == '"')
        .ok_or_else(|| format_err(path, "structured dtypes are not supported"))?;
    let descr_body = &descr_text[1..];
    let end = descr_body
        .find(quote)
        .ok_or_else(|| format_err(path, "unterminated 'descr' string in header"))?;
    let dtype = parse_descr(path, &descr_body[..end])?;

    let fortran_text = dict_value(header, "fortran_order")
        .ok_or_else(|| format_err(path, "header has no 'fortran_order' entry"))?;
    let fortran = if fortran_text.starts_with("True") {
        true
    } else if fortran_text.starts_with("False") {
        false
    } else {
        return Err(format_err(
            path,
            "'fortran_order' is neither True nor False",
        ));
    };

    let shape_text = dict_value(header, "shape")
        .ok_or_else(|| format_err(path, "header has no 'shape' entry"))?;
    let inner = shape_text
        .strip_prefix('(')
        .and_then(|s| s.find(')').map(|e| &s[..e]))
        .ok_or_else(|| format_err(path, "'shape' is not a tuple"))?;
    let mut shape = Vec::new();
    for part in inner.split(',') {
        let part = part.trim();
        if part.is_empty() {
            continue;
        }
        let dim: usize = part
            .trim_end_matches('L')
            .parse()
            .map_err(|_| format_err(path, format!("shape entry '{part}' is not a size")))?;
        shape.push(dim);
    }
    Ok((dtype, fortran, shape))
}

/// Read an `.npy` file of any supported dtype; real types become [`NpyData::Real`],
/// complex types [`NpyData::Complex`].
pub fn read_any(path: impl AsRef<Path>) -> Result<NpyArray, NpyError> {
    let path = path.as_ref();
    let bytes = fs::read(path).map_err(|source| NpyError::Io {
        path: path.to_path_buf(),
        action: "cannot read",
        source,
    })?;
    parse_bytes(path, &bytes)
}

fn parse_bytes(path: &Path, bytes: &[u8]) -> Result<NpyArray, NpyError> {
    if bytes.len() < 10 || &bytes[..6] != MAGIC {
        return Err(format_err(path, "missing the \\x93NUMPY magic string"));
    }
    let major = bytes[6];
    let (header_len, header_start) = match major {
        1 => (u16::from_le_bytes([bytes[8], bytes[9]]) as usize, 10),
        2 | 3 => {
            if bytes.len() < 12 {
                return Err(format_err(path, "file ends inside the header length"));
            }
            (
                u32::from_le_bytes([bytes[8], bytes[9], bytes[10], bytes[11]]) as usize,
                12,
            )
        }
        v => return Err(format_err(path, format!("unsupported format version {v}"))),
    };
    let data_start = header_start + header_len;
    if bytes.len() < data_start {
        return Err(format_err(path, "file ends inside the header"));
    }
    let header = std::str::from_utf8(&bytes[header_start..data_start])
        .map_err(|_| format_err(path, "header is not text"))?;
    let (dtype, fortran, shape) = parse_header(path, header)?;
    let n: usize = shape.iter().product();
    let data = &bytes[data_start..];
    let need = n * dtype.size();
    if data.len() != need {
        return Err(format_err(
            path,
            format!(
                "shape {shape:?} needs {need} data bytes, file has {} (truncated or padded file)",
                data.len()
            ),
        ));
    }
    let b8 = |c: &[u8]| [c[0], c[1], c[2], c[3], c[4], c[5], c[6], c[7]];
    let b4 = |c: &[u8]| [c[0], c[1], c[2], c[3]];
    let mut arr = match dtype {
        Dtype::F8 => NpyData::Real(
            data.chunks_exact(8)
                .map(|c| f64::from_le_bytes(b8(c)))
                .collect(),
        ),
        Dtype::F4 => NpyData::Real(
            data.chunks_exact(4)
                .map(|c| f64::from(f32::from_le_bytes(b4(c))))
                .collect(),
        ),
        Dtype::I8 => NpyData::Real(
            data.chunks_exact(8)
                .map(|c| i64::from_le_bytes(b8(c)) as f64)
                .collect(),
        ),
        Dtype::I4 => NpyData::Real(
            data.chunks_exact(4)
                .map(|c| f64::from(i32::from_le_bytes(b4(c))))
                .collect(),
        ),
        Dtype::C16 => NpyData::Complex(
            data.chunks_exact(16)
                .map(|c| {
                    Complex64::new(
                        f64::from_le_bytes(b8(&c[..8])),
                        f64::from_le_bytes(b8(&c[8..])),
                    )
                })
                .collect(),
        ),
        Dtype::C8 => NpyData::Complex(
            data.chunks_exact(8)
                .map(|c| {
                    Complex64::new(
                        f64::from(f32::from_le_bytes(b4(&c[..4]))),
                        f64::from(f32::from_le_bytes(b4(&c[4..]))),
                    )
                })
                .collect(),
        ),
    };
    if fortran && shape.len() > 1 {
        arr = match arr {
            NpyData::Real(v) => NpyData::Real(fortran_to_c(&v, &shape)),
            NpyData::Complex(v) => NpyData::Complex(fortran_to_c(&v, &shape)),
        };
    }
    Ok(NpyArray { shape, data: arr })
}

/// Reorder column-major elements into row-major order.
fn fortran_to_c<T: Copy>(v: &[T], shape: &[usize]) -> Vec<T> {
    let n = v.len();
    let d = shape.len();
    let mut out = Vec::with_capacity(n);
    let mut idx = vec![0usize; d];
    for _ in 0..n {
        // C-order index idx -> Fortran linear offset
        let mut off = 0;
        let mut stride = 1;
        for k in 0..d {
            off += idx[k] * stride;
            stride *= shape[k];
        }
        out.push(v[off]);
        for k in (0..d).rev() {
            idx[k] += 1;
            if idx[k] < shape[k] {
                break;
            }
            idx[k] = 0;
        }
    }
    out
}

fn header_bytes(descr: &str, shape: &[usize]) -> Vec<u8> {
    let shape_txt = match shape.len() {
        0 => "()".to_string(),
        1 => format!("({},)", shape[0]),
        _ => format!(
            "({})",
            shape
                .iter()
                .map(|s| s.to_string())
                .collect::<Vec<_>>()
                .join(", ")
        ),
    };
    let mut dict =
        format!("{{'descr': '{descr}', 'fortran_order': False, 'shape': {shape_txt}, }}");
    // Pad with spaces so that magic + version + length + header is a multiple of 64, ending in '\n'.
    let total = 10 + dict.len() + 1;
    let pad = (64 - total % 64) % 64;
    dict.push_str(&" ".repeat(pad));
    dict.push('\n');
    let mut out = Vec::with_capacity(10 + dict.len());
    out.extend_from_slice(MAGIC);
    out.extend_from_slice(&[1, 0]);
    out.extend_from_slice(&(dict.len() as u16).to_le_bytes());
    out.extend_from_slice(dict.as_bytes());
    out
}

/// Write `bytes` to `path` through a temporary file in the same folder and a rename.
pub fn write_atomic(path: &Path, bytes: &[u8]) -> Result<(), NpyError> {
    let io = |action: &'static str| {
        move |source| NpyError::Io {
            path: path.to_path_buf(),
            action,
            source,
        }
    };
    let dir = match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => PathBuf::from("."),
    };
    let name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    let tmp = dir.join(format!(".{name}.tmp.{}", std::process::id()));
    let result = (|| {
        let mut f = fs::File::create(&tmp).map_err(io("cannot create temporary file"))?;
        f.write_all(bytes).map_err(io("cannot write"))?;
        f.sync_all().map_err(io("cannot sync"))?;
        drop(f);
        fs::rename(&tmp, path).map_err(io("cannot rename temporary file into place"))
    })();
    if result.is_err() {
        let _ = fs::remove_file(&tmp);
    }
    result
}

fn check_len(path: &Path, shape: &[usize], got: usize) -> Result<(), NpyError> {
    let expected: usize = shape.iter().product();
    if expected != got {
        return Err(NpyError::ShapeMismatch {
            path: path.to_path_buf(),
            shape: shape.to_vec(),
            expected,
            got,
        });
    }
    Ok(())
}

/// Write a real `<f8` array of `shape` (C order) to `path` atomically.
pub fn write_real(path: impl AsRef<Path>, shape: &[usize], data: &[f64]) -> Result<(), NpyError> {
    let path = path.as_ref();
    check_len(path, shape, data.len())?;
    let mut bytes = header_bytes("<f8", shape);
    bytes.reserve(8 * data.len());
    for x in data {
        bytes.extend_from_slice(&x.to_le_bytes());
    }
    write_atomic(path, &bytes)
}

/// Write a complex `<c16` array of `shape` (C order) to `path` atomically.
pub fn write_complex(
    path: impl AsRef<Path>,
    shape: &[usize],
    data: &[Complex64],
) -> Result<(), NpyError> {
    let path = path.as_ref();
    check_len(path, shape, data.len())?;
    let mut bytes = header_bytes("<c16", shape);
    bytes.reserve(16 * data.len());
    for z in data {
        bytes.extend_from_slice(&z.re.to_le_bytes());
        bytes.extend_from_slice(&z.im.to_le_bytes());
    }
    write_atomic(path, &bytes)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn real_round_trip() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("a.npy");
        let data: Vec<f64> = (0..6).map(|i| i as f64 * 0.5 - 1.0).collect();
        write_real(&p, &[2, 3], &data).unwrap();
        let a = read_any(&p).unwrap();
        assert_eq!(a.shape, vec![2, 3]);
        assert_eq!(a.data, NpyData::Real(data));
        // NEP 1: total header length is a multiple of 64 bytes for alignment.
        let bytes = fs::read(&p).unwrap();
        let hl = u16::from_le_bytes([bytes[8], bytes[9]]) as usize;
        assert_eq!((10 + hl) % 64, 0);
        assert_eq!(bytes[10 + hl - 1], b'\n');
        // no temporary file left
        assert_eq!(fs::read_dir(dir.path()).unwrap().count(), 1);
    }

    #[test]
    fn complex_round_trip_and_flat() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("c.npy");
        let data: Vec<Complex64> = (0..4)
            .map(|i| Complex64::new(i as f64, -(i as f64) * 2.0))
            .collect();
        write_complex(&p, &[4], &data).unwrap();
        let a = read_any(&p).unwrap();
        assert!(a.is_complex());
        assert_eq!(a.as_complex().unwrap(), &data[..]);
        let flat = a.to_flat_f64();
        assert_eq!(flat.len(), 8);
        let b = NpyArray::from_flat_f64(a.shape.clone(), true, flat).unwrap();
        assert_eq!(a, b);
        assert!(NpyArray::from_flat_f64(vec![3], true, vec![0.0; 4]).is_none());
    }

    #[test]
    fn scalar_shape() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("s.npy");
        write_real(&p, &[], &[3.5]).unwrap();
        let a = read_any(&p).unwrap();
        assert!(a.shape.is_empty());
        assert_eq!(a.to_flat_f64(), vec![3.5]);
    }

    #[test]
    fn nonfinite_detected() {
        let a = NpyArray {
            shape: vec![2],
            data: NpyData::Real(vec![1.0, f64::NAN]),
        };
        assert!(a.has_nonfinite());
        let c = NpyArray {
            shape: vec![1],
            data: NpyData::Complex(vec![Complex64::new(0.0, f64::INFINITY)]),
        };
        assert!(c.has_nonfinite());
    }

    #[test]
    fn fortran_order_and_other_dtypes() {
        // A hand-built '<i8' Fortran-order 2x3 array: column-major data 0..6.
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("f.npy");
        let mut bytes = header_bytes("<i8", &[2, 3]);
        // Same length: "False" -> "True " keeps the header size.
        let pat = b"'fortran_order': False";
        let at = bytes.windows(pat.len()).position(|w| w == pat).unwrap();
        bytes[at..at + pat.len()].copy_from_slice(b"'fortran_order': True ");
        for i in 0..6i64 {
            bytes.extend_from_slice(&i.to_le_bytes());
        }
        fs::write(&p, &bytes).unwrap();
        let a = read_any(&p).unwrap();
        // column-major [[0,2,4],[1,3,5]]
        assert_eq!(a.to_flat_f64(), vec![0.0, 2.0, 4.0, 1.0, 3.0, 5.0]);
    }

    #[test]
    fn errors_name_the_file() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("bad.npy");
        fs::write(&p, b"hello world, not an array").unwrap();
        let e = read_any(&p).unwrap_err().to_string();
        assert!(e.contains("bad.npy") && e.contains("magic"), "{e}");

        let missing = dir.path().join("missing.npy");
        let e = read_any(&missing).unwrap_err().to_string();
        assert!(
            e.contains("missing.npy") && e.contains("cannot read"),
            "{e}"
        );

        // truncated data
        let t = dir.path().join("trunc.npy");
        write_real(&t, &[4], &[1.0, 2.0, 3.0, 4.0]).unwrap();
        let mut b = fs::read(&t).unwrap();
        b.truncate(b.len() - 8);
        fs::write(&t, &b).unwrap();
        let e = read_any(&t).unwrap_err().to_string();
        assert!(e.contains("trunc.npy") && e.contains("data bytes"), "{e}");

        // big-endian
        let be = dir.path().join("be.npy");
        let mut b = header_bytes(">f8", &[1]);
        b.extend_from_slice(&1.0f64.to_be_bytes());
        fs::write(&be, &b).unwrap();
        let e = read_any(&be).unwrap_err().to_string();
        assert!(e.contains("big-endian"), "{e}");

        let e = write_real(dir.path().join("w.npy"), &[3], &[1.0])
            .unwrap_err()
            .to_string();
        assert!(e.contains("needs 3 elements"), "{e}");
        assert!(!dir.path().join("w.npy").exists());
    }
}
