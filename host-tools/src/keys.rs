//! Signing keys for model files (`plumb keygen`, `plumb sign`, `plumb inspect
//! --trust`) and what a file's signature says.
//!
//! A key pair is an ed25519 seed (RFC 8032's 32-byte secret key) and its
//! public key. Each lives in a one-line text file:
//!
//! ```text
//! plumb-ed25519-secret 9d61b19deffd5a60ba844af492ec2cc44449c5697b326919703bac031cae7f60
//! plumb-ed25519-public d75a980182b10ab7d54bfed3c964073a0ee172f3daa62325af021a68f707511a
//! ```
//!
//! The secret key file is created readable by its owner only (on Unix) and
//! never overwritten unless asked. Boards read the public key file at build
//! time (`PLUMB_TRUSTED_KEY`). The signature layout is in
//! `shared-model/FORMAT.md`, "Signature".

use crate::error::{Error, Location, Result};
use crate::files::TempOutput;
use plumb_model::file;
use plumb_model::signature::{self, KeyId, SignatureError, TrustedKey};
use std::path::{Path, PathBuf};

/// First word of a secret key file.
pub const SECRET_TAG: &str = "plumb-ed25519-secret";
/// First word of a public key file.
pub const PUBLIC_TAG: &str = "plumb-ed25519-public";

/// An ed25519 key pair.
#[derive(Clone, PartialEq, Eq)]
pub struct SigningKey {
    seed: [u8; 32],
    public: [u8; 32],
}

impl std::fmt::Debug for SigningKey {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        // Never print the seed.
        write!(f, "SigningKey({})", self.id())
    }
}

impl SigningKey {
    /// The key pair of a seed.
    pub fn from_seed(seed: [u8; 32]) -> SigningKey {
        SigningKey {
            public: signature::public_key(&seed),
            seed,
        }
    }

    /// A new key pair from the operating system's random source.
    pub fn generate() -> Result<SigningKey> {
        let mut seed = [0u8; 32];
        getrandom::fill(&mut seed)
            .map_err(|e| Error::input(format!("no randomness from the operating system: {e}")))?;
        Ok(SigningKey::from_seed(seed))
    }

    /// The public key.
    pub fn public(&self) -> [u8; 32] {
        self.public
    }

    /// The public key's id.
    pub fn id(&self) -> KeyId {
        KeyId::of(&self.public)
    }

    /// `model` (a model file, signed or not) signed with this key.
    pub fn sign(&self, model: &[u8]) -> Result<Vec<u8>> {
        signature::sign(model, &self.seed)
            .map_err(|e| Error::input(format!("cannot sign: not a usable model file: {e}")))
    }

    /// The secret key file's text.
    pub fn secret_text(&self) -> String {
        format!("{SECRET_TAG} {}\n", hex(&self.seed))
    }

    /// The public key file's text.
    pub fn public_text(&self) -> String {
        public_text(&self.public)
    }
}

/// A public key file's text.
pub fn public_text(public: &[u8; 32]) -> String {
    format!("{PUBLIC_TAG} {}\n", hex(public))
}

fn hex(b: &[u8]) -> String {
    b.iter().map(|x| format!("{x:02x}")).collect()
}

fn parse_key(path: &Path, text: &str, tag: &str, other: &str) -> Result<[u8; 32]> {
    let at = || Location::file(path);
    let line = text.trim();
    let Some(rest) = line.strip_prefix(tag) else {
        if line.starts_with(other) {
            let what = if tag == SECRET_TAG {
                "a public key file; signing needs the secret key file (without .pub)"
            } else {
                "a secret key file; give the public key file (.pub)"
            };
            return Err(Error::at(at(), format!("this is {what}")));
        }
        return Err(Error::at(
            at(),
            format!("not a key file from `plumb keygen` (expected a line `{tag} HEX`)"),
        ));
    };
    let h = rest.trim();
    if h.len() != 64 || !h.bytes().all(|c| c.is_ascii_hexdigit()) {
        return Err(Error::at(
            at(),
            format!(
                "the key is not 64 hex digits (found {} characters)",
                h.len()
            ),
        ));
    }
    let mut key = [0u8; 32];
    for (i, k) in key.iter_mut().enumerate() {
        *k = u8::from_str_radix(&h[2 * i..2 * i + 2], 16)
            .map_err(|_| Error::at(at(), "the key is not hex"))?;
    }
    Ok(key)
}

