//! NPY arrays: format versions 1.0, 2.0 and 3.0, read from bytes already in memory; written as
//! version 1.0, little-endian, C order, laid out byte for byte as `np.save` lays them out.
//!
//! The header is a Python dict literal. It is parsed by a small hand-written parser of exactly the
//! subset NumPy writes (strings, `True`/`False`, tuples of integers) — nothing is evaluated, and
//! anything else is refused with the byte offset where it starts.

use std::io::Read;
use std::path::Path;

use ndarray::{ArrayD, IxDyn, ShapeBuilder};

use crate::tensor::{DType, Tensor, TensorFileError, shape_text};

/// The first six bytes of every NPY file.
pub(crate) const MAGIC: &[u8] = b"\x93NUMPY";

/// NumPy aligns the start of the data to this many bytes.
const ALIGN: usize = 64;

/// NumPy leaves room in the header for the growing axis to reach this many digits, so that a file
/// can be appended to in place; matching it keeps our files byte-identical to `np.save`'s.
const GROWTH_DIGITS: usize = 21;

/// Where an error is: the file and, for an NPZ, the member.
#[derive(Clone, Copy)]
struct At<'a> {
    path: &'a Path,
    member: Option<&'a str>,
}

impl At<'_> {
    fn bad_header(&self, offset: usize, problem: impl Into<String>) -> TensorFileError {
        TensorFileError::BadHeader {
            path: self.path.to_path_buf(),
            member: self.member.map(str::to_string),
            offset: offset as u64,
            problem: problem.into(),
        }
    }
}

/// The most header an NPZ member may have (NumPy itself refuses headers past 10,000 bytes by
/// default): the header is inflated before its size is known, so it needs a bound of its own.
pub(crate) const MAX_MEMBER_HEADER: usize = 1 << 20;

/// What the header of an NPY file says: where the data starts and how many bytes of it follow.
struct Declared {
    header_start: usize,
    header_end: usize,
    header: Header,
    needed: usize,
}

fn declared(at: At<'_>, name: &str, bytes: &[u8]) -> Result<Declared, TensorFileError> {
    let (header_start, header_len) = preamble(at, bytes)?;
    let header_end = header_start + header_len;
    let header = parse_header(at, name, &bytes[header_start..header_end], header_start)?;
    let needed = header
        .shape
        .iter()
        .try_fold(1usize, |acc, &d| acc.checked_mul(d))
        .and_then(|n| n.checked_mul(header.dtype.size()))
        .filter(|&n| n.checked_add(header_end).is_some());
    let Some(needed) = needed else {
        return Err(TensorFileError::SizeOverflow {
            path: at.path.to_path_buf(),
            member: at.member.map(str::to_string),
            tensor: name.to_string(),
            offset: header_end as u64,
            shape: header.shape.into(),
            dtype: header.dtype,
        });
    };
    Ok(Declared {
        header_start,
        header_end,
        header,
        needed,
    })
}

/// Where the header of an NPY file ends, from its first 12 bytes (`None` when they are not an NPY
/// preamble: reading the whole member then reports what is wrong).
pub(crate) fn header_end(first: &[u8]) -> Option<usize> {
    let at = At {
        path: Path::new(""),
        member: None,
    };
    match preamble(at, first) {
        Ok((start, len)) => Some(start + len),
        // The header-length field is whole, but more header follows than these bytes hold.
        Err(_) if first.len() >= 12 && first.starts_with(MAGIC) => {
            let field = if first[6] == 1 { 2 } else { 4 };
            let len = if field == 2 {
                u16::from_le_bytes([first[8], first[9]]) as usize
            } else {
                u32::from_le_bytes([first[8], first[9], first[10], first[11]]) as usize
            };
            matches!(first[6..8], [1, 0] | [2, 0] | [3, 0]).then_some(8 + field + len)
        }
        Err(_) => None,
    }
}

