//! Reading weight tensors from NumPy `.npy` / `.npz` files and safetensors files.
//!
//! - `.npy` follows the format as NumPy documents it (numpy.lib.format): the magic
//!   `\x93NUMPY`, a major/minor version (1.0: 2-byte little-endian header length;
//!   2.0 and 3.0: 4-byte), a header that is a Python dict literal with `descr`,
//!   `fortran_order` and `shape`, then the raw data. The header is read with
//!   ndarray-npy's header reader; the data is converted here, because
//!   ndarray-npy reads neither float16 nor bfloat16.
//! - `.npz` is a zip archive of `.npy` members (`numpy.savez`, stored or deflated).
//! - safetensors: an 8-byte little-endian header length, a JSON header of
//!   name → {dtype, shape, data_offsets}, then the buffer; read with the
//!   `safetensors` crate.
//!
//! dtypes float16, bfloat16, float32 and float64 become f32 (via the `half` crate for
//! the 16-bit ones); byte order as the descriptor says. Every size is checked
//! against the bytes present before anything is allocated.

use std::io::Read;
use std::path::Path;

use crate::error::Error;

/// Largest weight file read, in bytes.
pub const MAX_FILE: u64 = 1 << 30;

/// A tensor read from a file, converted to f32, row-major (C order).
#[derive(Debug, Clone, PartialEq)]
pub struct Tensor {
    /// Name in the file (`array` for a lone `.npy`).
    pub name: String,
    /// Shape.
    pub shape: Vec<usize>,
    /// The stored dtype, as the file names it.
    pub dtype: String,
    /// Values, C order.
    pub data: Vec<f32>,
}

/// Name, shape and dtype of a tensor, without its data.
#[derive(Debug, Clone, PartialEq)]
pub struct TensorInfo {
    /// Name.
    pub name: String,
    /// Shape.
    pub shape: Vec<usize>,
    /// Stored dtype.
    pub dtype: String,
}

impl std::fmt::Display for TensorInfo {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        let dims: Vec<String> = self.shape.iter().map(usize::to_string).collect();
        write!(f, "{} [{}] {}", self.name, dims.join("×"), self.dtype)
    }
}

fn err(path: &Path, m: impl Into<String>) -> Error {
    Error::Bank {
        file: Some(path.to_path_buf()),
        at: None,
        message: m.into(),
    }
}

#[derive(Debug, Clone, Copy, PartialEq)]
enum Elem {
    F16,
    BF16,
    F32,
    F64,
    U8,
    U16,
}

impl Elem {
    fn size(self) -> usize {
        match self {
            Elem::U8 => 1,
            Elem::F16 | Elem::BF16 | Elem::U16 => 2,
            Elem::F32 => 4,
            Elem::F64 => 8,
        }
    }
}

/// Samples of type `elem` (byte order as given) to f32. One loop per type and
/// order, each a plain map over fixed-size chunks that the compiler turns into
/// vector code: the conversion of a large float image costs about a copy.
fn convert(bytes: &[u8], elem: Elem, big_endian: bool) -> Vec<f32> {
    fn each<const N: usize>(bytes: &[u8], f: impl Fn([u8; N]) -> f32) -> Vec<f32> {
        bytes
            .chunks_exact(N)
            .map(|c| f(c.try_into().expect("chunks of N")))
            .collect()
    }
    match (elem, big_endian) {
        (Elem::F32, false) => each(bytes, f32::from_le_bytes),
        (Elem::F32, true) => each(bytes, f32::from_be_bytes),
        (Elem::F64, false) => each(bytes, |b| f64::from_le_bytes(b) as f32),
        (Elem::F64, true) => each(bytes, |b| f64::from_be_bytes(b) as f32),
        (Elem::F16, false) => each(bytes, |b| half::f16::from_le_bytes(b).to_f32()),
        (Elem::F16, true) => each(bytes, |b| half::f16::from_be_bytes(b).to_f32()),
        (Elem::BF16, false) => each(bytes, |b| half::bf16::from_le_bytes(b).to_f32()),
        (Elem::BF16, true) => each(bytes, |b| half::bf16::from_be_bytes(b).to_f32()),
        (Elem::U8, _) => bytes.iter().map(|&v| v as f32).collect(),
        (Elem::U16, false) => each(bytes, |b| u16::from_le_bytes(b) as f32),
        (Elem::U16, true) => each(bytes, |b| u16::from_be_bytes(b) as f32),
    }
}

/// A parsed `.npy` header.
#[derive(Debug, Clone, PartialEq)]
pub struct NpyHeader {
    /// `descr`, e.g. `<f4`.
    pub descr: String,
    /// `fortran_order`.
    pub fortran: bool,
    /// `shape`.
    pub shape: Vec<usize>,
    /// Byte offset of the data.
    pub data_offset: usize,
}

