//! Schema fingerprint: ties a model to the logs and firmware it fits.
//!
//! The fingerprint is the 64-bit FNV-1a hash (Fowler–Noll–Vo, public domain
//! reference parameters) of, for each feature in order, its name bytes, the
//! unit separator `0x1f`, its unit bytes and the record separator `0x1e`.
//! Reordering, renaming or changing a unit changes the fingerprint.

const FNV_OFFSET: u64 = 0xcbf2_9ce4_8422_2325;
const FNV_PRIME: u64 = 0x0000_0100_0000_01b3;

/// Incremental fingerprint builder.
#[derive(Debug, Clone, Copy)]
pub struct Fingerprint(u64);

impl Default for Fingerprint {
    fn default() -> Self {
        Fingerprint(FNV_OFFSET)
    }
}

impl Fingerprint {
    fn eat(&mut self, bytes: &[u8]) {
        for b in bytes {
            self.0 ^= u64::from(*b);
            self.0 = self.0.wrapping_mul(FNV_PRIME);
        }
    }

    /// Adds one feature.
    pub fn feature(&mut self, name: &str, unit: &str) {
        self.eat(name.as_bytes());
        self.eat(&[0x1f]);
        self.eat(unit.as_bytes());
        self.eat(&[0x1e]);
    }

    /// The fingerprint so far.
    pub fn finish(&self) -> u64 {
        self.0
    }
}

/// Fingerprint of `(name, unit)` pairs in order.
pub fn fingerprint<'a>(features: impl IntoIterator<Item = (&'a str, &'a str)>) -> u64 {
    let mut fp = Fingerprint::default();
    for (name, unit) in features {
        fp.feature(name, unit);
    }
    fp.finish()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn fnv1a_reference_vectors() {
        // FNV-1a 64 test vectors from the FNV reference page (Noll):
        // "" -> cbf29ce484222325, "a" -> af63dc4c8601ec8c.
        let mut fp = Fingerprint::default();
        assert_eq!(fp.finish(), 0xcbf2_9ce4_8422_2325);
        fp.eat(b"a");
        assert_eq!(fp.finish(), 0xaf63_dc4c_8601_ec8c);
    }

    #[test]
    fn order_and_units_matter() {
        let a = fingerprint([("x", "A"), ("y", "V")]);
        assert_ne!(a, fingerprint([("y", "V"), ("x", "A")]));
        assert_ne!(a, fingerprint([("x", "mA"), ("y", "V")]));
        assert_ne!(a, fingerprint([("xy", ""), ("", "V")]));
        assert_eq!(a, fingerprint([("x", "A"), ("y", "V")]));
    }
}
