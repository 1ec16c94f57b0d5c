//! The serial endpoint on the host: an in-memory link implementing the
//! `embedded-io` traits, a fake drift line, and hand-built models.

use plumb_firmware::endpoint::{
    BootError, Config, Endpoint, ModelSlots, Places, RamSlots, SlotError, SlotRecord,
    DEFAULT_RING_BYTES,
};
use plumb_firmware::{Detector, DriftState};
use plumb_model::file::{self, ModelFile};
use plumb_model::wire::{
    self, Ack, Crossing, DeviceFrame, DeviceFrameDecoder, DeviceMsg, FaultKind, HostMsg, Reason,
    Refusal, Request, ResendDone, ScoreKind, ScoreReport, Slot, State, Statistic, MAX_CHUNK,
};
use plumb_model::{Capacity, Dims, ModelMeta, ModelOwned, MonitorParams, ScoreLimits};
use proptest::prelude::*;
use std::cell::Cell;
use std::collections::VecDeque;
use std::convert::Infallible;
use std::rc::Rc;

// ---------------------------------------------------------------- fixtures

/// Bytes per RAM slot in these tests.
const SLOT: usize = 8192;

/// An in-memory serial link: bytes the host wrote wait in `to_device`; what
/// the device writes lands in `from_device`. Reads return at most `max_read`
/// bytes, to exercise partial reads.
struct Pipe {
    to_device: VecDeque<u8>,
    from_device: Vec<u8>,
    max_read: usize,
}

impl Pipe {
    fn new(max_read: usize) -> Self {
        Pipe {
            to_device: VecDeque::new(),
            from_device: Vec::new(),
            max_read: max_read.max(1),
        }
    }
}

impl embedded_io::ErrorType for Pipe {
    type Error = Infallible;
}

impl embedded_io::Read for Pipe {
    fn read(&mut self, buf: &mut [u8]) -> Result<usize, Infallible> {
        let n = buf.len().min(self.max_read).min(self.to_device.len());
        for (dst, src) in buf.iter_mut().zip(self.to_device.drain(..n)) {
            *dst = src;
        }
        Ok(n)
    }
}

impl embedded_io::ReadReady for Pipe {
    fn read_ready(&mut self) -> Result<bool, Infallible> {
        Ok(!self.to_device.is_empty())
    }
}

impl embedded_io::Write for Pipe {
    fn write(&mut self, buf: &[u8]) -> Result<usize, Infallible> {
        self.from_device.extend_from_slice(buf);
        Ok(buf.len())
    }

    fn flush(&mut self) -> Result<(), Infallible> {
        Ok(())
    }
}

/// A drift line whose level the test can see.
#[derive(Clone, Default)]
struct Line(Rc<Cell<bool>>);

impl embedded_hal::digital::ErrorType for Line {
    type Error = Infallible;
}

impl embedded_hal::digital::OutputPin for Line {
    fn set_low(&mut self) -> Result<(), Infallible> {
        self.0.set(false);
        Ok(())
    }

    fn set_high(&mut self) -> Result<(), Infallible> {
        self.0.set(true);
        Ok(())
    }
}

fn limits(center: f32, spread: f32) -> ScoreLimits {
    ScoreLimits {
        sample_limit: 50.0,
        center,
        spread,
        cusum_slack: 0.5,
        cusum_limit: 4.0,
        ewma_limit: 1.5,
    }
}

/// d = 4, m = 2, k = 2. Loadings are two orthonormal columns
/// (½·[1, 1, 1, 1] and ½·[1, −1, 1, −1]); the residual space holds
/// ½·[1, 1, −1, −1] and ½·[1, −1, −1, 1].
fn model(id: u32, mean_shift: f32) -> ModelOwned {
    ModelOwned {
        meta: ModelMeta {
            id,
            schema: 0x5EED_0000_0000_0001,
            created_unix_s: 1_700_000_000,
            train_rows: 1000,
            calib_rows: 500,
            sample_period_us: 10_000,
        },
        dims: Dims {
            features: 4,
            components: 2,
            mixture: 2,
        },
        mean: vec![mean_shift; 4],
        scale: vec![1.0; 4],
        loadings: vec![0.5, 0.5, 0.5, -0.5, 0.5, 0.5, 0.5, -0.5],
        eigenvalues: vec![2.0, 1.0],
        theta: [0.02, 0.0002, 0.000002],
        weights: vec![0.5, 0.5],
        mix_means: vec![-1.0, 0.0, 1.0, 0.0],
        mix_variances: vec![1.0, 1.0, 1.0, 1.0],
        monitor: MonitorParams {
            fault_z: 20.0,
            warmup: 20,
            ewma_lambda: 0.2,
            raise_dwell: 3,
            clear_dwell: 5,
            min_hold: 10,
            clear_fraction: 0.5,
            spe: limits(0.2, 0.1),
            t2: limits(1.0, 0.5),
            nll: limits(3.0, 1.5),
        },
        spe_center_by_mode: vec![0.2; 2],
        spe_spread_by_mode: vec![0.1; 2],
        // The residual chart off; `residual_chart` turns it on.
        resid_center: vec![0.0; 4],
        resid_gain: vec![0.0; 4],
        resid_limit: 1.0,
        resid_whiten: Vec::new(),
        slow_charts: Vec::new(),
        slow_limit: 1.0,
    }
}

/// [`file_of`] for the life of the test process, as a built-in model file
/// (which the endpoint keeps, to decode again). Each file is kept in a
/// static too: Miri counts leaked memory that no static reaches as a leak.
fn builtin_of(m: &ModelOwned) -> &'static [u8] {
    static KEPT: std::sync::Mutex<Vec<&'static [u8]>> = std::sync::Mutex::new(Vec::new());
    let file: &'static [u8] = file_of(m).leak();
    KEPT.lock().unwrap_or_else(|e| e.into_inner()).push(file);
    file
}

fn file_of(m: &ModelOwned) -> Vec<u8> {
    ModelFile {
        model: m.clone(),
        labels: vec![],
    }
    .to_bytes()
    .expect("valid test model")
}

/// Frames a model that `ModelFile::to_bytes` would refuse (it validates).
fn file_unchecked(m: &ModelOwned) -> Vec<u8> {
    let payload = postcard::to_allocvec(m).unwrap();
    let mut out = vec![0u8; payload.len() + 64];
    let n = file::frame_into(&payload, &[], &mut out).unwrap();
    out.truncate(n);
    out
}

/// A small deterministic generator (64-bit LCG, Knuth's MMIX constants).
struct Lcg(u64);

impl Lcg {
    fn next(&mut self) -> f32 {
        self.0 = self
            .0
            .wrapping_mul(6_364_136_223_846_793_005)
            .wrapping_add(1_442_695_040_888_963_407);
        ((self.0 >> 40) as f32 / (1u64 << 24) as f32) * 2.0 - 1.0
    }

    /// A sample in the model's latent plane plus a little residual noise.
    fn nominal(&mut self) -> Vec<f32> {
        let a = 1.4 * self.next();
        let b = 1.0 * self.next();
        (0..4)
            .map(|i| {
                let sign = if i % 2 == 0 { 1.0 } else { -1.0 };
                0.5 * a + 0.5 * sign * b + 0.05 * self.next()
            })
            .collect()
    }

    /// A sample pushed along a residual direction.
    fn drifted(&mut self) -> Vec<f32> {
        let mut x = self.nominal();
        for (xi, r) in x.iter_mut().zip([1.0, 1.0, -1.0, -1.0]) {
            *xi += 1.5 * r;
        }
        x
    }
}

/// A sample meant to be the device's sample `at` (sent modulo 2³²).
fn sample_at(at: u64, x: &[f32]) -> HostMsg {
    HostMsg::Sample {
        at: at as u32,
        features: heapless::Vec::from_slice(x).expect("≤ MAX_FEATURES"),
    }
}

struct Rig<const R: usize = DEFAULT_RING_BYTES, S: ModelSlots = RamSlots<SLOT>> {
    ep: Endpoint<S, Line, R>,
    pipe: Pipe,
    line: Line,
    rx: DeviceFrameDecoder,
}

impl<const R: usize> Rig<R> {
    fn boot_with(slots: RamSlots<SLOT>, max_read: usize) -> Self {
        Self::boot_on(slots, max_read)
    }

    /// Boots on model 1 in slot A, generation 1.
    fn new() -> Self {
        let mut slots = RamSlots::new();
        slots.store(Slot::A, &file_of(&model(1, 0.0)), 1).unwrap();
        Self::boot_with(slots, 64)
    }

    /// Boots on model 1 as the built-in file, with both slots empty.
    fn on_builtin() -> Self {
        let line = Line::default();
        let builtin = builtin_of(&model(1, 0.0));
        let ep = Endpoint::boot(RamSlots::new(), line.clone(), Some(builtin)).expect("built-in");
        Rig {
            ep,
            pipe: Pipe::new(64),
            line,
            rx: DeviceFrameDecoder::new(),
        }
    }
}

impl<const R: usize, S: ModelSlots> Rig<R, S> {
    fn boot_on(slots: S, max_read: usize) -> Self {
        let line = Line::default();
        let ep = Endpoint::boot(slots, line.clone(), None).expect("a valid slot");
        Rig {
            ep,
            pipe: Pipe::new(max_read),
            line,
            rx: DeviceFrameDecoder::new(),
        }
    }

    fn send_raw(&mut self, bytes: &[u8]) -> Vec<DeviceFrame> {
        self.pipe.to_device.extend(bytes);
        self.run()
    }

    fn send(&mut self, msg: &HostMsg) -> Vec<DeviceFrame> {
        self.send_raw(&wire::encode_frame_vec(msg))
    }

    /// Sends `x` as the device's next sample.
    fn sample(&mut self, x: &[f32]) -> Vec<DeviceFrame> {
        let at = self.ep.detector().samples();
        self.send(&sample_at(at, x))
    }

    fn run(&mut self) -> Vec<DeviceFrame> {
        while !self.pipe.to_device.is_empty() {
            self.ep.poll(&mut self.pipe).expect("in-memory link");
        }
        let bytes = std::mem::take(&mut self.pipe.from_device);
        let mut out = Vec::new();
        let mut rest = &bytes[..];
        loop {
            rest = self.rx.feed(rest);
            match self.rx.take_message::<DeviceFrame>() {
                Some(Ok(f)) => out.push(f),
                Some(Err(e)) => panic!("device sent a bad frame: {e}"),
                None if rest.is_empty() => return out,
                None => {}
            }
        }
    }

