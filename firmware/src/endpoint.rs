//! The serial endpoint: runs the detector, speaks the wire protocol, keeps model slots.
//!
//! [`Endpoint`] runs a [`Detector`] and owns the two model slots
//! ([`ModelSlots`]) and the drift output line (an `embedded-hal`
//! [`OutputPin`], high while [`DriftState::Drifting`]). The link is any
//! `embedded-io` byte stream, lent to each call, so a board keeps its UART
//! driver:
//!
//! ```ignore
//! // PLACES: &'static mut Places, from a static initialised to Places::EMPTY.
//! let ep = cortex_m::singleton!(: Ep = Endpoint::idle_in(PLACES, flash_slots, drift_pin))?;
//! ep.start(Some(BUILTIN_MODEL), config)?;
//! ep.greet(&mut uart)?;
//! loop {
//!     if let Err(e) = ep.poll(&mut uart) { /* count it; the link resynchronises */ }
//! }
//! ```
//!
//! What [`Endpoint::poll`] does with each host message, the sequence numbers,
//! the resend ring and the upload state machine are specified in
//! `shared-model/PROTOCOL.md`. Briefly:
//!
//! * a sample meant for the device's next index goes through
//!   [`Detector::update`] (any other is dropped and answered with
//!   [`Ack::NotTaken`], so a host may send a sample again safely); a drift
//!   raised or cleared message follows a state change, a sensor fault
//!   message the start of a fault (repeats are only counted), a score report
//!   every sample while reports are on, and a status message every
//!   [`Config::status_every`] samples; a board's own feature pipeline hands
//!   its samples to [`Endpoint::sample`], which takes them the same way;
//! * while echoes are on ([`HostMsg::SetEcho`]) every sample taken is first
//!   sent back as it was taken (`DeviceMsg::Features`, 31 features a
//!   message), so a host can record what the board saw and refit from it;
//! * drift raised, drift cleared and sensor fault messages are kept, as the
//!   frames sent, in a ring of `R` bytes (default [`DEFAULT_RING_BYTES`])
//!   and sent again, byte for byte with their original sequence numbers, on
//!   a resend request; when a new frame does not fit, the oldest ones are
//!   dropped and counted, and the resend summary tells the host the oldest
//!   sequence number it can still get;
//! * an upload is written into the slot that is not running and switched to
//!   only after its length, whole-file CRC-32, model file checks and the
//!   detector's own checks pass and the slot's record is written; anything
//!   else leaves the running model and its statistics untouched and is
//!   answered with a refusal code;
//! * with the `signatures` feature and `Config::trusted_key` set, an upload (and a slot at boot, see
//!   [`Endpoint::boot_with`]) must also carry a valid ed25519 signature by
//!   that key (`shared-model/FORMAT.md`, "Signature"), checked after the
//!   file's framing and CRC and before its payload is decoded; unsigned and
//!   wrongly signed files are refused with their own codes.
//!
//! Nothing allocates and every failure is a value. The big buffers live in
//! [`Places`]: one detector place of about 7 KiB and the resend ring (1 KiB
//! by default: a frame costs its length plus 5 bytes, 16–24 bytes for a
//! sensor fault and 53–141 for a drift raised), about 8 KiB on
//! `thumbv7em-none-eabihf`; the rest of an `Endpoint` (receive buffer of
//! 300 bytes, counters, settings) is small. Each frame is encoded in a
//! [`MAX_DEVICE_FRAME`] (150 byte) buffer on the stack.
//!
//! There is one detector place and no second model-sized buffer. An upload
//! (and each candidate model at boot) is decoded straight over the running
//! model with [`Detector::decode_model`], which leaves the statistics as they
//! are; on success the statistics restart and the endpoint switches, and on
//! any refusal the running model's own file (its slot, which an upload never
//! writes, or the built-in file) is decoded again: the same bytes give the
//! same model and constants, so the detector goes on bit for bit as if the
//! candidate had never been decoded. No model or detector is ever built on
//! the stack or moved. A board keeps [`Places::EMPTY`] in a static
//! (all zero: `.bss`), lends it to [`Endpoint::idle_in`] and boots in place
//! with [`Endpoint::start`]; [`Endpoint::boot`] holds the places by value
//! and returns the endpoint by value, for hosts and tests.

mod flash;
mod ring;
mod slots;

pub use flash::{Flash, FlashLayout, FlashSlots};
pub use slots::{
    newest_valid, slot_file, ModelSlots, RamSlots, SlotError, SlotRecord, FILE_OFFSET, RECORD_LEN,
};

use ring::FrameRing;

use crate::{Detector, DriftState, Event, Fault, Outcome, Score, ScoreSet};
use core::borrow::BorrowMut;
use embedded_hal::digital::{Error as _, ErrorKind as PinErrorKind, OutputPin};
use embedded_io::{ErrorType, Read, ReadReady, Write};
#[cfg(feature = "signatures")]
use plumb_model::signature::{self, TrustedKey};
use plumb_model::wire::{
    self, Ack, Crossing, DeviceMsg, DriftCleared, DriftRaised, EchoValues, FaultKind, FaultTally,
    FeatureEcho, Greeting, HostFrameDecoder, HostMsg, Level, LinkCounters, Reason, Refusal,
    Request, ResendDone, ScoreKind, ScoreReport, ScoreTriple, SensorFault, Share, Slot, State,
    Statistic, Status, ECHO_CHUNK, MAX_CROSSINGS, MAX_DEVICE_FRAME,
};
use plumb_model::{Capacity, ModelError, ScoreLimits, MAX_FEATURES};

