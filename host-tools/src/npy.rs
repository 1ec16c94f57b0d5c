//! The header of a NumPy `.npy` array file, for logs stored as arrays.
//!
//! The format is NumPy's own, published with it ("A simple file format for
//! NumPy arrays", NEP 1, and `numpy.lib.format`): the magic bytes
//! `\x93NUMPY`, a major and minor version byte, the header length (2 bytes
//! little-endian in version 1, 4 bytes in versions 2 and 3), then the header:
//! a Python dictionary literal with the keys `descr`, `fortran_order` and
//! `shape`, padded with spaces and ended by a newline. The data follow as
//! raw bytes.
//!
//! A log array is one of
//!
//! * a 2-D array of `<f8` or `<f4` in C order, shape `(rows, columns)`: its
//!   column names come from elsewhere (a header file beside it, see
//!   [`crate::logs`]);
//! * a 1-D structured array whose fields are all `<f8` or all `<f4`, shape
//!   `(rows,)`: the field names are the column names.
//!
//! Anything else (other element types, big-endian data, Fortran order,
//! nested or sub-array fields, other dimensions) is refused with a message
//! that says what was found and what was expected.

use std::fmt;

/// Element type of the values.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Element {
    /// Little-endian IEEE 754 binary64 (`<f8`).
    F64,
    /// Little-endian IEEE 754 binary32 (`<f4`).
    F32,
}

impl Element {
    /// Bytes per value.
    pub fn size(self) -> usize {
        match self {
            Element::F64 => 8,
            Element::F32 => 4,
        }
    }

    fn parse(descr: &str) -> Result<Element, String> {
        match descr {
            "<f8" => Ok(Element::F64),
            "<f4" => Ok(Element::F32),
            ">f8" | ">f4" => Err(format!(
                "expected little-endian floats ('<f8' or '<f4'), found big-endian {descr:?} \
                 (convert with a.astype('<f8'))"
            )),
            other => Err(format!(
                "expected floating-point values ('<f8' or '<f4'), found element type {other:?}"
            )),
        }
    }
}

/// What an array header says about a log.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ArrayHeader {
    /// Element type of every value.
    pub element: Element,
    /// Rows (the first dimension).
    pub rows: u64,
    /// Values per row.
    pub columns: usize,
    /// Field names of a structured array; `None` for a plain 2-D array.
    pub names: Option<Vec<String>>,
    /// Byte offset of the first value.
    pub data_offset: u64,
}

impl ArrayHeader {
    /// Bytes per row.
    pub fn row_bytes(&self) -> u64 {
        (self.columns * self.element.size()) as u64
    }
}

/// Why a header was refused.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct HeaderError(pub String);

impl fmt::Display for HeaderError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.0)
    }
}

/// The magic bytes at the start of every `.npy` file.
pub const MAGIC: &[u8; 6] = b"\x93NUMPY";

/// Longest header read (NumPy itself refuses headers over 10,000 bytes by
/// default; a structured array of many named fields can be longer).
pub const MAX_HEADER: usize = 1 << 20;

/// Bytes needed before the header text: the prefix of version 1 or of
/// versions 2 and 3. Returns `(prefix length, header length)`.
pub fn prefix(start: &[u8]) -> Result<(usize, usize), HeaderError> {
    if start.len() < 8 || &start[..6] != MAGIC {
        return Err(HeaderError(
            "expected a NumPy .npy file (it starts with the bytes \\x93NUMPY), found other bytes"
                .into(),
        ));
    }
    let (major, minor) = (start[6], start[7]);
    let (prefix, len) = match major {
        1 if start.len() >= 10 => (10, usize::from(u16::from_le_bytes([start[8], start[9]]))),
        2 | 3 if start.len() >= 12 => (
            12,
            u32::from_le_bytes([start[8], start[9], start[10], start[11]]) as usize,
        ),
        1..=3 => return Err(HeaderError("file ends inside the .npy header".to_string())),
        _ => {
            return Err(HeaderError(format!(
                "expected .npy format version 1, 2 or 3, found {major}.{minor}"
            )))
        }
    };
    if len > MAX_HEADER {
        return Err(HeaderError(format!(
            "the .npy header says it is {len} bytes long; expected at most {MAX_HEADER}"
        )));
    }
    Ok((prefix, len))
}

