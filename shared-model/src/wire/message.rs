//! The messages. Field order is wire order: postcard encodes structs as their
//! fields in declaration order and enums as a varint variant index followed by
//! the variant's fields, so **reordering anything here changes the protocol**
//! (see the stability section of `PROTOCOL.md`).

use super::Reason;
use crate::{Capacity, Dims, MAX_FEATURES};
use serde::{Deserialize, Serialize};

/// Longest firmware version string a greeting carries, in bytes.
pub const FIRMWARE_LEN: usize = 16;
/// Most bytes of model file one upload chunk carries.
pub const MAX_CHUNK: usize = 128;
/// Most limit crossings a drift raised message lists: three charts (EWMA,
/// CUSUM, per-sample limit) for each of three scores, and the SPE's residual
/// chart.
pub const MAX_CROSSINGS: usize = 10;

/// One of the two model slots of a device.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub enum Slot {
    /// Slot A (variant 0).
    A,
    /// Slot B (variant 1).
    B,
}

impl Slot {
    /// The other slot.
    pub const fn other(self) -> Slot {
        match self {
            Slot::A => Slot::B,
            Slot::B => Slot::A,
        }
    }

    /// 0 for A, 1 for B.
    pub const fn index(self) -> usize {
        match self {
            Slot::A => 0,
            Slot::B => 1,
        }
    }
}

/// Drift state as carried on the wire.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub enum State {
    /// Warm-up after a reset or model switch; no flag can rise.
    Priming,
    /// Data resembles the model.
    Watching,
    /// A drift flag is up.
    Drifting,
}

/// One of the three monitored scores.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub enum ScoreKind {
    /// SPE (Q).
    Spe,
    /// Hotelling T².
    T2,
    /// Mixture negative log-likelihood.
    Nll,
}

/// One of the charts kept per score: the two streaming statistics and the
/// per-sample limit, and for the SPE the residual chart.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub enum Statistic {
    /// EWMA of the standardised transformed score (variant 0); the SPE's is
    /// standardised within the sample's operating mode.
    Ewma,
    /// Upper CUSUM of the standardised transformed score (variant 1).
    Cusum,
    /// The sample's raw score against the per-sample limit
    /// (`ScoreLimits::sample_limit`), in the score's own units (variant 2).
    Sample,
    /// The SPE's residual chart (variant 3, model format 3): the EWMA of one
    /// feature's residual, centred and scaled by the model's
    /// `resid_center` and `resid_gain`, in absolute value, against
    /// `resid_limit`. A crossing names the feature furthest over the limit.
    Residual {
        /// Feature index in model order.
        feature: u8,
    },
    /// The SPE's slow charts (variant 4, model format 5): the second EWMA of
    /// one feature's residual chart input, with that chart's constant,
    /// centre and gain from the model's `slow_charts`, in absolute value,
    /// against `slow_limit`. A crossing names the feature furthest over the limit.
    Slow {
        /// Feature index in model order.
        feature: u8,
    },
}

impl Statistic {
    /// The three charts every score has, in the order a drift raised message
    /// lists them (the SPE's residual chart comes after them).
    pub const ALL: [Statistic; 3] = [Statistic::Ewma, Statistic::Cusum, Statistic::Sample];
}

/// The three scores of one sample.
#[derive(Debug, Clone, Copy, PartialEq, Default, Serialize, Deserialize)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct ScoreTriple {
    /// SPE (Q).
    pub spe: f32,
    /// Hotelling T².
    pub t2: f32,
    /// Mixture negative log-likelihood.
    pub nll: f32,
}

/// Current EWMA and CUSUM of one score.
#[derive(Debug, Clone, Copy, PartialEq, Default, Serialize, Deserialize)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct Level {
    /// EWMA value.
    pub ewma: f32,
    /// CUSUM value.
    pub cusum: f32,
}

/// A chart over its limit when a flag rose.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct Crossing {
    /// Which score.
    pub score: ScoreKind,
    /// Which chart of it.
    pub statistic: Statistic,
    /// Its value: the EWMA or CUSUM of the standardised score, or for
    /// [`Statistic::Sample`] the sample's raw score.
    pub value: f32,
    /// The limit it exceeded, on the same scale as `value`.
    pub limit: f32,
}