/// The whole length an NPY file's header declares (header and data), from bytes holding at least
/// the whole header.
pub(crate) fn declared_len(
    path: &Path,
    member: Option<&str>,
    name: &str,
    head: &[u8],
) -> Result<usize, TensorFileError> {
    let d = declared(At { path, member }, name, head)?;
    Ok(d.header_end + d.needed)
}

/// Parse a whole NPY file (or NPZ member) into a tensor called `name`.
pub(crate) fn read(
    path: &Path,
    member: Option<&str>,
    name: &str,
    bytes: &[u8],
) -> Result<Tensor, TensorFileError> {
    let at = At { path, member };
    let Declared {
        header_start,
        header_end,
        header,
        needed,
    } = declared(at, name, bytes)?;
    fits_length(at, name, &header, header_end, needed, bytes.len())?;
    let data = decode(&bytes[header_end..], header.dtype, header.big_endian);
    tensor(at, name, header_start, header, data)
}

/// What the header of an NPZ member of `len` bytes declares, its shape and stored type, from
/// `head`, its first bytes (the whole header among them): the member's values are not read.
/// The same refusals as [`read`] where they can be told from the header and the length the
/// archive gives (a shape past `len`, or short of it, is truncated or trailing data).
pub(crate) fn head(
    path: &Path,
    member: &str,
    name: &str,
    head: &[u8],
    len: u64,
) -> Result<(Vec<usize>, DType), TensorFileError> {
    let at = At {
        path,
        member: Some(member),
    };
    let d = declared(at, name, head)?;
    let len = usize::try_from(len).unwrap_or(usize::MAX);
    fits_length(at, name, &d.header, d.header_end, d.needed, len)?;
    Ok((d.header.shape, d.header.dtype))
}

/// Refuses an array whose `len` bytes, header and data, are not what its header declares: data
/// from `header_end` on, `needed` bytes of it.
fn fits_length(
    at: At<'_>,
    name: &str,
    header: &Header,
    header_end: usize,
    needed: usize,
    len: usize,
) -> Result<(), TensorFileError> {
    let dtype = header.dtype;
    let offset = header_end as u64;
    let available = len.saturating_sub(header_end) as u64;
    if needed as u64 != available {
        let (path, member) = (at.path.to_path_buf(), at.member.map(str::to_string));
        let (tensor, shape) = (name.to_string(), header.shape.clone().into());
        return Err(if available < needed as u64 {
            TensorFileError::Truncated {
                path,
                member,
                tensor,
                offset,
                shape,
                dtype,
                available,
            }
        } else {
            TensorFileError::TrailingBytes {
                path,
                member,
                tensor,
                offset,
                shape,
                dtype,
                available,
            }
        });
    }
    Ok(())
}

/// Bytes read from a file at a time by [`read_streamed`]: a multiple of every element size.
const PIECE: usize = 128 << 10;

/// [`read`] of an NPZ member that arrives in pieces: `head`, its first bytes (the whole header
/// among them), then the rest of its `len` bytes from `rest`. Each piece is widened as it
/// arrives, so the member's bytes are never in memory whole (a batch of 8,192 images in f32 is
/// 26 MB of fresh pages otherwise). `None` for anything but a well-formed member of exactly
/// `len` bytes, or a failed read: the caller then reads the file whole, and [`read`] says what
/// is wrong in the words it always has. With the tensor, where its first value that is not
/// finite lies (`Some(None)`: all are finite), found while each piece is in cache; `None` for
/// a column-major member, whose file order is not the tensor's.
pub(crate) fn read_streamed<T: Element>(
    path: &Path,
    member: &str,
    name: &str,
    head: &[u8],
    rest: &mut impl Read,
    len: usize,
) -> Option<(Tensor<T>, Option<Option<usize>>)> {
    let at = At {
        path,
        member: Some(member),
    };
    let d = declared(at, name, head).ok()?;
    if d.header_end.checked_add(d.needed)? != len || !T::holds(d.header.dtype) {
        return None;
    }
    let (dtype, big_endian) = (d.header.dtype, d.header.big_endian);
    // needed ≤ len, the member's bytes in a file checked to hold them: a bounded allocation.
    let mut data = Vec::with_capacity(d.needed / dtype.size());
    let mut source = (&head[d.header_end..]).chain(rest);
    let mut piece = vec![0u8; PIECE.min(d.needed)];
    let mut left = d.needed;
    let mut not_finite = None;
    while left > 0 {
        let n = left.min(PIECE);
        source.read_exact(&mut piece[..n]).ok()?;
        let start = data.len();
        T::decode(&piece[..n], dtype, big_endian, &mut data);
        // Without a branch per value, so that the test vectorises; searched only on a hit.
        if not_finite.is_none() && !data[start..].iter().fold(true, |all, v| all & v.finite()) {
            not_finite = data[start..]
                .iter()
                .position(|v| !v.finite())
                .map(|i| start + i);
        }
        left -= n;
    }
    // Found in file order, which is the tensor's order only for a row-major member.
    let seen = !(d.header.fortran_order && d.header.shape.len() > 1);
    let tensor = tensor(at, name, d.header_start, d.header, data).ok()?;
    Some((tensor, seen.then_some(not_finite)))
}

