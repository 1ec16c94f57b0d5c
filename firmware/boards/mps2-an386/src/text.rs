//! Tiny text output helpers for `embedded-io` writers (no `core::fmt`, to
//! keep the image small).

use embedded_io::Write;

/// Write `value` in decimal.
///
/// Divides by ten in 32-bit arithmetic, on the four 16-bit pieces of
/// `value` (each partial dividend is below 10 × 2¹⁶): a `u64` division would
/// link the 64-bit division routine, about 0.9 KB of flash.
pub fn write_dec<W: Write>(w: &mut W, value: u64) -> Result<(), W::Error> {
    let mut pieces = [48, 32, 16, 0].map(|shift| (value >> shift) as u32 & 0xFFFF);
    // u64::MAX has 20 digits.
    let mut buf = [0u8; 20];
    let mut digits = 0;
    for slot in buf.iter_mut().rev() {
        let mut rem = 0u32;
        for p in pieces.iter_mut() {
            let cur = (rem << 16) | *p;
            *p = cur / 10;
            rem = cur % 10;
        }
        *slot = b'0' + rem as u8;
        digits += 1;
        // (Not `pieces == [0; 4]`, which calls `memcmp`.)
        if pieces.iter().all(|&p| p == 0) {
            break;
        }
    }
    w.write_all(buf.get(buf.len() - digits..).unwrap_or(&buf))
}

/// Write `key=value` preceded by a space.
pub fn write_field<W: Write>(w: &mut W, key: &str, value: u64) -> Result<(), W::Error> {
    w.write_all(b" ")?;
    w.write_all(key.as_bytes())?;
    w.write_all(b"=")?;
    write_dec(w, value)
}
