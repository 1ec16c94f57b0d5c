//! The model file: layout pinned to exact bytes, one test per error, and
//! "never panics" properties over arbitrary and mutated bytes.

mod support;

use plumb_model::file::{self, crc32, Label, ModelFile, HEADER_LEN, MAGIC};
use plumb_model::{Capacity, Dim, Dims, Field, Model, ModelError, ModelMeta, ModelOwned};
use proptest::prelude::*;
use support::example_model;

/// Frames an arbitrary (possibly invalid) model without validating it.
fn frame(model: &ModelOwned) -> Vec<u8> {
    let payload = postcard::to_allocvec(model).unwrap();
    let mut out = vec![0u8; HEADER_LEN + payload.len() + 4];
    let n = file::frame_into(&payload, &[], &mut out).unwrap();
    assert_eq!(n, out.len());
    out
}

fn fix_crc(bytes: &mut [u8]) {
    let end = bytes.len() - 4;
    let crc = crc32(&bytes[..end]);
    bytes[end..].copy_from_slice(&crc.to_le_bytes());
}

fn decode(bytes: &[u8]) -> Result<plumb_model::Model, ModelError> {
    file::decode(bytes, &Capacity::DEVICE)
}

/// d = 2, m = 1, k = 1 with round numbers, so every byte can be read off.
fn tiny() -> ModelOwned {
    let s = std::f32::consts::FRAC_1_SQRT_2;
    ModelOwned {
        meta: ModelMeta {
            id: 7,
            schema: 1,
            created_unix_s: 0,
            train_rows: 300,
            calib_rows: 2,
            sample_period_us: 100_000,
        },
        dims: Dims {
            features: 2,
            components: 1,
            mixture: 1,
        },
        mean: vec![1.0, -2.0],
        scale: vec![0.5, 4.0],
        loadings: vec![s, s],
        eigenvalues: vec![1.5],
        theta: [0.5, 0.25, 0.125],
        weights: vec![1.0],
        mix_means: vec![0.0],
        mix_variances: vec![1.5],
        monitor: support::monitor(),
        spe_center_by_mode: vec![0.75],
        spe_spread_by_mode: vec![0.25],
        resid_center: vec![0.25, -0.5],
        resid_gain: vec![2.0, 0.0],
        resid_limit: 1.5,
        resid_whiten: vec![1.0, -0.5, -0.25, 2.0],
        slow_charts: vec![1.0, 0.005, -0.125, 0.5],
        slow_limit: 1.5,
    }
}

#[test]
fn crc_is_crc32_iso_hdlc() {
    // Check value of CRC-32/ISO-HDLC for "123456789": 0xCBF43926
    // (Greg Cook's CRC catalogue; also zlib's crc32).
    assert_eq!(crc32(b"123456789"), 0xcbf4_3926);
}

proptest! {
    /// The crate's CRC (four bits at a time) agrees with an independent
    /// one, the `crc` crate's byte-table CRC-32/ISO-HDLC, on any bytes.
    #[test]
    fn crc_agrees_with_an_independent_implementation(
        bytes in proptest::collection::vec(any::<u8>(), 0..600)
    ) {
        let reference = crc::Crc::<u32>::new(&crc::CRC_32_ISO_HDLC);
        prop_assert_eq!(crc32(&bytes), reference.checksum(&bytes));
    }
}

#[test]
fn tiny_model_exact_bytes() {
    let bytes = ModelFile {
        model: tiny(),
        labels: vec![],
    }
    .to_bytes()
    .unwrap();
    // Header (FORMAT.md): magic, version 5, flags 0, payload length, labels length 0.
    assert_eq!(&bytes[0..4], b"PLMD");
    assert_eq!(&bytes[4..8], &[5, 0, 0, 0]);
    let payload_len = u32::from_le_bytes(bytes[8..12].try_into().unwrap()) as usize;
    assert_eq!(&bytes[12..16], &[0, 0, 0, 0]);
    assert_eq!(bytes.len(), HEADER_LEN + payload_len + 4);
    // Payload, field by field in the postcard encoding (varint integers,
    // little-endian f32, varint length before each vector, none before arrays).
    let mut expect: Vec<u8> = vec![
        7, // id
        1, // schema
        0, // created
        0xac, 0x02, // train rows 300 as varint
        2,    // calib rows
        0xa0, 0x8d, 0x06, // 100_000 µs as varint
        2, 1, 1, // dims
    ];
    let f = |v: &[f32], with_len: bool, out: &mut Vec<u8>| {
        if with_len {
            out.push(v.len() as u8);
        }
        for x in v {
            out.extend_from_slice(&x.to_le_bytes());
        }
    };
    f(&[1.0, -2.0], true, &mut expect);
    f(&[0.5, 4.0], true, &mut expect);
    let s = std::f32::consts::FRAC_1_SQRT_2;
    f(&[s, s], true, &mut expect);
    f(&[1.5], true, &mut expect);
    f(&[0.5, 0.25, 0.125], false, &mut expect);
    f(&[1.0], true, &mut expect);
    f(&[0.0], true, &mut expect);
    f(&[1.5], true, &mut expect);
    // monitor: fault_z, warmup (varint), lambda, raise/clear dwell, min_hold, clear_fraction
    f(&[50.0], false, &mut expect);
    expect.push(10);
    f(&[0.1], false, &mut expect);
    expect.extend_from_slice(&[3, 20, 30]);
    f(&[0.5], false, &mut expect);
    for (c, sd) in [(0.5, 0.3), (1.2, 0.4), (3.0, 1.0)] {
        f(&[100.0, c, sd, 0.5, 5.0, 0.8], false, &mut expect);
    }
    // SPE centre and spread by mode, one component.
    f(&[0.75], true, &mut expect);
    f(&[0.25], true, &mut expect);
    // Residual chart: centre and gain per feature, then the limit.
    f(&[0.25, -0.5], true, &mut expect);
    f(&[2.0, 0.0], true, &mut expect);
    f(&[1.5], false, &mut expect);
    // Its whitening matrix, 2 × 2 row-major (format 4).
    f(&[1.0, -0.5, -0.25, 2.0], true, &mut expect);
    // The slow charts, one (feature 1, λ 0.005, centre −0.125, gain 0.5),
    // then their limit (format 5).
    f(&[1.0, 0.005, -0.125, 0.5], true, &mut expect);
    f(&[1.5], false, &mut expect);
    assert_eq!(&bytes[HEADER_LEN..HEADER_LEN + payload_len], &expect[..]);
    // And the whole file, pinned: any change to the layout shows up here.
    let crc = u32::from_le_bytes(bytes[bytes.len() - 4..].try_into().unwrap());
    assert_eq!(crc, crc32(&bytes[..bytes.len() - 4]));
    assert_eq!(payload_len, 229);
    // Also computed with Python's zlib.crc32 over the bytes written out by
    // hand from FORMAT.md (header, then the payload listed above).
    assert_eq!(crc, 0x8a9c_be04, "pinned CRC of the tiny model file");
}

