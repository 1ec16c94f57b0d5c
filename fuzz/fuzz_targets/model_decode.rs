//! Bytes → `file::decode` (device, fixed capacity) and `ModelFile::from_bytes`
//! (host, growable). Whatever decodes must validate, re-encode, and decode
//! again to the same model; the two readers must agree. Re-encoding gives
//! the canonical bytes: no longer than the input's, and a fixed point. The
//! in-place decoder behind `file::decode` agrees with postcard's derived one.
//!
//! Signed files: with bit 1 of the first byte set, the target signs the file
//! itself with a fixed key (a fuzzer cannot forge ed25519), then with bit 2
//! damages one byte and repairs the CRC, as an attacker who knows the format
//! would. Checked: a file verifies with the trusted key exactly when it is
//! the file that was signed, a damaged one is refused with the error for
//! what was damaged, stripping gives back the unsigned bytes, and the
//! device's trust check agrees.
#![no_main]

use libfuzzer_sys::fuzz_target;
use plumb_firmware::endpoint::{check_trust, Config};
use plumb_model::file::{self, ModelFile};
use plumb_model::signature::{self, SignatureError, TrustedKey};
use plumb_model::{Capacity, Model, ModelError, ModelOwned};

/// Seed of the signing key (fixed: the target checks verification, not keys).
const SEED: [u8; 32] = [7; 32];

/// The file the fuzzer means. A file's CRC-32 is out of a fuzzer's reach, so
/// with the first byte even the rest is a payload and label section
/// (`u16` little-endian payload length first) that is framed here with a
/// correct header and CRC; with it odd the rest is the file itself.
fn file_from(data: &[u8]) -> Option<Vec<u8>> {
    let (&mode, rest) = data.split_first()?;
    if mode & 1 == 1 {
        return Some(rest.to_vec());
    }
    let (len, rest) = match rest {
        [a, b, rest @ ..] => (usize::from(u16::from_le_bytes([*a, *b])), rest),
        _ => return None,
    };
    let (payload, labels) = rest.split_at(len.min(rest.len()));
    let mut out = vec![0u8; payload.len() + labels.len() + 64];
    let n = file::frame_into(payload, labels, &mut out).expect("room");
    out.truncate(n);
    Some(out)
}

/// Signs `file` with [`SEED`] and, when asked, damages one byte of the
/// result (position and bit pattern from `params`) and repairs its CRC.
/// Checks everything that holds for the file before and after.
fn check_signed(file: &[u8], damage: Option<(usize, u8)>) -> Vec<u8> {
    let key = TrustedKey::new(signature::public_key(&SEED));
    let config = Config {
        trusted_key: Some(key),
        ..Config::default()
    };
    let Ok(signed) = signature::sign(file, &SEED) else {
        // Only a file that frames can be signed.
        assert!(file::split(file).is_err(), "sign refused a framed file");
        return file.to_vec();
    };
    let sections = file::split(&signed).expect("a signed file frames");
    assert_eq!(signature::verify(&sections, &key), Ok(()));
    assert_eq!(check_trust(&signed, &config), Ok(()));
    let stripped = signature::strip(&signed).expect("strip");
    assert_eq!(
        signature::strip(file).expect("strip the input"),
        stripped,
        "sign then strip gives the unsigned bytes"
    );
    let other = TrustedKey::new(signature::public_key(&[8; 32]));
    assert!(matches!(
        signature::verify(&sections, &other),
        Err(SignatureError::UnknownKey { .. })
    ));

    let Some((at, xor)) = damage else {
        return signed;
    };
    let mut bad = signed.clone();
    let body_end = bad.len() - file::CRC_LEN;
    let at = at % body_end;
    bad[at] ^= xor.max(1);
    let crc = file::crc32(&bad[..body_end]);
    bad[body_end..].copy_from_slice(&crc.to_le_bytes());
    let trust = check_trust(&bad, &config);
    assert!(trust.is_err(), "a damaged signed file was trusted");
    if let Ok(sec) = file::split(&bad) {
        let verdict = signature::verify(&sec, &key);
        let block = body_end - signature::BLOCK_LEN;
        let key_id_at = block..block + signature::KEY_ID_LEN;
        if key_id_at.contains(&at) {
            assert!(
                matches!(verdict, Err(SignatureError::UnknownKey { .. })),
                "{verdict:?}"
            );
        } else {
            assert_eq!(verdict, Err(SignatureError::BadSignature));
        }
    }
    bad
}