    /// Sends one message and expects exactly one answer.
    fn ask(&mut self, msg: &HostMsg) -> DeviceMsg {
        let mut got = self.send(msg);
        assert_eq!(got.len(), 1, "answers to {msg:?}: {got:?}");
        got.remove(0).msg
    }

    /// Uploads a file in chunks; returns every answer.
    fn upload(&mut self, file: &[u8], crc: u32) -> Vec<DeviceMsg> {
        let mut answers = Vec::new();
        let total = file.len() as u32;
        answers.extend(self.send(&HostMsg::UploadBegin { total, crc }));
        for (i, chunk) in file.chunks(MAX_CHUNK).enumerate() {
            answers.extend(self.send(&HostMsg::UploadChunk {
                offset: (i * MAX_CHUNK) as u32,
                data: heapless::Vec::from_slice(chunk).unwrap(),
            }));
        }
        answers.extend(self.send(&HostMsg::UploadCommit));
        answers.into_iter().map(|f| f.msg).collect()
    }
}

fn refusal(msgs: &[DeviceMsg]) -> Option<Refusal> {
    msgs.iter().find_map(|m| match m {
        DeviceMsg::Refused(r) => Some(*r),
        _ => None,
    })
}

fn switched(msgs: &[DeviceMsg]) -> Option<(Slot, u32, u32)> {
    msgs.iter().find_map(|m| match m {
        DeviceMsg::Ack(Ack::ModelSwitched {
            slot,
            model_id,
            generation,
        }) => Some((*slot, *model_id, *generation)),
        _ => None,
    })
}

fn reports(frames: &[DeviceFrame]) -> Vec<ScoreReport> {
    frames
        .iter()
        .filter_map(|f| match &f.msg {
            DeviceMsg::ScoreReport(r) => Some(*r),
            _ => None,
        })
        .collect()
}

/// Feeds `xs` to the endpoint with reports on and to `reference` directly,
/// and checks every report bit for bit.
fn assert_scores_match(rig: &mut Rig, reference: &mut Detector, xs: &[Vec<f32>]) {
    assert_eq!(
        rig.ask(&HostMsg::SetReports { on: true }),
        DeviceMsg::Ack(Ack::Reports { on: true })
    );
    for x in xs {
        let got = reports(&rig.sample(x));
        assert_eq!(got.len(), 1);
        let r = got[0];
        let want = reference.update(x);
        assert_eq!(r.sample, want.index);
        assert_eq!(r.state, plumb_firmware::endpoint::wire_state(want.state));
        match (r.scores, want.scores) {
            (Some(a), Some(b)) => {
                assert_eq!(a.spe.to_bits(), b.spe.to_bits(), "spe at {}", r.sample);
                assert_eq!(a.t2.to_bits(), b.t2.to_bits(), "t2 at {}", r.sample);
                assert_eq!(a.nll.to_bits(), b.nll.to_bits(), "nll at {}", r.sample);
            }
            (None, None) => {}
            other => panic!("scored differently at {}: {other:?}", r.sample),
        }
    }
}

fn mixed_samples(seed: u64, n: usize) -> Vec<Vec<f32>> {
    let mut g = Lcg(seed);
    (0..n)
        .map(|i| match i % 37 {
            5 => vec![f32::NAN, 0.0, 0.0, 0.0],
            11 => vec![0.0; 3],
            17 => vec![100.0, 0.0, 0.0, 0.0],
            20..=30 => g.drifted(),
            _ => g.nominal(),
        })
        .collect()
}

// ------------------------------------------------------------------ tests

mod greeting_and_boot {
    use super::*;

    #[test]
    fn greeting_names_the_running_model() {
        let mut rig: Rig = Rig::new();
        rig.ep.greet(&mut rig.pipe).unwrap();
        let frames = rig.run();
        assert_eq!(frames.len(), 1);
        assert_eq!(frames[0].seq, 0);
        let DeviceMsg::Greeting(g) = &frames[0].msg else {
            panic!("{frames:?}")
        };
        assert_eq!(g.protocol, wire::PROTOCOL_VERSION);
        assert_eq!(g.firmware.as_str(), env!("CARGO_PKG_VERSION"));
        assert_eq!(g.model_id, 1);
        assert_eq!(g.schema, 0x5EED_0000_0000_0001);
        assert_eq!(g.dims.features, 4);
        assert_eq!(g.capacity, Capacity::DEVICE);
        assert_eq!(g.active, Some(Slot::A));
        assert_eq!(g.generation, 1);
        assert_eq!(
            g.status_every,
            plumb_firmware::endpoint::DEFAULT_STATUS_EVERY
        );
        // Asked again: same content, next sequence number.
        let again = rig.send(&HostMsg::GreetingQuery);
        assert_eq!(again[0].seq, 1);
        assert_eq!(again[0].msg, frames[0].msg);
    }

    #[test]
    fn long_firmware_names_are_cut_to_sixteen_bytes() {
        let mut rig: Rig = Rig::new();
        rig.ep.set_config(Config {
            firmware: "board-x 1.2.3-rc.4+g0123456",
            status_every: 0,
            ..Config::default()
        });
        let DeviceMsg::Greeting(g) = rig.ask(&HostMsg::GreetingQuery) else {
            panic!()
        };
        assert_eq!(g.firmware.as_str(), "board-x 1.2.3-rc");
        assert_eq!(g.status_every, 0);
    }

    #[test]
    fn boot_picks_the_newest_valid_slot() {
        let one = file_of(&model(1, 0.0));
        let two = builtin_of(&model(2, 0.1));
        let mut slots = RamSlots::<SLOT>::new();
        slots.store(Slot::A, &one, 1).unwrap();
        slots.store(Slot::B, two, 2).unwrap();
        let ep = Endpoint::<_, _>::boot(slots.clone(), Line::default(), None).unwrap();
        assert_eq!(ep.active_slot(), Some(Slot::B));
        assert_eq!(ep.generation(), 2);
        assert_eq!(ep.detector().model().meta.id, 2);
        assert_eq!(
            plumb_firmware::endpoint::newest_valid(&slots).map(|(s, r)| (s, r.generation)),
            Some((Slot::B, 2))
        );

        // Damage B: its CRC fails, A runs.
        slots.bytes_mut(Slot::B)[40] ^= 0x10;
        let ep = Endpoint::<_, _>::boot(slots.clone(), Line::default(), None).unwrap();
        assert_eq!(ep.active_slot(), Some(Slot::A));
        assert_eq!(ep.detector().model().meta.id, 1);

        // No valid slot: the built-in model, else an error.
        let empty = RamSlots::<SLOT>::new();
        let ep = Endpoint::<_, _>::boot(empty.clone(), Line::default(), Some(two)).unwrap();
        assert_eq!(ep.active_slot(), None);
        assert_eq!(ep.generation(), 0);
        assert!(matches!(
            Endpoint::<_, _>::boot(empty.clone(), Line::default(), None),
            Err(BootError::NoModel)
        ));
        assert!(matches!(
            Endpoint::<_, _>::boot(empty, Line::default(), Some(&two[..10])),
            Err(BootError::Builtin(_))
        ));
    }

    #[test]
    fn an_idle_endpoint_starts_in_place_like_boot() {
        let one = file_of(&model(1, 0.0));
        let two = builtin_of(&model(2, 0.1));
        let mut slots = RamSlots::<SLOT>::new();
        slots.store(Slot::A, &one, 1).unwrap();
        let mut ep = Endpoint::<_, _>::idle(slots.clone(), Line::default());
        // Before a start: no model, every sample a fault, no panic.
        assert!(!ep.detector().is_loaded());
        let mut io = Pipe::new(64);
        ep.feed(&wire::encode_frame_vec(&sample_at(0, &[0.0; 4])), &mut io)
            .unwrap();
        assert_eq!(ep.detector().faults().wrong_length, 1);

        ep.start(Some(two), Config::default()).unwrap();
        assert_eq!(ep.active_slot(), Some(Slot::A));
        assert_eq!(ep.generation(), 1);
        assert_eq!(ep.detector().model().meta.id, 1);
        // As booted by value, but for the link counters and the fault event
        // of the sample sent before the start.
        let booted = Endpoint::<_, _>::boot(slots, Line::default(), Some(two)).unwrap();
        assert_eq!(ep.detector().model(), booted.detector().model());
        let (a, b) = (ep.status(), booted.status());
        assert_eq!(
            (a.samples, a.state, a.faults, a.levels),
            (b.samples, b.state, b.faults, b.levels)
        );
        assert_eq!(a.model_id, b.model_id);

        // A start that finds nothing leaves the running model running.
        let mut ep = Endpoint::<_, _>::idle(RamSlots::<SLOT>::new(), Line::default());
        ep.start(Some(two), Config::default()).unwrap();
        assert_eq!(ep.active_slot(), None);
        assert_eq!(ep.detector().model().meta.id, 2);
        assert!(matches!(
            ep.start(Some(&two[..10]), Config::default()),
            Err(BootError::Builtin(_))
        ));
        assert!(matches!(
            ep.start(None, Config::default()),
            Err(BootError::NoModel)
        ));
        assert_eq!(ep.detector().model().meta.id, 2);
        assert!(ep.detector().is_loaded());

        // Places lent from outside (as a board's static) work the same.
        let mut places = Box::new(Places::EMPTY);
        let mut slots = RamSlots::<SLOT>::new();
        slots.store(Slot::B, &one, 4).unwrap();
        let mut ep =
            Endpoint::<_, _, DEFAULT_RING_BYTES, _>::idle_in(&mut *places, slots, Line::default());
        ep.start(None, Config::default()).unwrap();
        assert_eq!(ep.active_slot(), Some(Slot::B));
        assert_eq!(ep.detector().model().meta.id, 1);
    }

