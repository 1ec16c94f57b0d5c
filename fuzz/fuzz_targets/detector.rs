//! Arbitrary bytes as a model, then arbitrary f32 samples (NaN, infinities,
//! subnormals, huge values) through `Detector::update`.
//!
//! Input: one mode byte, a little-endian `u16` length `L`, `L` model bytes,
//! then the samples as little-endian f32.
//!
//! * mode bit 0: the model bytes are a bare payload, framed here with a
//!   correct header and CRC (so the fuzzer reaches validation and the
//!   arithmetic); otherwise they are a whole model file;
//! * mode bit 1: sample values are offsets from the model mean in scales
//!   (most then pass the fault limit); otherwise raw feature values;
//! * mode bit 2: each sample's length comes from the stream (wrong lengths);
//!   otherwise it is the model's `d`.
//!
//! A model that does not decode is replaced by the built-in one, so samples
//! are always exercised.
//!
//! * Nothing panics; `Detector::new` on a decoded model never panics either.
//! * A sample that is not a fault has finite scores, bit-equal to
//!   `Detector::score`, and leaves every EWMA and CUSUM a number (not NaN)
//!   and every value of the residual chart and of the slow charts finite
//!   (they step in place, kept in range by the model's validation).
//! * A fault touches no statistic; `score` finds the same fault, except an
//!   overflow of a standardised score, which only `update` computes.
#![no_main]

use libfuzzer_sys::fuzz_target;
use plumb_firmware::{Detector, Fault, Score};
use plumb_fuzz::{builtin_model, frame_payload};
use std::sync::OnceLock;

/// The built-in model's detector, built once.
fn fallback() -> &'static Detector {
    static DET: OnceLock<Detector> = OnceLock::new();
    DET.get_or_init(|| Detector::new(builtin_model().to_device().expect("fits")).expect("valid"))
}

fn levels(det: &Detector) -> [(u32, u32); 3] {
    Score::ALL.map(|s| {
        let t = det.track(s);
        (t.ewma.value().to_bits(), t.cusum.value().to_bits())
    })
}

fuzz_target!(|data: &[u8]| {
    let Some((&mode, rest)) = data.split_first() else {
        return;
    };
    let (len, rest) = match rest {
        [a, b, rest @ ..] => (usize::from(u16::from_le_bytes([*a, *b])), rest),
        _ => return,
    };
    let (model_bytes, mut samples) = rest.split_at(len.min(rest.len()));
    let decoded = if mode & 1 == 1 {
        Detector::from_file(&frame_payload(model_bytes))
    } else {
        Detector::from_file(model_bytes)
    };
    let mut det = match decoded {
        Ok(det) => det,
        Err(_) => fallback().clone(),
    };
    let d = usize::from(det.model().dims.features);
    let relative = mode & 2 == 2;
    let own_lengths = mode & 4 == 4;
    let mut x = [0f32; 80];
    while !samples.is_empty() {
        let n = if own_lengths {
            let (&n, r) = samples.split_first().expect("non-empty");
            samples = r;
            usize::from(n) % x.len()
        } else {
            d
        };
        let take = (4 * n).min(samples.len() / 4 * 4);
        let (now, r) = samples.split_at(take);
        samples = r;
        for (i, (xi, b)) in x.iter_mut().zip(now.chunks_exact(4)).enumerate() {
            let v = f32::from_le_bytes([b[0], b[1], b[2], b[3]]);
            *xi = match (relative, det.model().mean.get(i), det.model().scale.get(i)) {
                (true, Some(mu), Some(s)) => mu + v * s,
                _ => v,
            };
        }
        let sample = &x[..n];
        let before = levels(&det);
        let faults_before = det.faults().total();
        let alone = det.score(sample);
        let o = det.update(sample);
        match (o.fault, o.scores) {
            (Some(f), None) => {
                // An overflow of a standardised score is found by `update`
                // only; `score` sees the raw scores.
                if !(f == Fault::Overflow && alone.is_ok()) {
                    assert_eq!(alone.err(), Some(f));
                }
                assert_eq!(levels(&det), before, "a fault moved a statistic");
                assert_eq!(det.faults().total(), faults_before.saturating_add(1));
            }
            (None, Some(s)) => {
                assert!(
                    s.spe.is_finite() && s.t2.is_finite() && s.nll.is_finite(),
                    "non-finite scores {s:?}"
                );
                let a = alone.expect("score and update agree").scores;
                assert_eq!(
                    [a.spe, a.t2, a.nll].map(f32::to_bits),
                    [s.spe, s.t2, s.nll].map(f32::to_bits)
                );
                for (s, (ewma, cusum)) in Score::ALL.iter().zip(levels(&det)) {
                    let (e, c) = (f32::from_bits(ewma), f32::from_bits(cusum));
                    assert!(!e.is_nan() && !c.is_nan(), "{s:?}: EWMA {e}, CUSUM {c}");
                }
                // The residual chart steps in place without a check: the
                // model's range check must keep every value finite.
                let chart = det.residual_chart();
                assert!(
                    chart.ewma.iter().all(|e| e.is_finite())
                        && chart.peak.is_finite()
                        && chart.slow.iter().all(|e| e.is_finite())
                        && chart.slow_peak.is_finite(),
                    "residual or slow chart left the f32 range: {chart:?}"
                );
            }
            other => panic!("fault and scores disagree: {other:?}"),
        }
        if take < 4 * n {
            break;
        }
    }
});
