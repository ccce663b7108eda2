//! Data the audio thread hands to the editor: fixed arrays of atomics with an atomic write index, written by the
//! audio thread only, read by the editor. No locks, no allocation after construction.

use atomic_float::{AtomicF32, AtomicF64};
use breakdown_dsp::circuit::MAX_POSITIONS;
use std::sync::atomic::{AtomicBool, AtomicU32, AtomicUsize, Ordering};

/// Compared positions at run time: every switch position a circuit can have, then the candidate
/// (`session::CANDIDATE`).
pub const SLOTS: usize = MAX_POSITIONS + 1;

/// Samples kept for the scope and the spectrum (a power of two).
pub const RING_LEN: usize = 16_384;
const RING_MASK: usize = RING_LEN - 1;

/// Single-writer ring of samples. Readers may see a sample being overwritten at the very oldest end; they only
/// read the newest part, so that does not show.
pub struct Ring {
    data: Box<[AtomicF32]>,
    written: AtomicUsize,
}

impl Default for Ring {
    fn default() -> Self {
        Ring {
            data: (0..RING_LEN).map(|_| AtomicF32::new(0.0)).collect(),
            written: AtomicUsize::new(0),
        }
    }
}

impl Ring {
    /// Append one sample (audio thread).
    #[inline]
    pub fn push(&self, value: f32) {
        let n = self.written.load(Ordering::Relaxed);
        self.data[n & RING_MASK].store(value, Ordering::Relaxed);
        self.written.store(n.wrapping_add(1), Ordering::Release);
    }

    /// Total samples written so far.
    pub fn written(&self) -> usize {
        self.written.load(Ordering::Acquire)
    }

    /// Copy the newest `out.len()` samples (oldest first) into `out` (editor thread).
    pub fn newest(&self, out: &mut [f32]) {
        let len = out.len().min(RING_LEN / 2);
        let end = self.written();
        let start = end.wrapping_sub(len);
        for (k, o) in out.iter_mut().take(len).enumerate() {
            *o = self.data[start.wrapping_add(k) & RING_MASK].load(Ordering::Relaxed);
        }
    }
}

/// Readouts of one compared position over the last meter window.
#[derive(Default)]
pub struct SlotReadout {
    pub clamp_peak_positive: AtomicF32,
    pub clamp_peak_negative: AtomicF32,
    pub share_clamped: AtomicF32,
    pub zener_peak_current: AtomicF32,
    pub positive_peak_watts: AtomicF32,
    pub negative_peak_watts: AtomicF32,
    pub positive_average_watts: AtomicF32,
    pub negative_average_watts: AtomicF32,
    /// Where the pair conducts 10 uA (`engine::CLAMPED_CURRENT`), positive and negative (V); NaN without it.
    pub threshold_positive: AtomicF32,
    pub threshold_negative: AtomicF32,
    /// Vz of the parts the model runs with (V); NaN for a missing part.
    pub volts_positive: AtomicF32,
    pub volts_negative: AtomicF32,
    /// The family the parts' rating is judged against: 0 = 1N47xxA (1 W), 1 = 1N52xxB (1/2 W).
    pub family: AtomicU32,
    /// The parts carry the circuit file's own knee data (not a family row).
    pub own_knee: AtomicBool,
    /// Id of the circuit the running models belong to (0: no model).
    pub circuit: AtomicU32,
    /// Unmatched K-weighted short-term loudness of the listening output (LUFS, one channel).
    pub loudness: AtomicF32,
    /// Level-match gain applied now (dB).
    pub match_gain_db: AtomicF32,
    /// True while a rebuilt model for new part values is on its way.
    pub rebuilding: AtomicBool,
}

/// Everything the editor reads.
pub struct Shared {
    /// Clamp-node volts of the heard position (host rate).
    pub scope: Ring,
    /// What is heard at the listening point (after the cabinet at the chain; before the output trim), one
    /// channel (full-scale units, host rate).
    pub listen: Ring,
    pub slots: [SlotReadout; SLOTS],
    /// The runtime slot heard (a position index, or `session::CANDIDATE`).
    pub heard: AtomicUsize,
    /// Id of the circuit the processor follows now.
    pub circuit: AtomicU32,
    pub sample_rate: AtomicF64,
    pub latency: AtomicU32,
    pub models: AtomicUsize,
    /// Count of meter windows published (the editor repaints when it changes).
    pub publications: AtomicU32,
    /// The listening point heard (`runtime::listen_index`: 0 chain, 1 wiper, 2 clamp node).
    pub listen_point: AtomicU32,
    /// The cabinet playing (or fading in): 0 none, 1 built-in, 2 the loaded response `cabinet_ir`.
    pub cabinet_kind: AtomicU32,
    pub cabinet_ir: AtomicU32,
    /// A cabinet other than the one playing is asked for and being prepared.
    pub cabinet_pending: AtomicBool,
}

impl Default for Shared {
    fn default() -> Self {
        Shared {
            scope: Ring::default(),
            listen: Ring::default(),
            slots: Default::default(),
            heard: AtomicUsize::new(1),
            circuit: AtomicU32::new(0),
            sample_rate: AtomicF64::new(48_000.0),
            latency: AtomicU32::new(0),
            models: AtomicUsize::new(1),
            publications: AtomicU32::new(0),
            listen_point: AtomicU32::new(0),
            cabinet_kind: AtomicU32::new(1),
            cabinet_ir: AtomicU32::new(0),
            cabinet_pending: AtomicBool::new(false),
        }
    }
}