    #[test]
    fn slot_record_bytes_check_themselves() {
        let rec = SlotRecord {
            generation: 7,
            len: 1234,
            crc: 0xDEAD_BEEF,
        };
        let bytes = rec.to_bytes();
        assert_eq!(SlotRecord::from_bytes(&bytes), Some(rec));
        assert_eq!(SlotRecord::from_bytes(&[0xFF; 16]), None);
        for bit in 0..128 {
            let mut bad = bytes;
            bad[bit / 8] ^= 1 << (bit % 8);
            assert_eq!(SlotRecord::from_bytes(&bad), None, "bit {bit}");
        }
        assert_eq!(SlotRecord::from_bytes(&bytes[..15]), None);
    }
}

mod scoring {
    use super::*;

    #[test]
    fn only_the_next_sample_is_taken_and_any_other_is_answered_as_not_taken() {
        // PROTOCOL.md, "Which samples are taken": a sample sent again (its
        // report was lost, say) or sent behind a lost one changes nothing.
        let mut rig: Rig = Rig::new();
        let mut g = Lcg(3);
        rig.ask(&HostMsg::SetReports { on: true });
        let x = g.nominal();
        let first = reports(&rig.send(&sample_at(0, &x)));
        assert_eq!(first.len(), 1);
        assert_eq!(first[0].sample, 0);
        let mut reference = rig.ep.detector().clone();
        for stray in [0, 2, 7, u32::MAX] {
            let answer = rig.send(&sample_at(u64::from(stray), &g.drifted()));
            assert_eq!(answer.len(), 1, "{answer:?}");
            assert_eq!(
                answer[0].msg,
                DeviceMsg::Ack(Ack::NotTaken { at: stray, next: 1 })
            );
        }
        assert_eq!(rig.ep.detector().samples(), 1);
        // The statistics did not move: the next sample scores as it would have.
        let y = g.nominal();
        let got = reports(&rig.send(&sample_at(1, &y)));
        let want = reference.update(&y);
        assert_eq!(got.len(), 1);
        assert_eq!(got[0].sample, 1);
        let (a, b) = (got[0].scores.unwrap(), want.scores.unwrap());
        assert_eq!(a.spe.to_bits(), b.spe.to_bits());
        assert_eq!(a.nll.to_bits(), b.nll.to_bits());
        // `Polled::samples` counts taken samples only.
        let mut io = Pipe::new(64);
        let two = [sample_at(2, &y), sample_at(2, &y), sample_at(9, &y)]
            .iter()
            .flat_map(wire::encode_frame_vec)
            .collect::<Vec<u8>>();
        let polled = rig.ep.feed(&two, &mut io).unwrap();
        assert_eq!((polled.messages, polled.samples), (3, 1));
    }

    #[test]
    fn drift_raises_the_flag_and_the_line_then_clears_both() {
        let mut rig: Rig = Rig::new();
        let mut g = Lcg(7);
        let mut events = Vec::new();
        for _ in 0..100 {
            events.extend(rig.sample(&g.nominal()));
        }
        assert_eq!(rig.ep.detector().state(), DriftState::Watching);
        assert!(!rig.line.0.get());
        assert!(events.iter().all(|f| !f.msg.is_retained()), "{events:?}");

        let mut raised = None;
        for _ in 0..20 {
            for f in rig.sample(&g.drifted()) {
                if let DeviceMsg::DriftRaised(r) = f.msg {
                    raised = Some(r);
                }
            }
        }
        let r = raised.expect("drift raised");
        assert!(rig.line.0.get(), "line high while drifting");
        assert_eq!(rig.ep.detector().state(), DriftState::Drifting);
        assert!(r.drivers & 0b001 != 0, "SPE drives: {r:?}");
        assert!(!r.crossed.is_empty());
        for c in &r.crossed {
            assert!(c.value > c.limit, "{c:?}");
        }
        // The residual direction loads all four features equally.
        assert!(
            r.top.iter().all(|s| s.feature < 4 && s.value > 0.5),
            "{r:?}"
        );
        assert!(r.scores.spe > 1.0);

        let mut cleared = None;
        for _ in 0..200 {
            for f in rig.sample(&g.nominal()) {
                if let DeviceMsg::DriftCleared(c) = f.msg {
                    cleared = Some(c);
                }
            }
        }
        let c = cleared.expect("drift cleared");
        assert!(c.sample > r.sample);
        assert!(!rig.line.0.get(), "line low again");
        assert_eq!(rig.ep.detector().state(), DriftState::Watching);
    }

    /// Model 1 with SPE's limits `spe`, T²'s per-sample limit `t2_sample`,
    /// and every other EWMA, CUSUM and per-sample limit out of reach of the
    /// samples below.
    fn chart_model(spe: ScoreLimits, t2_sample: f32) -> ModelOwned {
        let far = |center, spread, sample_limit| ScoreLimits {
            sample_limit,
            cusum_limit: 40.0,
            ewma_limit: 40.0,
            ..limits(center, spread)
        };
        let mut m = model(1, 0.0);
        m.monitor.spe = spe;
        m.monitor.t2 = far(1.0, 0.5, t2_sample);
        m.monitor.nll = far(3.0, 1.5, 50.0);
        m
    }

    /// Boots on `m`, feeds 40 nominal samples (past warm-up, no event), then
    /// `spike`; returns the drift raised message it caused and a reference
    /// detector fed the same samples.
    fn raise_with(m: &ModelOwned, spike: &[f32]) -> (wire::DriftRaised, Detector) {
        let mut slots = RamSlots::new();
        slots.store(Slot::A, &file_of(m), 1).unwrap();
        let mut rig: Rig = Rig::boot_with(slots, 64);
        let mut reference = Detector::from_file(&file_of(m)).unwrap();
        let mut g = Lcg(17);
        for _ in 0..40 {
            let x = g.nominal();
            reference.update(&x);
            let got = rig.sample(&x);
            assert!(got.iter().all(|f| !f.msg.is_retained()), "{got:?}");
        }
        assert_eq!(rig.ep.detector().state(), DriftState::Watching);
        reference.update(spike);
        let got = rig.sample(spike);
        assert_eq!(got.len(), 1, "{got:?}");
        let DeviceMsg::DriftRaised(r) = &got[0].msg else {
            panic!("expected a drift raised message: {got:?}")
        };
        assert_eq!(rig.ep.detector().state(), DriftState::Drifting);
        (r.clone(), reference)
    }

    #[test]
    fn a_flag_raised_by_the_per_sample_limit_alone_names_it() {
        // SPE's per-sample limit at 3; its EWMA and CUSUM limits, like every
        // other chart's, out of reach. One sample pushed 1.5 along each of
        // four residual directions has SPE ≈ 9: over the per-sample limit,
        // with u ≈ 19 moving the CUSUM to about 18 and the EWMA to about 4.
        let spe = ScoreLimits {
            sample_limit: 3.0,
            cusum_limit: 40.0,
            ewma_limit: 40.0,
            ..limits(0.2, 0.1)
        };
        let spike = Lcg(5).drifted();
        let (r, reference) = raise_with(&chart_model(spe, 50.0), &spike);
        assert_eq!(r.drivers, 0b001, "{r:?}");
        assert!(r.scores.spe > 3.0, "{r:?}");
        let t = reference.track(plumb_firmware::Score::Spe);
        assert!(t.ewma.value() < 40.0 && t.cusum.value() < 40.0, "{t:?}");
        assert_eq!(
            r.crossed.as_slice(),
            &[Crossing {
                score: ScoreKind::Spe,
                statistic: Statistic::Sample,
                value: r.scores.spe,
                limit: 3.0,
            }]
        );
        // The value is the raw score the detector computed, bit for bit.
        let s = reference.score(&spike).unwrap().scores;
        assert_eq!(r.crossed[0].value.to_bits(), s.spe.to_bits());
    }

    #[test]
    fn crossings_list_scores_then_charts_in_a_fixed_order() {
        // SPE: per-sample limit 3 and the usual EWMA 1.5 and CUSUM 4, so
        // the spike crosses all three (u ≈ 19 moves the CUSUM to about 18
        // and the EWMA to about 4); T²: per-sample limit 4, crossed by a
        // latent shift of 6 (T² ≥ 10), its EWMA and CUSUM out of reach.
        let spe = ScoreLimits {
            sample_limit: 3.0,
            ..limits(0.2, 0.1)
        };
        let m = chart_model(spe, 4.0);
        let mut spike = Lcg(5).drifted();
        for xi in &mut spike {
            *xi += 0.5 * 6.0;
        }
        let (r, reference) = raise_with(&m, &spike);
        assert_eq!(r.drivers, 0b011, "{r:?}");
        let t = reference.track(plumb_firmware::Score::Spe);
        let want = [
            Crossing {
                score: ScoreKind::Spe,
                statistic: Statistic::Ewma,
                value: t.ewma.value(),
                limit: 1.5,
            },
            Crossing {
                score: ScoreKind::Spe,
                statistic: Statistic::Cusum,
                value: t.cusum.value(),
                limit: 4.0,
            },
            Crossing {
                score: ScoreKind::Spe,
                statistic: Statistic::Sample,
                value: r.scores.spe,
                limit: 3.0,
            },
            Crossing {
                score: ScoreKind::T2,
                statistic: Statistic::Sample,
                value: r.scores.t2,
                limit: 4.0,
            },
        ];
        assert_eq!(r.crossed.as_slice(), &want);
        for c in &r.crossed {
            assert!(c.value > c.limit, "{c:?}");
        }
    }

    /// The SPE's per-sample limit low enough for the spike of
    /// `Lcg(5).drifted()` to cross it, its CUSUM and EWMA out of reach, and
    /// the residual chart on (limit 0.2; feature 2 with twice the gain of
    /// the others).
    fn residual_spike_model() -> ModelOwned {
        let spe = ScoreLimits {
            sample_limit: 3.0,
            cusum_limit: 40.0,
            ewma_limit: 40.0,
            ..limits(0.2, 0.1)
        };
        let mut m = chart_model(spe, 50.0);
        m.resid_gain = vec![1.0, 1.0, 2.0, 1.0];
        m.resid_limit = 0.2;
        m
    }