/// The dtype a member's header declares, from its first bytes (`None` if they do not parse).
pub(crate) fn head_dtype(path: &Path, name: &str, head: &[u8]) -> Option<DType> {
    let at = At { path, member: None };
    declared(at, name, head).ok().map(|d| d.header.dtype)
}

/// The shape an NPY header at the start of `head` declares, if it reads.
pub(crate) fn head_shape(path: &Path, name: &str, head: &[u8]) -> Option<Vec<usize>> {
    let at = At { path, member: None };
    declared(at, name, head).ok().map(|d| d.header.shape)
}

/// What a streamed member's values become: f64 from any dtype (widened), or f32 from an f32
/// member, as stored.
pub(crate) trait Element: Copy {
    /// Whether values of `dtype` decode into this type exactly.
    fn holds(dtype: DType) -> bool;
    fn decode(bytes: &[u8], dtype: DType, big_endian: bool, out: &mut Vec<Self>);
    fn finite(self) -> bool;
}

impl Element for f64 {
    fn holds(_: DType) -> bool {
        true
    }
    fn decode(bytes: &[u8], dtype: DType, big_endian: bool, out: &mut Vec<f64>) {
        decode_into(bytes, dtype, big_endian, out);
    }
    fn finite(self) -> bool {
        self.is_finite()
    }
}

impl Element for f32 {
    fn holds(dtype: DType) -> bool {
        dtype == DType::F32
    }
    fn decode(bytes: &[u8], _: DType, big_endian: bool, out: &mut Vec<f32>) {
        out.extend(bytes.chunks_exact(4).map(|chunk| {
            let raw: [u8; 4] = chunk.try_into().expect("chunks_exact yields 4 bytes");
            if big_endian {
                f32::from_be_bytes(raw)
            } else {
                f32::from_le_bytes(raw)
            }
        }));
    }
    fn finite(self) -> bool {
        self.is_finite()
    }
}

/// The tensor of a parsed header and its values in file order (column-major ones laid out in
/// row-major order).
fn tensor<T: Copy>(
    at: At<'_>,
    name: &str,
    header_start: usize,
    header: Header,
    mut data: Vec<T>,
) -> Result<Tensor<T>, TensorFileError> {
    // No values, no order to undo (and a shape like (0, 2^32, 2^32) is more than an index
    // can span).
    if header.fortran_order && header.shape.len() > 1 && !data.is_empty() {
        // Lay the column-major values out under their logical index, then walk that index in
        // row-major order. The length was checked by the caller, so the shape always fits.
        data = ArrayD::from_shape_vec(IxDyn(&header.shape).f(), data)
            .map_err(|e| at.bad_header(header_start, format!("shape does not fit the data: {e}")))?
            .iter()
            .copied()
            .collect();
    }
    Ok(Tensor {
        name: name.to_string(),
        shape: header.shape,
        dtype: header.dtype,
        data,
    })
}