#[test]
fn host_and_device_encode_the_same_bytes() {
    for (d, m, k) in [(2, 1, 1), (8, 3, 2), (64, 16, 8)] {
        let owned = example_model(d, m, k, 42);
        let host = ModelFile {
            model: owned.clone(),
            labels: vec![],
        }
        .to_bytes()
        .unwrap();
        let device = owned.to_device().unwrap();
        let mut buf = vec![0u8; 32 * 1024];
        let n = file::encode_into(&device, &mut buf).unwrap();
        assert_eq!(&buf[..n], &host[..]);
        let back = decode(&host).unwrap();
        assert_eq!(back, device);
        assert_eq!(ModelOwned::from(&back), owned);
    }
}

#[test]
fn labels_round_trip_and_must_match_fingerprint() {
    let mut model = tiny();
    let labels = vec![
        Label {
            name: "a".into(),
            unit: "A".into(),
        },
        Label {
            name: "b".into(),
            unit: String::new(),
        },
    ];
    model.meta.schema = plumb_model::schema::fingerprint([("a", "A"), ("b", "")]);
    let file = ModelFile {
        model: model.clone(),
        labels: labels.clone(),
    };
    let bytes = file.to_bytes().unwrap();
    assert_eq!(ModelFile::from_bytes(&bytes).unwrap(), file);
    // The device ignores labels but still checks the CRC over them.
    assert!(decode(&bytes).is_ok());
    let wrong = ModelFile {
        model,
        labels: vec![labels[1].clone(), labels[0].clone()],
    };
    assert_eq!(
        wrong.to_bytes(),
        Err(ModelError::OutOfRange {
            field: Field::Labels
        })
    );
}

#[test]
fn each_framing_error_is_distinct() {
    let good = frame(&tiny());
    assert!(decode(&good).is_ok());

    let mut b = good.clone();
    b[0] = b'X';
    assert_eq!(decode(&b), Err(ModelError::BadMagic));

    let mut b = good.clone();
    b[4] = 6;
    assert_eq!(decode(&b), Err(ModelError::UnknownVersion { found: 6 }));
    // Versions 1 (before the SPE by mode), 2 (before the residual chart),
    // 3 (before its whitening matrix) and 4 (before the slow charts) are
    // refused, not misread.
    for old in [1u8, 2, 3, 4] {
        let mut b = good.clone();
        b[4] = old;
        assert_eq!(
            decode(&b),
            Err(ModelError::UnknownVersion {
                found: u16::from(old)
            })
        );
    }

    // Flag bit 0 is the signature's; any other set flag is unknown.
    let mut b = good.clone();
    b[6] = 2;
    assert_eq!(decode(&b), Err(ModelError::UnknownFlags { found: 2 }));
    let mut b = good.clone();
    b[7] = 0x80;
    assert_eq!(decode(&b), Err(ModelError::UnknownFlags { found: 0x8000 }));
    // The signed flag on a file without the block: 72 bytes short.
    let mut b = good.clone();
    b[6] = 1;
    assert_eq!(
        decode(&b),
        Err(ModelError::Truncated {
            needed: good.len() as u32 + 72,
            got: good.len() as u32
        })
    );

    let n = good.len() as u32;
    assert_eq!(
        decode(&good[..good.len() - 1]),
        Err(ModelError::Truncated {
            needed: n,
            got: n - 1
        })
    );
    assert_eq!(
        decode(&MAGIC),
        Err(ModelError::Truncated {
            needed: HEADER_LEN as u32,
            got: 4
        })
    );
    assert_eq!(
        decode(&[]),
        Err(ModelError::Truncated { needed: 16, got: 0 })
    );

    let mut b = good.clone();
    b.push(0);
    assert_eq!(decode(&b), Err(ModelError::TrailingBytes { extra: 1 }));

    let mut b = good.clone();
    b[HEADER_LEN + 3] ^= 0x10;
    assert!(matches!(decode(&b), Err(ModelError::BadCrc { .. })));

    // Valid CRC around a payload that does not decode.
    let mut b = vec![0u8; HEADER_LEN + 3 + 4];
    file::frame_into(&[0xff, 0xff, 0xff], &[], &mut b).unwrap();
    assert_eq!(decode(&b), Err(ModelError::Undecodable));
}