/// One feature's share of the SPE.
#[derive(Debug, Clone, Copy, PartialEq, Default, Serialize, Deserialize)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct Share {
    /// Feature index in model order; 255 for an unused slot.
    pub feature: u8,
    /// Squared residual of that feature.
    pub value: f32,
}

/// Why a sample was not scored.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub enum FaultKind {
    /// Wrong number of features.
    WrongLength {
        /// Features received.
        got: u16,
    },
    /// A feature is NaN or infinite.
    NonFinite {
        /// Feature index.
        feature: u8,
    },
    /// A feature is beyond the model's fault limit.
    OutOfRange {
        /// Feature index.
        feature: u8,
    },
    /// A score overflowed.
    Overflow,
}

/// Faulted samples by cause since the last statistics reset.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct FaultTally {
    /// Wrong number of features.
    pub wrong_length: u32,
    /// NaN or infinite features.
    pub non_finite: u32,
    /// Features beyond the fault limit.
    pub out_of_range: u32,
    /// Score overflow.
    pub overflow: u32,
}

/// Counters of the device's receiving side since boot.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct LinkCounters {
    /// Frames that passed the CRC and decoded to a message.
    pub frames_ok: u32,
    /// Frames whose CRC did not match.
    pub crc_errors: u32,
    /// Frames with broken COBS or too short to hold a CRC.
    pub framing_errors: u32,
    /// Frames longer than the receive buffer (discarded up to the next zero).
    pub overflows: u32,
    /// Frames that passed the CRC but are not a valid message.
    pub undecodable: u32,
}

/// Sent at boot and on [`HostMsg::GreetingQuery`]: who the device is and
/// what it runs.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct Greeting {
    /// [`super::PROTOCOL_VERSION`] of the firmware.
    pub protocol: u16,
    /// Firmware version, free text, at most [`FIRMWARE_LEN`] bytes.
    pub firmware: heapless::String<FIRMWARE_LEN>,
    /// Id of the running model.
    pub model_id: u32,
    /// Schema fingerprint of the running model.
    pub schema: u64,
    /// Dimensions of the running model (a sample must have `features` values).
    pub dims: Dims,
    /// Largest model this build holds.
    pub capacity: Capacity,
    /// Slot the running model came from; `None` for a model built into the
    /// firmware image.
    pub active: Option<Slot>,
    /// Generation of the running model's slot (0 for a built-in model).
    pub generation: u32,
    /// A status message follows every this many samples (0: never unasked).
    pub status_every: u32,
}

/// Periodic and on-request health report.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct Status {
    /// Samples since the last statistics reset (faulted ones included).
    pub samples: u64,
    /// Current drift state.
    pub state: State,
    /// Scores whose EWMA or CUSUM is over its limit (bit 0 SPE, 1 T², 2 NLL).
    pub hot: u8,
    /// Faulted samples by cause.
    pub faults: FaultTally,
    /// EWMA and CUSUM of SPE, T², NLL in that order.
    pub levels: [Level; 3],
    /// Receive counters.
    pub link: LinkCounters,
    /// Sequence number of the newest retained event, if any: a host that has
    /// not seen it asks for a resend.
    pub last_event: Option<u32>,
    /// Id of the running model.
    pub model_id: u32,
}

/// A drift flag rose.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct DriftRaised {
    /// Index of the sample that raised it.
    pub sample: u64,
    /// Scores that drove the flag (bit 0 SPE, 1 T², 2 NLL).
    pub drivers: u8,
    /// That sample's scores.
    pub scores: ScoreTriple,
    /// Every chart of a driving score that is over its limit: SPE before
    /// T² before NLL, and per score EWMA, CUSUM, per-sample limit, then for
    /// the SPE its residual chart.
    pub crossed: heapless::Vec<Crossing, MAX_CROSSINGS>,
    /// The three largest SPE contributions, largest first.
    pub top: [Share; 3],
}

/// A drift flag cleared.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct DriftCleared {
    /// Index of the sample that cleared it.
    pub sample: u64,
}

/// A sensor fault began (sent when a sample's fault differs from the
/// previous sample's; repeats are only counted).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct SensorFault {
    /// Index of the faulted sample.
    pub sample: u64,
    /// Kind and feature.
    pub fault: FaultKind,
}

/// Scores of one sample, sent for every sample while reports are on.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct ScoreReport {
    /// Sample index.
    pub sample: u64,
    /// Scores; `None` for a faulted sample.
    pub scores: Option<ScoreTriple>,
    /// State after the sample.
    pub state: State,
}