/// Parses the header text (the dictionary literal) of a file whose data
/// start at `data_offset`.
pub fn parse_header(text: &[u8], data_offset: u64) -> Result<ArrayHeader, HeaderError> {
    let text =
        std::str::from_utf8(text).map_err(|_| HeaderError("the .npy header is not text".into()))?;
    let value = Parser::new(text).whole()?;
    let Value::Dict(entries) = value else {
        return Err(HeaderError(
            "expected the .npy header to be a dictionary".into(),
        ));
    };
    let get = |key: &str| {
        entries
            .iter()
            .find(|(k, _)| k == key)
            .map(|(_, v)| v)
            .ok_or_else(|| HeaderError(format!("the .npy header has no {key:?} entry")))
    };
    if let Value::Bool(true) = get("fortran_order")? {
        return Err(HeaderError(
            "expected C order (fortran_order False), found Fortran order \
             (save np.ascontiguousarray(a) instead)"
                .into(),
        ));
    }
    let shape: Vec<u64> = match get("shape")? {
        Value::Tuple(items) => items
            .iter()
            .map(|v| match v {
                Value::Int(n) => Ok(*n),
                _ => Err(HeaderError("expected whole numbers in the shape".into())),
            })
            .collect::<Result<_, _>>()?,
        _ => return Err(HeaderError("expected the shape to be a tuple".into())),
    };
    match get("descr")? {
        Value::Str(descr) => {
            let element = Element::parse(descr).map_err(HeaderError)?;
            let [rows, columns] = shape[..] else {
                return Err(HeaderError(format!(
                    "expected a 2-D array (rows, columns), found shape {}",
                    show_shape(&shape)
                )));
            };
            let columns = usize::try_from(columns)
                .ok()
                .filter(|&c| c > 0 && c <= u16::MAX as usize)
                .ok_or_else(|| {
                    HeaderError(format!(
                        "expected 1 to {} columns, found {columns}",
                        u16::MAX
                    ))
                })?;
            Ok(ArrayHeader {
                element,
                rows,
                columns,
                names: None,
                data_offset,
            })
        }
        Value::List(fields) => {
            let [rows] = shape[..] else {
                return Err(HeaderError(format!(
                    "expected a 1-D structured array (rows,), found shape {}",
                    show_shape(&shape)
                )));
            };
            if fields.is_empty() || fields.len() > u16::MAX as usize {
                return Err(HeaderError(format!(
                    "expected 1 to {} fields, found {}",
                    u16::MAX,
                    fields.len()
                )));
            }
            let mut names = Vec::with_capacity(fields.len());
            let mut element = None;
            for (i, field) in fields.iter().enumerate() {
                let (name, descr) = match field {
                    Value::Tuple(t) => match &t[..] {
                        [Value::Str(n), Value::Str(d)] => (n, d),
                        [Value::Str(n), Value::Str(_), _] => {
                            return Err(HeaderError(format!(
                                "field {} ({n:?}) is a sub-array; expected one value per field",
                                i + 1
                            )))
                        }
                        _ => {
                            return Err(HeaderError(format!(
                                "field {} is not a plain (name, type) pair",
                                i + 1
                            )))
                        }
                    },
                    _ => {
                        return Err(HeaderError(format!(
                            "field {} is not a (name, type) pair",
                            i + 1
                        )))
                    }
                };
                let e = Element::parse(descr)
                    .map_err(|m| HeaderError(format!("field {} ({name:?}): {m}", i + 1)))?;
                if *element.get_or_insert(e) != e {
                    return Err(HeaderError(format!(
                        "field {} ({name:?}) is {descr:?} but field 1 is {:?}; expected one \
                         element type for every field",
                        i + 1,
                        match element {
                            Some(Element::F32) => "<f4",
                            _ => "<f8",
                        }
                    )));
                }
                names.push(name.clone());
            }
            Ok(ArrayHeader {
                element: element.unwrap_or(Element::F64),
                rows,
                columns: names.len(),
                names: Some(names),
                data_offset,
            })
        }
        _ => Err(HeaderError(
            "expected descr to be a type string or a list of fields".into(),
        )),
    }
}

fn show_shape(shape: &[u64]) -> String {
    match shape {
        [one] => format!("({one},)"),
        _ => format!(
            "({})",
            shape
                .iter()
                .map(u64::to_string)
                .collect::<Vec<_>>()
                .join(", ")
        ),
    }
}