    #[test]
    fn the_residual_chart_crossing_follows_the_spe_charts_and_names_its_feature() {
        // As above, SPE's per-sample limit crossed by the spike, and the
        // residual chart on (limit 0.2; feature 2 with twice the gain of the
        // others): one spike sample moves each feature's chart to λ·w =
        // 0.2 × 1.5 × gain, over the limit, so it is listed right after the
        // SPE's own charts (before T²'s), with its peak and that feature.
        let m = residual_spike_model();
        let spike = Lcg(5).drifted();
        let (r, reference) = raise_with(&m, &spike);
        assert_eq!(r.drivers, 0b001, "{r:?}");
        let chart = reference.residual_chart();
        assert_eq!(chart.peak_feature, 2, "{chart:?}");
        assert_eq!(
            r.crossed.as_slice(),
            &[
                Crossing {
                    score: ScoreKind::Spe,
                    statistic: Statistic::Sample,
                    value: r.scores.spe,
                    limit: 3.0,
                },
                Crossing {
                    score: ScoreKind::Spe,
                    statistic: Statistic::Residual { feature: 2 },
                    value: chart.peak,
                    limit: 0.2,
                },
            ]
        );
        // The chart's value is the detector's, bit for bit.
        assert_eq!(r.crossed[1].value.to_bits(), chart.peak.to_bits());
    }

    #[test]
    fn the_slow_chart_crossing_follows_the_residual_charts_and_names_its_feature() {
        // As above, with slow charts (format 5) on features 1 and 3 (λ 1,
        // so one spike sample moves each to its full scaled input; feature
        // 3's gain larger) and their limit 0.2: listed after the residual
        // chart, with the slow peak and its feature.
        let mut m = residual_spike_model();
        m.slow_charts = vec![1.0, 1.0, 0.0, 1.0, 3.0, 1.0, 0.0, 3.0];
        m.slow_limit = 0.2;
        let spike = Lcg(5).drifted();
        let (r, reference) = raise_with(&m, &spike);
        assert_eq!(r.drivers, 0b001, "{r:?}");
        let chart = reference.residual_chart();
        assert_eq!(chart.slow_peak_feature, 3, "{chart:?}");
        assert!(chart.slow_peak > 0.2, "{chart:?}");
        let tail: Vec<Statistic> = r.crossed.iter().map(|c| c.statistic).collect();
        assert_eq!(
            tail,
            [
                Statistic::Sample,
                Statistic::Residual { feature: 2 },
                Statistic::Slow { feature: 3 }
            ]
        );
        assert_eq!(
            r.crossed[2],
            Crossing {
                score: ScoreKind::Spe,
                statistic: Statistic::Slow { feature: 3 },
                value: chart.slow_peak,
                limit: 0.2,
            }
        );
        assert_eq!(r.crossed[2].value.to_bits(), chart.slow_peak.to_bits());
    }

    #[test]
    fn score_reports_equal_the_detector_bit_for_bit() {
        let mut rig: Rig = Rig::new();
        let mut reference = Detector::from_file(&file_of(&model(1, 0.0))).unwrap();
        assert_scores_match(&mut rig, &mut reference, &mixed_samples(11, 400));
        // Off again: no more reports.
        assert_eq!(
            rig.ask(&HostMsg::SetReports { on: false }),
            DeviceMsg::Ack(Ack::Reports { on: false })
        );
        let frames = rig.sample(&[0.0; 4]);
        assert!(reports(&frames).is_empty());
    }

    #[test]
    fn faults_are_reported_when_they_start_and_counted_always() {
        let mut rig: Rig = Rig::new();
        let nan = [f32::NAN, 0.0, 0.0, 0.0];
        let first = rig.sample(&nan);
        assert!(matches!(
            first[0].msg,
            DeviceMsg::SensorFault(s) if s.fault == FaultKind::NonFinite { feature: 0 } && s.sample == 0
        ));
        // The same fault again: counted, not reported.
        assert!(rig.sample(&nan).is_empty());
        // A different fault is a new start.
        let other = rig.sample(&[0.0; 2]);
        assert!(matches!(
            other[0].msg,
            DeviceMsg::SensorFault(s) if s.fault == FaultKind::WrongLength { got: 2 }
        ));
        let DeviceMsg::Status(s) = rig.ask(&HostMsg::StatusQuery) else {
            panic!()
        };
        assert_eq!(s.faults.non_finite, 2);
        assert_eq!(s.faults.wrong_length, 1);
        assert_eq!(s.samples, 3);
        assert_eq!(s.last_event, Some(other[0].seq));
        assert_eq!(s.link.frames_ok, 4);
    }

    #[test]
    fn status_every_n_samples_and_reset() {
        let mut rig: Rig = Rig::new();
        rig.ep.set_config(Config {
            status_every: 10,
            ..Config::default()
        });
        let mut g = Lcg(3);
        let mut statuses = Vec::new();
        for _ in 0..35 {
            for f in rig.sample(&g.nominal()) {
                if let DeviceMsg::Status(s) = f.msg {
                    statuses.push(s.samples);
                }
            }
        }
        assert_eq!(statuses, vec![10, 20, 30]);
        assert_eq!(
            rig.ask(&HostMsg::ResetStats),
            DeviceMsg::Ack(Ack::StatsReset)
        );
        assert_eq!(rig.ep.detector().samples(), 0);
        assert_eq!(rig.ep.detector().state(), DriftState::Priming);
        let DeviceMsg::Status(s) = rig.ask(&HostMsg::StatusQuery) else {
            panic!()
        };
        assert_eq!(s.state, State::Priming);
        assert_eq!(s.samples, 0);
    }
}

mod upload {
    use super::*;

    #[test]
    fn a_second_valid_model_switches() {
        let mut rig: Rig = Rig::new();
        let two = model(2, 0.25);
        let bytes = file_of(&two);
        let answers = rig.upload(&bytes, wire::crc32(&bytes));
        assert_eq!(refusal(&answers), None, "{answers:?}");
        assert_eq!(
            answers[0],
            DeviceMsg::Ack(Ack::UploadOpen {
                slot: Slot::B,
                total: bytes.len() as u32
            })
        );
        let chunks = bytes.len().div_ceil(MAX_CHUNK);
        assert_eq!(answers.len(), chunks + 2);
        assert_eq!(
            answers[chunks],
            DeviceMsg::Ack(Ack::ChunkTaken {
                next: bytes.len() as u32
            })
        );
        assert_eq!(switched(&answers), Some((Slot::B, 2, 2)));
        assert_eq!(rig.ep.active_slot(), Some(Slot::B));
        assert_eq!(rig.ep.detector().model().meta.id, 2);
        assert_eq!(rig.ep.slots().record(Slot::B).unwrap().generation, 2);

        // The new model scores exactly like a fresh detector on it.
        let mut reference = Detector::from_file(&bytes).unwrap();
        assert_scores_match(&mut rig, &mut reference, &mixed_samples(5, 120));

        // A third goes to A, the slot not running, with generation 3; and a
        // reboot picks it.
        let three = file_of(&model(3, -0.25));
        let answers = rig.upload(&three, wire::crc32(&three));
        assert_eq!(switched(&answers), Some((Slot::A, 3, 3)));
        // It was decoded into the place model 1 ran in: nothing of model 1
        // is left, it scores like a fresh detector.
        let mut reference = Detector::from_file(&three).unwrap();
        assert_scores_match(&mut rig, &mut reference, &mixed_samples(6, 120));
        let (_, slots, _) = rig.ep.release();
        let ep = Endpoint::<_, _>::boot(slots, Line::default(), None).unwrap();
        assert_eq!(ep.detector().model().meta.id, 3);
        assert_eq!(ep.active_slot(), Some(Slot::A));
    }

    /// Runs `attack`, expects `want` as the first refusal, and checks that
    /// the running model and its statistics are exactly as before: on model
    /// 1 from slot A, and on model 1 built in (the two files a refused
    /// upload that was decoded over the running model is restored from).
    fn refused_and_untouched(attack: impl Fn(&mut Rig) -> Vec<DeviceMsg>, want: Reason) {
        for (mut rig, slot, generation) in
            [(Rig::new(), Some(Slot::A), 1), (Rig::on_builtin(), None, 0)]
        {
            let warm = mixed_samples(21, 60);
            let mut reference = Detector::from_file(&file_of(&model(1, 0.0))).unwrap();
            assert_scores_match(&mut rig, &mut reference, &warm);
            let before = rig.ep.status();
            let running = rig.ep.detector().clone();

            let answers = attack(&mut rig);
            let r = refusal(&answers).unwrap_or_else(|| panic!("no refusal in {answers:?}"));
            assert_eq!(r.reason, want, "{answers:?}");
            assert_eq!(switched(&answers), None);
            assert_eq!(rig.ep.active_slot(), slot);
            assert_eq!(rig.ep.generation(), generation);
            assert_eq!(rig.ep.detector().model().meta.id, 1);
            // Model, constants, statistics and state, every bit.
            assert!(
                *rig.ep.detector() == running,
                "the running detector changed"
            );
            let after = rig.ep.status();
            assert_eq!(after.samples, before.samples);
            assert_eq!(after.levels, before.levels);
            // And it keeps scoring as if nothing had happened.
            assert_scores_match(&mut rig, &mut reference, &mixed_samples(22, 80));
        }
    }

    #[test]
    fn wrong_transfer_crc() {
        let bytes = file_of(&model(2, 0.25));
        let crc = wire::crc32(&bytes);
        refused_and_untouched(
            |rig| rig.upload(&bytes, crc ^ 1),
            Reason::TransferCrc {
                expected: crc ^ 1,
                computed: crc,
            },
        );
    }

    #[test]
    fn damaged_file_with_a_matching_transfer_crc() {
        let mut bytes = file_of(&model(2, 0.25));
        bytes[30] ^= 0x01;
        let Err(plumb_model::ModelError::BadCrc { stored, computed }) =
            file::decode(&bytes, &Capacity::DEVICE)
        else {
            panic!("expected a CRC error")
        };
        refused_and_untouched(
            |rig| rig.upload(&bytes, wire::crc32(&bytes)),
            Reason::BadCrc { stored, computed },
        );
    }