/// A host request carried out.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub enum Ack {
    /// Score reports are now on or off.
    Reports {
        /// New setting.
        on: bool,
    },
    /// Statistics were reset; warm-up restarts.
    StatsReset,
    /// An upload is open into `slot`.
    UploadOpen {
        /// The slot being written (never the active one).
        slot: Slot,
        /// Bytes expected.
        total: u32,
    },
    /// A chunk was stored.
    ChunkTaken {
        /// Offset the next chunk must start at.
        next: u32,
    },
    /// The upload passed every check and now runs.
    ModelSwitched {
        /// The new active slot.
        slot: Slot,
        /// Id of the new model.
        model_id: u32,
        /// Generation written beside the slot.
        generation: u32,
    },
    /// A [`HostMsg::Sample`] meant for another index than the device's next
    /// was dropped: sent again after it was taken (`at < next`), or sent
    /// behind a sample that never arrived (`at > next`).
    NotTaken {
        /// The index the sample was sent at (modulo 2³², as sent).
        at: u32,
        /// The index the device takes next ([`Status::samples`]).
        next: u64,
    },
    /// Feature echoes ([`DeviceMsg::Features`]) are now on or off.
    Echo {
        /// New setting.
        on: bool,
    },
}

/// The host request a refusal answers.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub enum Request {
    /// [`HostMsg::UploadBegin`].
    UploadBegin,
    /// [`HostMsg::UploadChunk`].
    UploadChunk,
    /// [`HostMsg::UploadCommit`].
    UploadCommit,
}

/// A host request not carried out.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct Refusal {
    /// What was refused.
    pub request: Request,
    /// Why.
    pub reason: Reason,
}

/// Closes the answer to [`HostMsg::ResendFrom`].
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct ResendDone {
    /// The sequence number asked for.
    pub from: u32,
    /// Retained messages sent again.
    pub count: u16,
    /// Oldest sequence number still retained, if any. When it is after
    /// `from`, events in between were dropped from the ring.
    pub oldest: Option<u32>,
    /// Events dropped from the ring since boot.
    pub dropped: u32,
}

/// Most features in one [`FeatureEcho`]: a sample of more features is echoed
/// in several messages. 31 is the most that keeps a device frame within
/// [`MAX_DEVICE_MESSAGE`](super::MAX_DEVICE_MESSAGE): seq 5 + variant 1 + sample 10 + first 1 +
/// length 1 + 31 × 4 = 142 bytes.
pub const ECHO_CHUNK: usize = 31;

/// Up to [`ECHO_CHUNK`] features as one byte string on the wire (a varint
/// byte count, then each feature as 4 bytes of `f32` little-endian): the
/// device writes them with one copy instead of a value at a time.
#[derive(Debug, Clone, PartialEq, Eq, Default)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct EchoValues(heapless::Vec<u8, { 4 * ECHO_CHUNK }>);

impl EchoValues {
    /// The first [`ECHO_CHUNK`] features of `x` (all of them if fewer).
    pub fn new(x: &[f32]) -> Self {
        let mut bytes = heapless::Vec::new();
        for v in x.iter().take(ECHO_CHUNK) {
            // Cannot fail: at most ECHO_CHUNK × 4 bytes.
            let _ = bytes.extend_from_slice(&v.to_le_bytes());
        }
        EchoValues(bytes)
    }

    /// Number of features.
    pub fn len(&self) -> usize {
        self.0.len() / 4
    }

    /// Whether there is no feature.
    pub fn is_empty(&self) -> bool {
        self.0.is_empty()
    }

    /// The features, bit for bit as the device had them.
    pub fn iter(&self) -> impl Iterator<Item = f32> + '_ {
        // `chunks_exact(4)` gives 4 bytes every time; the NaN is never made.
        self.0
            .chunks_exact(4)
            .map(|b| <[u8; 4]>::try_from(b).map_or(f32::NAN, f32::from_le_bytes))
    }
}

impl Serialize for EchoValues {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        s.serialize_bytes(&self.0)
    }
}