#[test]
fn each_content_error_is_distinct() {
    let check = |edit: &dyn Fn(&mut ModelOwned), want: ModelError| {
        let mut m = tiny();
        edit(&mut m);
        assert_eq!(decode(&frame(&m)), Err(want), "after edit");
        assert_eq!(m.validate(), Err(want));
    };
    check(
        &|m| m.mean.push(0.0),
        ModelError::Inconsistent {
            field: Field::Mean,
            expected: 2,
            found: 3,
        },
    );
    check(
        &|m| m.loadings.pop().map(|_| ()).unwrap(),
        ModelError::Inconsistent {
            field: Field::Loadings,
            expected: 2,
            found: 1,
        },
    );
    check(&|m| m.dims.components = 3, ModelError::BadDimensions);
    check(&|m| m.dims.mixture = 0, ModelError::BadDimensions);
    check(
        &|m| m.mean[1] = f32::NAN,
        ModelError::NonFinite {
            field: Field::Mean,
            index: 1,
        },
    );
    check(
        &|m| m.loadings[0] = f32::INFINITY,
        ModelError::NonFinite {
            field: Field::Loadings,
            index: 0,
        },
    );
    check(
        &|m| m.scale[1] = 0.0,
        ModelError::NotPositive {
            field: Field::Scale,
            index: 1,
        },
    );
    check(
        &|m| m.mix_variances[0] = -1.0,
        ModelError::NotPositive {
            field: Field::MixVariances,
            index: 0,
        },
    );
    check(
        &|m| m.eigenvalues[0] = 0.0,
        ModelError::NotPositive {
            field: Field::Eigenvalues,
            index: 0,
        },
    );
    check(
        &|m| m.weights[0] = 0.9,
        ModelError::OutOfRange {
            field: Field::Weights,
        },
    );
    check(
        &|m| m.monitor.ewma_lambda = 1.5,
        ModelError::OutOfRange {
            field: Field::Monitor,
        },
    );
    check(
        &|m| m.monitor.t2.spread = 0.0,
        ModelError::NotPositive {
            field: Field::T2Limits,
            index: 2,
        },
    );
    check(
        &|m| m.monitor.nll.center = f32::NAN,
        ModelError::NonFinite {
            field: Field::NllLimits,
            index: 1,
        },
    );
}

#[test]
fn over_capacity_is_refused_before_decoding_arrays() {
    let big = example_model(65, 2, 1, 1);
    let bytes = frame(&big);
    assert_eq!(
        decode(&bytes),
        Err(ModelError::OverCapacity {
            dim: Dim::Features,
            found: 65,
            max: 64
        })
    );
    // A smaller reader capacity refuses a model the default build would hold.
    let small = Capacity {
        features: 8,
        components: 2,
        mixture: 2,
    };
    let bytes = frame(&example_model(8, 3, 1, 1));
    assert_eq!(
        file::decode(&bytes, &small),
        Err(ModelError::OverCapacity {
            dim: Dim::Components,
            found: 3,
            max: 2
        })
    );
    assert!(matches!(
        example_model(8, 3, 9, 1).to_device(),
        Err(ModelError::OverCapacity {
            dim: Dim::Mixture,
            ..
        })
    ));
}

#[test]
fn encode_into_small_buffer_is_an_error() {
    let device = tiny().to_device().unwrap();
    let mut buf = [0u8; 40];
    assert_eq!(
        file::encode_into(&device, &mut buf),
        Err(ModelError::BufferTooSmall)
    );
}

/// The by-value decoder `decode_payload_into` replaced, kept as the
/// reference: the derived `Deserialize` of `Model` through postcard.
fn reference_payload(payload: &[u8], cap: &Capacity) -> Result<Model, ModelError> {
    let (_, dims) = file::peek(payload)?;
    cap.admits(&dims)?;
    Capacity::DEVICE.admits(&dims)?;
    let (model, rest) =
        postcard::take_from_bytes::<Model>(payload).map_err(|_| ModelError::Undecodable)?;
    if !rest.is_empty() {
        return Err(ModelError::Undecodable);
    }
    model.validate()?;
    Ok(model)
}

/// In place into `start`, compared with the reference; `start` is reused, so
/// a decode must not keep anything of what the place held before.
fn assert_in_place_agrees(payload: &[u8], start: &mut Model) -> Result<(), TestCaseError> {
    let expected = reference_payload(payload, &Capacity::DEVICE);
    let got = file::decode_payload_into(payload, &Capacity::DEVICE, start);
    match (&expected, got) {
        (Ok(model), Ok(())) => prop_assert_eq!(&*start, model),
        (Err(e), Err(g)) => {
            prop_assert_eq!(*e, g);
            // On error the place is the empty model, which cannot run.
            prop_assert_eq!(&*start, &Model::EMPTY);
            prop_assert!(start.validate().is_err());
        }
        (e, g) => prop_assert!(false, "reference {e:?}, in place {g:?}"),
    }
    Ok(())
}