/// Bytes of retained event frames kept for resend unless the type says
/// otherwise: the last 64 sensor fault starts (16 bytes each), or the last
/// 13 drift raised and cleared pairs with one chart over its limit (about
/// 76 bytes a pair; 6 pairs when all nine charts are), or a mix.
pub const DEFAULT_RING_BYTES: usize = 1024;
// The ring stores a frame's length in one byte.
const _: () = assert!(MAX_DEVICE_FRAME <= u8::MAX as usize);
/// Samples between two unasked status messages, unless configured.
pub const DEFAULT_STATUS_EVERY: u32 = 500;
/// Bytes read per `read` call.
const READ_CHUNK: usize = 64;
/// The buffer [`Endpoint::poll`] reads into, word-aligned: it is zeroed on
/// every call (a board calls once per byte or burst received), and an
/// aligned buffer is cleared a word at a time rather than byte by byte.
#[repr(align(4))]
struct ReadChunk([u8; READ_CHUNK]);

/// Bytes one [`Endpoint::poll`] handles at most before returning, so a busy
/// link cannot keep a board's main loop from its other work.
pub const POLL_BUDGET: usize = 1024;

/// Settings a board may change.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct Config {
    /// Firmware version for the greeting (cut to 16 bytes).
    pub firmware: &'static str,
    /// A status message every this many samples; 0 turns them off.
    pub status_every: u32,
    /// Run only model files signed by this key (uploads, and slots at boot
    /// through [`Endpoint::boot_with`]); `None` runs any valid file. A
    /// model built into the image is trusted as it is. Only with the
    /// `signatures` feature: without it no ed25519 code is linked (about
    /// 16 KB of flash on a Cortex-M4F) and every valid file runs.
    #[cfg(feature = "signatures")]
    pub trusted_key: Option<TrustedKey>,
}

impl Config {
    /// The defaults: this crate's version, a status message every
    /// [`DEFAULT_STATUS_EVERY`] samples, no trusted key.
    pub const DEFAULT: Config = Config {
        firmware: env!("CARGO_PKG_VERSION"),
        status_every: DEFAULT_STATUS_EVERY,
        #[cfg(feature = "signatures")]
        trusted_key: None,
    };
}

impl Default for Config {
    fn default() -> Self {
        Config::DEFAULT
    }
}

/// Whether a model file passes `config`'s signature policy: always without
/// a trusted key; else framing and CRC first, then the signature (the
/// payload is not decoded here).
#[cfg(feature = "signatures")]
pub fn check_trust(file: &[u8], config: &Config) -> Result<(), Reason> {
    let Some(key) = config.trusted_key else {
        return Ok(());
    };
    let sections = plumb_model::file::split(file).map_err(Reason::from)?;
    signature::verify(&sections, &key).map_err(Reason::from)
}

/// Whether a model file passes `config`'s signature policy: built without
/// the `signatures` feature there is no trusted key, so every file does.
#[cfg(not(feature = "signatures"))]
pub fn check_trust(_file: &[u8], _config: &Config) -> Result<(), Reason> {
    Ok(())
}

/// Why a call could not finish its output. Input problems are never errors:
/// they are counted ([`Endpoint::link_counters`]) or refused on the wire.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Error<E> {
    /// The link's read or write failed.
    Link(E),
    /// The link accepted no bytes (`write` returned 0).
    LinkStalled,
    /// The drift line could not be driven.
    Pin(PinErrorKind),
    /// A message did not fit the frame buffer (a bug: buffers are sized for
    /// the largest message).
    Encode,
}

#[cfg(feature = "defmt")]
impl<E> defmt::Format for Error<E> {
    fn format(&self, f: defmt::Formatter<'_>) {
        match self {
            Error::Link(_) => defmt::write!(f, "link error"),
            Error::LinkStalled => defmt::write!(f, "link stalled"),
            Error::Pin(_) => defmt::write!(f, "drift line error"),
            Error::Encode => defmt::write!(f, "frame encoding error"),
        }
    }
}

/// Why [`Endpoint::start`] (or [`Endpoint::boot`]) found nothing to run.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub enum BootError {
    /// No valid slot and no built-in model.
    NoModel,
    /// No valid slot, and the built-in model was refused.
    Builtin(ModelError),
}

/// What one call handled.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct Polled {
    /// Bytes read from the link.
    pub bytes: usize,
    /// Host messages handled.
    pub messages: u32,
    /// Samples taken (a sample at another index than the device's next is
    /// dropped, see [`HostMsg::Sample`]).
    pub samples: u32,
    /// Frames sent.
    pub sent: u32,
}

#[derive(Debug, Clone, Copy)]
struct Upload {
    slot: Slot,
    total: u32,
    crc: u32,
    next: u32,
}

/// Collects the first output error while the rest of the input is handled.
struct Out<'a, W: ErrorType> {
    io: &'a mut W,
    first: Option<Error<W::Error>>,
    sent: u32,
}

impl<W: Write> Out<'_, W> {
    fn send(&mut self, seq: u32, msg: &DeviceMsg) {
        let mut buf = [0u8; MAX_DEVICE_FRAME];
        match encode(seq, msg, &mut buf) {
            Ok(frame) => self.write(frame, &[]),
            Err(e) => self.fail(e),
        }
    }

    /// Writes one frame given in two pieces.
    fn write(&mut self, head: &[u8], tail: &[u8]) {
        match write_all(self.io, head).and_then(|()| write_all(self.io, tail)) {
            Ok(()) => self.sent = self.sent.wrapping_add(1),
            Err(e) => self.fail(e),
        }
    }

    fn fail(&mut self, e: Error<W::Error>) {
        self.first.get_or_insert(e);
    }
}