fuzz_target!(|input: &[u8]| {
    let Some((&mode, rest)) = input.split_first() else {
        return;
    };
    let (damage, rest) = match rest {
        [a, b, x, rest @ ..] if mode & 4 == 4 => {
            (Some((usize::from(u16::from_le_bytes([*a, *b])), *x)), rest)
        }
        _ => (None, rest),
    };
    let Some(mut file) = file_from(&[&[mode & 1], rest].concat()) else {
        return;
    };
    if mode & 2 == 2 {
        file = check_signed(&file, damage);
    }
    let data = &file[..];
    let device = file::decode(data, &Capacity::DEVICE);
    let host = ModelFile::from_bytes(data);

    // `file::decode` is built on the in-place decoder; hold that decoder to
    // the derived one (postcard's `Deserialize` for `Model`), with the same
    // checks around it, on every payload that frames.
    if let Ok(sections) = file::split(data) {
        let derived = (|| {
            let (_, dims) = file::peek(sections.payload)?;
            Capacity::DEVICE.admits(&dims)?;
            let (m, rest) = postcard::take_from_bytes::<Model>(sections.payload)
                .map_err(|_| ModelError::Undecodable)?;
            if !rest.is_empty() {
                return Err(ModelError::Undecodable);
            }
            m.validate()?;
            Ok(m)
        })();
        assert_eq!(derived, device, "in-place and derived decoders disagree");
    }

    if let Ok(model) = &device {
        model.validate().expect("decode returned an invalid model");
        let mut buf = vec![0u8; data.len() + 64];
        let n = file::encode_into(model, &mut buf).expect("re-encode");
        let again = file::decode(&buf[..n], &Capacity::DEVICE).expect("re-decode");
        assert_eq!(&again, model, "device round trip");
        // Re-encoding gives the canonical form: never longer than what was
        // read (postcard also reads varints with redundant continuation
        // bytes), equal to it when that was canonical, and a fixed point.
        let sections = file::split(data).expect("framing passed once");
        let payload = &buf[file::HEADER_LEN..n - file::CRC_LEN];
        assert!(payload.len() <= sections.payload.len(), "re-encoding grew");
        let mut buf2 = vec![0u8; n + 64];
        let n2 = file::encode_into(&again, &mut buf2).expect("re-encode");
        assert_eq!(&buf2[..n2], &buf[..n], "canonical form is a fixed point");
        // The host reader, which has no capacity limit, accepts it too
        // unless the label section is what it refuses.
        if let Ok(h) = &host {
            assert_eq!(h.model, ModelOwned::from(model), "readers disagree");
        }
    }

    if let Ok(mf) = &host {
        mf.model
            .validate()
            .expect("from_bytes returned an invalid model");
        let bytes = mf.to_bytes().expect("re-encode");
        let again = ModelFile::from_bytes(&bytes).expect("re-decode");
        assert_eq!(&again, mf, "host round trip");
        let sections = file::split(data).expect("framing passed once");
        let re = file::split(&bytes).expect("own framing");
        assert!(
            re.payload.len() <= sections.payload.len(),
            "re-encoding grew"
        );
        assert_eq!(again.to_bytes().expect("re-encode"), bytes, "fixed point");
        // Within device capacities, the device reader accepts it too.
        if Capacity::DEVICE.admits(&mf.model.dims).is_ok() {
            let m = device.as_ref().expect("device refused a host-valid model");
            assert_eq!(ModelOwned::from(m), mf.model);
        }
    }
});
