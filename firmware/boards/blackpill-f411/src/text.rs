//! Tiny text output helpers for `embedded-io` writers (no `core::fmt`, to
//! keep the image small).

use embedded_io::Write;

/// Write `value` in decimal.
pub fn write_dec<W: Write>(w: &mut W, mut value: u64) -> Result<(), W::Error> {
    let mut buf = [0u8; 20];
    let mut i = buf.len();
    loop {
        i -= 1;
        buf[i] = b'0' + (value % 10) as u8;
        value /= 10;
        if value == 0 {
            break;
        }
    }
    w.write_all(&buf[i..])
}

/// Write `key=value` preceded by a space.
pub fn write_field<W: Write>(w: &mut W, key: &str, value: u64) -> Result<(), W::Error> {
    w.write_all(b" ")?;
    w.write_all(key.as_bytes())?;
    w.write_all(b"=")?;
    write_dec(w, value)
}