/// The frame of `msg` with sequence number `seq`, in `buf`.
fn encode<'b, E>(
    seq: u32,
    msg: &DeviceMsg,
    buf: &'b mut [u8; MAX_DEVICE_FRAME],
) -> Result<&'b [u8], Error<E>> {
    // (seq, msg) encodes exactly like `DeviceFrame { seq, msg }`. The
    // encoder is not generic: it is compiled in `plumb-model`, with that
    // crate's settings (`opt-level = "z"` on the boards), 284 bytes less
    // than a copy instantiated here.
    let n = wire::encode_device_frame(seq, msg, buf).map_err(|_| Error::Encode)?;
    buf.get(..n).ok_or(Error::Encode)
}

fn write_all<W: Write>(io: &mut W, bytes: &[u8]) -> Result<(), Error<W::Error>> {
    let mut rest = bytes;
    while !rest.is_empty() {
        match io.write(rest) {
            Ok(0) => return Err(Error::LinkStalled),
            Ok(k) => rest = rest.get(k..).unwrap_or(&[]),
            Err(e) => return Err(Error::Link(e)),
        }
    }
    Ok(())
}

/// The big parts of an [`Endpoint`] (about 8 KiB with the default ring):
/// the detector place and the resend ring of `R` bytes.
///
/// [`Places::EMPTY`] is all zero or uninitialised bytes, so a static
/// holding it costs no flash (it lands in `.bss`) and no start-up work
/// beyond zeroing; a board lends `&'static mut Places` to
/// [`Endpoint::idle_in`] and nothing big is ever built on the stack.
pub struct Places<const R: usize = DEFAULT_RING_BYTES> {
    detector: Detector,
    retained: FrameRing<R>,
}

impl<const R: usize> Places<R> {
    /// An empty detector place ([`Detector::EMPTY`]) and an empty ring.
    pub const EMPTY: Places<R> = Places {
        detector: Detector::EMPTY,
        retained: FrameRing::EMPTY,
    };
}

/// The device side of the link. `S` stores the model slots, `P` drives the
/// drift line, `R` is the resend ring's size in bytes, and `D` holds the
/// [`Places`]: by value (the default) or lent (`&mut Places<R>`, for a board
/// that keeps them in a static).
pub struct Endpoint<S, P, const R: usize = DEFAULT_RING_BYTES, D = Places<R>> {
    /// The detector place and the ring.
    places: D,
    /// The model file built into the image, if any: where the running model
    /// is decoded again from when `active` is `None` (see [`keep_running`]).
    builtin: Option<&'static [u8]>,
    slots: S,
    pin: P,
    /// Level last driven on the pin; `None` until driven or after an error.
    pin_high: Option<bool>,
    rx: HostFrameDecoder,
    seq: u32,
    dropped: u32,
    reports: bool,
    echo: bool,
    config: Config,
    since_status: u32,
    last_fault: Option<Fault>,
    upload: Option<Upload>,
    active: Option<Slot>,
    generation: u32,
}

impl<S, P, const R: usize> Endpoint<S, P, R> {
    /// An endpoint with no model yet and its [`Places`] inside it, to be
    /// started with [`Endpoint::start`]; see [`Endpoint::idle_in`].
    pub const fn idle(slots: S, pin: P) -> Self {
        Self::idle_in(Places::EMPTY, slots, pin)
    }
}

impl<S, P, const R: usize, D: BorrowMut<Places<R>>> Endpoint<S, P, R, D> {
    /// An endpoint with no model yet, on the given places (which should be
    /// [`Places::EMPTY`]: whatever they hold is not run and is overwritten
    /// by the first start), to be started in place with [`Endpoint::start`].
    /// Until a start succeeds every sample is a wrong-length fault.
    pub const fn idle_in(places: D, slots: S, pin: P) -> Self {
        Endpoint {
            places,
            builtin: None,
            slots,
            pin,
            pin_high: None,
            rx: HostFrameDecoder::new(),
            seq: 0,
            dropped: 0,
            reports: false,
            echo: false,
            config: Config::DEFAULT,
            since_status: 0,
            last_fault: None,
            upload: None,
            active: None,
            generation: 0,
        }
    }
}

impl<S: ModelSlots, P: OutputPin, const R: usize> Endpoint<S, P, R> {
    /// Starts on the newest valid slot (highest generation whose record,
    /// CRC-32 and model file all pass), else on `builtin` (a model file in
    /// the image), else fails. Default [`Config`]: no signature needed.
    /// Returns the endpoint by value (about 8.5 KiB on
    /// `thumbv7em-none-eabihf`: its [`Places`], about 8 KiB, and a small
    /// rest): see [`Endpoint::start`].
    pub fn boot(slots: S, pin: P, builtin: Option<&'static [u8]>) -> Result<Self, BootError> {
        Self::boot_with(slots, pin, builtin, Config::default())
    }

    /// [`Endpoint::boot`] with settings: [`Endpoint::idle`], then
    /// [`Endpoint::start`].
    pub fn boot_with(
        slots: S,
        pin: P,
        builtin: Option<&'static [u8]>,
        config: Config,
    ) -> Result<Self, BootError> {
        let mut ep = Self::idle(slots, pin);
        ep.start(builtin, config)?;
        Ok(ep)
    }
}