fn read_text(path: &Path) -> Result<String> {
    std::fs::read_to_string(path).map_err(|e| Error::io(path, "read", &e))
}

/// Reads a secret key file.
pub fn read_secret(path: &Path) -> Result<SigningKey> {
    let seed = parse_key(path, &read_text(path)?, SECRET_TAG, PUBLIC_TAG)?;
    Ok(SigningKey::from_seed(seed))
}

/// Reads a public key file.
pub fn read_public(path: &Path) -> Result<TrustedKey> {
    let public = parse_key(path, &read_text(path)?, PUBLIC_TAG, SECRET_TAG)?;
    Ok(TrustedKey::new(public))
}

/// The public key file beside a secret key file: the same path plus `.pub`.
pub fn public_path(secret: &Path) -> PathBuf {
    let mut s = secret.as_os_str().to_owned();
    s.push(".pub");
    PathBuf::from(s)
}

/// Writes a new key pair: `secret` (owner-only on Unix) and `secret.pub`.
/// Existing files are kept unless `force`; a folder at either path is
/// refused. Both keys are written to temporary files beside them first and
/// renamed into place only when both are written, the public key first and
/// the secret key last: a failure leaves the old pair (or nothing) as it
/// was.
pub fn write_pair(key: &SigningKey, secret: &Path, force: bool) -> Result<PathBuf> {
    let public = public_path(secret);
    for p in [secret, public.as_path()] {
        if p.is_dir() {
            return Err(Error::at(
                Location::file(p),
                "is a folder; expected a key file name (--out names the secret key file, \
                 the public key goes beside it with .pub)",
            ));
        }
        if !force && (p.exists() || p.is_symlink()) {
            return Err(Error::at(
                Location::file(p),
                "exists; not overwritten (give --force to replace the key pair)",
            ));
        }
    }
    let (secret_place, f) = TempOutput::create_private(secret)?;
    write_secret(secret, secret_place.temp_path(), f, &key.secret_text())?;
    let (public_place, mut f) = TempOutput::create(&public)?;
    {
        use std::io::Write;
        f.write_all(key.public_text().as_bytes())
            .and_then(|()| f.sync_all())
            .map_err(|e| Error::io(&public, "write", &e))?;
    }
    public_place.commit()?;
    secret_place.commit()?;
    Ok(public)
}

/// Writes the secret key text to `tmp` (open as `f`), readable by its owner
/// only; errors name `path`, the file it will become.
fn write_secret(path: &Path, tmp: &Path, mut f: std::fs::File, text: &str) -> Result<()> {
    use std::io::Write;
    #[cfg(unix)]
    {
        use std::os::unix::fs::PermissionsExt;
        std::fs::set_permissions(tmp, std::fs::Permissions::from_mode(0o600))
            .map_err(|e| Error::io(path, "set permissions of", &e))?;
    }
    #[cfg(not(unix))]
    let _ = tmp;
    f.write_all(text.as_bytes())
        .and_then(|()| f.sync_all())
        .map_err(|e| Error::io(path, "write", &e))
}

/// What a model file's signature block says.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum SignatureInfo {
    /// No signature block.
    Unsigned,
    /// Signed by the key with this id (not checked).
    Signed(KeyId),
}

impl SignatureInfo {
    /// Reads it from a model file's bytes (framing and CRC checked).
    pub fn of(bytes: &[u8]) -> Result<SignatureInfo> {
        let s =
            file::split_host(bytes).map_err(|e| Error::input(format!("not a model file: {e}")))?;
        Ok(match s.signature {
            Some(b) => SignatureInfo::Signed(b.key_id),
            None => SignatureInfo::Unsigned,
        })
    }
}