#[test]
fn in_place_decoding_agrees_with_the_derived_decoder() {
    let mut models = vec![tiny()];
    for (d, m, k) in [(1, 1, 1), (2, 1, 1), (8, 3, 2), (20, 16, 3), (64, 16, 8)] {
        for seed in 0..3 {
            models.push(example_model(d, m, k, seed));
        }
    }
    // The place starts full (the largest model) and is reused throughout,
    // so every vector must be cleared before it is filled.
    let mut place = example_model(64, 16, 8, 9).to_device().unwrap();
    for owned in &models {
        let payload = postcard::to_allocvec(owned).unwrap();
        assert_in_place_agrees(&payload, &mut place).unwrap();
        assert_eq!(ModelOwned::from(&place), *owned);
        let file = frame(owned);
        let mut again = Model::EMPTY;
        file::decode_into(&file, &Capacity::DEVICE, &mut again).unwrap();
        assert_eq!(again, place);
        assert_eq!(decode(&file).unwrap(), place);
    }
}

#[test]
fn in_place_decoding_refuses_what_the_derived_decoder_refuses() {
    let good = postcard::to_allocvec(&example_model(8, 3, 2, 1)).unwrap();
    let mut place = example_model(64, 16, 8, 9).to_device().unwrap();
    // Truncated anywhere, one byte too many, over a vector's capacity, an
    // invalid value: each an error, the same one, and an empty place.
    for cut in 0..good.len() {
        assert_in_place_agrees(&good[..cut], &mut place).unwrap();
        assert_eq!(place, Model::EMPTY);
        place = example_model(4, 2, 1, 3).to_device().unwrap();
    }
    let mut long = good.clone();
    long.push(0);
    assert_in_place_agrees(&long, &mut place).unwrap();
    assert_eq!(place, Model::EMPTY);
    // 65 means: dims say 8 features, so it is the vector itself that
    // overflows its capacity (64) while being filled.
    let mut wide = example_model(8, 3, 2, 1);
    wide.mean = vec![0.5; 65];
    let payload = postcard::to_allocvec(&wide).unwrap();
    place = example_model(4, 2, 1, 3).to_device().unwrap();
    assert_in_place_agrees(&payload, &mut place).unwrap();
    assert_eq!(
        file::decode_payload_into(&payload, &Capacity::DEVICE, &mut place),
        Err(ModelError::Undecodable)
    );
    let mut bad = example_model(8, 3, 2, 1);
    bad.scale[2] = -1.0;
    let payload = postcard::to_allocvec(&bad).unwrap();
    place = example_model(4, 2, 1, 3).to_device().unwrap();
    assert_in_place_agrees(&payload, &mut place).unwrap();
    assert!(matches!(
        file::decode_payload_into(&payload, &Capacity::DEVICE, &mut place),
        Err(ModelError::NotPositive {
            field: Field::Scale,
            index: 2
        })
    ));
    // A framing error empties the place too.
    place = example_model(4, 2, 1, 3).to_device().unwrap();
    assert_eq!(
        file::decode_into(b"PLMD", &Capacity::DEVICE, &mut place),
        Err(ModelError::Truncated { needed: 16, got: 4 })
    );
    assert_eq!(place, Model::EMPTY);
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(2000))]

    #[test]
    fn arbitrary_bytes_never_panic(bytes in proptest::collection::vec(any::<u8>(), 0..600)) {
        let _ = decode(&bytes);
        let _ = ModelFile::from_bytes(&bytes);
    }

    #[test]
    fn mutated_payload_with_fixed_crc_gives_model_or_error(
        at in 0usize..2000, value in any::<u8>(), cut in 0usize..64, seed in 0u64..50
    ) {
        // Reach the deep decoder: mutate inside the payload and repair the CRC.
        let mut bytes = frame(&example_model(6, 3, 2, seed));
        let body = bytes.len() - 4 - HEADER_LEN;
        bytes[HEADER_LEN + at % body] = value;
        fix_crc(&mut bytes);
        if let Ok(m) = decode(&bytes) {
            prop_assert!(m.validate().is_ok());
        }
        let mut place = example_model(3, 2, 1, seed).to_device().unwrap();
        assert_in_place_agrees(&bytes[HEADER_LEN..bytes.len() - 4], &mut place)?;
        // Truncate the payload but keep the header lengths consistent.
        let payload_len = body.saturating_sub(cut % body);
        let payload = bytes[HEADER_LEN..HEADER_LEN + payload_len].to_vec();
        let mut out = vec![0u8; HEADER_LEN + payload_len + 4];
        file::frame_into(&payload, &[], &mut out).unwrap();
        let _ = decode(&out);
        assert_in_place_agrees(&payload, &mut place)?;
    }

    #[test]
    fn arbitrary_payloads_decode_alike_in_place(
        bytes in proptest::collection::vec(any::<u8>(), 0..400), seed in 0u64..8
    ) {
        // Mostly refused early; a valid prefix (identity and dimensions)
        // followed by noise reaches the vectors.
        let mut payload = postcard::to_allocvec(&example_model(5, 2, 2, seed)).unwrap();
        payload.truncate(40);
        payload.extend_from_slice(&bytes);
        let mut place = example_model(64, 16, 8, seed).to_device().unwrap();
        assert_in_place_agrees(&payload, &mut place)?;
        assert_in_place_agrees(&bytes, &mut place)?;
    }
}

// ------------------------------------------------------------ signatures

mod signed {
    use super::*;
    use plumb_model::signature::{self, KeyId, SignatureError, TrustedKey, BLOCK_LEN, FLAG_SIGNED};