/// Check the magic and version and return where the header dict starts and how long it is.
fn preamble(at: At<'_>, bytes: &[u8]) -> Result<(usize, usize), TensorFileError> {
    let prefix = &bytes[..bytes.len().min(MAGIC.len())];
    if bytes.len() < MAGIC.len() + 2 && MAGIC.starts_with(prefix) && !bytes.is_empty() {
        return Err(at.bad_header(
            bytes.len(),
            format!(
                "the data ends after {} bytes, inside the NPY preamble (the file is truncated)",
                bytes.len()
            ),
        ));
    }
    if !bytes.starts_with(MAGIC) {
        return Err(TensorFileError::BadMagic {
            path: at.path.to_path_buf(),
            member: at.member.map(str::to_string),
            format: crate::FileFormat::Npy,
            expected: r"\x93NUMPY",
            found: first_bytes(bytes),
        });
    }
    let (major, minor) = (bytes[6], bytes[7]);
    let field = match (major, minor) {
        (1, 0) => 2,
        (2, 0) | (3, 0) => 4,
        _ => {
            return Err(at.bad_header(
                6,
                format!("format version {major}.{minor} is not one plumb reads (1.0, 2.0 or 3.0)"),
            ));
        }
    };
    let start = 8 + field;
    let Some(len_bytes) = bytes.get(8..start) else {
        return Err(at.bad_header(
            bytes.len(),
            "the data ends inside the header-length field (the file is truncated)",
        ));
    };
    let len = if field == 2 {
        u16::from_le_bytes([len_bytes[0], len_bytes[1]]) as usize
    } else {
        u32::from_le_bytes([len_bytes[0], len_bytes[1], len_bytes[2], len_bytes[3]]) as usize
    };
    let available = bytes.len() - start;
    if len > available {
        return Err(at.bad_header(
            8,
            format!(
                "the header-length field says {len} bytes but only {available} follow (the file \
                 is truncated)"
            ),
        ));
    }
    Ok((start, len))
}

/// The first bytes of a file, for a message about what it is not.
pub(crate) fn first_bytes(bytes: &[u8]) -> String {
    if bytes.is_empty() {
        return "no bytes at all (the file is empty)".to_string();
    }
    let hex: Vec<String> = bytes.iter().take(8).map(|b| format!("{b:02x}")).collect();
    format!("bytes {}", hex.join(" "))
}

struct Header {
    dtype: DType,
    big_endian: bool,
    fortran_order: bool,
    shape: Vec<usize>,
}

/// A value of the header dict, with the offset it starts at.
enum Value {
    Str(String),
    Bool(bool),
    Tuple(Vec<usize>),
}

