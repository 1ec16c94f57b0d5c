//! Bytes → `file::decode` (device, fixed capacity) and `ModelFile::from_bytes`
//! (host, growable). Whatever decodes must validate, re-encode, and decode
//! again to the same model; the two readers must agree.
#![no_main]

use libfuzzer_sys::fuzz_target;
use plumb_model::file::{self, ModelFile};
use plumb_model::{Capacity, ModelOwned};

fuzz_target!(|data: &[u8]| {
    let device = file::decode(data, &Capacity::DEVICE);
    let host = ModelFile::from_bytes(data);

    if let Ok(model) = &device {
        model.validate().expect("decode returned an invalid model");
        let mut buf = vec![0u8; data.len() + 64];
        let n = file::encode_into(model, &mut buf).expect("re-encode");
        let again = file::decode(&buf[..n], &Capacity::DEVICE).expect("re-decode");
        assert_eq!(&again, model, "device round trip");
        // The payload re-encodes byte for byte (postcard is canonical for
        // what it accepts, or the model id/CRC of one model could differ).
        let sections = file::split(data).expect("framing passed once");
        let payload = &buf[file::HEADER_LEN..n - file::CRC_LEN];
        assert_eq!(payload, sections.payload, "payload bytes round trip");
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
        assert_eq!(re.payload, sections.payload, "payload bytes round trip");
        // Within device capacities, the device reader accepts it too.
        if Capacity::DEVICE.admits(&mf.model.dims).is_ok() {
            let m = device.as_ref().expect("device refused a host-valid model");
            assert_eq!(ModelOwned::from(m), mf.model);
        }
    }
});