impl<S: ModelSlots, P: OutputPin, const R: usize, D: BorrowMut<Places<R>>> Endpoint<S, P, R, D> {
    /// Boots in place: takes `config`, then runs the newest valid slot
    /// (highest generation whose record, CRC-32 and model file all pass),
    /// else `builtin` (a model file in the image), else fails. With
    /// [`Config::trusted_key`] set, a slot whose file is not signed by that
    /// key is passed over like an invalid one (the built-in model is not
    /// checked: it is part of the image).
    ///
    /// Each candidate is decoded into the detector place and kept only when
    /// it passes; a failed start leaves the model that was running, if any,
    /// running with its statistics (decoded again from its own file: see the
    /// module documentation; on an [`Endpoint::idle`] endpoint: no model).
    pub fn start(
        &mut self,
        builtin: Option<&'static [u8]>,
        config: Config,
    ) -> Result<(), BootError> {
        self.config = config;
        let mut order = [Slot::A, Slot::B].map(|s| (s, self.slots.record(s)));
        if let [(_, Some(a)), (_, Some(b))] = order {
            if b.generation > a.generation {
                order.swap(0, 1);
            }
        }
        for (slot, rec) in order {
            let Some(rec) = rec else { continue };
            let Some(bytes) = slot_file(&self.slots, slot) else {
                continue;
            };
            if check_trust(bytes, &self.config).is_err() {
                continue;
            }
            let place = &mut self.places.borrow_mut().detector;
            if place.decode_model(bytes).is_ok() {
                self.builtin = builtin;
                // A pin failure is retried after the next sample.
                let _ = self.switch(Some(slot), rec.generation);
                return Ok(());
            }
            keep_running(place, &self.slots, self.active, self.builtin);
        }
        let Some(file) = builtin else {
            return Err(BootError::NoModel);
        };
        let place = &mut self.places.borrow_mut().detector;
        if let Err(e) = place.decode_model(file) {
            keep_running(place, &self.slots, self.active, self.builtin);
            return Err(BootError::Builtin(e));
        }
        self.builtin = builtin;
        let _ = self.switch(None, 0);
        Ok(())
    }

    /// The running detector.
    fn running(&self) -> &Detector {
        &self.places.borrow().detector
    }

    fn running_mut(&mut self) -> &mut Detector {
        &mut self.places.borrow_mut().detector
    }

    fn ring(&self) -> &FrameRing<R> {
        &self.places.borrow().retained
    }

    fn ring_mut(&mut self) -> &mut FrameRing<R> {
        &mut self.places.borrow_mut().retained
    }

    /// Runs the model just decoded into the place from now on: its
    /// statistics and the per-model endpoint state restart, and the drift
    /// line follows the new state.
    fn switch(&mut self, active: Option<Slot>, generation: u32) -> Result<(), PinErrorKind> {
        self.running_mut().reset();
        self.active = active;
        self.generation = generation;
        self.last_fault = None;
        self.since_status = 0;
        self.drive_pin()
    }

    /// Replaces the settings.
    pub fn set_config(&mut self, config: Config) {
        self.config = config;
    }

    /// The settings.
    pub fn config(&self) -> Config {
        self.config
    }

    /// The running detector.
    pub fn detector(&self) -> &Detector {
        self.running()
    }

    /// Slot of the running model (`None`: built-in).
    pub fn active_slot(&self) -> Option<Slot> {
        self.active
    }

    /// Generation of the running model's slot (0: built-in).
    pub fn generation(&self) -> u32 {
        self.generation
    }

    /// Receive counters since boot.
    pub fn link_counters(&self) -> LinkCounters {
        self.rx.counters()
    }

    /// Sequence number the next message will carry.
    pub fn next_seq(&self) -> u32 {
        self.seq
    }

    /// Events in the resend ring, and events dropped from it since boot.
    pub fn retained(&self) -> (usize, u32) {
        (self.ring().len(), self.dropped)
    }

    /// Whether per-sample score reports are on.
    pub fn reports(&self) -> bool {
        self.reports
    }

    /// Whether feature echoes are on ([`HostMsg::SetEcho`]).
    pub fn echo(&self) -> bool {
        self.echo
    }

    /// The slot storage.
    pub fn slots(&self) -> &S {
        &self.slots
    }

    /// The drift line.
    pub fn pin(&self) -> &P {
        &self.pin
    }

    /// Takes the parts back (the running detector as a copy).
    pub fn release(self) -> (Detector, S, P) {
        let detector = self.running().clone();
        (detector, self.slots, self.pin)
    }

    /// Sends a greeting (do this once the link is up, after boot).
    pub fn greet<W: Write>(&mut self, io: &mut W) -> Result<(), Error<W::Error>> {
        let mut out = Out {
            io,
            first: None,
            sent: 0,
        };
        self.send_greeting(&mut out);
        let _ = out.io.flush().map_err(|e| out.fail(Error::Link(e)));
        out.first.map_or(Ok(()), Err)
    }

