//! Signed model files: the optional ed25519 signature block (`FORMAT.md`,
//! "Signature").
//!
//! A model file whose header has flag bit 0 ([`FLAG_SIGNED`]) set carries a
//! 72-byte block between its label section and its CRC-32:
//!
//! ```text
//! 16+P+L   8    key id: the first 8 bytes of SHA-512(public key)
//! 24+P+L   64   ed25519 signature (RFC 8032, pure) of bytes [0, 24+P+L)
//! 88+P+L   4    CRC-32/ISO-HDLC of bytes [0, 88+P+L)
//! ```
//!
//! The signature covers the header (flag included), the payload, the labels
//! and the key id; the CRC covers everything before it, signature included,
//! so a damaged file is still `BadCrc` and only an intact file reaches the
//! signature check. [`crate::file::split`] checks the framing and returns
//! the block; [`verify`] checks it against a [`TrustedKey`]. Nothing here
//! allocates; signing (which needs the secret key) is the host's business.

use crate::file::Sections;
use core::fmt;
use serde::{Deserialize, Serialize};

/// Header flag bit: the file carries a signature block.
pub const FLAG_SIGNED: u16 = 0x0001;
/// Every header flag bit this crate knows.
pub const KNOWN_FLAGS: u16 = FLAG_SIGNED;
/// Bytes of a key id.
pub const KEY_ID_LEN: usize = 8;
/// Bytes of an ed25519 signature.
pub const SIGNATURE_LEN: usize = 64;
/// Bytes of the signature block (key id, then signature).
pub const BLOCK_LEN: usize = KEY_ID_LEN + SIGNATURE_LEN;
/// Bytes of an ed25519 public key.
pub const PUBLIC_KEY_LEN: usize = 32;

/// Names a public key: the first 8 bytes of SHA-512 over its 32 bytes.
/// Shown as 16 lowercase hex digits; travels on the wire as 8 raw bytes.
#[derive(Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord, Serialize, Deserialize)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct KeyId(pub [u8; KEY_ID_LEN]);

impl KeyId {
    /// The id of an ed25519 public key.
    pub fn of(public: &[u8; PUBLIC_KEY_LEN]) -> KeyId {
        let h = ed25519_compact::sha512::Hash::hash(public);
        let mut id = [0u8; KEY_ID_LEN];
        id.copy_from_slice(&h[..KEY_ID_LEN]);
        KeyId(id)
    }
}

impl fmt::Display for KeyId {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        for b in self.0 {
            write!(f, "{b:02x}")?;
        }
        Ok(())
    }
}

impl fmt::Debug for KeyId {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "KeyId({self})")
    }
}

/// The signature block of a signed file, as [`crate::file::split`] found it.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct SignatureBlock<'a> {
    /// Id of the key that signed.
    pub key_id: KeyId,
    /// The ed25519 signature.
    pub signature: &'a [u8; SIGNATURE_LEN],
    /// The bytes it signs: header, payload, labels, key id.
    pub signed: &'a [u8],
}

impl<'a> SignatureBlock<'a> {
    /// The block of a file whose signature block starts at `at` (after the
    /// labels); `None` when the bytes are too short (the caller checked the
    /// length, so this does not happen for a framed file).
    pub(crate) fn at(bytes: &'a [u8], at: usize) -> Option<Self> {
        let id = bytes.get(at..at + KEY_ID_LEN)?;
        let sig = bytes.get(at + KEY_ID_LEN..at + BLOCK_LEN)?;
        let mut key_id = [0u8; KEY_ID_LEN];
        key_id.copy_from_slice(id);
        Some(SignatureBlock {
            key_id: KeyId(key_id),
            signature: sig.try_into().ok()?,
            signed: bytes.get(..at + KEY_ID_LEN)?,
        })
    }
}

/// A public key a reader trusts to sign models.
#[derive(Clone, Copy, PartialEq, Eq)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct TrustedKey {
    public: [u8; PUBLIC_KEY_LEN],
    id: KeyId,
}

impl TrustedKey {
    /// Trusts `public` (32 bytes of an ed25519 public key).
    pub fn new(public: [u8; PUBLIC_KEY_LEN]) -> TrustedKey {
        TrustedKey {
            public,
            id: KeyId::of(&public),
        }
    }

    /// The key's bytes.
    pub fn public(&self) -> &[u8; PUBLIC_KEY_LEN] {
        &self.public
    }

    /// The key's id.
    pub fn id(&self) -> KeyId {
        self.id
    }
}