    /// RFC 8032, section 7.1, TEST 1: secret key (seed), public key, and
    /// the signature of the empty message (published test vector).
    const RFC_SEED: &str = "9d61b19deffd5a60ba844af492ec2cc44449c5697b326919703bac031cae7f60";
    const RFC_PUBLIC: &str = "d75a980182b10ab7d54bfed3c964073a0ee172f3daa62325af021a68f707511a";
    const RFC_SIG_EMPTY: &str = "e5564300c360ac729086e2cc806e828a84877f1eb8e5d974d873e065\
                                 224901555fb8821590a33bacc61e39701cf9b46bd25bf5f0595bbe24\
                                 655141438e7a100b";

    fn hex<const N: usize>(s: &str) -> [u8; N] {
        let v: Vec<u8> = (0..s.len())
            .step_by(2)
            .map(|i| u8::from_str_radix(&s[i..i + 2], 16).unwrap())
            .collect();
        v.try_into().unwrap()
    }

    fn seed() -> [u8; 32] {
        hex(RFC_SEED)
    }

    fn trusted() -> TrustedKey {
        TrustedKey::new(hex(RFC_PUBLIC))
    }

    fn unsigned() -> Vec<u8> {
        ModelFile {
            model: tiny(),
            labels: vec![],
        }
        .to_bytes()
        .unwrap()
    }

    #[test]
    fn the_ed25519_implementation_matches_rfc_8032() {
        assert_eq!(signature::public_key(&seed()), hex::<32>(RFC_PUBLIC));
        let block = signature::SignatureBlock {
            key_id: trusted().id(),
            signature: &hex::<64>(RFC_SIG_EMPTY),
            signed: &[],
        };
        assert_eq!(signature::verify_block(&block, &trusted()), Ok(()));
        let mut bad = hex::<64>(RFC_SIG_EMPTY);
        bad[10] ^= 1;
        let block = signature::SignatureBlock {
            signature: &bad,
            ..block
        };
        assert_eq!(
            signature::verify_block(&block, &trusted()),
            Err(SignatureError::BadSignature)
        );
    }

    #[test]
    fn key_id_is_the_start_of_sha512_of_the_public_key() {
        // Python: hashlib.sha512(bytes.fromhex(RFC_PUBLIC)).hexdigest()[:16]
        assert_eq!(trusted().id().to_string(), "0e02a50225b4baaa");
        assert_eq!(KeyId::of(&hex(RFC_PUBLIC)), trusted().id());
    }

    #[test]
    fn signed_tiny_model_layout() {
        let plain = unsigned();
        let signed = signature::sign(&plain, &seed()).unwrap();
        let p = plain.len() - HEADER_LEN - 4; // no labels
        assert_eq!(signed.len(), plain.len() + BLOCK_LEN);
        // Header: flag bit 0 set, lengths unchanged.
        assert_eq!(&signed[0..6], &plain[0..6]);
        assert_eq!(
            u16::from_le_bytes([signed[6], signed[7]]),
            FLAG_SIGNED,
            "flags"
        );
        assert_eq!(&signed[8..16], &plain[8..16]);
        // Payload as it was, then the key id, the signature, the CRC.
        assert_eq!(
            &signed[HEADER_LEN..HEADER_LEN + p],
            &plain[HEADER_LEN..HEADER_LEN + p]
        );
        let at = HEADER_LEN + p;
        assert_eq!(&signed[at..at + 8], &trusted().id().0);
        let sig: [u8; 64] = signed[at + 8..at + 72].try_into().unwrap();
        let pk = ed25519_compact::PublicKey::new(hex(RFC_PUBLIC));
        pk.verify(&signed[..at + 8], &ed25519_compact::Signature::new(sig))
            .expect("the signature covers header, payload, labels and key id");
        let end = signed.len() - 4;
        assert_eq!(
            u32::from_le_bytes(signed[end..].try_into().unwrap()),
            crc32(&signed[..end])
        );
        // RFC 8032 signatures are deterministic: the whole file is pinned.
        assert_eq!(signature::sign(&plain, &seed()).unwrap(), signed);
        assert_eq!(
            crc32(&signed),
            0x2144_df1c,
            "pinned CRC of the signed tiny model file"
        );
        // Stripping gives the unsigned bytes back; signing twice replaces.
        assert_eq!(signature::strip(&signed).unwrap(), plain);
        assert_eq!(signature::sign(&signed, &seed()).unwrap(), signed);
    }

    #[test]
    fn readers_take_a_signed_file_as_the_model_it_holds() {
        let plain = unsigned();
        let signed = signature::sign(&plain, &seed()).unwrap();
        assert_eq!(decode(&signed).unwrap(), decode(&plain).unwrap());
        assert_eq!(
            ModelFile::from_bytes(&signed).unwrap(),
            ModelFile::from_bytes(&plain).unwrap()
        );
        let s = file::split(&signed).unwrap();
        assert_eq!(s.signature.unwrap().key_id, trusted().id());
        assert!(s.labels.is_empty());
        assert!(file::split(&plain).unwrap().signature.is_none());
        // With labels: the block follows them.
        let mut with_labels = ModelFile::from_bytes(&plain).unwrap();
        with_labels.labels = vec![
            Label {
                name: "a".into(),
                unit: "".into(),
            },
            Label {
                name: "b".into(),
                unit: "m".into(),
            },
        ];
        with_labels.model.meta.schema = plumb_model::schema::fingerprint(
            with_labels
                .labels
                .iter()
                .map(|l| (l.name.as_str(), l.unit.as_str())),
        );
        let lab = with_labels.to_bytes().unwrap();
        let slab = signature::sign(&lab, &seed()).unwrap();
        assert_eq!(ModelFile::from_bytes(&slab).unwrap(), with_labels);
        let s = file::split(&slab).unwrap();
        assert_eq!(s.labels, file::split(&lab).unwrap().labels);
        assert_eq!(signature::verify(&s, &trusted()), Ok(()));
    }