    /// Reads whatever the link has ready (up to [`POLL_BUDGET`] bytes) and
    /// handles every complete host message. Returns the first output error
    /// after handling all input read so far; a read error ends the call.
    pub fn poll<IO>(&mut self, io: &mut IO) -> Result<Polled, Error<IO::Error>>
    where
        IO: Read + Write + ReadReady,
    {
        let mut buf = ReadChunk([0; READ_CHUNK]);
        let buf = &mut buf.0;
        let mut total = Polled::default();
        let mut first: Option<Error<IO::Error>> = None;
        while total.bytes < POLL_BUDGET {
            match io.read_ready() {
                Ok(true) => {}
                Ok(false) => break,
                Err(e) => {
                    first.get_or_insert(Error::Link(e));
                    break;
                }
            }
            let n = match io.read(buf) {
                Ok(0) => break,
                Ok(n) => n,
                Err(e) => {
                    first.get_or_insert(Error::Link(e));
                    break;
                }
            };
            let bytes = buf.get(..n).unwrap_or(&[]);
            match self.feed(bytes, io) {
                Ok(p) => {
                    total.messages += p.messages;
                    total.samples += p.samples;
                    total.sent += p.sent;
                }
                Err(e) => {
                    first.get_or_insert(e);
                }
            }
            total.bytes += n;
        }
        first.map_or(Ok(total), Err)
    }

    /// Handles bytes that were already received (from an interrupt or DMA
    /// buffer, say) and writes the answers to `io`.
    pub fn feed<W: Write>(&mut self, bytes: &[u8], io: &mut W) -> Result<Polled, Error<W::Error>> {
        let mut out = Out {
            io,
            first: None,
            sent: 0,
        };
        let mut polled = Polled {
            bytes: bytes.len(),
            ..Polled::default()
        };
        let mut rest = bytes;
        loop {
            rest = self.rx.feed(rest);
            match self.rx.take_message::<HostMsg>() {
                Some(Ok(msg)) => {
                    polled.messages += 1;
                    if self.handle(&msg, &mut out) {
                        polled.samples += 1;
                    }
                }
                // Counted by the decoder; the host sees the counters.
                Some(Err(_)) => {}
                None if rest.is_empty() => break,
                None => {}
            }
        }
        if out.sent > 0 {
            let _ = out.io.flush().map_err(|e| out.fail(Error::Link(e)));
        }
        polled.sent = out.sent;
        out.first.map_or(Ok(polled), Err)
    }

    /// Takes a sample the device produced itself (its own feature pipeline,
    /// in model order) as its next sample, exactly as a
    /// [`HostMsg::Sample`] sent at the device's next index is taken: the
    /// detector updates, and the echo, score report, events and status that
    /// follow are written to `io`. Samples from the host and from the
    /// device share one index, so a board takes its samples from one
    /// source.
    pub fn sample<W: Write>(
        &mut self,
        features: &[f32],
        io: &mut W,
    ) -> Result<(), Error<W::Error>> {
        let mut out = Out {
            io,
            first: None,
            sent: 0,
        };
        self.on_sample(features, &mut out);
        if out.sent > 0 {
            let _ = out.io.flush().map_err(|e| out.fail(Error::Link(e)));
        }
        out.first.map_or(Ok(()), Err)
    }

    fn next_seq_take(&mut self) -> u32 {
        let s = self.seq;
        self.seq = self.seq.wrapping_add(1);
        s
    }

    fn send<W: Write>(&mut self, out: &mut Out<'_, W>, msg: DeviceMsg) {
        let seq = self.next_seq_take();
        out.send(seq, &msg);
    }

    /// Sends an event and keeps its frame for resend.
    fn send_retained<W: Write>(&mut self, out: &mut Out<'_, W>, msg: DeviceMsg) {
        let seq = self.next_seq_take();
        let mut buf = [0u8; MAX_DEVICE_FRAME];
        let frame = match encode(seq, &msg, &mut buf) {
            Ok(frame) => frame,
            Err(e) => return out.fail(e),
        };
        // Err only with a ring smaller than the frame: sent, not kept.
        let dropped = self.ring_mut().push(seq, frame).unwrap_or(1);
        self.dropped = self.dropped.wrapping_add(dropped);
        out.write(frame, &[]);
    }

    fn refuse<W: Write>(&mut self, out: &mut Out<'_, W>, request: Request, reason: Reason) {
        self.send(out, DeviceMsg::Refused(Refusal { request, reason }));
    }

    /// Answers one host message; `true` when it was a sample the detector
    /// took.
    //
    // Out of line: inlined into `feed` and `poll`, the handlers and
    // `Detector::update` share the serving loop's registers with the frame
    // decoder, and the spills and reloads around them cost about 0.5 KB of
    // flash on a Cortex-M (BENCHMARKS.md, "Smaller code"); one call per host
    // message is all this costs at run time.
    #[inline(never)]
    fn handle<W: Write>(&mut self, msg: &HostMsg, out: &mut Out<'_, W>) -> bool {
        match msg {
            // Only the device's next sample is taken; any other (sent again,
            // or behind a lost one) is dropped and answered with where the
            // device stands, so the host knows what to send.
            HostMsg::Sample { at, features } => {
                let next = self.running().samples();
                // Indices travel modulo 2³² (`HostMsg::Sample`).
                if *at == next as u32 {
                    self.on_sample(features, out);
                    return true;
                }
                let ack = Ack::NotTaken { at: *at, next };
                self.send(out, DeviceMsg::Ack(ack));
            }
            HostMsg::StatusQuery => {
                let s = self.status();
                self.send(out, DeviceMsg::Status(s));
            }
            HostMsg::ResendFrom { seq } => self.on_resend(*seq, out),
            HostMsg::SetReports { on } => {
                self.reports = *on;
                self.send(out, DeviceMsg::Ack(Ack::Reports { on: *on }));
            }
            HostMsg::UploadBegin { total, crc } => self.on_begin(*total, *crc, out),
            HostMsg::UploadChunk { offset, data } => self.on_chunk(*offset, data, out),
            HostMsg::UploadCommit => self.on_commit(out),
            HostMsg::ResetStats => {
                self.running_mut().reset();
                self.last_fault = None;
                self.since_status = 0;
                self.pin_or_fail(out);
                self.send(out, DeviceMsg::Ack(Ack::StatsReset));
            }
            HostMsg::GreetingQuery => self.send_greeting(out),
            HostMsg::SetEcho { on } => {
                self.echo = *on;
                self.send(out, DeviceMsg::Ack(Ack::Echo { on: *on }));
            }
        }
        false
    }