    #[test]
    fn model_over_capacity() {
        let d = 65usize;
        let mut m = model(9, 0.0);
        m.dims = Dims {
            features: d as u16,
            components: 1,
            mixture: 1,
        };
        m.mean = vec![0.0; d];
        m.scale = vec![1.0; d];
        m.loadings = (0..d).map(|i| if i == 0 { 1.0 } else { 0.0 }).collect();
        m.eigenvalues = vec![1.0];
        m.weights = vec![1.0];
        m.mix_means = vec![0.0];
        m.mix_variances = vec![1.0];
        m.spe_center_by_mode = vec![0.2];
        m.spe_spread_by_mode = vec![0.1];
        m.resid_center = vec![0.0; d];
        m.resid_gain = vec![0.0; d];
        let bytes = file_of(&m);
        refused_and_untouched(
            |rig| rig.upload(&bytes, wire::crc32(&bytes)),
            Reason::OverCapacity {
                dim: wire::dim_code(plumb_model::Dim::Features),
                found: 65,
                max: 64,
            },
        );
    }

    #[test]
    fn model_with_a_nan_mean() {
        let mut m = model(9, 0.0);
        m.mean[2] = f32::NAN;
        let bytes = file_unchecked(&m);
        refused_and_untouched(
            |rig| rig.upload(&bytes, wire::crc32(&bytes)),
            Reason::NonFinite {
                field: wire::field_code(plumb_model::Field::Mean),
                index: 2,
            },
        );
    }

    #[test]
    fn file_larger_than_a_slot() {
        refused_and_untouched(
            |rig| {
                rig.send(&HostMsg::UploadBegin {
                    total: SLOT as u32 + 1,
                    crc: 0,
                })
                .into_iter()
                .map(|f| f.msg)
                .collect()
            },
            Reason::TooLarge {
                total: SLOT as u32 + 1,
                max: SLOT as u32,
            },
        );
        refused_and_untouched(
            |rig| vec![rig.ask(&HostMsg::UploadBegin { total: 0, crc: 0 })],
            Reason::Empty,
        );
    }

    #[test]
    fn commit_before_the_last_chunk() {
        let bytes = file_of(&model(2, 0.25));
        let half = &bytes[..bytes.len() / 2];
        let crc = wire::crc32(&bytes);
        refused_and_untouched(
            |rig| {
                let mut a = vec![rig.ask(&HostMsg::UploadBegin {
                    total: bytes.len() as u32,
                    crc,
                })];
                for (i, c) in half.chunks(MAX_CHUNK).enumerate() {
                    a.push(rig.ask(&HostMsg::UploadChunk {
                        offset: (i * MAX_CHUNK) as u32,
                        data: heapless::Vec::from_slice(c).unwrap(),
                    }));
                }
                a.push(rig.ask(&HostMsg::UploadCommit));
                a
            },
            Reason::Incomplete {
                received: half.len() as u32,
                total: bytes.len() as u32,
            },
        );
    }

    #[test]
    fn truncated_file_announced_as_complete() {
        let bytes = file_of(&model(2, 0.25));
        let cut = &bytes[..bytes.len() - 9];
        refused_and_untouched(
            |rig| rig.upload(cut, wire::crc32(cut)),
            Reason::Truncated {
                needed: bytes.len() as u32,
                got: cut.len() as u32,
            },
        );
    }

    #[test]
    fn interrupted_by_a_new_begin() {
        let bytes = file_of(&model(2, 0.25));
        refused_and_untouched(
            |rig| {
                let total = bytes.len() as u32;
                let crc = wire::crc32(&bytes);
                let mut a = vec![rig.ask(&HostMsg::UploadBegin { total, crc })];
                a.push(rig.ask(&HostMsg::UploadChunk {
                    offset: 0,
                    data: heapless::Vec::from_slice(&bytes[..MAX_CHUNK]).unwrap(),
                }));
                // A new begin drops the open upload (refused), then opens.
                let again: Vec<DeviceMsg> = rig
                    .send(&HostMsg::UploadBegin { total, crc })
                    .into_iter()
                    .map(|f| f.msg)
                    .collect();
                // The slot not running: B beside slot A, A beside the
                // built-in model.
                let slot = match rig.ep.active_slot() {
                    Some(Slot::A) => Slot::B,
                    _ => Slot::A,
                };
                assert_eq!(again[1], DeviceMsg::Ack(Ack::UploadOpen { slot, total }));
                a.extend(again);
                a
            },
            Reason::Abandoned {
                received: MAX_CHUNK as u32,
                total: bytes.len() as u32,
            },
        );
    }

    #[test]
    fn protocol_mistakes_each_have_a_code() {
        let bytes = file_of(&model(2, 0.25));
        let total = bytes.len() as u32;
        let crc = wire::crc32(&bytes);
        let chunk = |offset: usize, len: usize| HostMsg::UploadChunk {
            offset: offset as u32,
            data: heapless::Vec::from_slice(&bytes[offset..offset + len]).unwrap(),
        };
        refused_and_untouched(|rig| vec![rig.ask(&chunk(0, 10))], Reason::NoUpload);
        refused_and_untouched(
            |rig| vec![rig.ask(&HostMsg::UploadCommit)],
            Reason::NoUpload,
        );
        refused_and_untouched(
            |rig| {
                rig.ask(&HostMsg::UploadBegin { total, crc });
                vec![rig.ask(&chunk(0, 10)), rig.ask(&chunk(20, 10))]
            },
            Reason::UnexpectedOffset {
                expected: 10,
                got: 20,
            },
        );
        refused_and_untouched(
            |rig| {
                rig.ask(&HostMsg::UploadBegin { total: 100, crc });
                vec![rig.ask(&chunk(0, 64)), rig.ask(&chunk(64, 64))]
            },
            Reason::Overrun {
                end: 128,
                total: 100,
            },
        );
    }

    #[test]
    fn a_wrong_offset_keeps_the_upload_open() {
        let mut rig: Rig = Rig::new();
        let bytes = file_of(&model(2, 0.25));
        let total = bytes.len() as u32;
        rig.ask(&HostMsg::UploadBegin {
            total,
            crc: wire::crc32(&bytes),
        });
        let mut offset = 0usize;
        let mut resent = false;
        while offset < bytes.len() {
            let len = MAX_CHUNK.min(bytes.len() - offset);
            let msg = HostMsg::UploadChunk {
                offset: offset as u32,
                data: heapless::Vec::from_slice(&bytes[offset..offset + len]).unwrap(),
            };
            // Send the second chunk twice, as after a lost acknowledgement.
            if offset == MAX_CHUNK && !resent {
                rig.ask(&msg);
                resent = true;
                let DeviceMsg::Refused(r) = rig.ask(&msg) else {
                    panic!()
                };
                assert_eq!(
                    r.reason,
                    Reason::UnexpectedOffset {
                        expected: 2 * MAX_CHUNK as u32,
                        got: MAX_CHUNK as u32
                    }
                );
            } else {
                rig.ask(&msg);
            }
            offset += len;
        }
        let done = rig.ask(&HostMsg::UploadCommit);
        assert_eq!(switched(&[done]), Some((Slot::B, 2, 2)));
    }

    struct FailingSlots {
        inner: RamSlots<SLOT>,
        fail_commit: bool,
    }

    impl ModelSlots for FailingSlots {
        fn capacity(&self) -> u32 {
            self.inner.capacity()
        }
        fn erase(&mut self, slot: Slot) -> Result<(), SlotError> {
            self.inner.erase(slot)
        }
        fn write(&mut self, slot: Slot, offset: u32, data: &[u8]) -> Result<(), SlotError> {
            self.inner.write(slot, offset, data)
        }
        fn read(&self, slot: Slot) -> &[u8] {
            self.inner.read(slot)
        }
        fn record(&self, slot: Slot) -> Option<SlotRecord> {
            self.inner.record(slot)
        }
        fn commit(&mut self, slot: Slot, record: SlotRecord) -> Result<(), SlotError> {
            if self.fail_commit {
                return Err(SlotError::Device);
            }
            self.inner.commit(slot, record)
        }
    }

    #[test]
    fn a_storage_failure_at_the_record_keeps_the_old_model() {
        let mut inner = RamSlots::new();
        inner.store(Slot::A, &file_of(&model(1, 0.0)), 1).unwrap();
        let slots = FailingSlots {
            inner,
            fail_commit: true,
        };
        let mut ep = Endpoint::<_, _>::boot(slots, Line::default(), None).unwrap();
        let mut pipe = Pipe::new(64);
        // Some statistics first: the new model was decoded over the running
        // one before the record failed, so they must come back.
        for (at, x) in mixed_samples(23, 40).iter().enumerate() {
            pipe.to_device
                .extend(wire::encode_frame_vec(&sample_at(at as u64, x)));
        }
        while !pipe.to_device.is_empty() {
            ep.poll(&mut pipe).unwrap();
        }
        let running = ep.detector().clone();
        assert_eq!(ep.detector().samples(), 40);
        let bytes = file_of(&model(2, 0.25));
        let mut msgs = vec![HostMsg::UploadBegin {
            total: bytes.len() as u32,
            crc: wire::crc32(&bytes),
        }];
        for (i, c) in bytes.chunks(MAX_CHUNK).enumerate() {
            msgs.push(HostMsg::UploadChunk {
                offset: (i * MAX_CHUNK) as u32,
                data: heapless::Vec::from_slice(c).unwrap(),
            });
        }
        msgs.push(HostMsg::UploadCommit);
        for m in &msgs {
            pipe.to_device.extend(wire::encode_frame_vec(m));
        }
        while !pipe.to_device.is_empty() {
            ep.poll(&mut pipe).unwrap();
        }
        let mut dec = DeviceFrameDecoder::new();
        let mut rest = &pipe.from_device[..];
        let mut last = None;
        loop {
            rest = dec.feed(rest);
            match dec.take_message::<DeviceFrame>() {
                Some(f) => last = Some(f.unwrap().msg),
                None if rest.is_empty() => break,
                None => {}
            }
        }
        assert_eq!(
            last,
            Some(DeviceMsg::Refused(Refusal {
                request: Request::UploadCommit,
                reason: Reason::Storage
            }))
        );
        assert_eq!(ep.detector().model().meta.id, 1);
        assert_eq!(ep.active_slot(), Some(Slot::A));
        assert!(*ep.detector() == running, "the running detector changed");
    }
}

mod resend {
    use super::*;