impl fmt::Debug for TrustedKey {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "TrustedKey({})", self.id)
    }
}

/// Why a framed file is not accepted as signed by a trusted key.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub enum SignatureError {
    /// The file carries no signature.
    Unsigned,
    /// The file was signed by another key.
    UnknownKey {
        /// Key id in the file.
        found: KeyId,
    },
    /// The key id is the trusted key's but the signature does not verify:
    /// the file was changed after signing, or the signature was forged.
    BadSignature,
}

impl fmt::Display for SignatureError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            SignatureError::Unsigned => f.write_str("the model file is not signed"),
            SignatureError::UnknownKey { found } => {
                write!(
                    f,
                    "the model file is signed by key {found}, not a trusted key"
                )
            }
            SignatureError::BadSignature => f.write_str(
                "the model file's signature does not verify with the trusted key \
                 (changed after signing, or forged)",
            ),
        }
    }
}

/// Whether the signature `block` verifies with `key` (key ids compared
/// first).
pub fn verify_block(block: &SignatureBlock<'_>, key: &TrustedKey) -> Result<(), SignatureError> {
    if block.key_id != key.id {
        return Err(SignatureError::UnknownKey {
            found: block.key_id,
        });
    }
    let public = ed25519_compact::PublicKey::new(key.public);
    let sig = ed25519_compact::Signature::new(*block.signature);
    public
        .verify(block.signed, &sig)
        .map_err(|_| SignatureError::BadSignature)
}

/// Whether a framed file (see [`crate::file::split`]) is signed by `key`.
pub fn verify(sections: &Sections<'_>, key: &TrustedKey) -> Result<(), SignatureError> {
    match &sections.signature {
        None => Err(SignatureError::Unsigned),
        Some(block) => verify_block(block, key),
    }
}

#[cfg(feature = "alloc")]
mod signing {
    use super::*;
    use crate::error::ModelError;
    use crate::file::{crc32, split, CRC_LEN, HEADER_LEN};
    use alloc::vec::Vec;

    /// The public key of the ed25519 key pair whose 32-byte seed (RFC 8032's
    /// secret key) is `seed`.
    pub fn public_key(seed: &[u8; 32]) -> [u8; PUBLIC_KEY_LEN] {
        let kp = ed25519_compact::KeyPair::from_seed(ed25519_compact::Seed::new(*seed));
        *kp.pk
    }

    /// Header, payload and labels of a framed file with the signed flag set
    /// or cleared (the rest of the header as it was).
    fn body(file: &[u8], signed: bool) -> Result<Vec<u8>, ModelError> {
        let s = split(file)?;
        let mut out = Vec::with_capacity(file.len() + BLOCK_LEN);
        out.extend_from_slice(&file[..HEADER_LEN]);
        let flags = u16::from_le_bytes([file[6], file[7]]);
        let flags = if signed {
            flags | FLAG_SIGNED
        } else {
            flags & !FLAG_SIGNED
        };
        out[6..8].copy_from_slice(&flags.to_le_bytes());
        out.extend_from_slice(s.payload);
        out.extend_from_slice(s.labels);
        Ok(out)
    }

    fn close(mut out: Vec<u8>) -> Vec<u8> {
        let crc = crc32(&out);
        out.extend_from_slice(&crc.to_le_bytes());
        debug_assert!(out.len() >= HEADER_LEN + CRC_LEN);
        out
    }

    /// `file` (a framed model file, signed or not: an old signature is
    /// replaced) signed with the key pair of `seed`: flag bit 0 set, the key
    /// id and the deterministic RFC 8032 signature of everything before it,
    /// then a new CRC-32.
    pub fn sign(file: &[u8], seed: &[u8; 32]) -> Result<Vec<u8>, ModelError> {
        let kp = ed25519_compact::KeyPair::from_seed(ed25519_compact::Seed::new(*seed));
        let mut out = body(file, true)?;
        out.extend_from_slice(&KeyId::of(&kp.pk).0);
        let sig = kp.sk.sign(&out, None);
        out.extend_from_slice(&sig[..]);
        Ok(close(out))
    }

    /// `file` without its signature (flag bit 0 cleared): the bytes the
    /// unsigned file had.
    pub fn strip(file: &[u8]) -> Result<Vec<u8>, ModelError> {
        Ok(close(body(file, false)?))
    }
}

#[cfg(feature = "alloc")]
pub use signing::{public_key, sign, strip};