fn parse_header(
    at: At<'_>,
    name: &str,
    text: &[u8],
    base: usize,
) -> Result<Header, TensorFileError> {
    let mut p = Parser {
        at,
        text,
        pos: 0,
        base,
    };
    let mut descr = None;
    let mut fortran_order = None;
    let mut shape = None;

    p.skip_ws();
    p.expect(b'{', "the header should be a dict starting with `{`")?;
    loop {
        p.skip_ws();
        if p.eat(b'}') {
            break;
        }
        let key_at = p.offset();
        let key = p.string()?;
        let slot = match key.as_str() {
            "descr" => &mut descr,
            "fortran_order" => &mut fortran_order,
            "shape" => &mut shape,
            _ => {
                return Err(at.bad_header(
                    key_at,
                    format!(
                        "unexpected key `{key}` in the header dict (only 'descr', \
                         'fortran_order' and 'shape' belong there)"
                    ),
                ));
            }
        };
        if slot.is_some() {
            return Err(at.bad_header(key_at, format!("the key `{key}` appears twice")));
        }
        p.skip_ws();
        p.expect(b':', "expected `:` after the key")?;
        p.skip_ws();
        let value_at = p.offset();
        if key == "descr" && p.peek() == Some(b'[') {
            return Err(TensorFileError::UnsupportedDType {
                path: at.path.to_path_buf(),
                member: at.member.map(str::to_string),
                tensor: name.to_string(),
                offset: value_at as u64,
                dtype: "a structured dtype (a list of named fields)".to_string(),
            });
        }
        let value = p.value()?;
        *slot = Some((value, value_at));
        p.skip_ws();
        if p.eat(b',') {
            continue;
        }
        p.skip_ws();
        p.expect(b'}', "expected `,` or `}` after a value")?;
        break;
    }
    p.skip_ws();
    if p.pos < text.len() {
        return Err(at.bad_header(
            p.offset(),
            "unexpected text after the header dict (only spaces and a newline may follow it)",
        ));
    }

    let missing = |key: &str| at.bad_header(base, format!("the header dict has no '{key}' key"));
    let (descr, descr_at) = descr.ok_or_else(|| missing("descr"))?;
    let (fortran, fortran_at) = fortran_order.ok_or_else(|| missing("fortran_order"))?;
    let (shape, shape_at) = shape.ok_or_else(|| missing("shape"))?;

    let Value::Str(descr) = descr else {
        return Err(at.bad_header(descr_at, "'descr' should be a string such as '<f8'"));
    };
    let (dtype, big_endian) =
        parse_descr(&descr).map_err(|gloss| TensorFileError::UnsupportedDType {
            path: at.path.to_path_buf(),
            member: at.member.map(str::to_string),
            tensor: name.to_string(),
            offset: descr_at as u64,
            dtype: format!("'{descr}' ({gloss})"),
        })?;
    let Value::Bool(fortran_order) = fortran else {
        return Err(at.bad_header(fortran_at, "'fortran_order' should be True or False"));
    };
    let Value::Tuple(shape) = shape else {
        return Err(at.bad_header(
            shape_at,
            "'shape' should be a tuple of integers such as (3, 4) or (3,)",
        ));
    };
    Ok(Header {
        dtype,
        big_endian,
        fortran_order,
        shape,
    })
}

/// Map a NumPy type string to a dtype and byte order, or say what kind of unsupported type it is.
fn parse_descr(descr: &str) -> Result<(DType, bool), &'static str> {
    let (big_endian, rest) = match descr.as_bytes().first() {
        Some(b'>') => (true, &descr[1..]),
        // `=` is the writer's native order: little-endian on every machine NumPy runs on today.
        Some(b'<' | b'=' | b'|') => (false, &descr[1..]),
        _ => (false, descr),
    };
    let mut chars = rest.chars();
    let kind = chars.next().ok_or("an empty type string")?;
    let size: Option<usize> = chars.as_str().parse().ok();
    let dtype = match (kind, size) {
        ('f', Some(2)) => DType::F16,
        ('f', Some(4)) => DType::F32,
        ('f', Some(8)) => DType::F64,
        ('f', _) => return Err("extended-precision float"),
        ('i', Some(1)) => DType::I8,
        ('i', Some(2)) => DType::I16,
        ('i', Some(4)) => DType::I32,
        ('i', Some(8)) => DType::I64,
        ('u', Some(1)) => DType::U8,
        ('u', Some(2)) => DType::U16,
        ('u', Some(4)) => DType::U32,
        ('u', Some(8)) => DType::U64,
        ('b', Some(1)) => DType::Bool,
        ('c', _) => return Err("complex"),
        ('O', _) => return Err("Python objects"),
        ('U', _) => return Err("unicode strings"),
        ('S' | 'a', _) => return Err("byte strings"),
        ('V', _) => return Err("raw or structured records"),
        ('M', _) => return Err("datetimes"),
        ('m', _) => return Err("timedeltas"),
        _ => return Err("not a NumPy type string plumb knows"),
    };
    Ok((dtype, big_endian))
}

struct Parser<'a> {
    at: At<'a>,
    text: &'a [u8],
    pos: usize,
    /// Offset of `text` in the file, so errors point at file bytes.
    base: usize,
}