impl<'de> Deserialize<'de> for EchoValues {
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct Bytes;
        impl serde::de::Visitor<'_> for Bytes {
            type Value = EchoValues;
            fn expecting(&self, f: &mut core::fmt::Formatter<'_>) -> core::fmt::Result {
                write!(f, "at most {} features of 4 bytes each", ECHO_CHUNK)
            }
            fn visit_bytes<E: serde::de::Error>(self, v: &[u8]) -> Result<EchoValues, E> {
                if v.len() % 4 != 0 {
                    return Err(E::invalid_length(v.len(), &self));
                }
                heapless::Vec::from_slice(v)
                    .map(EchoValues)
                    .map_err(|_| E::invalid_length(v.len(), &self))
            }
        }
        d.deserialize_bytes(Bytes)
    }
}

/// Features of one sample as the detector took them, sent while echoes are
/// on ([`HostMsg::SetEcho`]), so a host can record what the device saw (and
/// refit from it). A sample of `d` features takes ⌈d / [`ECHO_CHUNK`]⌉
/// messages, in order of `first`, each sent once (not retained).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct FeatureEcho {
    /// Sample index.
    pub sample: u64,
    /// Index of `values[0]` among the sample's features.
    pub first: u8,
    /// The features from `first` on, at most [`ECHO_CHUNK`].
    pub values: EchoValues,
}

/// Device → host messages.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub enum DeviceMsg {
    /// 0: identity.
    Greeting(Greeting),
    /// 1: health.
    Status(Status),
    /// 2: a flag rose (retained for resend).
    DriftRaised(DriftRaised),
    /// 3: a flag cleared (retained for resend).
    DriftCleared(DriftCleared),
    /// 4: a sensor fault began (retained for resend).
    SensorFault(SensorFault),
    /// 5: per-sample scores.
    ScoreReport(ScoreReport),
    /// 6: request done.
    Ack(Ack),
    /// 7: request refused.
    Refused(Refusal),
    /// 8: end of a resend.
    ResendDone(ResendDone),
    /// 9: features of one sample, or part of them (while echoes are on).
    Features(FeatureEcho),
}

impl DeviceMsg {
    /// Whether the device keeps this message for resend.
    pub fn is_retained(&self) -> bool {
        matches!(
            self,
            DeviceMsg::DriftRaised(_) | DeviceMsg::DriftCleared(_) | DeviceMsg::SensorFault(_)
        )
    }
}

/// A device message with its sequence number. Every device frame carries
/// one of these.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct DeviceFrame {
    /// Sequence number, incremented (wrapping) per message sent; a resent
    /// message keeps its original number.
    pub seq: u32,
    /// The message.
    pub msg: DeviceMsg,
}

/// Host → device messages.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub enum HostMsg {
    /// 0: one sample, features in model order. The device takes it only
    /// as its sample `at` (its count of samples since the last statistics
    /// reset, [`Status::samples`], modulo 2³² as sequence numbers wrap);
    /// any other sample is dropped and answered with [`Ack::NotTaken`], so
    /// a host may send a sample again without its being taken twice.
    Sample {
        /// The index the sample is meant to have on the device, modulo 2³².
        at: u32,
        /// The features.
        features: heapless::Vec<f32, MAX_FEATURES>,
    },
    /// 1: asks for a [`DeviceMsg::Status`].
    StatusQuery,
    /// 2: asks for every retained event with a sequence number at or after
    /// `seq` (serial-number order), then a [`DeviceMsg::ResendDone`].
    ResendFrom {
        /// First sequence number wanted.
        seq: u32,
    },
    /// 3: turns per-sample score reports on or off.
    SetReports {
        /// New setting.
        on: bool,
    },
    /// 4: opens an upload of a model file into the inactive slot.
    UploadBegin {
        /// File length in bytes.
        total: u32,
        /// CRC-32/ISO-HDLC of the whole file.
        crc: u32,
    },
    /// 5: file bytes at `offset` (must equal the bytes received so far).
    UploadChunk {
        /// Offset in the file.
        offset: u32,
        /// At most [`MAX_CHUNK`] bytes.
        data: heapless::Vec<u8, MAX_CHUNK>,
    },
    /// 6: checks the upload and switches to it.
    UploadCommit,
    /// 7: forgets the statistics and restarts warm-up.
    ResetStats,
    /// 8: asks for a [`DeviceMsg::Greeting`].
    GreetingQuery,
    /// 9: turns feature echoes ([`DeviceMsg::Features`]) on or off.
    SetEcho {
        /// New setting.
        on: bool,
    },
}