    /// Produces events: a fault start, a drift raise and a clear.
    fn events<const R: usize>(rig: &mut Rig<R>) -> Vec<DeviceFrame> {
        let mut g = Lcg(99);
        let mut out = Vec::new();
        let mut xs = vec![vec![f32::INFINITY, 0.0, 0.0, 0.0]];
        xs.extend((0..60).map(|_| g.nominal()));
        xs.extend((0..20).map(|_| g.drifted()));
        xs.extend((0..200).map(|_| g.nominal()));
        for x in xs {
            out.extend(rig.sample(&x).into_iter().filter(|f| f.msg.is_retained()));
        }
        out
    }

    #[test]
    fn resend_returns_the_retained_events_with_their_numbers() {
        let mut rig: Rig = Rig::new();
        let seen = events(&mut rig);
        assert_eq!(seen.len(), 3, "{seen:?}");
        let again = rig.send(&HostMsg::ResendFrom { seq: seen[0].seq });
        assert_eq!(&again[..3], &seen[..]);
        assert_eq!(
            again[3].msg,
            DeviceMsg::ResendDone(ResendDone {
                from: seen[0].seq,
                count: 3,
                oldest: Some(seen[0].seq),
                dropped: 0,
            })
        );
        // From the middle: only the later ones.
        let tail = rig.send(&HostMsg::ResendFrom { seq: seen[1].seq });
        assert_eq!(&tail[..2], &seen[1..]);
        // From the future: nothing but the summary.
        let none = rig.send(&HostMsg::ResendFrom {
            seq: rig.ep.next_seq(),
        });
        assert_eq!(none.len(), 1);
    }

    /// What a retained frame costs in the ring (its length plus a 5-byte
    /// header), for sequence and sample numbers of 1 and of 5 varint bytes:
    /// the figures `DEFAULT_RING_BYTES` and the module docs quote.
    #[test]
    fn retained_frames_cost_what_the_docs_say() {
        use plumb_model::wire::{DriftCleared, DriftRaised, ScoreTriple, SensorFault, Share};
        let cost =
            |seq: u32, msg: DeviceMsg| 5 + wire::encode_frame_vec(&DeviceFrame { seq, msg }).len();
        let raised = |sample: u64, charts: usize| {
            let c = Crossing {
                score: ScoreKind::Spe,
                statistic: Statistic::Ewma,
                value: 7.5,
                limit: 7.25,
            };
            DeviceMsg::DriftRaised(DriftRaised {
                sample,
                drivers: 1,
                scores: ScoreTriple {
                    spe: 31.5,
                    t2: 12.25,
                    nll: 40.125,
                },
                crossed: std::iter::repeat_n(c, charts).collect(),
                top: [Share {
                    feature: 3,
                    value: 9.5,
                }; 3],
            })
        };
        let fault = |sample| {
            DeviceMsg::SensorFault(SensorFault {
                sample,
                fault: FaultKind::NonFinite { feature: 0 },
            })
        };
        let cleared = |sample| DeviceMsg::DriftCleared(DriftCleared { sample });
        let big = (u32::MAX, u64::from(u32::MAX));
        assert_eq!((cost(5, fault(5)), cost(big.0, fault(big.1))), (16, 24));
        assert_eq!((cost(5, cleared(5)), cost(big.0, cleared(big.1))), (14, 22));
        // One chart over its limit, then all nine.
        assert_eq!(
            (cost(5, raised(5, 1)), cost(big.0, raised(big.1, 1))),
            (53, 61)
        );
        assert_eq!(
            (cost(5, raised(5, 9)), cost(big.0, raised(big.1, 9))),
            (133, 141)
        );
        // So the default ring holds at least 6 raised-and-cleared pairs.
        const { assert!(DEFAULT_RING_BYTES / (141 + 22) >= 6) };
    }

    #[test]
    fn a_full_ring_drops_the_oldest_and_says_so() {
        let mut slots = RamSlots::new();
        slots.store(Slot::A, &file_of(&model(1, 0.0)), 1).unwrap();
        // The ring holds the frames as sent, each after a 5-byte header; a
        // sensor fault frame with one-byte sequence and sample numbers is
        // FAULT bytes (checked below), so this ring holds four of them.
        const FAULT: usize = 11;
        let mut rig: Rig<{ 4 * (5 + FAULT) + 4 }> = Rig::boot_with(slots, 5);
        let mut seqs = Vec::new();
        for i in 0..7 {
            // Alternating faulted and clean samples: every fault is a start.
            let faulted = rig.sample(&[f32::NAN, 0.0, i as f32 * 0.01, 0.0]);
            assert_eq!(wire::encode_frame_vec(&faulted[0]).len(), FAULT);
            seqs.push(faulted[0].seq);
            rig.sample(&[0.0; 4]);
        }
        assert_eq!(rig.ep.retained(), (4, 3));
        let again = rig.send(&HostMsg::ResendFrom { seq: 0 });
        let resent: Vec<u32> = again[..4].iter().map(|f| f.seq).collect();
        assert_eq!(resent, seqs[3..]);
        assert_eq!(
            again[4].msg,
            DeviceMsg::ResendDone(ResendDone {
                from: 0,
                count: 4,
                oldest: Some(seqs[3]),
                dropped: 3,
            })
        );
    }
}

mod hostile_input {
    use super::*;

    fn valid_requests() -> Vec<HostMsg> {
        let bytes = file_of(&model(2, 0.25));
        vec![
            sample_at(0, &[0.1, 0.2, 0.3, 0.4]),
            HostMsg::ResetStats,
            HostMsg::SetReports { on: true },
            HostMsg::UploadBegin {
                total: bytes.len() as u32,
                crc: wire::crc32(&bytes),
            },
            HostMsg::UploadChunk {
                offset: 0,
                data: heapless::Vec::from_slice(&bytes[..MAX_CHUNK]).unwrap(),
            },
            HostMsg::UploadCommit,
            HostMsg::ResendFrom { seq: 0 },
        ]
    }

    #[test]
    fn no_single_bit_flip_is_accepted() {
        let mut rig: Rig = Rig::new();
        let mut g = Lcg(1);
        for _ in 0..30 {
            rig.sample(&g.nominal());
        }
        let before = rig.ep.status();
        let ok_before = rig.ep.link_counters().frames_ok;
        let mut flips = 0u32;
        for msg in valid_requests() {
            let frame = wire::encode_frame_vec(&msg);
            for bit in 0..frame.len() * 8 {
                let mut bad = frame.clone();
                bad[bit / 8] ^= 1 << (bit % 8);
                bad.push(0); // make sure the next frame starts clean
                let answers = rig.send_raw(&bad);
                assert!(answers.is_empty(), "{msg:?} bit {bit}: {answers:?}");
                flips += 1;
            }
        }
        let c = rig.ep.link_counters();
        assert_eq!(c.frames_ok, ok_before);
        assert!(c.crc_errors + c.framing_errors + c.undecodable + c.overflows >= flips);
        let after = rig.ep.status();
        assert_eq!(after.samples, before.samples);
        assert_eq!(after.levels, before.levels);
        assert_eq!(rig.ep.detector().model().meta.id, 1);
        // Still answers a clean request.
        assert!(matches!(
            rig.ask(&HostMsg::StatusQuery),
            DeviceMsg::Status(_)
        ));
    }

    proptest! {
        #![proptest_config(ProptestConfig::with_cases(256))]

        #[test]
        fn garbage_is_never_accepted(
            bytes in proptest::collection::vec(prop_oneof![Just(0u8), any::<u8>()], 0..2000),
            max_read in 1usize..80,
        ) {
            let mut slots = RamSlots::new();
            slots.store(Slot::A, &file_of(&model(1, 0.0)), 1).unwrap();
            let mut rig: Rig = Rig::boot_with(slots, max_read);
            let answers = rig.send_raw(&bytes);
            prop_assert!(answers.is_empty(), "{:?}", answers);
            prop_assert_eq!(rig.ep.link_counters().frames_ok, 0);
            prop_assert_eq!(rig.ep.detector().samples(), 0);
        }

        #[test]
        fn requests_inside_garbage_are_handled(
            noise in proptest::collection::vec(proptest::collection::vec(any::<u8>(), 0..60), 7),
            max_read in 1usize..80,
        ) {
            let mut slots = RamSlots::new();
            slots.store(Slot::A, &file_of(&model(1, 0.0)), 1).unwrap();
            let mut rig: Rig = Rig::boot_with(slots, max_read);
            let mut stream = Vec::new();
            let reqs = [
                HostMsg::SetReports { on: true },
                sample_at(0, &[0.1, 0.2, 0.3, 0.4]),
                HostMsg::StatusQuery,
            ];
            for (req, junk) in reqs.iter().zip(&noise) {
                stream.extend_from_slice(junk);
                stream.push(0);
                stream.extend(wire::encode_frame_vec(req));
            }
            let answers = rig.send_raw(&stream);
            prop_assert_eq!(rig.ep.link_counters().frames_ok, 3);
            prop_assert_eq!(answers.len(), 3);
            prop_assert!(matches!(answers[1].msg, DeviceMsg::ScoreReport(_)));
        }
    }
}

#[test]
fn footprint() {
    use std::mem::size_of;
    struct NoSlots;
    impl ModelSlots for NoSlots {
        fn capacity(&self) -> u32 {
            0
        }
        fn erase(&mut self, _: Slot) -> Result<(), SlotError> {
            Ok(())
        }
        fn write(&mut self, _: Slot, _: u32, _: &[u8]) -> Result<(), SlotError> {
            Ok(())
        }
        fn read(&self, _: Slot) -> &[u8] {
            &[]
        }
        fn record(&self, _: Slot) -> Option<SlotRecord> {
            None
        }
        fn commit(&mut self, _: Slot, _: SlotRecord) -> Result<(), SlotError> {
            Ok(())
        }
    }
    let endpoint = size_of::<Endpoint<NoSlots, Line>>();
    let detector = size_of::<Detector>();
    let ring = size_of::<Endpoint<NoSlots, Line>>() - size_of::<Endpoint<NoSlots, Line, 0>>();
    let model = size_of::<plumb_model::Model>() + size_of::<plumb_firmware::score::Derived>();
    println!(
        "Endpoint<_, _, {DEFAULT_RING_BYTES}>: {endpoint} bytes (Detector {detector}, of which \
         model and derived constants {model}; ring {ring}, host frame decoder {})",
        size_of::<wire::HostFrameDecoder>(),
    );
    // One detector place (a candidate model is decoded over the running
    // one) and a ring of frames as sent: what is not the detector stays
    // within the ring, the receive buffer and 256 bytes of counters and
    // settings (BENCHMARKS.md, "RAM": the goal leaves 4 KiB beside the
    // model for all of this and the stack).
    assert_eq!(ring, DEFAULT_RING_BYTES);
    assert!(
        endpoint <= detector + ring + size_of::<wire::HostFrameDecoder>() + 256,
        "{endpoint}"
    );
}