impl Parser<'_> {
    fn offset(&self) -> usize {
        self.base + self.pos
    }

    fn peek(&self) -> Option<u8> {
        self.text.get(self.pos).copied()
    }

    fn eat(&mut self, byte: u8) -> bool {
        let found = self.peek() == Some(byte);
        if found {
            self.pos += 1;
        }
        found
    }

    fn skip_ws(&mut self) {
        while matches!(self.peek(), Some(b' ' | b'\t' | b'\n' | b'\r')) {
            self.pos += 1;
        }
    }

    fn error(&self, problem: impl Into<String>) -> TensorFileError {
        let mut problem = problem.into();
        match self.peek() {
            Some(b) if b.is_ascii_graphic() || b == b' ' => {
                problem.push_str(&format!(", found `{}`", b as char));
            }
            Some(b) => problem.push_str(&format!(", found byte 0x{b:02x}")),
            None => problem.push_str(", found the end of the header"),
        }
        self.at.bad_header(self.offset(), problem)
    }

    fn expect(&mut self, byte: u8, problem: &str) -> Result<(), TensorFileError> {
        if self.eat(byte) {
            Ok(())
        } else {
            Err(self.error(problem))
        }
    }

    /// A quoted string without escapes (NumPy never writes any).
    fn string(&mut self) -> Result<String, TensorFileError> {
        let quote = match self.peek() {
            Some(q @ (b'\'' | b'"')) => q,
            _ => return Err(self.error("expected a quoted key or string")),
        };
        self.pos += 1;
        let start = self.pos;
        loop {
            match self.peek() {
                Some(b) if b == quote => break,
                Some(b'\\') => return Err(self.error("escape sequences are not supported here")),
                Some(b) if b.is_ascii() && !b.is_ascii_control() => self.pos += 1,
                Some(_) => return Err(self.error("only printable ASCII is expected in a string")),
                None => return Err(self.error("the string is not closed")),
            }
        }
        let text = String::from_utf8_lossy(&self.text[start..self.pos]).into_owned();
        self.pos += 1;
        Ok(text)
    }

    fn value(&mut self) -> Result<Value, TensorFileError> {
        match self.peek() {
            Some(b'\'' | b'"') => Ok(Value::Str(self.string()?)),
            Some(b'(') => self.tuple(),
            Some(b'T' | b'F') => {
                for (word, value) in [(&b"True"[..], true), (&b"False"[..], false)] {
                    if self.text[self.pos..].starts_with(word) {
                        self.pos += word.len();
                        return Ok(Value::Bool(value));
                    }
                }
                Err(self.error("expected True or False"))
            }
            _ => Err(self.error("expected a string, True, False or a tuple of integers")),
        }
    }

    fn tuple(&mut self) -> Result<Value, TensorFileError> {
        let open = self.offset();
        self.pos += 1;
        let mut dims = Vec::new();
        let mut trailing_comma = false;
        loop {
            self.skip_ws();
            if self.eat(b')') {
                break;
            }
            if !dims.is_empty() && !trailing_comma {
                return Err(self.error("expected `,` or `)` in the shape"));
            }
            dims.push(self.dimension()?);
            self.skip_ws();
            trailing_comma = self.eat(b',');
        }
        if dims.len() == 1 && !trailing_comma {
            return Err(self.at.bad_header(
                open,
                format!(
                    "({0}) is the number {0} in Python, not a tuple; a 1-D shape is written ({0},)",
                    dims[0]
                ),
            ));
        }
        Ok(Value::Tuple(dims))
    }

    /// A non-negative integer (Python 2's `3L` accepted: old NumPy wrote it).
    fn dimension(&mut self) -> Result<usize, TensorFileError> {
        let start = self.pos;
        while matches!(self.peek(), Some(b'0'..=b'9')) {
            self.pos += 1;
        }
        if start == self.pos {
            return Err(self.error("expected a non-negative integer dimension"));
        }
        let digits = std::str::from_utf8(&self.text[start..self.pos]).unwrap_or_default();
        let value = digits.parse::<usize>().map_err(|_| {
            self.at.bad_header(
                self.base + start,
                format!("the dimension {digits} is too large for this machine"),
            )
        })?;
        self.eat(b'L');
        Ok(value)
    }
}

