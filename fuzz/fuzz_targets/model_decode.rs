//! Bytes → `file::decode` (device, fixed capacity) and `ModelFile::from_bytes`
//! (host, growable). Whatever decodes must validate, re-encode, and decode
//! again to the same model; the two readers must agree. Re-encoding gives
//! the canonical bytes: no longer than the input's, and a fixed point. The
//! in-place decoder behind `file::decode` agrees with postcard's derived one.
#![no_main]

use libfuzzer_sys::fuzz_target;
use plumb_model::file::{self, ModelFile};
use plumb_model::{Capacity, Model, ModelError, ModelOwned};

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

fuzz_target!(|input: &[u8]| {
    let Some(file) = file_from(input) else {
        return;
    };
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