    fn send_greeting<W: Write>(&mut self, out: &mut Out<'_, W>) {
        let model = self.running().model();
        // The longest prefix that fits, cut at a character boundary.
        let text = self.config.firmware;
        let mut end = text.len().min(wire::FIRMWARE_LEN);
        while !text.is_char_boundary(end) {
            end -= 1;
        }
        let mut firmware = heapless::String::new();
        let _ = firmware.push_str(text.get(..end).unwrap_or(""));
        let g = Greeting {
            protocol: wire::PROTOCOL_VERSION,
            firmware,
            model_id: model.meta.id,
            schema: model.meta.schema,
            dims: model.dims,
            capacity: Capacity::DEVICE,
            active: self.active,
            generation: self.generation,
            status_every: self.config.status_every,
        };
        self.send(out, DeviceMsg::Greeting(g));
    }

    fn drive_pin(&mut self) -> Result<(), PinErrorKind> {
        let want = self.running().state() == DriftState::Drifting;
        if self.pin_high == Some(want) {
            return Ok(());
        }
        let r = if want {
            self.pin.set_high()
        } else {
            self.pin.set_low()
        };
        match r {
            Ok(()) => {
                self.pin_high = Some(want);
                Ok(())
            }
            Err(e) => {
                self.pin_high = None;
                Err(e.kind())
            }
        }
    }

    fn pin_or_fail<W: Write>(&mut self, out: &mut Out<'_, W>) {
        if let Err(k) = self.drive_pin() {
            out.fail(Error::Pin(k));
        }
    }

    // Out of line, so the detector update's working space (the residual
    // chart's next values, 256 bytes, and the drift raised message) is not
    // in the frame of `handle` on every other path, such as an upload's
    // decoding (BENCHMARKS.md, "Residual chart").
    #[inline(never)]
    fn on_sample<W: Write>(&mut self, x: &[f32], out: &mut Out<'_, W>) {
        if self.echo {
            let sample = self.running().samples();
            // At most MAX_FEATURES features are echoed (a longer slice is a
            // wrong-length fault anyway), so `first` fits a byte.
            let parts = x.chunks(ECHO_CHUNK).take(MAX_FEATURES.div_ceil(ECHO_CHUNK));
            for (i, part) in parts.enumerate() {
                let echo = FeatureEcho {
                    sample,
                    first: (i * ECHO_CHUNK) as u8,
                    values: EchoValues::new(part),
                };
                self.send(out, DeviceMsg::Features(echo));
            }
        }
        let o = self.running_mut().update(x);
        if self.reports {
            let report = ScoreReport {
                sample: o.index,
                scores: o.scores.map(|s| ScoreTriple {
                    spe: s.spe,
                    t2: s.t2,
                    nll: s.nll,
                }),
                state: wire_state(o.state),
            };
            self.send(out, DeviceMsg::ScoreReport(report));
        }
        match o.fault {
            Some(f) => {
                if self.last_fault != Some(f) {
                    let msg = SensorFault {
                        sample: o.index,
                        fault: wire_fault(f),
                    };
                    self.send_retained(out, DeviceMsg::SensorFault(msg));
                }
                self.last_fault = Some(f);
            }
            None => self.last_fault = None,
        }
        match o.event {
            Some(Event::Raised { drivers }) => {
                let msg = self.raised(&o, drivers);
                self.send_retained(out, DeviceMsg::DriftRaised(msg));
            }
            Some(Event::Cleared) => {
                let msg = DriftCleared { sample: o.index };
                self.send_retained(out, DeviceMsg::DriftCleared(msg));
            }
            Some(Event::Primed) | None => {}
        }
        self.pin_or_fail(out);
        if self.config.status_every > 0 {
            self.since_status = self.since_status.saturating_add(1);
            if self.since_status >= self.config.status_every {
                self.since_status = 0;
                let s = self.status();
                self.send(out, DeviceMsg::Status(s));
            }
        }
    }

    /// The drift raised message for `o` ([`drift_raised`]).
    fn raised(&self, o: &Outcome, drivers: ScoreSet) -> DriftRaised {
        drift_raised(self.running(), o, drivers)
    }

    /// The status message as it would be sent now.
    pub fn status(&self) -> Status {
        let mut levels = [Level::default(); 3];
        let mut hot = ScoreSet::EMPTY;
        for (level, s) in levels.iter_mut().zip(Score::ALL) {
            let t = self.running().track(s);
            let lim = limits(self.running(), s);
            *level = Level {
                ewma: t.ewma.value(),
                cusum: t.cusum.value(),
            };
            if t.cusum.value() > lim.cusum_limit || t.ewma.value() > lim.ewma_limit {
                hot.insert(s);
            }
        }
        let f = self.running().faults();
        Status {
            samples: self.running().samples(),
            state: wire_state(self.running().state()),
            hot: hot.0,
            faults: FaultTally {
                wrong_length: f.wrong_length,
                non_finite: f.non_finite,
                out_of_range: f.out_of_range,
                overflow: f.overflow,
            },
            levels,
            link: self.rx.counters(),
            last_event: self.ring().newest(),
            model_id: self.running().model().meta.id,
        }
    }