/// Widen raw elements to f64. The caller has checked that `bytes` holds whole elements.
pub(crate) fn decode(bytes: &[u8], dtype: DType, big_endian: bool) -> Vec<f64> {
    let mut out = Vec::with_capacity(bytes.len() / dtype.size());
    decode_into(bytes, dtype, big_endian, &mut out);
    out
}

/// [`decode`] appending to `out`.
fn decode_into(bytes: &[u8], dtype: DType, big_endian: bool, out: &mut Vec<f64>) {
    macro_rules! widen {
        ($t:ty, $convert:expr) => {{
            const N: usize = std::mem::size_of::<$t>();
            out.extend(bytes.chunks_exact(N).map(|chunk| {
                let raw: [u8; N] = chunk.try_into().expect("chunks_exact yields N bytes");
                let value = if big_endian {
                    <$t>::from_be_bytes(raw)
                } else {
                    <$t>::from_le_bytes(raw)
                };
                $convert(value)
            }))
        }};
    }
    match dtype {
        DType::F16 => widen!(u16, |b| half::f16::from_bits(b).to_f64()),
        DType::BF16 => widen!(u16, |b| half::bf16::from_bits(b).to_f64()),
        DType::F32 => widen!(f32, f64::from),
        DType::F64 => widen!(f64, |v| v),
        DType::I8 => widen!(i8, f64::from),
        DType::I16 => widen!(i16, f64::from),
        DType::I32 => widen!(i32, f64::from),
        // Integers beyond 2^53 round: they are reported, never computed with.
        DType::I64 => widen!(i64, |v| v as f64),
        DType::U8 => widen!(u8, f64::from),
        DType::U16 => widen!(u16, f64::from),
        DType::U32 => widen!(u32, f64::from),
        DType::U64 => widen!(u64, |v| v as f64),
        DType::Bool => out.extend(bytes.iter().map(|&b| f64::from(u8::from(b != 0)))),
    }
}