/// Checks a model file's signature against `key`.
pub fn verify(bytes: &[u8], key: &TrustedKey) -> Result<std::result::Result<(), SignatureError>> {
    let s = file::split_host(bytes).map_err(|e| Error::input(format!("not a model file: {e}")))?;
    Ok(signature::verify(&s, key))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn scratch(name: &str) -> PathBuf {
        let d = std::env::temp_dir().join(format!("plumb-keys-{name}-{}", std::process::id()));
        let _ = std::fs::remove_dir_all(&d);
        std::fs::create_dir_all(&d).unwrap();
        d
    }

    #[test]
    fn key_files_round_trip_and_are_told_apart() {
        let dir = scratch("round");
        let key = SigningKey::from_seed([5; 32]);
        let secret = dir.join("release");
        let public = write_pair(&key, &secret, false).unwrap();
        assert_eq!(public, dir.join("release.pub"));
        assert_eq!(read_secret(&secret).unwrap(), key);
        let trusted = read_public(&public).unwrap();
        assert_eq!(trusted.public(), &key.public());
        assert_eq!(trusted.id(), key.id());
        #[cfg(unix)]
        {
            use std::os::unix::fs::PermissionsExt;
            let mode = std::fs::metadata(&secret).unwrap().permissions().mode();
            assert_eq!(mode & 0o777, 0o600, "secret key readable by its owner only");
        }
        // Not overwritten without force; replaced with it.
        let e = write_pair(&SigningKey::from_seed([6; 32]), &secret, false).unwrap_err();
        assert!(e.to_string().contains("not overwritten"), "{e}");
        assert_eq!(read_secret(&secret).unwrap(), key);
        write_pair(&SigningKey::from_seed([6; 32]), &secret, true).unwrap();
        assert_eq!(
            read_secret(&secret).unwrap(),
            SigningKey::from_seed([6; 32])
        );
        // The wrong file for the job says so.
        let e = read_secret(&public).unwrap_err().to_string();
        assert!(e.contains("public key file"), "{e}");
        let e = read_public(&secret).unwrap_err().to_string();
        assert!(e.contains("secret key file"), "{e}");
        std::fs::write(dir.join("junk"), "hello\n").unwrap();
        let e = read_public(&dir.join("junk")).unwrap_err().to_string();
        assert!(e.contains("not a key file"), "{e}");
        std::fs::write(dir.join("short"), format!("{PUBLIC_TAG} abcd\n")).unwrap();
        let e = read_public(&dir.join("short")).unwrap_err().to_string();
        assert!(e.contains("64 hex digits"), "{e}");
        let _ = std::fs::remove_dir_all(&dir);
    }

    #[test]
    fn a_pair_is_written_whole_or_not_at_all() {
        let dir = scratch("whole");
        let old = SigningKey::from_seed([7; 32]);
        let secret = dir.join("k");
        write_pair(&old, &secret, false).unwrap();
        // A folder where the public key goes: refused before anything is
        // written, even with force; the old secret key stays.
        std::fs::remove_file(dir.join("k.pub")).unwrap();
        std::fs::create_dir(dir.join("k.pub")).unwrap();
        let e = write_pair(&SigningKey::from_seed([8; 32]), &secret, true).unwrap_err();
        assert!(e.to_string().contains("k.pub: is a folder"), "{e}");
        assert_eq!(read_secret(&secret).unwrap(), old);
        // A public key name too long for the file system: nothing written.
        let long = dir.join("s".repeat(252));
        let e = write_pair(&old, &long, false).unwrap_err();
        assert!(e.to_string().contains(".pub"), "{e}");
        assert!(!long.exists(), "a secret key without its public key");
        let left: Vec<_> = std::fs::read_dir(&dir)
            .unwrap()
            .map(|e| e.unwrap().file_name())
            .filter(|n| n.to_string_lossy().ends_with(".tmp"))
            .collect();
        assert!(left.is_empty(), "{left:?}");
        let _ = std::fs::remove_dir_all(&dir);
    }

    #[test]
    fn debug_never_shows_the_seed() {
        let key = SigningKey::from_seed([0xab; 32]);
        let s = format!("{key:?}");
        assert!(!s.contains("abab"), "{s}");
        assert!(s.contains(&key.id().to_string()));
    }

    #[test]
    fn generated_keys_differ() {
        let a = SigningKey::generate().unwrap();
        let b = SigningKey::generate().unwrap();
        assert_ne!(a.public(), b.public());
    }
}