    #[test]
    fn each_signature_failure_is_distinct() {
        let plain = unsigned();
        let signed = signature::sign(&plain, &seed()).unwrap();
        let check = |b: &[u8]| signature::verify(&file::split(b).unwrap(), &trusted());
        assert_eq!(check(&signed), Ok(()));
        assert_eq!(check(&plain), Err(SignatureError::Unsigned));
        // Another key.
        let other = signature::sign(&plain, &[7u8; 32]).unwrap();
        let other_id = KeyId::of(&signature::public_key(&[7u8; 32]));
        assert_eq!(
            check(&other),
            Err(SignatureError::UnknownKey { found: other_id })
        );
        // A payload or signature byte changed (CRC made to match again).
        let at = signed.len() - 4 - BLOCK_LEN;
        for k in [HEADER_LEN, HEADER_LEN + 40, at + 8, at + 40, at + 71] {
            let mut b = signed.clone();
            b[k] ^= 0x04;
            fix_crc(&mut b);
            assert_eq!(check(&b), Err(SignatureError::BadSignature), "byte {k}");
        }
        // The key id changed: not the trusted key any more.
        let mut b = signed.clone();
        b[at] ^= 0x01;
        fix_crc(&mut b);
        assert!(matches!(check(&b), Err(SignatureError::UnknownKey { .. })));
        // Without fixing the CRC, damage is a CRC error first.
        let mut b = signed.clone();
        b[at + 20] ^= 0x01;
        assert!(matches!(decode(&b), Err(ModelError::BadCrc { .. })));
        // Cut inside the block.
        assert!(matches!(
            decode(&signed[..signed.len() - 10]),
            Err(ModelError::Truncated { .. })
        ));
    }

    proptest! {
        #[test]
        fn sign_then_strip_is_the_identity(d in 1u16..6, m in 1u16..4, k in 1u16..4, s in any::<u64>()) {
            let m = m.min(d);
            let model = example_model(usize::from(d), usize::from(m), usize::from(k), s);
            let plain = ModelFile { model, labels: vec![] }.to_bytes().unwrap();
            let signed = signature::sign(&plain, &seed()).unwrap();
            prop_assert_eq!(signature::strip(&signed).unwrap(), plain);
            prop_assert_eq!(signature::verify(&file::split(&signed).unwrap(), &trusted()), Ok(()));
        }
    }
}

/// An older file: the current file's payload less its last `cut` bytes,
/// under a header of `version` (FORMAT.md's history: versions differ only by
/// fields appended at the end).
fn older_file(current: &[u8], version: u16, cut: usize) -> Vec<u8> {
    let payload_len = u32::from_le_bytes(current[8..12].try_into().unwrap()) as usize;
    let payload = &current[HEADER_LEN..HEADER_LEN + payload_len - cut];
    let mut out = Vec::new();
    out.extend_from_slice(&MAGIC);
    out.extend_from_slice(&version.to_le_bytes());
    out.extend_from_slice(&0u16.to_le_bytes());
    out.extend_from_slice(&(payload.len() as u32).to_le_bytes());
    out.extend_from_slice(&0u32.to_le_bytes());
    out.extend_from_slice(payload);
    out.extend_from_slice(&crc32(&out).to_le_bytes());
    out
}

/// Bytes of the tiny model's fields added by version 5 (one slow chart: a
/// length byte and four f32, and the f32 limit), by version 4 (d = 2: a length
/// byte and four f32), by version 3 (two vectors of a length byte and two
/// f32, and one f32) and by version 2 (k = 1: two vectors of a length byte
/// and one f32).
const V5_FIELDS: usize = 1 + 16 + 4;
const V4_FIELDS: usize = 1 + 16;
const V3_FIELDS: usize = 2 * (1 + 8) + 4;
const V2_FIELDS: usize = 2 * (1 + 4);

/// The tiny model as an older version reads on the host: the residual chart
/// off (every gain 0), so it flags as it did.
fn tiny_chart_off() -> ModelOwned {
    let mut want = tiny();
    want.resid_center = vec![0.0, 0.0];
    want.resid_gain = vec![0.0, 0.0];
    want.resid_limit = 1.0;
    want.resid_whiten = vec![];
    no_slow(want)
}

/// `m` without slow charts, as a host reads a version 1–4 file.
fn no_slow(mut m: ModelOwned) -> ModelOwned {
    m.slow_charts = vec![];
    m.slow_limit = 1.0;
    m
}