/// Parses the header of `.npy` bytes with ndarray-npy's header reader (magic,
/// version 1.0/2.0/3.0, the dict literal with `descr`, `fortran_order` and
/// `shape`); the data starts where the reader stopped.
pub fn parse_npy_header(bytes: &[u8]) -> Result<NpyHeader, String> {
    use ndarray_npy::npy::header::{Header, ParseHeaderError, ReadHeaderError};
    if !bytes.starts_with(b"\x93NUMPY") {
        return Err("is not a NumPy .npy file (no \\x93NUMPY magic)".into());
    }
    let mut cursor = std::io::Cursor::new(bytes);
    let header = Header::from_reader(&mut cursor).map_err(|e| match e {
        ReadHeaderError::Io(_) => {
            "is truncated inside its header (not a whole NumPy .npy file)".to_string()
        }
        ReadHeaderError::Parse(ParseHeaderError::Version { major, minor }) => {
            format!("has .npy format version {major}.{minor}; tapmap reads 1.0, 2.0 and 3.0")
        }
        ReadHeaderError::Parse(p) => format!("has a header that does not parse: {p}"),
    })?;
    // The header is a Python dict literal, padded with spaces to its newline;
    // the parser takes one without its closing brace, which a damaged or
    // hand-made file can lack.
    let start = if bytes.get(6) == Some(&1) { 10 } else { 12 };
    let end = cursor.position() as usize;
    let text = bytes.get(start..end).unwrap_or_default();
    let text = String::from_utf8_lossy(text);
    let text = text.trim_end_matches(['\n', ' ', '\0']);
    if !(text.starts_with('{') && text.ends_with('}')) {
        return Err(format!(
            "has a header that is not a whole Python dict ({} … {}); the file is damaged",
            text.chars().take(12).collect::<String>(),
            text.chars()
                .rev()
                .take(12)
                .collect::<String>()
                .chars()
                .rev()
                .collect::<String>()
        ));
    }
    // The descriptor is a Python literal: a quoted string for the plain dtypes
    // read here, a list for structured ones.
    let literal = header.type_descriptor.to_string();
    let descr = literal
        .strip_prefix(['\'', '"'])
        .and_then(|d| d.strip_suffix(['\'', '"']))
        .ok_or_else(|| format!("has the dtype {literal}, which is not a plain number type"))?
        .to_string();
    Ok(NpyHeader {
        descr,
        fortran: header.layout.is_fortran(),
        shape: header.shape,
        data_offset: cursor.position() as usize,
    })
}

fn elem_of(descr: &str, allow_int: bool) -> Result<(Elem, bool), String> {
    // The first character is the byte-order mark; split on a char boundary, since
    // a damaged header may hold any UTF-8 there.
    let first = descr.chars().next().map_or(0, char::len_utf8);
    let (order, ty) = descr.split_at(first);
    let big = match order {
        "<" | "=" | "|" => false,
        ">" => true,
        _ => return Err(format!("dtype '{descr}' has no byte-order mark")),
    };
    let elem = match ty {
        "f2" | "e" => Elem::F16,
        "f4" => Elem::F32,
        "f8" => Elem::F64,
        "bfloat16" => Elem::BF16,
        "u1" if allow_int => Elem::U8,
        "u2" if allow_int => Elem::U16,
        other if allow_int => {
            return Err(format!(
                "has dtype '{other}'; image arrays must be uint8, uint16, float32 or float64"
            ))
        }
        other => {
            return Err(format!(
                "has dtype '{other}'; weights must be float16, bfloat16, float32 or float64"
            ))
        }
    };
    Ok((elem, big))
}

fn count(shape: &[usize]) -> Result<usize, String> {
    shape
        .iter()
        .try_fold(1usize, |a, d| a.checked_mul(*d))
        .ok_or_else(|| "has a shape whose size overflows".to_string())
}

/// Reads a tensor from `.npy` bytes.
pub fn npy_tensor(bytes: &[u8], name: &str) -> Result<Tensor, String> {
    let (h, data, _) = npy_values(bytes, false)?;
    Ok(Tensor {
        name: name.to_string(),
        shape: h.shape,
        dtype: h.descr,
        data,
    })
}

/// An image array read from `.npy` bytes.
#[derive(Debug, Clone, PartialEq)]
pub struct NpyArray {
    /// Shape.
    pub shape: Vec<usize>,
    /// Values as stored (not scaled), C order.
    pub data: Vec<f32>,
    /// The integer type's full scale (255, 65535), or `None` for float.
    pub full_scale: Option<u32>,
    /// Bits per sample as stored (8, 16, 32 or 64).
    pub bits: u8,
}