    fn on_resend<W: Write>(&mut self, from: u32, out: &mut Out<'_, W>) {
        let mut count: u16 = 0;
        for r in self.ring().iter() {
            if wire::seq_at_or_after(r.seq, from) {
                out.write(r.head, r.tail);
                count = count.saturating_add(1);
            }
        }
        let done = ResendDone {
            from,
            count,
            oldest: self.ring().oldest(),
            dropped: self.dropped,
        };
        self.send(out, DeviceMsg::ResendDone(done));
    }

    /// The slot an upload writes: never the running one.
    fn target_slot(&self) -> Slot {
        self.active.map_or(Slot::A, Slot::other)
    }

    fn on_begin<W: Write>(&mut self, total: u32, crc: u32, out: &mut Out<'_, W>) {
        if let Some(old) = self.upload.take() {
            let reason = Reason::Abandoned {
                received: old.next,
                total: old.total,
            };
            self.refuse(out, Request::UploadBegin, reason);
        }
        let max = self.slots.capacity();
        if total == 0 {
            return self.refuse(out, Request::UploadBegin, Reason::Empty);
        }
        if total > max {
            return self.refuse(out, Request::UploadBegin, Reason::TooLarge { total, max });
        }
        let slot = self.target_slot();
        if self.slots.erase(slot).is_err() {
            return self.refuse(out, Request::UploadBegin, Reason::Storage);
        }
        self.upload = Some(Upload {
            slot,
            total,
            crc,
            next: 0,
        });
        self.send(out, DeviceMsg::Ack(Ack::UploadOpen { slot, total }));
    }

    fn on_chunk<W: Write>(&mut self, offset: u32, data: &[u8], out: &mut Out<'_, W>) {
        let Some(mut up) = self.upload else {
            return self.refuse(out, Request::UploadChunk, Reason::NoUpload);
        };
        if offset != up.next {
            let reason = Reason::UnexpectedOffset {
                expected: up.next,
                got: offset,
            };
            return self.refuse(out, Request::UploadChunk, reason);
        }
        let end = u32::try_from(data.len())
            .ok()
            .and_then(|n| offset.checked_add(n));
        let end = match end {
            Some(end) if end <= up.total => end,
            _ => {
                self.upload = None;
                let reason = Reason::Overrun {
                    end: end.unwrap_or(u32::MAX),
                    total: up.total,
                };
                return self.refuse(out, Request::UploadChunk, reason);
            }
        };
        if self.slots.write(up.slot, offset, data).is_err() {
            self.upload = None;
            return self.refuse(out, Request::UploadChunk, Reason::Storage);
        }
        up.next = end;
        self.upload = Some(up);
        self.send(out, DeviceMsg::Ack(Ack::ChunkTaken { next: end }));
    }

    fn on_commit<W: Write>(&mut self, out: &mut Out<'_, W>) {
        let Some(up) = self.upload else {
            return self.refuse(out, Request::UploadCommit, Reason::NoUpload);
        };
        if up.next != up.total {
            let reason = Reason::Incomplete {
                received: up.next,
                total: up.total,
            };
            return self.refuse(out, Request::UploadCommit, reason);
        }
        // From here on the upload is over, switched or refused.
        self.upload = None;
        match self.check_upload(up) {
            Ok(generation) => {
                if let Err(k) = self.switch(Some(up.slot), generation) {
                    out.fail(Error::Pin(k));
                }
                let ack = Ack::ModelSwitched {
                    slot: up.slot,
                    model_id: self.running().model().meta.id,
                    generation,
                };
                self.send(out, DeviceMsg::Ack(ack));
            }
            Err(reason) => self.refuse(out, Request::UploadCommit, reason),
        }
    }

    /// Every check of a finished upload, then the slot's record; returns the
    /// new generation. The file is decoded over the running model; on any
    /// error the running model is put back ([`keep_running`]): the caller
    /// switches only on success.
    fn check_upload(&mut self, up: Upload) -> Result<u32, Reason> {
        self.slots.flush(up.slot).map_err(|_| Reason::Storage)?;
        let len = usize::try_from(up.total).map_err(|_| Reason::Storage)?;
        let file = self.slots.read(up.slot).get(..len).ok_or(Reason::Storage)?;
        let computed = wire::crc32(file);
        if computed != up.crc {
            return Err(Reason::TransferCrc {
                expected: up.crc,
                computed,
            });
        }
        // On a board that trusts a key: framing, CRC and signature before
        // any of the payload is decoded.
        check_trust(file, &self.config)?;
        // `Detector::load` = `file::decode_into` (framing, CRC, capacity,
        // validation) + the detector's own checks, written over the running
        // model; on error the running model is put back as it was.
        let place = &mut self.places.borrow_mut().detector;
        if let Err(e) = place.decode_model(file) {
            keep_running(place, &self.slots, self.active, self.builtin);
            return Err(Reason::from(e));
        }
        let generation = [Slot::A, Slot::B]
            .iter()
            .filter_map(|s| self.slots.record(*s))
            .map(|r| r.generation)
            .fold(self.generation, u32::max)
            .saturating_add(1);
        let record = SlotRecord {
            generation,
            len: up.total,
            crc: computed,
        };
        if self.slots.commit(up.slot, record).is_err() {
            let place = &mut self.places.borrow_mut().detector;
            keep_running(place, &self.slots, self.active, self.builtin);
            return Err(Reason::Storage);
        }
        Ok(generation)
    }
}