/// The Python literals a header holds.
#[derive(Debug, Clone, PartialEq)]
enum Value {
    Str(String),
    Int(u64),
    Bool(bool),
    None,
    Tuple(Vec<Value>),
    List(Vec<Value>),
    Dict(Vec<(String, Value)>),
}

/// A recursive-descent reader of the literal subset above. Nesting is
/// bounded (`MAX_DEPTH`), so no header can exhaust the stack.
struct Parser<'a> {
    s: &'a [u8],
    i: usize,
    depth: usize,
}

const MAX_DEPTH: usize = 8;

impl<'a> Parser<'a> {
    fn new(text: &'a str) -> Self {
        Parser {
            s: text.as_bytes(),
            i: 0,
            depth: 0,
        }
    }

    fn err(&self, what: &str) -> HeaderError {
        HeaderError(format!(
            "cannot read the .npy header at byte {}: expected {what}",
            self.i + 1
        ))
    }

    fn skip_space(&mut self) {
        while self.s.get(self.i).is_some_and(u8::is_ascii_whitespace) {
            self.i += 1;
        }
    }

    fn whole(mut self) -> Result<Value, HeaderError> {
        let v = self.value()?;
        self.skip_space();
        if self.i != self.s.len() {
            return Err(self.err("the end of the header"));
        }
        Ok(v)
    }

    fn eat(&mut self, c: u8) -> bool {
        self.skip_space();
        if self.s.get(self.i) == Some(&c) {
            self.i += 1;
            true
        } else {
            false
        }
    }

    fn value(&mut self) -> Result<Value, HeaderError> {
        self.skip_space();
        match self.s.get(self.i) {
            Some(b'\'' | b'"') => self.string().map(Value::Str),
            Some(b'0'..=b'9') => self.int(),
            Some(b'(') => self.sequence(b')').map(Value::Tuple),
            Some(b'[') => self.sequence(b']').map(Value::List),
            Some(b'{') => self.dict(),
            _ => {
                for (word, v) in [
                    ("True", Value::Bool(true)),
                    ("False", Value::Bool(false)),
                    ("None", Value::None),
                ] {
                    if self.s[self.i..].starts_with(word.as_bytes()) {
                        self.i += word.len();
                        return Ok(v);
                    }
                }
                Err(self.err("a string, a number, True, False, a tuple, a list or a dictionary"))
            }
        }
    }

    fn string(&mut self) -> Result<String, HeaderError> {
        let quote = self.s[self.i];
        self.i += 1;
        let mut out = Vec::new();
        loop {
            match self.s.get(self.i) {
                None => return Err(self.err("the end of a string")),
                Some(&c) if c == quote => {
                    self.i += 1;
                    break;
                }
                Some(b'\\') => {
                    let Some(&c) = self.s.get(self.i + 1) else {
                        return Err(self.err("a character after a backslash"));
                    };
                    out.push(c);
                    self.i += 2;
                }
                Some(&c) => {
                    out.push(c);
                    self.i += 1;
                }
            }
        }
        String::from_utf8(out).map_err(|_| self.err("UTF-8 text in a string"))
    }

    fn int(&mut self) -> Result<Value, HeaderError> {
        let start = self.i;
        while self.s.get(self.i).is_some_and(u8::is_ascii_digit) {
            self.i += 1;
        }
        // Python 2 wrote long integers as `10L`.
        let digits = &self.s[start..self.i];
        if self.s.get(self.i) == Some(&b'L') {
            self.i += 1;
        }
        std::str::from_utf8(digits)
            .ok()
            .and_then(|t| t.parse().ok())
            .map(Value::Int)
            .ok_or_else(|| self.err("a whole number below 2^64"))
    }

    fn enter(&mut self) -> Result<(), HeaderError> {
        self.depth += 1;
        if self.depth > MAX_DEPTH {
            return Err(self.err(&format!("at most {MAX_DEPTH} levels of nesting")));
        }
        self.i += 1;
        Ok(())
    }

    fn sequence(&mut self, close: u8) -> Result<Vec<Value>, HeaderError> {
        self.enter()?;
        let mut items = Vec::new();
        loop {
            if self.eat(close) {
                break;
            }
            items.push(self.value()?);
            if self.eat(close) {
                break;
            }
            if !self.eat(b',') {
                return Err(self.err(&format!("',' or '{}'", close as char)));
            }
        }
        self.depth -= 1;
        Ok(items)
    }