/// An image array from `.npy` bytes (uint8, uint16, float32, float64).
pub fn npy_array(bytes: &[u8]) -> Result<NpyArray, String> {
    let (h, data, elem) = npy_values(bytes, true)?;
    let full_scale = match elem {
        Elem::U8 => Some(255),
        Elem::U16 => Some(65535),
        _ => None,
    };
    Ok(NpyArray {
        shape: h.shape,
        data,
        full_scale,
        bits: (elem.size() * 8) as u8,
    })
}

/// Header, values (C order) and element type of `.npy` bytes, sizes checked
/// against the bytes present before anything is allocated.
fn npy_values(bytes: &[u8], allow_int: bool) -> Result<(NpyHeader, Vec<f32>, Elem), String> {
    let h = parse_npy_header(bytes)?;
    let (elem, big) = elem_of(&h.descr, allow_int)?;
    let n = count(&h.shape)?;
    let need = n
        .checked_mul(elem.size())
        .ok_or("has a shape whose byte size overflows")?;
    let have = bytes.len() - h.data_offset;
    if need > have {
        return Err(format!(
            "is truncated: its header claims {need} bytes of data ({:?} {}) but it holds {have}",
            h.shape, h.descr
        ));
    }
    if have > need {
        return Err(format!(
            "has {} bytes after its data ({need} bytes for {:?} {}); the file is damaged \
             or not what its header says",
            have - need,
            h.shape,
            h.descr
        ));
    }
    let mut data = convert(&bytes[h.data_offset..h.data_offset + need], elem, big);
    if h.fortran && h.shape.len() > 1 {
        data = fortran_to_c(&data, &h.shape);
    }
    Ok((h, data, elem))
}

/// Reorders column-major (Fortran) data into row-major order.
fn fortran_to_c(data: &[f32], shape: &[usize]) -> Vec<f32> {
    let nd = shape.len();
    let mut out = vec![0.0f32; data.len()];
    let mut idx = vec![0usize; nd];
    for v in out.iter_mut() {
        // Fortran offset of the current C-order index.
        let mut off = 0;
        let mut stride = 1;
        for d in 0..nd {
            off += idx[d] * stride;
            stride *= shape[d];
        }
        *v = data[off];
        for d in (0..nd).rev() {
            idx[d] += 1;
            if idx[d] < shape[d] {
                break;
            }
            idx[d] = 0;
        }
    }
    out
}

fn read_limited(path: &Path) -> Result<Vec<u8>, Error> {
    let meta = std::fs::metadata(path).map_err(|e| Error::io(path, e))?;
    if meta.len() > MAX_FILE {
        return Err(err(
            path,
            format!(
                "is {} bytes, over the {MAX_FILE}-byte limit for weight files",
                meta.len()
            ),
        ));
    }
    std::fs::read(path).map_err(|e| Error::io(path, e))
}

enum Format {
    Npy,
    Npz,
    SafeTensors,
}

fn format_of(path: &Path, bytes: &[u8]) -> Result<Format, Error> {
    if bytes.starts_with(b"\x93NUMPY") {
        return Ok(Format::Npy);
    }
    if bytes.starts_with(b"PK\x03\x04") || bytes.starts_with(b"PK\x05\x06") {
        return Ok(Format::Npz);
    }
    if bytes.len() >= 9 && bytes[8] == b'{' {
        return Ok(Format::SafeTensors);
    }
    Err(err(
        path,
        "is not a weight file tapmap reads (.npy, .npz or safetensors)",
    ))
}

fn npz_members<'a>(
    path: &Path,
    bytes: &'a [u8],
) -> Result<zip::ZipArchive<std::io::Cursor<&'a [u8]>>, Error> {
    zip::ZipArchive::new(std::io::Cursor::new(bytes))
        .map_err(|e| err(path, format!("is not a readable .npz archive: {e}")))
}

fn member_name(n: &str) -> String {
    n.strip_suffix(".npy").unwrap_or(n).to_string()
}

/// Lists the tensors in a weight file.
pub fn list_tensors(path: &Path) -> Result<Vec<TensorInfo>, Error> {
    list_tensors_in(&read_limited(path)?, path)
}

