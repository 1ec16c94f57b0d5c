//! A serde serializer that writes postcard's wire format (postcard 1.x:
//! LEB128 varints for `u16`..`u64`, lengths and variant indices, zigzag
//! varints for `i16`..`i64`, little-endian floats, `0`/`1` before an
//! `Option`'s value, fields and tuple elements in order) into a fixed buffer,
//! for [`super::encode_frame`].
//!
//! Postcard's own serializer inlines its varint encoder, with bounds checks
//! a compiler cannot always remove, at every integer of every message; on a
//! board that made the encoder of the device messages about 5 KB. Here every
//! integer goes through one out-of-line [`Writer::varint`] and every byte
//! through one [`Writer::extend`], which never panic. The bytes are
//! postcard's: `shared-model/tests/wire.rs` checks them against
//! `postcard::to_slice` for every message variant and for arbitrary
//! messages. 128-bit integers are refused (no message has one).

use core::fmt;
use serde::ser::{self, Serialize};

/// The buffer was too small, or a value cannot be written (a sequence of
/// unknown length, a 128-bit integer, a `Display` that failed).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) struct Unwritable;

impl fmt::Display for Unwritable {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str("message does not fit the buffer")
    }
}

impl core::error::Error for Unwritable {}

impl ser::Error for Unwritable {
    fn custom<T: fmt::Display>(_msg: T) -> Self {
        Unwritable
    }
}

/// Serialises `value` into the front of `buf`; returns the number of bytes
/// written.
pub(crate) fn to_slice<T: Serialize + ?Sized>(value: &T, buf: &mut [u8]) -> Result<usize> {
    let mut w = Writer { buf, len: 0 };
    value.serialize(&mut w)?;
    Ok(w.len)
}

/// Bytes written so far into `buf[..len]`.
pub(crate) struct Writer<'a> {
    buf: &'a mut [u8],
    len: usize,
}

type Result<T> = core::result::Result<T, Unwritable>;

impl Writer<'_> {
    /// Appends `bytes`, or fails without writing when they do not fit.
    ///
    /// Copies byte by byte through `zip` rather than with
    /// `copy_from_slice`: the lengths are equal by construction, but at the
    /// boards' `opt-level = "z"` for this crate the compiler kept
    /// `copy_from_slice`'s length check, a call to a panic entry point in the
    /// image (`scripts/device-audit.sh`).
    #[inline(never)]
    fn extend(&mut self, bytes: &[u8]) -> Result<()> {
        let end = self.len.checked_add(bytes.len()).ok_or(Unwritable)?;
        let dst = self.buf.get_mut(self.len..end).ok_or(Unwritable)?;
        for (d, s) in dst.iter_mut().zip(bytes) {
            *d = *s;
        }
        self.len = end;
        Ok(())
    }

    /// Appends `v` as a LEB128 varint: seven bits a byte, least significant
    /// first, the high bit set on every byte but the last (the same bytes
    /// for a value whatever its integer type).
    #[inline(never)]
    fn varint(&mut self, mut v: u64) -> Result<()> {
        let mut bytes = [0u8; 10];
        let mut n = 0;
        for b in bytes.iter_mut() {
            n += 1;
            if v < 0x80 {
                *b = v as u8;
                break;
            }
            *b = (v as u8) | 0x80;
            v >>= 7;
        }
        self.extend(bytes.get(..n).unwrap_or(&[]))
    }

    fn len_prefix(&mut self, len: Option<usize>) -> Result<()> {
        self.varint(len.ok_or(Unwritable)? as u64)
    }
}

impl fmt::Write for Writer<'_> {
    fn write_str(&mut self, s: &str) -> fmt::Result {
        self.extend(s.as_bytes()).map_err(|_| fmt::Error)
    }
}

/// Zigzag: 0, −1, 1, −2, … as 0, 1, 2, 3, …
fn zigzag(v: i64) -> u64 {
    ((v << 1) ^ (v >> 63)) as u64
}

impl<'a> ser::Serializer for &mut Writer<'a> {
    type Ok = ();
    type Error = Unwritable;
    type SerializeSeq = Self;
    type SerializeTuple = Self;
    type SerializeTupleStruct = Self;
    type SerializeTupleVariant = Self;
    type SerializeMap = Self;
    type SerializeStruct = Self;
    type SerializeStructVariant = Self;

    fn is_human_readable(&self) -> bool {
        false
    }

    fn serialize_bool(self, v: bool) -> Result<()> {
        self.extend(&[u8::from(v)])
    }

    fn serialize_i8(self, v: i8) -> Result<()> {
        self.extend(&v.to_le_bytes())
    }

    fn serialize_i16(self, v: i16) -> Result<()> {
        self.varint(zigzag(i64::from(v)))
    }

    fn serialize_i32(self, v: i32) -> Result<()> {
        self.varint(zigzag(i64::from(v)))
    }

    fn serialize_i64(self, v: i64) -> Result<()> {
        self.varint(zigzag(v))
    }

    fn serialize_u8(self, v: u8) -> Result<()> {
        self.extend(&[v])
    }

    fn serialize_u16(self, v: u16) -> Result<()> {
        self.varint(u64::from(v))
    }

    fn serialize_u32(self, v: u32) -> Result<()> {
        self.varint(u64::from(v))
    }

    fn serialize_u64(self, v: u64) -> Result<()> {
        self.varint(v)
    }