/// A version 1 file (the layout before fields 28–29, as FORMAT.md's
/// history gives it: the same header with version 1, the payload without
/// the trailing fields of versions 2 and 3) is read by the host with every
/// mode at the global SPE centre and spread, so its EWMA smooths what a
/// version 1 detector smoothed, and the residual chart off; a device refuses
/// it.
#[test]
fn a_version_1_file_reads_on_the_host_with_the_global_spe() {
    let v5 = ModelFile {
        model: tiny(),
        labels: vec![],
    }
    .to_bytes()
    .unwrap();
    let v1 = older_file(&v5, 1, V5_FIELDS + V4_FIELDS + V3_FIELDS + V2_FIELDS);
    let read = ModelFile::from_bytes(&v1).unwrap().model;
    let mut want = tiny_chart_off();
    want.spe_center_by_mode = vec![want.monitor.spe.center];
    want.spe_spread_by_mode = vec![want.monitor.spe.spread];
    assert_eq!(read, want);
    assert_eq!(decode(&v1), Err(ModelError::UnknownVersion { found: 1 }));
    // A version 1 header over a version 5 payload does not decode.
    let mut wrong = v5.clone();
    wrong[4] = 1;
    fix_crc(&mut wrong);
    assert_eq!(ModelFile::from_bytes(&wrong), Err(ModelError::Undecodable));
}

/// A version 2 file (before fields 30–32) is read by the host with the
/// residual chart off and everything else as stored; a device refuses it.
#[test]
fn a_version_2_file_reads_on_the_host_with_the_residual_chart_off() {
    let v5 = ModelFile {
        model: tiny(),
        labels: vec![],
    }
    .to_bytes()
    .unwrap();
    let v2 = older_file(&v5, 2, V5_FIELDS + V4_FIELDS + V3_FIELDS);
    assert_eq!(ModelFile::from_bytes(&v2).unwrap().model, tiny_chart_off());
    assert_eq!(decode(&v2), Err(ModelError::UnknownVersion { found: 2 }));
    // Off means off: a chart with every gain 0 validates.
    tiny_chart_off().validate().unwrap();
    // Version headers over the wrong payloads do not decode.
    let mut wrong = v5.clone();
    wrong[4] = 2;
    fix_crc(&mut wrong);
    assert_eq!(ModelFile::from_bytes(&wrong), Err(ModelError::Undecodable));
    let mut wrong = v2.clone();
    wrong[4] = 5;
    fix_crc(&mut wrong);
    assert_eq!(decode(&wrong), Err(ModelError::Undecodable));
}

/// A version 3 file (before field 33) is read by the host with no whitening
/// matrix, so its chart smooths the raw residuals as a version 3 detector
/// did; a device refuses it.
#[test]
fn a_version_3_file_reads_on_the_host_without_whitening() {
    let v5 = ModelFile {
        model: tiny(),
        labels: vec![],
    }
    .to_bytes()
    .unwrap();
    let v3 = older_file(&v5, 3, V5_FIELDS + V4_FIELDS);
    let mut want = no_slow(tiny());
    want.resid_whiten = vec![];
    assert_eq!(ModelFile::from_bytes(&v3).unwrap().model, want);
    assert_eq!(decode(&v3), Err(ModelError::UnknownVersion { found: 3 }));
    // A version 3 header over a version 5 payload leaves bytes over; a
    // version 5 header over a version 3 payload lacks the matrix.
    let mut wrong = v5.clone();
    wrong[4] = 3;
    fix_crc(&mut wrong);
    assert_eq!(ModelFile::from_bytes(&wrong), Err(ModelError::Undecodable));
    let mut wrong = v3.clone();
    wrong[4] = 5;
    fix_crc(&mut wrong);
    assert_eq!(decode(&wrong), Err(ModelError::Undecodable));
}

/// A version 4 file (before fields 34–35) is read by the host without slow
/// charts, so it flags as a version 4 detector did; a device refuses it.
#[test]
fn a_version_4_file_reads_on_the_host_without_slow_charts() {
    let v5 = ModelFile {
        model: tiny(),
        labels: vec![],
    }
    .to_bytes()
    .unwrap();
    let v4 = older_file(&v5, 4, V5_FIELDS);
    assert_eq!(ModelFile::from_bytes(&v4).unwrap().model, no_slow(tiny()));
    assert_eq!(decode(&v4), Err(ModelError::UnknownVersion { found: 4 }));
    // A version 4 header over a version 5 payload leaves bytes over; a
    // version 5 header over a version 4 payload lacks the slow charts.
    let mut wrong = v5.clone();
    wrong[4] = 4;
    fix_crc(&mut wrong);
    assert_eq!(ModelFile::from_bytes(&wrong), Err(ModelError::Undecodable));
    let mut wrong = v4.clone();
    wrong[4] = 5;
    fix_crc(&mut wrong);
    assert_eq!(decode(&wrong), Err(ModelError::Undecodable));
}