/// Serialise a tensor as NPY 1.0 (2.0 if the header outgrows 64 KiB), little-endian, C order. The
/// caller has checked that the data fills the shape and that `dtype` is F32 or F64.
pub(crate) fn write(tensor: &Tensor, dtype: DType) -> Vec<u8> {
    let descr = if dtype == DType::F32 { "<f4" } else { "<f8" };
    let mut dict = format!(
        "{{'descr': '{descr}', 'fortran_order': False, 'shape': {}, }}",
        shape_text(&tensor.shape)
    );
    if let Some(first) = tensor.shape.first() {
        let digits = first.to_string().len();
        dict.push_str(&" ".repeat(GROWTH_DIGITS.saturating_sub(digits)));
    }
    let (version, field) = if MAGIC.len() + 2 + 2 + dict.len() + 1 + ALIGN <= u16::MAX as usize {
        (1u8, 2usize)
    } else {
        (2u8, 4usize)
    };
    let unpadded = MAGIC.len() + 2 + field + dict.len() + 1;
    // Like NumPy: 1 to 64 spaces, so the newline ends exactly on a 64-byte boundary.
    let pad = ALIGN - unpadded % ALIGN;
    let header_len = dict.len() + pad + 1;

    let mut out = Vec::with_capacity(unpadded + pad + tensor.data.len() * dtype.size());
    out.extend_from_slice(MAGIC);
    out.extend_from_slice(&[version, 0]);
    if field == 2 {
        out.extend_from_slice(&(header_len as u16).to_le_bytes());
    } else {
        out.extend_from_slice(&(header_len as u32).to_le_bytes());
    }
    out.extend_from_slice(dict.as_bytes());
    out.extend(std::iter::repeat_n(b' ', pad));
    out.push(b'\n');
    for &value in &tensor.data {
        if dtype == DType::F32 {
            out.extend_from_slice(&(value as f32).to_le_bytes());
        } else {
            out.extend_from_slice(&value.to_le_bytes());
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    fn npy(dict: &str, data: &[u8]) -> Vec<u8> {
        let mut out = MAGIC.to_vec();
        out.extend_from_slice(&[1, 0]);
        out.extend_from_slice(&(dict.len() as u16 + 1).to_le_bytes());
        out.extend_from_slice(dict.as_bytes());
        out.push(b'\n');
        out.extend_from_slice(data);
        out
    }

    fn load(dict: &str, data: &[u8]) -> Result<Tensor, TensorFileError> {
        read(Path::new("t.npy"), None, "t", &npy(dict, data))
    }

    #[test]
    fn byte_order_marks_numpy_accepts() {
        // `=` is native order (little-endian here), `|` marks single-byte types.
        let cases: [(&str, &[u8], DType, f64); 5] = [
            ("=f8", &[0, 0, 0, 0, 0, 0, 0xf8, 0x3f], DType::F64, 1.5),
            ("|u1", &[250], DType::U8, 250.0),
            ("|b1", &[1], DType::Bool, 1.0),
            (">i2", &[0xff, 0xfe], DType::I16, -2.0),
            ("<u8", &[1, 0, 0, 0, 0, 0, 0, 0], DType::U64, 1.0),
        ];
        for (descr, data, dtype, value) in cases {
            let dict = format!("{{'descr': '{descr}', 'fortran_order': False, 'shape': (1,)}}");
            let t = load(&dict, data).unwrap();
            assert_eq!((t.dtype, t.data), (dtype, vec![value]), "{descr}");
        }
    }

    #[test]
    fn the_python_literal_subset_numpy_writes() {
        // Any key order, double quotes, no trailing comma, Python 2's `3L`, spaces in odd places.
        let dict = r#"{ "shape" : ( 2L , 1L ) , "fortran_order":True,'descr':'<f4' }"#;
        let mut data = 0.5f32.to_le_bytes().to_vec();
        data.extend_from_slice(&(-4.0f32).to_le_bytes());
        let t = load(dict, &data).unwrap();
        assert_eq!((t.shape, t.data), (vec![2, 1], vec![0.5, -4.0]));
        // A zero-length dimension holds no data at all.
        let t = load(
            "{'descr': '<f8', 'fortran_order': False, 'shape': (0, 7)}",
            &[],
        )
        .unwrap();
        assert!(t.is_empty());
        assert_eq!(t.shape, [0, 7]);
    }

    #[test]
    fn fortran_order_in_three_dimensions() {
        // Column-major storage of a 2 × 2 × 2 array whose C-order values are 0..8: element
        // (i, j, k) sits at i + 2j + 4k.
        let column_major = [0.0, 4.0, 2.0, 6.0, 1.0, 5.0, 3.0, 7.0f64];
        let data: Vec<u8> = column_major.iter().flat_map(|v| v.to_le_bytes()).collect();
        let t = load(
            "{'descr': '<f8', 'fortran_order': True, 'shape': (2, 2, 2)}",
            &data,
        );
        assert_eq!(t.unwrap().data, [0.0, 1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0]);
    }

    #[test]
    fn written_headers_are_aligned_and_parse_back() {
        for shape in [vec![], vec![5], vec![3, 4], vec![1; 40]] {
            let n = shape.iter().product();
            let t = Tensor {
                name: "t".into(),
                shape: shape.clone(),
                dtype: DType::F64,
                data: (0..n).map(|i| i as f64).collect(),
            };
            let bytes = write(&t, DType::F64);
            let len = u16::from_le_bytes([bytes[8], bytes[9]]) as usize;
            assert_eq!((10 + len) % ALIGN, 0, "{shape:?}");
            assert_eq!(bytes[10 + len - 1], b'\n');
            assert_eq!(read(Path::new("t.npy"), None, "t", &bytes).unwrap(), t);
        }
    }
}