    fn serialize_f32(self, v: f32) -> Result<()> {
        self.extend(&v.to_le_bytes())
    }

    fn serialize_f64(self, v: f64) -> Result<()> {
        self.extend(&v.to_le_bytes())
    }

    fn serialize_char(self, v: char) -> Result<()> {
        self.serialize_str(v.encode_utf8(&mut [0u8; 4]))
    }

    fn serialize_str(self, v: &str) -> Result<()> {
        self.serialize_bytes(v.as_bytes())
    }

    fn serialize_bytes(self, v: &[u8]) -> Result<()> {
        self.varint(v.len() as u64)?;
        self.extend(v)
    }

    fn serialize_none(self) -> Result<()> {
        self.extend(&[0])
    }

    fn serialize_some<T: Serialize + ?Sized>(self, value: &T) -> Result<()> {
        self.extend(&[1])?;
        value.serialize(self)
    }

    fn serialize_unit(self) -> Result<()> {
        Ok(())
    }

    fn serialize_unit_struct(self, _name: &'static str) -> Result<()> {
        Ok(())
    }

    fn serialize_unit_variant(
        self,
        _name: &'static str,
        index: u32,
        _variant: &'static str,
    ) -> Result<()> {
        self.varint(u64::from(index))
    }

    fn serialize_newtype_struct<T: Serialize + ?Sized>(
        self,
        _name: &'static str,
        value: &T,
    ) -> Result<()> {
        value.serialize(self)
    }

    fn serialize_newtype_variant<T: Serialize + ?Sized>(
        self,
        _name: &'static str,
        index: u32,
        _variant: &'static str,
        value: &T,
    ) -> Result<()> {
        self.varint(u64::from(index))?;
        value.serialize(self)
    }

    fn serialize_seq(self, len: Option<usize>) -> Result<Self> {
        self.len_prefix(len)?;
        Ok(self)
    }

    fn serialize_tuple(self, _len: usize) -> Result<Self> {
        Ok(self)
    }

    fn serialize_tuple_struct(self, _name: &'static str, _len: usize) -> Result<Self> {
        Ok(self)
    }

    fn serialize_tuple_variant(
        self,
        _name: &'static str,
        index: u32,
        _variant: &'static str,
        _len: usize,
    ) -> Result<Self> {
        self.varint(u64::from(index))?;
        Ok(self)
    }

    fn serialize_map(self, len: Option<usize>) -> Result<Self> {
        self.len_prefix(len)?;
        Ok(self)
    }

    fn serialize_struct(self, _name: &'static str, _len: usize) -> Result<Self> {
        Ok(self)
    }

    fn serialize_struct_variant(
        self,
        _name: &'static str,
        index: u32,
        _variant: &'static str,
        _len: usize,
    ) -> Result<Self> {
        self.varint(u64::from(index))?;
        Ok(self)
    }

    /// The text's length, then the text (formatted twice: once to count).
    fn collect_str<T: fmt::Display + ?Sized>(self, value: &T) -> Result<()> {
        struct Count(usize);
        impl fmt::Write for Count {
            fn write_str(&mut self, s: &str) -> fmt::Result {
                self.0 += s.len();
                Ok(())
            }
        }
        let mut count = Count(0);
        fmt::write(&mut count, format_args!("{value}")).map_err(|_| Unwritable)?;
        self.varint(count.0 as u64)?;
        fmt::write(self, format_args!("{value}")).map_err(|_| Unwritable)
    }
}

/// The compound serializers whose parts are written one after another with
/// nothing between them (postcard writes no separators): `$method` for each
/// part, nothing at the end.
macro_rules! in_order {
    ($($trait:ident :: $method:ident),* $(,)?) => {$(
        impl ser::$trait for &mut Writer<'_> {
            type Ok = ();
            type Error = Unwritable;

            fn $method<T: Serialize + ?Sized>(&mut self, value: &T) -> Result<()> {
                value.serialize(&mut **self)
            }

            fn end(self) -> Result<()> {
                Ok(())
            }
        }
    )*};
}

in_order!(
    SerializeSeq::serialize_element,
    SerializeTuple::serialize_element,
    SerializeTupleStruct::serialize_field,
    SerializeTupleVariant::serialize_field,
);

impl ser::SerializeMap for &mut Writer<'_> {
    type Ok = ();
    type Error = Unwritable;

    fn serialize_key<T: Serialize + ?Sized>(&mut self, key: &T) -> Result<()> {
        key.serialize(&mut **self)
    }

    fn serialize_value<T: Serialize + ?Sized>(&mut self, value: &T) -> Result<()> {
        value.serialize(&mut **self)
    }

    fn end(self) -> Result<()> {
        Ok(())
    }
}

/// The struct serializers: fields by position, names not written.
macro_rules! named_in_order {
    ($($trait:ident),* $(,)?) => {$(
        impl ser::$trait for &mut Writer<'_> {
            type Ok = ();
            type Error = Unwritable;

            fn serialize_field<T: Serialize + ?Sized>(
                &mut self,
                _key: &'static str,
                value: &T,
            ) -> Result<()> {
                value.serialize(&mut **self)
            }

            fn end(self) -> Result<()> {
                Ok(())
            }
        }
    )*};
}

named_in_order!(SerializeStruct, SerializeStructVariant);