/// Fields 34–35's checks (FORMAT.md): whole quadruples; features integers
/// under d, ascending, no repeat; λ in (0, 1]; gain ≥ 0; the range check on
/// centre and gain; a positive finite limit. Each refusal is the residual
/// chart's out-of-range error (or not positive for the limit), and the
/// model without the fault validates.
#[test]
fn the_slow_charts_are_checked() {
    let check = |charts: &[f32], limit: f32| {
        let mut m = tiny();
        m.slow_charts = charts.to_vec();
        m.slow_limit = limit;
        m.validate()
    };
    let field = Field::ResidualChart;
    let out = Err(ModelError::OutOfRange { field });
    assert_eq!(check(&[], 1.5), Ok(()));
    assert_eq!(check(&[1.0, 0.005, -0.125, 0.5], 1.5), Ok(()));
    assert_eq!(
        check(&[0.0, 1.0, 0.0, 0.0, 1.0, 0.002, 3.0, 2.0], 1.5),
        Ok(())
    );
    // Not whole quadruples.
    assert_eq!(check(&[1.0, 0.005, -0.125], 1.5), out);
    // Features: out of range, not an integer, negative, NaN, a repeat, out
    // of order.
    for bad in [2.0, 0.5, -1.0, f32::NAN, 64.0] {
        assert_eq!(check(&[bad, 0.005, 0.0, 1.0], 1.5), out, "feature {bad}");
    }
    assert_eq!(check(&[1.0, 0.1, 0.0, 1.0, 1.0, 0.1, 0.0, 1.0], 1.5), out);
    assert_eq!(check(&[1.0, 0.1, 0.0, 1.0, 0.0, 0.1, 0.0, 1.0], 1.5), out);
    // λ outside (0, 1] or NaN; a negative or NaN gain.
    for bad in [0.0, -0.1, 1.5, f32::NAN] {
        assert_eq!(check(&[1.0, bad, 0.0, 1.0], 1.5), out, "lambda {bad}");
    }
    assert_eq!(check(&[1.0, 1.0, 0.0, 1.0], 1.5), Ok(()));
    for bad in [-0.5, f32::NAN] {
        assert_eq!(check(&[1.0, 0.1, 0.0, bad], 1.5), out, "gain {bad}");
    }
    // The range check: feature 1's input reaches (0.25 + 2) · RESIDUAL_MAX
    // with the tiny model's matrix (row [−0.25, 2]), about 4.2e19; a gain
    // that takes that beyond CHART_INPUT_MAX (1e37) is refused, one inside
    // it is not; so is an infinite or NaN centre.
    assert_eq!(check(&[1.0, 0.1, 0.0, 2.5e17], 1.5), out);
    assert_eq!(check(&[1.0, 0.1, 0.0, 2.0e17], 1.5), Ok(()));
    assert_eq!(check(&[1.0, 0.1, f32::INFINITY, 1.0], 1.5), out);
    assert_eq!(check(&[1.0, 0.1, f32::NAN, 1.0], 1.5), out);
    // The limit.
    for bad in [0.0, -1.0, f32::NAN, f32::INFINITY] {
        assert!(check(&[1.0, 0.1, 0.0, 1.0], bad).is_err(), "limit {bad}");
    }
}

/// More slow charts than a device holds (`MAX_SLOW`): the host reads the
/// file, `to_device` refuses it naming the field, and a device decoder
/// refuses the bytes (its vector is full) without misreading them.
#[test]
fn more_slow_charts_than_a_device_holds_are_refused_on_the_device() {
    let mut m = support::example_model(24, 3, 2, 5);
    m.slow_charts = (0..=plumb_model::MAX_SLOW)
        .flat_map(|i| [i as f32, 0.01, 0.0, 1.0])
        .collect();
    m.validate().unwrap();
    let bytes = ModelFile {
        model: m.clone(),
        labels: vec![],
    }
    .to_bytes()
    .unwrap();
    assert_eq!(ModelFile::from_bytes(&bytes).unwrap().model, m);
    assert_eq!(
        m.to_device(),
        Err(ModelError::Inconsistent {
            field: Field::ResidualChart,
            expected: 64,
            found: 68
        })
    );
    assert_eq!(decode(&bytes), Err(ModelError::Undecodable));
    // Sixteen fit.
    m.slow_charts.truncate(4 * plumb_model::MAX_SLOW);
    assert!(m.to_device().is_ok());
}

/// Field 33's checks: its length (0 or d²), finite values, and the chart's
/// range check on the matrix and on the gains (FORMAT.md).
#[test]
fn the_whitening_matrix_is_checked() {
    let check = |f: &dyn Fn(&mut ModelOwned)| {
        let mut m = tiny();
        f(&mut m);
        m.validate()
    };
    let field = Field::ResidualChart;
    assert_eq!(check(&|_| ()), Ok(()));
    assert_eq!(check(&|m| m.resid_whiten.clear()), Ok(()));
    assert_eq!(
        check(&|m| m.resid_whiten.truncate(3)),
        Err(ModelError::Inconsistent {
            field,
            expected: 4,
            found: 3
        })
    );
    assert_eq!(
        check(&|m| m.resid_whiten[2] = f32::NAN),
        Err(ModelError::NonFinite { field, index: 2 })
    );
    // Row 1 reaches (0.25 + w) · 1.845e19: within 1e37 up to w ≈ 5.4e17.
    assert_eq!(check(&|m| m.resid_whiten[3] = 5e17), Ok(()));
    assert_eq!(
        check(&|m| m.resid_whiten[3] = 6e17),
        Err(ModelError::OutOfRange { field })
    );
    // Row sums that overflow are refused, even for a feature whose chart
    // is off (gain 0: ∞ · 0 would be NaN on the device).
    assert_eq!(
        check(&|m| m.resid_whiten[2] = f32::MAX),
        Err(ModelError::OutOfRange { field })
    );
    // Without a matrix the gain is held: (1.845e19 + 0.25) · 2e17 fits,
    // · 1e18 does not.
    assert_eq!(
        check(&|m| {
            m.resid_whiten.clear();
            m.resid_gain[0] = 2e17;
        }),
        Ok(())
    );
    assert_eq!(
        check(&|m| {
            m.resid_whiten.clear();
            m.resid_gain[0] = 1e18;
        }),
        Err(ModelError::OutOfRange { field })
    );
}
