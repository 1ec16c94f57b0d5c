//! `device::feed` against the firmware's own endpoint, run in this process
//! behind a transport that loses whole frames in both directions: whatever
//! the window, the endpoint takes every sample exactly once and in order
//! (protocol 3, `shared-model/PROTOCOL.md`, "Which samples are taken"). The
//! emulated board runs the same check with damaged bytes in
//! `tests/tests/qemu.rs`; this one is fast enough for many windows and seeds.

use plumb::device::{self, FeedConfig, Patience};
use plumb::link::{Chunk, Link, Transport};
use plumb::rng::Rng;
use plumb_firmware::endpoint::{Endpoint, RamSlots};
use plumb_firmware::Detector;
use plumb_model::wire::{DeviceMsg, ScoreTriple};
use std::collections::VecDeque;
use std::time::Duration;

/// The model of the emulated board's image (24 features).
const MODEL: &[u8] = include_bytes!("../../firmware/boards/mps2-an386/default.plumb");

#[path = "../../firmware/tests/support/io.rs"]
mod io;
use io::{NoPin, Sink};

/// The endpoint behind a link that drops each frame, either way, with
/// probability `loss` (the project's seeded generator, so a run is
/// repeatable).
struct Lossy {
    ep: Endpoint<RamSlots<8192>, NoPin>,
    out: VecDeque<Vec<u8>>,
    loss: f64,
    rng: Rng,
}

impl Lossy {
    fn lose(&mut self) -> bool {
        self.rng.uniform() < self.loss
    }
}

impl Transport for Lossy {
    fn send(&mut self, bytes: &[u8]) -> std::io::Result<()> {
        for frame in bytes.split_inclusive(|b| *b == 0) {
            if self.lose() {
                continue;
            }
            let mut sink = Sink::default();
            self.ep.feed(frame, &mut sink).expect("in-memory link");
            for out in sink.0.split_inclusive(|b| *b == 0) {
                if !self.lose() {
                    self.out.push_back(out.to_vec());
                }
            }
        }
        Ok(())
    }

    fn recv(&mut self, timeout: Duration) -> Chunk {
        match self.out.pop_front() {
            Some(b) => Chunk::Bytes(b),
            None => {
                std::thread::sleep(timeout.min(Duration::from_millis(1)));
                Chunk::Timeout
            }
        }
    }

    fn describe(&self) -> String {
        "an in-process endpoint behind a lossy link".into()
    }
}

fn samples(n: usize) -> Vec<Vec<f32>> {
    let file = plumb_model::file::ModelFile::from_bytes(MODEL).expect("the board's model");
    let (mean, scale) = (&file.model.mean, &file.model.scale);
    (0..n)
        .map(|i| {
            (0..mean.len())
                .map(|j| mean[j] + scale[j] * (((i * 31 + j * 7) % 17) as f32 / 8.0 - 1.0))
                .collect()
        })
        .collect()
}

#[test]
fn every_sample_is_taken_once_and_in_order_whatever_the_window_and_the_losses() {
    let xs = samples(300);
    for (window, loss, seed) in [(1, 0.2, 1), (4, 0.2, 2), (8, 0.3, 3), (3, 0.0, 4)] {
        let ep = Endpoint::boot(RamSlots::new(), NoPin, Some(MODEL)).expect("boots");
        let mut link = Link::new(Box::new(Lossy {
            ep,
            out: VecDeque::new(),
            loss,
            rng: Rng::new(seed, 0),
        }));
        let cfg = FeedConfig {
            window,
            patience: Patience {
                reply: Duration::from_millis(20),
                tries: 1000,
            },
            ..FeedConfig::default()
        };
        let mut reports: Vec<Option<(u64, Option<ScoreTriple>)>> = vec![None; xs.len()];
        let mut not_taken = 0u64;
        let mut beyond = Vec::new();
        let sum = device::feed(
            &mut link,
            xs.iter().map(|x| Ok(x.clone())),
            cfg,
            &mut |r| match &r.frame.msg {
                DeviceMsg::ScoreReport(rep) => match reports.get_mut(rep.sample as usize) {
                    Some(slot) => *slot = Some((rep.sample, rep.scores)),
                    None => beyond.push(rep.sample),
                },
                DeviceMsg::Ack(plumb_model::wire::Ack::NotTaken { .. }) => not_taken += 1,
                _ => {}
            },
        )
        .unwrap_or_else(|e| panic!("window {window}, loss {loss}: {e}"));
        let what = format!("window {window}, loss {loss}: {sum:?}, {not_taken} not taken");
        assert!(beyond.is_empty(), "samples taken twice: {beyond:?}, {what}");
        assert_eq!((sum.samples, sum.taken), (300, 300), "{what}");
        if loss > 0.0 {
            assert!(sum.resent > 0, "losses were made up for: {what}");
        }
        // Every report that came through is the host detector's on the same
        // sequence, bit for bit: no sample was taken twice or out of order.
        let mut reference = Detector::from_file(MODEL).expect("the board's model");
        let mut seen = 0;
        for (i, x) in xs.iter().enumerate() {
            let want = reference.update(x);
            if let Some((idx, scores)) = reports[i] {
                seen += 1;
                assert_eq!(idx, want.index, "{what}");
                let (a, b) = (scores.expect("scored"), want.scores.expect("scored"));
                assert_eq!(
                    [a.spe.to_bits(), a.t2.to_bits(), a.nll.to_bits()],
                    [b.spe.to_bits(), b.t2.to_bits(), b.nll.to_bits()],
                    "sample {i}, {what}"
                );
            }
        }
        assert!(seen > 200, "most reports arrive: {seen}, {what}");
    }
}