#[cfg(feature = "signatures")]
mod signed_models {
    use super::*;
    use plumb_model::signature::{self, KeyId, TrustedKey};

    const SEED: [u8; 32] = [0x11; 32];
    const OTHER: [u8; 32] = [0x22; 32];

    fn key() -> TrustedKey {
        TrustedKey::new(signature::public_key(&SEED))
    }

    fn trusting() -> Config {
        Config {
            trusted_key: Some(key()),
            ..Config::default()
        }
    }

    fn signed(m: &ModelOwned, seed: &[u8; 32]) -> Vec<u8> {
        signature::sign(&file_of(m), seed).unwrap()
    }

    /// Uploads `bytes` to a rig that trusts [`SEED`]'s key (model 1 running,
    /// unsigned, from before the key was set) and checks the refusal and
    /// that nothing changed.
    fn refused_when_trusting(bytes: Vec<u8>, want: Reason) {
        let mut rig: Rig = Rig::new();
        rig.ep.set_config(trusting());
        let warm = mixed_samples(31, 60);
        let mut reference = Detector::from_file(&file_of(&model(1, 0.0))).unwrap();
        assert_scores_match(&mut rig, &mut reference, &warm);
        let before = rig.ep.status();
        let answers = rig.upload(&bytes, wire::crc32(&bytes));
        let r = refusal(&answers).unwrap_or_else(|| panic!("no refusal in {answers:?}"));
        assert_eq!((r.request, r.reason), (Request::UploadCommit, want));
        assert_eq!(switched(&answers), None);
        assert_eq!(
            (rig.ep.active_slot(), rig.ep.generation()),
            (Some(Slot::A), 1)
        );
        assert_eq!(rig.ep.detector().model().meta.id, 1);
        let after = rig.ep.status();
        assert_eq!(
            (after.samples, after.levels),
            (before.samples, before.levels)
        );
        assert_scores_match(&mut rig, &mut reference, &mixed_samples(32, 40));
        // The slot written is not recorded: a reboot (without the key, as
        // model 1 is unsigned) runs model 1.
        let (_, slots, _) = rig.ep.release();
        assert_eq!(slots.record(Slot::B), None);
        let ep = Endpoint::<_, _>::boot(slots, Line::default(), None).unwrap();
        assert_eq!(ep.detector().model().meta.id, 1);
    }

    #[test]
    fn a_trusting_board_takes_a_file_signed_by_its_key() {
        let mut rig: Rig = Rig::new();
        rig.ep.set_config(trusting());
        let bytes = signed(&model(2, 0.25), &SEED);
        let answers = rig.upload(&bytes, wire::crc32(&bytes));
        assert_eq!(switched(&answers), Some((Slot::B, 2, 2)), "{answers:?}");
        let mut reference = Detector::from_file(&bytes).unwrap();
        assert_scores_match(&mut rig, &mut reference, &mixed_samples(33, 50));
    }

    #[test]
    fn an_unsigned_file_is_refused() {
        refused_when_trusting(file_of(&model(2, 0.25)), Reason::Unsigned);
    }

    #[test]
    fn a_file_signed_by_another_key_is_refused_with_its_key_id() {
        let key_id = KeyId::of(&signature::public_key(&OTHER));
        refused_when_trusting(
            signed(&model(2, 0.25), &OTHER),
            Reason::UnknownKey { key_id },
        );
    }

    #[test]
    fn a_file_changed_after_signing_is_refused() {
        let mut bytes = signed(&model(2, 0.25), &SEED);
        // A payload byte (the model id), CRC made to match: only the
        // signature can tell.
        bytes[file::HEADER_LEN] ^= 0x01;
        let end = bytes.len() - 4;
        let crc = file::crc32(&bytes[..end]);
        bytes[end..].copy_from_slice(&crc.to_le_bytes());
        refused_when_trusting(bytes, Reason::BadSignature);
    }

    #[test]
    fn a_damaged_signed_file_is_a_crc_error_first() {
        let mut bytes = signed(&model(2, 0.25), &SEED);
        let k = bytes.len() - 30; // inside the signature
        bytes[k] ^= 0x01;
        let Err(plumb_model::ModelError::BadCrc { stored, computed }) = file::split(&bytes) else {
            panic!("expected a CRC error")
        };
        refused_when_trusting(bytes, Reason::BadCrc { stored, computed });
    }

    #[test]
    fn a_board_without_a_key_runs_signed_and_unsigned_files() {
        let mut rig: Rig = Rig::new();
        let bytes = signed(&model(2, 0.25), &OTHER);
        assert_eq!(
            switched(&rig.upload(&bytes, wire::crc32(&bytes))),
            Some((Slot::B, 2, 2))
        );
        let bytes = file_of(&model(3, 0.5));
        assert_eq!(
            switched(&rig.upload(&bytes, wire::crc32(&bytes))),
            Some((Slot::A, 3, 3))
        );
    }

    #[test]
    fn boot_passes_over_slots_not_signed_by_the_key() {
        let builtin = builtin_of(&model(9, 0.0));
        let boot = |a: Option<Vec<u8>>, b: Option<Vec<u8>>| {
            let mut slots: RamSlots<SLOT> = RamSlots::new();
            if let Some(f) = a {
                slots.store(Slot::A, &f, 1).unwrap();
            }
            if let Some(f) = b {
                slots.store(Slot::B, &f, 2).unwrap();
            }
            let ep = Endpoint::<_, _>::boot_with(slots, Line::default(), Some(builtin), trusting())
                .unwrap();
            assert_eq!(ep.config().trusted_key, Some(key()));
            (ep.detector().model().meta.id, ep.active_slot())
        };
        let good = |id| signed(&model(id, 0.0), &SEED);
        // The newest slot is signed: it runs.
        assert_eq!(boot(Some(good(1)), Some(good(2))), (2, Some(Slot::B)));
        // The newest is unsigned or signed by another key: the older one.
        assert_eq!(
            boot(Some(good(1)), Some(file_of(&model(2, 0.0)))),
            (1, Some(Slot::A))
        );
        assert_eq!(
            boot(Some(good(1)), Some(signed(&model(2, 0.0), &OTHER))),
            (1, Some(Slot::A))
        );
        // Neither: the built-in model (part of the image, not checked).
        assert_eq!(boot(Some(file_of(&model(1, 0.0))), None), (9, None));
        // Without a key, the newest valid slot as always.
        let mut slots: RamSlots<SLOT> = RamSlots::new();
        slots.store(Slot::B, &file_of(&model(2, 0.0)), 2).unwrap();
        let ep = Endpoint::<_, _>::boot(slots, Line::default(), None).unwrap();
        assert_eq!(ep.detector().model().meta.id, 2);
    }
}

// ------------------------------------------------- model slots in NOR flash

mod flash_slots {
    use super::*;
    use plumb_firmware::endpoint::{Flash, FlashLayout, FlashSlots, FILE_OFFSET, RECORD_LEN};

    /// Bytes per region in these tests (one erase unit).
    const REGION: usize = 4096;
    const LAYOUT: FlashLayout = FlashLayout {
        regions: [0, REGION],
        region_len: REGION,
    };
    /// Bytes one step of an erase clears.
    const ERASE_STEP: usize = 64;

    /// NOR flash that can lose power: erase sets bytes to `0xFF`,
    /// programming ANDs bytes in (it can only clear bits). Every programmed
    /// byte and every erase step of [`ERASE_STEP`] bytes costs one unit of
    /// `budget`; when it runs out the operation stops where it is and every
    /// later one fails, until the test restores power.
    #[derive(Clone)]
    struct SimFlash {
        mem: Vec<u8>,
        budget: Option<usize>,
        steps: usize,
    }

    impl SimFlash {
        fn new() -> Self {
            SimFlash {
                mem: vec![0xFF; 2 * REGION],
                budget: None,
                steps: 0,
            }
        }

        fn step(&mut self) -> Result<(), SlotError> {
            match &mut self.budget {
                Some(0) => return Err(SlotError::Device),
                Some(b) => *b -= 1,
                None => {}
            }
            self.steps += 1;
            Ok(())
        }
    }

    impl Flash for SimFlash {
        fn memory(&self) -> &[u8] {
            &self.mem
        }

        fn erase(&mut self, slot: Slot) -> Result<(), SlotError> {
            let base = LAYOUT.regions[slot.index()];
            // From the end of the region back, so the record at its start
            // is the last thing to go: the order least kind to the slots.
            for i in (0..REGION / ERASE_STEP).rev() {
                self.step()?;
                let at = base + i * ERASE_STEP;
                self.mem[at..at + ERASE_STEP].fill(0xFF);
            }
            Ok(())
        }

        fn program(&mut self, offset: usize, bytes: &[u8]) -> Result<(), SlotError> {
            for (i, b) in bytes.iter().enumerate() {
                self.step()?;
                self.mem[offset + i] &= b;
            }
            Ok(())
        }
    }

    fn store(slots: &mut FlashSlots<SimFlash>, slot: Slot, file: &[u8], generation: u32) {
        slots.erase(slot).unwrap();
        slots.write(slot, 0, file).unwrap();
        let record = SlotRecord {
            generation,
            len: file.len() as u32,
            crc: wire::crc32(file),
        };
        slots.commit(slot, record).unwrap();
    }

    /// The running slot and model id.
    type Running = (Option<Slot>, u32);

    fn running(ep: &Endpoint<FlashSlots<SimFlash>, Line>) -> Running {
        (ep.active_slot(), ep.detector().model().meta.id)
    }