/// Lists the tensors in the bytes of a weight file; `path` names it in messages.
pub fn list_tensors_in(bytes: &[u8], path: &Path) -> Result<Vec<TensorInfo>, Error> {
    match format_of(path, bytes)? {
        Format::Npy => {
            let h = parse_npy_header(bytes).map_err(|m| err(path, m))?;
            Ok(vec![TensorInfo {
                name: "array".into(),
                shape: h.shape,
                dtype: h.descr,
            }])
        }
        Format::Npz => {
            let mut z = npz_members(path, bytes)?;
            let mut out = Vec::new();
            for i in 0..z.len() {
                let mut f = z
                    .by_index(i)
                    .map_err(|e| err(path, format!("member {i}: {e}")))?;
                let name = member_name(f.name());
                let mut head = Vec::new();
                (&mut f)
                    .take(65_536 + 12)
                    .read_to_end(&mut head)
                    .map_err(|e| err(path, format!("{name}: {e}")))?;
                let h =
                    parse_npy_header(&head).map_err(|m| err(path, format!("member {name} {m}")))?;
                out.push(TensorInfo {
                    name,
                    shape: h.shape,
                    dtype: h.descr,
                });
            }
            Ok(out)
        }
        Format::SafeTensors => {
            let st = safetensors::SafeTensors::deserialize(bytes)
                .map_err(|e| err(path, format!("is not a readable safetensors file: {e}")))?;
            let mut out: Vec<TensorInfo> = st
                .tensors()
                .into_iter()
                .map(|(n, v)| TensorInfo {
                    name: n,
                    shape: v.shape().to_vec(),
                    dtype: format!("{:?}", v.dtype()),
                })
                .collect();
            out.sort_by(|a, b| a.name.cmp(&b.name));
            Ok(out)
        }
    }
}

/// Reads one tensor (by name; `None` for a lone `.npy`, or when the file holds
/// exactly one 4-D tensor). Several candidates and no name is an error listing them.
pub fn read_tensor(path: &Path, name: Option<&str>) -> Result<Tensor, Error> {
    read_tensor_in(&read_limited(path)?, path, name)
}

/// Like [`read_tensor`], from the bytes of a weight file (the fuzz targets use it).
pub fn read_tensor_in(bytes: &[u8], path: &Path, name: Option<&str>) -> Result<Tensor, Error> {
    let infos = list_tensors_in(bytes, path)?;
    let chosen = match name {
        Some(n) => infos
            .iter()
            .find(|t| t.name == n)
            .map(|t| t.name.clone())
            .ok_or_else(|| {
                err(
                    path,
                    format!(
                        "has no tensor '{n}'; it holds: {}",
                        infos
                            .iter()
                            .map(|t| t.to_string())
                            .collect::<Vec<_>>()
                            .join("; ")
                    ),
                )
            })?,
        None => {
            let four: Vec<&TensorInfo> = infos.iter().filter(|t| t.shape.len() == 4).collect();
            match (infos.len(), four.len()) {
                (1, _) => infos[0].name.clone(),
                (_, 1) => four[0].name.clone(),
                _ => {
                    return Err(err(
                        path,
                        format!(
                            "holds {} tensors; name one with --tensor (or FILE:TENSOR): {}",
                            infos.len(),
                            infos
                                .iter()
                                .map(|t| t.to_string())
                                .collect::<Vec<_>>()
                                .join("; ")
                        ),
                    ))
                }
            }
        }
    };
    match format_of(path, bytes)? {
        Format::Npy => npy_tensor(bytes, &chosen).map_err(|m| err(path, m)),
        Format::Npz => {
            let mut z = npz_members(path, bytes)?;
            let member = format!("{chosen}.npy");
            let idx = z
                .index_for_name(&member)
                .or_else(|| z.index_for_name(&chosen))
                .ok_or_else(|| err(path, format!("has no member {member}")))?;
            let mut f = z
                .by_index(idx)
                .map_err(|e| err(path, format!("{chosen}: {e}")))?;
            if f.size() > MAX_FILE {
                return Err(err(
                    path,
                    format!("member {chosen} claims {} bytes", f.size()),
                ));
            }
            let mut buf = Vec::new();
            (&mut f)
                .take(MAX_FILE)
                .read_to_end(&mut buf)
                .map_err(|e| err(path, format!("member {chosen}: {e}")))?;
            npy_tensor(&buf, &chosen).map_err(|m| err(path, format!("member {chosen} {m}")))
        }
        Format::SafeTensors => {
            let st = safetensors::SafeTensors::deserialize(bytes)
                .map_err(|e| err(path, format!("is not a readable safetensors file: {e}")))?;
            let v = st
                .tensor(&chosen)
                .map_err(|e| err(path, format!("{chosen}: {e}")))?;
            use safetensors::Dtype;
            let elem = match v.dtype() {
                Dtype::F16 => Elem::F16,
                Dtype::BF16 => Elem::BF16,
                Dtype::F32 => Elem::F32,
                Dtype::F64 => Elem::F64,
                other => return Err(err(path, format!("tensor {chosen} has dtype {other:?}; weights must be F16, BF16, F32 or F64"))),
            };
            let n = count(v.shape()).map_err(|m| err(path, m))?;
            if v.data().len() != n * elem.size() {
                return Err(err(
                    path,
                    format!(
                        "tensor {chosen} holds {} bytes for shape {:?}",
                        v.data().len(),
                        v.shape()
                    ),
                ));
            }
            Ok(Tensor {
                name: chosen.clone(),
                shape: v.shape().to_vec(),
                dtype: format!("{:?}", v.dtype()),
                data: convert(v.data(), elem, false),
            })
        }
    }
}