/// After a candidate model failed in `place` (decoded over the running one
/// with [`Detector::decode_model`], which leaves the statistics alone), puts
/// the model that ran back: decoded again from the file it came from (the
/// slot `active`, else the built-in file), which nothing wrote to meanwhile
/// (an upload goes to the slot not running). The same bytes give the same
/// model and constants, so the detector goes on bit for bit as if the
/// candidate had never been decoded. When no model ran, or the old file no
/// longer reads back whole (its record or CRC-32 fails), the place is left
/// empty ([`Detector::unload`]), every sample a fault.
#[inline(never)]
fn keep_running<S: ModelSlots>(
    place: &mut Detector,
    slots: &S,
    active: Option<Slot>,
    builtin: Option<&[u8]>,
) {
    let file = match active {
        Some(slot) => slot_file(slots, slot),
        None => builtin,
    };
    if file.is_none_or(|f| place.decode_model(f).is_err()) {
        place.unload();
    }
}

/// The wire form of a drift state.
pub fn wire_state(s: DriftState) -> State {
    match s {
        DriftState::Priming => State::Priming,
        DriftState::Watching => State::Watching,
        DriftState::Drifting => State::Drifting,
    }
}

/// Lists one of the SPE's per-feature charts (`statistic`) when `value`
/// is over `limit`. Out of line: the residual and slow charts share it.
#[inline(never)]
fn spe_chart(
    crossed: &mut heapless::Vec<Crossing, MAX_CROSSINGS>,
    statistic: Statistic,
    value: f32,
    limit: f32,
) {
    if value > limit {
        let _ = crossed.push(Crossing {
            score: ScoreKind::Spe,
            statistic,
            value,
            limit,
        });
    }
}

/// The drift raised message `det` sends after it took the sample of `o`
/// and raised a flag driven by `drivers`: the scores, the top contributions
/// and every chart of a driving score over its limit, SPE before T² before
/// NLL and per score EWMA, CUSUM, per-sample limit (the order of
/// [`Statistic::ALL`]), the SPE's residual and slow charts after its other
/// three.
/// The host's replay lists a flag's charts through this function too.
#[inline(always)]
pub fn drift_raised(det: &Detector, o: &Outcome, drivers: ScoreSet) -> DriftRaised {
    let scores = o.scores.unwrap_or_default();
    let mut crossed = heapless::Vec::new();
    for s in drivers.iter() {
        let t = det.track(s);
        let lim = limits(det, s);
        let raw = match s {
            Score::Spe => scores.spe,
            Score::T2 => scores.t2,
            Score::Nll => scores.nll,
        };
        for statistic in Statistic::ALL {
            // Over or not as the detector decides (the per-sample limit
            // on the standardised scale); the per-sample crossing is
            // reported in the score's own units.
            let (over, value, limit) = match statistic {
                Statistic::Ewma => {
                    let v = t.ewma.value();
                    (v > lim.ewma_limit, v, lim.ewma_limit)
                }
                Statistic::Cusum => {
                    let v = t.cusum.value();
                    (v > lim.cusum_limit, v, lim.cusum_limit)
                }
                Statistic::Sample => (t.last_u > t.sample_u, raw, lim.sample_limit),
                // Not in `Statistic::ALL`: listed after the loop.
                Statistic::Residual { .. } | Statistic::Slow { .. } => (false, 0.0, 0.0),
            };
            if over {
                let c = Crossing {
                    score: wire_score(s),
                    statistic,
                    value,
                    limit,
                };
                // At most 3 scores × 3 charts and the residual chart =
                // MAX_CROSSINGS: always fits.
                let _ = crossed.push(c);
            }
        }
        let chart = det.residual_chart();
        let model = det.model();
        if s == Score::Spe {
            spe_chart(
                &mut crossed,
                Statistic::Residual {
                    feature: chart.peak_feature,
                },
                chart.peak,
                model.resid_limit,
            );
            // At most 10 crossings (MAX_CROSSINGS): with every other chart
            // over, the slow charts' crossing is the one left out.
            spe_chart(
                &mut crossed,
                Statistic::Slow {
                    feature: chart.slow_peak_feature,
                },
                chart.slow_peak,
                model.slow_limit,
            );
        }
    }
    DriftRaised {
        sample: o.index,
        drivers: drivers.0,
        scores: ScoreTriple {
            spe: scores.spe,
            t2: scores.t2,
            nll: scores.nll,
        },
        crossed,
        top: o.top.map(|c| Share {
            feature: c.feature,
            value: c.value,
        }),
    }
}

/// The running model's limits of score `s`.
fn limits(det: &Detector, s: Score) -> ScoreLimits {
    let mp = &det.model().monitor;
    match s {
        Score::Spe => mp.spe,
        Score::T2 => mp.t2,
        Score::Nll => mp.nll,
    }
}

/// The wire form of a score.
pub fn wire_score(s: Score) -> ScoreKind {
    match s {
        Score::Spe => ScoreKind::Spe,
        Score::T2 => ScoreKind::T2,
        Score::Nll => ScoreKind::Nll,
    }
}

/// The wire form of a sensor fault.
pub fn wire_fault(f: Fault) -> FaultKind {
    match f {
        Fault::WrongLength { got } => FaultKind::WrongLength { got },
        Fault::NonFinite { feature } => FaultKind::NonFinite { feature },
        Fault::OutOfRange { feature } => FaultKind::OutOfRange { feature },
        Fault::Overflow => FaultKind::Overflow,
    }
}