    #[test]
    fn layout_bounds_and_read_back() {
        let mut slots = FlashSlots::new(SimFlash::new(), LAYOUT);
        assert_eq!(slots.capacity() as usize, REGION - FILE_OFFSET);
        // Erased flash holds no record.
        assert_eq!(slots.record(Slot::A), None);
        assert_eq!(slots.read(Slot::B).len(), REGION - FILE_OFFSET);
        let cap = slots.capacity();
        assert_eq!(slots.write(Slot::A, cap - 1, &[1]), Ok(()));
        assert_eq!(
            slots.write(Slot::A, cap - 1, &[1, 2]),
            Err(SlotError::OutOfBounds)
        );
        assert_eq!(
            slots.write(Slot::A, u32::MAX, &[1]),
            Err(SlotError::OutOfBounds)
        );
        // Slot B's bytes live in the second region, after its record area.
        slots.write(Slot::B, 0, &[0x12, 0x34]).unwrap();
        let at = REGION + FILE_OFFSET;
        assert_eq!(&slots.flash().mem[at..at + 2], &[0x12, 0x34]);
        // Programming cannot set bits: writing over written bytes without
        // an erase reads back wrong and is refused.
        assert_eq!(slots.write(Slot::B, 0, &[0xFF]), Err(SlotError::Device));
        let record = SlotRecord {
            generation: 7,
            len: 2,
            crc: 9,
        };
        slots.commit(Slot::B, record).unwrap();
        assert_eq!(slots.record(Slot::B), Some(record));
        assert_eq!(
            &slots.flash().mem[REGION..REGION + RECORD_LEN],
            &record.to_bytes()
        );
        slots.erase(Slot::B).unwrap();
        assert_eq!(slots.record(Slot::B), None);
        assert_eq!(slots.record(Slot::A), None);
    }

    /// Power fails after `cut` steps of an upload of model 9 (or never);
    /// returns what ran right after the upload, what boots once power is
    /// back, and the steps the upload took.
    fn upload_with_cut(start: &SimFlash, cut: Option<usize>) -> (Running, Running, usize) {
        let mut flash = start.clone();
        flash.steps = 0;
        // Boot only reads, so the budget is all the upload's.
        flash.budget = cut;
        let mut rig: Rig<DEFAULT_RING_BYTES, FlashSlots<SimFlash>> =
            Rig::boot_on(FlashSlots::new(flash, LAYOUT), 64);
        let before = running(&rig.ep);
        let file = file_of(&model(9, 0.3));
        let answers = rig.upload(&file, wire::crc32(&file));
        let after = running(&rig.ep);
        if switched(&answers).is_none() {
            assert_eq!(after, before, "a failed upload keeps the running model");
            assert!(refusal(&answers).is_some(), "{answers:?}");
        }
        // Power back, reboot.
        let (_, slots, _) = rig.ep.release();
        let mut flash = slots.release();
        let steps = flash.steps;
        flash.budget = None;
        let ep = Endpoint::<_, Line>::boot(FlashSlots::new(flash, LAYOUT), Line::default(), None)
            .expect("a whole model boots after any cut");
        (after, running(&ep), steps)
    }

    #[test]
    fn power_cut_at_every_step_of_an_upload_boots_a_whole_model() {
        let one = file_of(&model(1, 0.0));
        let two = file_of(&model(2, 0.1));
        // Model 1 in A; and model 1 in A (older) with model 2 running in B,
        // so the upload erases a region that holds a valid record.
        let mut first = FlashSlots::new(SimFlash::new(), LAYOUT);
        store(&mut first, Slot::A, &one, 1);
        let mut second = FlashSlots::new(first.flash().clone(), LAYOUT);
        store(&mut second, Slot::B, &two, 2);
        for (start, old, target) in [
            (first.release(), (Some(Slot::A), 1), Slot::B),
            (second.release(), (Some(Slot::B), 2), Slot::A),
        ] {
            let (after, booted, total) = upload_with_cut(&start, None);
            assert_eq!(after, (Some(target), 9));
            assert_eq!(booted, (Some(target), 9));
            // Erase steps, file bytes, record bytes: each is a place to cut.
            assert_eq!(total, REGION / ERASE_STEP + one.len() + RECORD_LEN);
            for cut in 0..total {
                let (after, booted, _) = upload_with_cut(&start, Some(cut));
                assert_eq!(after, old, "cut after {cut} of {total} steps");
                assert_eq!(booted, old, "boot after a cut at {cut} of {total}");
            }
            // The record's last byte completes the upload.
            let (_, booted, _) = upload_with_cut(&start, Some(total));
            assert_eq!(booted, (Some(target), 9));
        }
    }
}

mod echo {
    use super::*;
    use plumb_model::wire::FeatureEcho;

    fn echoes(frames: &[DeviceFrame]) -> Vec<FeatureEcho> {
        frames
            .iter()
            .filter_map(|f| match &f.msg {
                DeviceMsg::Features(e) => Some(e.clone()),
                _ => None,
            })
            .collect()
    }

    fn bits(x: &[f32]) -> Vec<u32> {
        x.iter().map(|v| v.to_bits()).collect()
    }

    /// Off by default; once on, every sample the detector takes is echoed
    /// before anything it causes, bit for bit (a NaN's payload and −0.0
    /// too) with its index; a sample not taken is not echoed; off again,
    /// nothing.
    #[test]
    fn each_taken_sample_is_echoed_bit_for_bit() {
        let mut rig: Rig = Rig::new();
        let mut g = Lcg(11);
        assert!(!rig.ep.echo());
        assert!(echoes(&rig.sample(&g.nominal())).is_empty());
        assert_eq!(
            rig.ask(&HostMsg::SetEcho { on: true }),
            DeviceMsg::Ack(Ack::Echo { on: true })
        );
        assert!(rig.ep.echo());
        rig.ask(&HostMsg::SetReports { on: true });
        let mut samples = mixed_samples(3, 60);
        samples[7] = vec![-0.0, f32::from_bits(0x7fc0_1234), f32::MIN_POSITIVE, 1e30];
        for x in &samples {
            let at = rig.ep.detector().samples();
            let frames = rig.sample(x);
            let DeviceMsg::Features(e) = &frames[0].msg else {
                panic!("echo first: {frames:?}")
            };
            assert_eq!((e.sample, e.first), (at, 0));
            assert_eq!(bits(&e.values.iter().collect::<Vec<_>>()), bits(x));
            assert_eq!(echoes(&frames).len(), 1, "{frames:?}");
            // The report of the same sample follows, numbered next.
            let r = reports(&frames);
            assert_eq!(r.len(), 1);
            assert_eq!(r[0].sample, at);
            assert_eq!(frames[1].seq, frames[0].seq.wrapping_add(1));
        }
        // Sent again after it was taken: not taken, not echoed.
        let at = rig.ep.detector().samples();
        let again = rig.send(&sample_at(at - 1, &samples[0]));
        assert!(echoes(&again).is_empty(), "{again:?}");
        assert_eq!(
            rig.ask(&HostMsg::SetEcho { on: false }),
            DeviceMsg::Ack(Ack::Echo { on: false })
        );
        assert!(echoes(&rig.sample(&g.nominal())).is_empty());
    }

    /// A sample of more than `ECHO_CHUNK` features goes out in parts of 31:
    /// 64 features (a wrong-length fault for this 4-feature model, echoed
    /// all the same: it is what the device took) as 31 + 31 + 2.
    #[test]
    fn long_samples_are_echoed_in_parts() {
        let mut rig: Rig = Rig::new();
        rig.ask(&HostMsg::SetEcho { on: true });
        let x: Vec<f32> = (0..64).map(|i| i as f32 * 0.25 - 3.0).collect();
        let frames = rig.sample(&x);
        let parts = echoes(&frames);
        let shape: Vec<(u64, u8, usize)> = parts
            .iter()
            .map(|e| (e.sample, e.first, e.values.len()))
            .collect();
        assert_eq!(shape, [(0, 0, 31), (0, 31, 31), (0, 62, 2)]);
        let joined: Vec<f32> = parts.iter().flat_map(|e| e.values.iter()).collect();
        assert_eq!(bits(&joined), bits(&x));
        assert!(frames.iter().any(|f| matches!(
            f.msg,
            DeviceMsg::SensorFault(wire::SensorFault {
                fault: FaultKind::WrongLength { got: 64 },
                ..
            })
        )));
    }

    /// `Endpoint::sample` (a board's own feature pipeline) says exactly
    /// what the same samples sent over the link make it say: the same
    /// frames, byte for byte, events and echoes included.
    #[test]
    fn local_samples_speak_as_linked_ones() {
        let samples = mixed_samples(5, 200);
        let mut linked: Rig = Rig::new();
        let mut local: Rig = Rig::new();
        for rig in [&mut linked, &mut local] {
            rig.ask(&HostMsg::SetEcho { on: true });
            rig.ask(&HostMsg::SetReports { on: true });
        }
        let mut a = Vec::new();
        let mut b = Vec::new();
        for x in &samples {
            a.extend(linked.sample(x));
            local.ep.sample(x, &mut local.pipe).unwrap();
            b.extend(local.run());
        }
        assert_eq!(a, b);
        assert!(a.iter().any(|f| matches!(f.msg, DeviceMsg::DriftRaised(_))));
        assert_eq!(echoes(&a).len(), samples.len());
        assert_eq!(linked.ep.detector(), local.ep.detector());
    }

    /// The greeting carries the longest prefix of the firmware text that
    /// fits `FIRMWARE_LEN` bytes, cut at a character boundary.
    #[test]
    fn greeting_cuts_a_long_firmware_text_at_a_character() {
        for (text, want) in [
            ("0123456789abcdeü-rc1", "0123456789abcde"),
            ("0123456789abcdef-rc1", "0123456789abcdef"),
            ("1.2.3", "1.2.3"),
        ] {
            let mut rig: Rig = Rig::new();
            let config = Config {
                firmware: text,
                ..rig.ep.config()
            };
            rig.ep.set_config(config);
            let DeviceMsg::Greeting(g) = rig.ask(&HostMsg::GreetingQuery) else {
                panic!()
            };
            assert_eq!(g.firmware.as_str(), want);
        }
    }
}