    fn dict(&mut self) -> Result<Value, HeaderError> {
        self.enter()?;
        let mut entries = Vec::new();
        loop {
            if self.eat(b'}') {
                break;
            }
            self.skip_space();
            if !matches!(self.s.get(self.i), Some(b'\'' | b'"')) {
                return Err(self.err("a quoted key"));
            }
            let key = self.string()?;
            if !self.eat(b':') {
                return Err(self.err("':' after a key"));
            }
            entries.push((key, self.value()?));
            if self.eat(b'}') {
                break;
            }
            if !self.eat(b',') {
                return Err(self.err("',' or '}'"));
            }
        }
        self.depth -= 1;
        Ok(Value::Dict(entries))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // Header texts as NumPy 1.26 writes them (np.save; checked against the
    // format description in numpy.lib.format).
    #[test]
    fn plain_two_dimensional() {
        let h = parse_header(
            b"{'descr': '<f8', 'fortran_order': False, 'shape': (1000, 32), }     \n",
            128,
        )
        .unwrap();
        assert_eq!(h.element, Element::F64);
        assert_eq!((h.rows, h.columns, h.row_bytes()), (1000, 32, 256));
        assert_eq!(h.names, None);
        assert_eq!(h.data_offset, 128);
    }

    #[test]
    fn structured() {
        let h = parse_header(
            b"{'descr': [('t', '<f4'), ('vib_band_1', '<f4')], 'fortran_order': False, \
              'shape': (7,), }\n",
            128,
        )
        .unwrap();
        assert_eq!(h.element, Element::F32);
        assert_eq!((h.rows, h.columns), (7, 2));
        assert_eq!(
            h.names,
            Some(vec!["t".to_string(), "vib_band_1".to_string()])
        );
    }

    #[test]
    fn refusals_say_what_was_expected() {
        let refuse = |t: &str| parse_header(t.as_bytes(), 64).unwrap_err().0;
        assert!(
            refuse("{'descr': '<f8', 'fortran_order': True, 'shape': (3, 2)}")
                .contains("Fortran order")
        );
        assert!(
            refuse("{'descr': '>f8', 'fortran_order': False, 'shape': (3, 2)}")
                .contains("big-endian")
        );
        assert!(
            refuse("{'descr': '<i4', 'fortran_order': False, 'shape': (3, 2)}")
                .contains("'<f8' or '<f4'")
        );
        assert!(
            refuse("{'descr': '<f8', 'fortran_order': False, 'shape': (3,)}").contains("2-D array")
        );
        assert!(
            refuse("{'descr': '<f8', 'fortran_order': False, 'shape': (3, 0)}").contains("columns")
        );
        assert!(refuse(
            "{'descr': [('a', '<f8'), ('b', '<f4')], 'fortran_order': False, 'shape': (3,)}"
        )
        .contains("one element type"));
        assert!(
            refuse("{'descr': [('a', '<f8', (2,))], 'fortran_order': False, 'shape': (3,)}")
                .contains("sub-array")
        );
        assert!(refuse("{'descr': '<f8', 'shape': (3, 2)}").contains("fortran_order"));
        assert!(refuse("{'descr': '<f8' 'x'}").contains("byte 17: expected ',' or '}'"));
        assert!(refuse(&format!("{{'descr': {}", "(".repeat(20))).contains("nesting"));
        assert!(refuse("[1, 2]").contains("dictionary"));
    }

    #[test]
    fn prefixes() {
        let mut v1 = MAGIC.to_vec();
        v1.extend_from_slice(&[1, 0, 0x76, 0]);
        assert_eq!(prefix(&v1), Ok((10, 0x76)));
        let mut v2 = MAGIC.to_vec();
        v2.extend_from_slice(&[2, 0, 1, 2, 0, 0]);
        assert_eq!(prefix(&v2), Ok((12, 0x201)));
        assert!(prefix(b"t,a,b\n1,2,3\n")
            .unwrap_err()
            .0
            .contains("\\x93NUMPY"));
        let mut v9 = MAGIC.to_vec();
        v9.extend_from_slice(&[9, 0, 0, 0]);
        assert!(prefix(&v9).unwrap_err().0.contains("version"));
    }
}
