//! Augmentation for speaker and channel variation: additive noise (coloured and babble),
//! reverberation by simulated rooms, band-limiting and gain, drawn per utterance.
//!
//! Key design decision: **every random value comes from the caller's generator**, and
//! [`Augmenter::apply`] returns what it drew ([`Applied`]). The training loop seeds one generator
//! per utterance and epoch, so an epoch is reproducible on any number of threads, and what was done
//! to an utterance can be logged and checked. The one expensive piece, room impulse responses, is
//! computed once into a [`RirBank`] from its own seed when the [`Augmenter`] is built; each
//! utterance is still convolved afresh (a bank of responses, not a cache of augmented audio).
//!
//! The chain, each step with its own probability, in the order sound meets it: the **voice**
//! (its source exchanged through a linear-prediction vocoder, [`revoice`]), the **room**
//! (the voice convolved with a response of a random rectangular room, level kept), **background
//! noise** (white, pink, brown or babble at an SNR drawn in a range, exact over the utterance),
//! the **channel** (a random band, or the 300–3400 Hz telephone band), the **recording level**
//! (gain in dB, through [`crate::volume_perturb`]) and a **lossy re-encode** (a simulated
//! low-bit-rate transform codec, [`simulate_codec`]: a cut-off, bands without bits, coarse
//! quantisation that follows the speech's envelope). Noise is added after the room, not
//! reverberated with it: a simplification that keeps the SNR exact. Speed perturbation
//! ([`crate::speed_perturb`]) changes the length and stays a separate step; vocal-tract length
//! perturbation works on the mel filter bank and lives in the features crate.
//!
//! Settings sit in the training configuration's `[augmentation]` table; [`AugmentConfig::validate`]
//! names each key by its full path there (`augmentation.noise.snr_db`).
//!
//! ```
//! use isogloss_audio::augment::{AugmentConfig, Augmenter};
//! use rand::SeedableRng;
//!
//! let mut config = AugmentConfig::default();
//! config.reverb.bank_size = 4;
//! config.reverb.rt60_seconds = [0.2, 0.3];
//! let augmenter = Augmenter::new(config)?;
//! let mut samples: Vec<f32> = (0..16_000).map(|n| (n as f32 * 0.05).sin() * 0.3).collect();
//! // Other utterances of the training set, for babble.
//! let others: Vec<Vec<f32>> = (1..5)
//!     .map(|k| (0..12_000).map(|n| (n as f32 * 0.01 * k as f32).sin() * 0.2).collect())
//!     .collect();
//! let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(42);
//! let applied = augmenter.apply(&mut samples, &mut rng, Some(&others))?;
//! println!("{applied:?}");
//! # Ok::<(), isogloss_audio::AudioError>(())
//! ```

mod codec;
mod filter;
mod fourier;
mod noise;
mod revoice;
mod room;

use rand::Rng;
use serde::{Deserialize, Serialize};

use crate::{volume_perturb, AudioError, SAMPLE_RATE};

pub use codec::{
    codec_window, frame_spectra, overlap_add, simulate_codec, CodecSettings, BAND_EDGES_HZ,
    CODEC_FRAME, CODEC_HOP,
};
pub use filter::{band_limit, band_limit_gain, BUTTERWORTH_ORDER};
pub use fourier::{convolve, FftPlans};
pub use noise::{
    babble, coloured_noise, hum, loop_to_length, mean_power, mix_at_snr, BabbleSource, HumSettings,
    NoiseKind, COLOURED_NOISE_LOW_HZ, HUM_HARMONICS, HUM_HISS_DB, LOOP_CROSSFADE_SAMPLES, MAINS_HZ,
};
pub use revoice::{
    autocorrelation, levinson_durbin, revoice, RevoiceSettings, JITTER, LPC_ORDER, PREEMPHASIS,
    REVOICE_HOP, REVOICE_WINDOW, VOICING_HIGH, VOICING_LOW,
};
pub use room::{
    image_source_rir, reverberate, sabine_absorption, ImageSourceSettings, RirBank, Room,
    RoomImpulseResponse, MIN_SOURCE_DISTANCE_M, SPEED_OF_SOUND, WALL_MARGIN_M,
};

/// The telephone band (Hz), used when a band-limit draws the telephone channel.
pub const TELEPHONE_BAND_HZ: [f64; 2] = [300.0, 3400.0];

/// The longest reverberation time accepted (seconds): the image count grows with its cube,
/// and a 2 s response already takes seconds to compute.
pub const MAX_RT60_SECONDS: f64 = 2.0;

/// All augmentation settings (the `[augmentation]` table). Missing keys take the defaults;
/// unknown keys are an error.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, Default)]
#[serde(default, deny_unknown_fields)]
pub struct AugmentConfig {
    /// Additive noise.
    pub noise: NoiseConfig,
    /// Simulated room reverberation.
    pub reverb: ReverbConfig,
    /// Band-limiting (random band or telephone).
    pub band_limit: BandLimitConfig,
    /// Gain.
    pub gain: GainConfig,
    /// A lossy re-encode.
    pub codec: CodecConfig,
    /// A new voice source ([`revoice`]).
    pub revoice: RevoiceConfig,
}

/// `[augmentation.noise]`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct NoiseConfig {
    /// Chance that an utterance gets noise.
    pub probability: f64,
    /// SNR range in dB, [low, high], drawn uniformly; 0 ≤ low ≤ high.
    pub snr_db: [f64; 2],
    /// Kinds to draw from, uniformly; not empty.
    pub kinds: Vec<NoiseKind>,
    /// Number of talkers in babble, [low, high], drawn uniformly; at least 1.
    pub babble_talkers: [usize; 2],
}

impl Default for NoiseConfig {
    /// Noise on 40 % of utterances at 5–20 dB SNR (the range of noisy archive recordings the
    /// project's degraded test audio spans), any of the four kinds, 3–6 babble talkers.
    fn default() -> Self {
        NoiseConfig {
            probability: 0.4,
            snr_db: [5.0, 20.0],
            kinds: vec![
                NoiseKind::White,
                NoiseKind::Pink,
                NoiseKind::Brown,
                NoiseKind::Babble,
            ],
            babble_talkers: [3, 6],
        }
    }
}

/// `[augmentation.reverb]`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct ReverbConfig {
    /// Chance that an utterance is reverberated.
    pub probability: f64,
    /// Reverberation time range (seconds), [low, high]; 0 < low ≤ high ≤ [`MAX_RT60_SECONDS`].
    pub rt60_seconds: [f64; 2],
    /// Smallest room: length, width, height (metres), each at least 1.5.
    pub room_min_m: [f64; 3],
    /// Largest room: length, width, height (metres), each at least the smallest.
    pub room_max_m: [f64; 3],
    /// Responses in the bank (at least 1).
    pub bank_size: usize,
    /// Seed the bank is drawn from.
    pub seed: u64,
    /// Taps of the windowed-sinc fractional delay of each arrival (odd, at least 3).
    pub fractional_delay_taps: usize,
}

impl Default for ReverbConfig {
    /// A quarter of utterances in rooms from 3 × 3 × 2.4 m (a small office) to 10 × 8 × 4 m (a
    /// village hall) with RT60 0.2–0.7 s; 64 responses; 81-tap delays.
    fn default() -> Self {
        ReverbConfig {
            probability: 0.25,
            rt60_seconds: [0.2, 0.7],
            room_min_m: [3.0, 3.0, 2.4],
            room_max_m: [10.0, 8.0, 4.0],
            bank_size: 64,
            seed: 0,
            fractional_delay_taps: 81,
        }
    }
}

/// `[augmentation.band_limit]`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct BandLimitConfig {
    /// Chance that an utterance is band-limited.
    pub probability: f64,
    /// Of those, the chance of the telephone band [`TELEPHONE_BAND_HZ`] instead of a random one.
    pub telephone_probability: f64,
    /// Range of the random high-pass cut-off (Hz), [low, high].
    pub low_cut_hz: [f64; 2],
    /// Range of the random low-pass cut-off (Hz), [low, high], above the high-pass range and
    /// below half the sample rate.
    pub high_cut_hz: [f64; 2],
}

impl Default for BandLimitConfig {
    /// A fifth of utterances, a third of those telephone; otherwise a high-pass at 50–300 Hz
    /// (cheap microphones, cassette transfers) and a low-pass at 3.5–7.5 kHz.
    fn default() -> Self {
        BandLimitConfig {
            probability: 0.2,
            telephone_probability: 1.0 / 3.0,
            low_cut_hz: [50.0, 300.0],
            high_cut_hz: [3500.0, 7500.0],
        }
    }
}

/// `[augmentation.gain]`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct GainConfig {
    /// Chance that an utterance's level is changed.
    pub probability: f64,
    /// Gain range in dB, [low, high].
    pub gain_db: [f64; 2],
}

impl Default for GainConfig {
    /// Half of utterances, ±6 dB.
    fn default() -> Self {
        GainConfig {
            probability: 0.5,
            gain_db: [-6.0, 6.0],
        }
    }
}

/// `[augmentation.codec]`: a simulated low-bit-rate transform codec ([`simulate_codec`]).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct CodecConfig {
    /// Chance that an utterance is re-encoded.
    pub probability: f64,
    /// Range of the cut-off (Hz), [low, high]: bins above it are dropped.
    pub cutoff_hz: [f64; 2],
    /// Range of the signal-to-quantisation-noise ratio within each kept band (dB), [low, high].
    pub band_snr_db: [f64; 2],
    /// Range of the bit-pool floor (dB), [low, high]: bands this far below the frame's loudest
    /// get no bits.
    pub floor_db: [f64; 2],
}

impl Default for CodecConfig {
    /// A fifth of utterances; a cut-off at 4–7 kHz, 6–18 dB of band SNR and a floor 25–40 dB
    /// below the loudest band: the range of speech coded at a few tens of kbit/s (common
    /// practice for low-bit-rate perceptual codecs at 16 kHz, from memory, not measured on any
    /// test audio of this project).
    fn default() -> Self {
        CodecConfig {
            probability: 0.2,
            cutoff_hz: [4_000.0, 7_000.0],
            band_snr_db: [6.0, 18.0],
            floor_db: [25.0, 40.0],
        }
    }
}

impl CodecConfig {
    /// The same ranges, never drawn: what a training configuration without an
    /// `[augmentation.codec]` table means.
    pub fn off() -> Self {
        CodecConfig {
            probability: 0.0,
            ..CodecConfig::default()
        }
    }

    /// Checks the `[augmentation.codec]` settings.
    pub fn validate(&self) -> Result<(), AudioError> {
        check_probability("augmentation.codec.probability", self.probability)?;
        let nyquist = f64::from(SAMPLE_RATE) / 2.0;
        check_range(
            "augmentation.codec.cutoff_hz",
            self.cutoff_hz,
            500.0,
            nyquist,
            &format!("from 500 Hz to half the sample rate ({nyquist} Hz)"),
        )?;
        check_range(
            "augmentation.codec.band_snr_db",
            self.band_snr_db,
            0.0,
            60.0,
            "from 0 to 60 dB",
        )?;
        check_range(
            "augmentation.codec.floor_db",
            self.floor_db,
            f64::MIN_POSITIVE,
            120.0,
            "above 0 and at most 120 dB",
        )
    }
}

/// `[augmentation.revoice]`: the voice source exchanged through a linear-prediction vocoder
/// ([`revoice`]).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct RevoiceConfig {
    /// Chance that an utterance is re-voiced.
    pub probability: f64,
    /// Range of the new fundamental (Hz), [low, high], drawn on a log scale.
    pub f0_hz: [f64; 2],
    /// Range of the intonation depth (semitones, peak), [low, high].
    pub intonation_semitones: [f64; 2],
    /// Range of the breathiness (share of the voiced source power given to noise), [low, high].
    pub breath: [f64; 2],
    /// Range of the source tilt (one-pole coefficient; positive: darker), [low, high].
    pub tilt: [f64; 2],
    /// Range of the envelope's pole radius factor γ (bandwidth expansion; 1 keeps the
    /// formants as they were), [low, high].
    pub bandwidth_factor: [f64; 2],
}

impl Default for RevoiceConfig {
    /// A fifth of utterances; fundamentals from 70 to 300 Hz (low male to child voices, common
    /// knowledge of speech, from memory), intonation up to 4 semitones, breathiness up to 0.4, a
    /// tilt from slightly brighter to darker than the analysed source, formants kept to about
    /// 250 Hz wider (γ from 0.95 to 1).
    fn default() -> Self {
        RevoiceConfig {
            probability: 0.2,
            f0_hz: [70.0, 300.0],
            intonation_semitones: [0.0, 4.0],
            breath: [0.0, 0.4],
            tilt: [-0.3, 0.6],
            bandwidth_factor: [0.95, 1.0],
        }
    }
}

impl RevoiceConfig {
    /// The same ranges, never drawn: what a training configuration without an
    /// `[augmentation.revoice]` table means.
    pub fn off() -> Self {
        RevoiceConfig {
            probability: 0.0,
            ..RevoiceConfig::default()
        }
    }

    /// Checks the `[augmentation.revoice]` settings.
    pub fn validate(&self) -> Result<(), AudioError> {
        check_probability("augmentation.revoice.probability", self.probability)?;
        check_range(
            "augmentation.revoice.f0_hz",
            self.f0_hz,
            40.0,
            600.0,
            "from 40 to 600 Hz",
        )?;
        check_range(
            "augmentation.revoice.intonation_semitones",
            self.intonation_semitones,
            0.0,
            12.0,
            "from 0 to 12 semitones",
        )?;
        check_range(
            "augmentation.revoice.breath",
            self.breath,
            0.0,
            1.0,
            "from 0 to 1",
        )?;
        check_range(
            "augmentation.revoice.tilt",
            self.tilt,
            -0.95,
            0.95,
            "from -0.95 to 0.95",
        )?;
        check_range(
            "augmentation.revoice.bandwidth_factor",
            self.bandwidth_factor,
            0.8,
            1.0,
            "from 0.8 to 1",
        )
    }
}

fn invalid(
    key: &'static str,
    expected: impl Into<String>,
    found: impl std::fmt::Debug,
) -> AudioError {
    AudioError::InvalidSetting {
        key,
        expected: expected.into(),
        found: format!("{found:?}"),
    }
}

fn check_probability(key: &'static str, value: f64) -> Result<(), AudioError> {
    if (0.0..=1.0).contains(&value) {
        Ok(())
    } else {
        Err(invalid(key, "a probability from 0 to 1", value))
    }
}

/// Checks that `[low, high]` is finite, ordered and within `[min, max]`.
fn check_range(
    key: &'static str,
    [low, high]: [f64; 2],
    min: f64,
    max: f64,
    expected: &str,
) -> Result<(), AudioError> {
    if low.is_finite() && high.is_finite() && low <= high && low >= min && high <= max {
        Ok(())
    } else {
        Err(invalid(
            key,
            format!("[low, high] with low ≤ high, {expected}"),
            [low, high],
        ))
    }
}

impl AugmentConfig {
    /// The same settings with every step's probability set to 1 (for inspecting and timing the
    /// whole chain).
    pub fn every_step(mut self) -> AugmentConfig {
        self.noise.probability = 1.0;
        self.reverb.probability = 1.0;
        self.band_limit.probability = 1.0;
        self.gain.probability = 1.0;
        self.codec.probability = 1.0;
        self.revoice.probability = 1.0;
        self
    }

    /// Checks every setting; errors name the key (`augmentation.noise.snr_db`), what was expected
    /// and what was found. [`Augmenter::new`] calls it.
    pub fn validate(&self) -> Result<(), AudioError> {
        self.noise.validate()?;
        self.reverb.validate()?;
        self.band_limit.validate()?;
        self.gain.validate()?;
        self.codec.validate()?;
        self.revoice.validate()
    }
}

impl NoiseConfig {
    /// Checks the `[augmentation.noise]` settings.
    pub fn validate(&self) -> Result<(), AudioError> {
        check_probability("augmentation.noise.probability", self.probability)?;
        check_range(
            "augmentation.noise.snr_db",
            self.snr_db,
            0.0,
            f64::INFINITY,
            "both at least 0 dB",
        )?;
        if self.kinds.is_empty() {
            return Err(invalid(
                "augmentation.noise.kinds",
                "at least one of \"white\", \"pink\", \"brown\", \"babble\" (set probability = 0 to turn noise off)",
                &self.kinds,
            ));
        }
        let [low, high] = self.babble_talkers;
        if low == 0 || low > high {
            return Err(invalid(
                "augmentation.noise.babble_talkers",
                "[low, high] with 1 ≤ low ≤ high",
                self.babble_talkers,
            ));
        }
        Ok(())
    }
}

impl ReverbConfig {
    /// Checks the `[augmentation.reverb]` settings, including that even the largest room can
    /// reach the shortest RT60 (Sabine absorption at most 1).
    pub fn validate(&self) -> Result<(), AudioError> {
        check_probability("augmentation.reverb.probability", self.probability)?;
        let [low, high] = self.rt60_seconds;
        if !(low > 0.0 && low <= high && high <= MAX_RT60_SECONDS) {
            return Err(invalid(
                "augmentation.reverb.rt60_seconds",
                format!("[low, high] with 0 < low ≤ high ≤ {MAX_RT60_SECONDS} s"),
                self.rt60_seconds,
            ));
        }
        let smallest = 3.0 * WALL_MARGIN_M;
        if !self
            .room_min_m
            .iter()
            .all(|&side| side.is_finite() && side >= smallest)
        {
            return Err(invalid(
                "augmentation.reverb.room_min_m",
                format!(
                    "three sides of at least {smallest} m (sources keep {WALL_MARGIN_M} m from the walls)"
                ),
                self.room_min_m,
            ));
        }
        if !self
            .room_max_m
            .iter()
            .zip(&self.room_min_m)
            .all(|(&max, &min)| max.is_finite() && max >= min)
        {
            return Err(invalid(
                "augmentation.reverb.room_max_m",
                format!(
                    "each side at least the smallest room's ({:?} m)",
                    self.room_min_m
                ),
                self.room_max_m,
            ));
        }
        let needed = sabine_absorption(low, self.room_max_m, SPEED_OF_SOUND);
        if needed > 1.0 {
            return Err(invalid(
                "augmentation.reverb.rt60_seconds",
                format!(
                    "a shortest RT60 of at least {:.3} s, the least the largest room ({:?} m) has even with fully absorbing walls (Sabine)",
                    low * needed,
                    self.room_max_m
                ),
                self.rt60_seconds,
            ));
        }
        if self.bank_size == 0 {
            return Err(invalid(
                "augmentation.reverb.bank_size",
                "at least 1 response",
                0,
            ));
        }
        if self.fractional_delay_taps < 3 || self.fractional_delay_taps.is_multiple_of(2) {
            return Err(invalid(
                "augmentation.reverb.fractional_delay_taps",
                "an odd number of taps, at least 3",
                self.fractional_delay_taps,
            ));
        }
        Ok(())
    }
}

impl BandLimitConfig {
    /// Checks the `[augmentation.band_limit]` settings.
    pub fn validate(&self) -> Result<(), AudioError> {
        check_probability("augmentation.band_limit.probability", self.probability)?;
        check_probability(
            "augmentation.band_limit.telephone_probability",
            self.telephone_probability,
        )?;
        let nyquist = f64::from(SAMPLE_RATE) / 2.0;
        check_range(
            "augmentation.band_limit.low_cut_hz",
            self.low_cut_hz,
            f64::MIN_POSITIVE,
            nyquist,
            "both above 0 Hz",
        )?;
        check_range(
            "augmentation.band_limit.high_cut_hz",
            self.high_cut_hz,
            self.low_cut_hz[1] + f64::EPSILON * nyquist,
            nyquist - 1.0,
            &format!(
                "above the highest low cut ({} Hz) and below half the sample rate ({nyquist} Hz)",
                self.low_cut_hz[1]
            ),
        )
    }
}

impl GainConfig {
    /// Checks the `[augmentation.gain]` settings.
    pub fn validate(&self) -> Result<(), AudioError> {
        check_probability("augmentation.gain.probability", self.probability)?;
        check_range(
            "augmentation.gain.gain_db",
            self.gain_db,
            -60.0,
            60.0,
            "within ±60 dB",
        )
    }
}

/// What [`Augmenter::apply`] did to one utterance (`None`: that step was not drawn).
#[derive(Debug, Clone, PartialEq, Default, Serialize)]
pub struct Applied {
    /// The new voice source.
    pub revoice: Option<AppliedRevoice>,
    /// The room the utterance was reverberated in.
    pub reverb: Option<AppliedReverb>,
    /// The noise added.
    pub noise: Option<AppliedNoise>,
    /// The band kept.
    pub band_limit: Option<AppliedBandLimit>,
    /// The gain applied, in dB.
    pub gain_db: Option<f64>,
    /// The re-encode.
    pub codec: Option<AppliedCodec>,
}

/// A re-voicing as drawn ([`RevoiceSettings`]).
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct AppliedRevoice {
    /// Centre of the new fundamental (Hz).
    pub f0_hz: f64,
    /// Intonation depth (semitones).
    pub intonation_semitones: f64,
    /// Breathiness.
    pub breath: f64,
    /// Source tilt.
    pub tilt: f64,
    /// Pole radius factor of the envelope.
    pub bandwidth_factor: f64,
}

/// A re-encode as drawn.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct AppliedCodec {
    /// Cut-off (Hz).
    pub cutoff_hz: f64,
    /// Band SNR (dB).
    pub band_snr_db: f64,
    /// Bit-pool floor (dB).
    pub floor_db: f64,
}

/// A reverberation drawn from the bank.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct AppliedReverb {
    /// Index of the response in the bank.
    pub bank_index: usize,
    /// Its reverberation time (seconds).
    pub rt60_seconds: f64,
    /// Its room.
    pub room: Room,
}

/// Noise as mixed.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct AppliedNoise {
    /// Which kind.
    pub kind: NoiseKind,
    /// The SNR over the utterance (dB).
    pub snr_db: f64,
    /// For babble: the indices of the utterances that were mixed in.
    pub talkers: Vec<usize>,
}

/// The band kept.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct AppliedBandLimit {
    /// High-pass cut-off (Hz).
    pub low_cut_hz: f64,
    /// Low-pass cut-off (Hz).
    pub high_cut_hz: f64,
    /// Whether this was the telephone band.
    pub telephone: bool,
}

/// A validated configuration with its room-response bank and FFT plans, shared by the threads
/// of a training loop (`apply` takes `&self`).
#[derive(Debug)]
pub struct Augmenter {
    config: AugmentConfig,
    bank: Option<RirBank>,
    plans: FftPlans,
}

impl Augmenter {
    /// Validates `config` and, when reverberation can be drawn, computes the response bank.
    pub fn new(config: AugmentConfig) -> Result<Augmenter, AudioError> {
        config.validate()?;
        let bank = (config.reverb.probability > 0.0)
            .then(|| RirBank::generate(&config.reverb, SAMPLE_RATE));
        Ok(Augmenter {
            config,
            bank,
            plans: FftPlans::new(),
        })
    }

    /// The settings.
    pub fn config(&self) -> &AugmentConfig {
        &self.config
    }

    /// The room responses (`None` when reverberation is off).
    pub fn rir_bank(&self) -> Option<&RirBank> {
        self.bank.as_ref()
    }

    /// The FFT plans, for calling the single steps directly.
    pub fn plans(&self) -> &FftPlans {
        &self.plans
    }

    /// Draws the chain for one utterance of 16 kHz samples and applies it in place (the length
    /// does not change). For each step in turn — re-voicing, reverberation, noise, band-limit,
    /// gain, codec — one uniform value decides whether it happens (with the configured
    /// probability), then its parameters are drawn. The codec and re-voicing, the newest steps,
    /// draw nothing at all when their probability is 0, so configurations without them get the
    /// same draws as before they existed. `babble` supplies the other utterances for babble noise; when babble
    /// is drawn and there is none to draw from, that is an error (a configuration that lists
    /// babble needs a source). Silent utterances get no noise.
    pub fn apply<R: Rng + ?Sized>(
        &self,
        samples: &mut [f32],
        rng: &mut R,
        babble_source: Option<&dyn BabbleSource>,
    ) -> Result<Applied, AudioError> {
        let mut applied = Applied::default();
        let config = &self.config;
        let voice = &config.revoice;
        if voice.probability > 0.0 && rng.random::<f64>() < voice.probability {
            let [low, high] = voice.f0_hz;
            let settings = RevoiceSettings {
                f0_hz: (low.ln() + rng.random::<f64>() * (high.ln() - low.ln())).exp(),
                intonation_semitones: draw(rng, voice.intonation_semitones),
                breath: draw(rng, voice.breath),
                tilt: draw(rng, voice.tilt),
                bandwidth_factor: draw(rng, voice.bandwidth_factor),
            };
            if revoice(samples, &settings, rng) {
                applied.revoice = Some(AppliedRevoice {
                    f0_hz: settings.f0_hz,
                    intonation_semitones: settings.intonation_semitones,
                    breath: settings.breath,
                    tilt: settings.tilt,
                    bandwidth_factor: settings.bandwidth_factor,
                });
            }
        }
        if rng.random::<f64>() < config.reverb.probability {
            if let Some((bank_index, response)) = self.bank.as_ref().and_then(|b| b.draw(rng)) {
                reverberate(samples, response, &self.plans);
                applied.reverb = Some(AppliedReverb {
                    bank_index,
                    rt60_seconds: response.rt60_seconds,
                    room: response.room,
                });
            }
        }
        if rng.random::<f64>() < config.noise.probability {
            applied.noise = self.add_noise(samples, rng, babble_source)?;
        }
        if rng.random::<f64>() < config.band_limit.probability {
            let band = &config.band_limit;
            let telephone = rng.random::<f64>() < band.telephone_probability;
            let [low_cut_hz, high_cut_hz] = if telephone {
                TELEPHONE_BAND_HZ
            } else {
                [draw(rng, band.low_cut_hz), draw(rng, band.high_cut_hz)]
            };
            band_limit(samples, Some(low_cut_hz), Some(high_cut_hz), SAMPLE_RATE);
            applied.band_limit = Some(AppliedBandLimit {
                low_cut_hz,
                high_cut_hz,
                telephone,
            });
        }
        if rng.random::<f64>() < config.gain.probability {
            let gain_db = draw(rng, config.gain.gain_db);
            volume_perturb(samples, 10f64.powf(gain_db / 20.0) as f32);
            applied.gain_db = Some(gain_db);
        }
        let codec = &config.codec;
        if codec.probability > 0.0 && rng.random::<f64>() < codec.probability {
            let settings = CodecSettings {
                cutoff_hz: draw(rng, codec.cutoff_hz),
                band_snr_db: draw(rng, codec.band_snr_db),
                floor_db: draw(rng, codec.floor_db),
            };
            simulate_codec(samples, &settings, &self.plans);
            applied.codec = Some(AppliedCodec {
                cutoff_hz: settings.cutoff_hz,
                band_snr_db: settings.band_snr_db,
                floor_db: settings.floor_db,
            });
        }
        Ok(applied)
    }

    fn add_noise<R: Rng + ?Sized>(
        &self,
        samples: &mut [f32],
        rng: &mut R,
        babble_source: Option<&dyn BabbleSource>,
    ) -> Result<Option<AppliedNoise>, AudioError> {
        let config = &self.config.noise;
        let kind = config.kinds[rng.random_range(0..config.kinds.len())];
        let snr_db = draw(rng, config.snr_db);
        let (noise, talkers) = match kind.spectral_exponent() {
            Some(exponent) => (
                Some(coloured_noise(
                    samples.len(),
                    exponent,
                    SAMPLE_RATE,
                    rng,
                    &self.plans,
                )),
                Vec::new(),
            ),
            None if kind == NoiseKind::Hum => {
                let settings = HumSettings::draw(SAMPLE_RATE, rng);
                (
                    Some(hum(samples.len(), SAMPLE_RATE, &settings, rng)),
                    Vec::new(),
                )
            }
            None => {
                let source = babble_source
                    .filter(|source| source.utterance_count() > 0)
                    .ok_or(AudioError::NoBabbleSource)?;
                let [low, high] = config.babble_talkers;
                let wanted = rng.random_range(low..=high).min(source.utterance_count());
                let indices =
                    rand::seq::index::sample(rng, source.utterance_count(), wanted).into_vec();
                let mut talkers = Vec::with_capacity(wanted);
                let mut used = Vec::with_capacity(wanted);
                for index in indices {
                    if let Some(samples) = source.utterance(index) {
                        if mean_power(&samples) > 0.0 {
                            talkers.push(samples);
                            used.push(index);
                        }
                    }
                }
                (babble(&talkers, samples.len(), rng), used)
            }
        };
        Ok(noise
            .and_then(|noise| mix_at_snr(samples, &noise, snr_db))
            .map(|_| AppliedNoise {
                kind,
                snr_db,
                talkers,
            }))
    }
}

/// A value drawn uniformly in `[low, high]` (`low` itself when the range is a point).
pub(crate) fn draw<R: Rng + ?Sized>(rng: &mut R, [low, high]: [f64; 2]) -> f64 {
    if high > low {
        rng.random_range(low..=high)
    } else {
        low
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;
    use rand_chacha::ChaCha8Rng;

    fn parse(text: &str) -> Result<AugmentConfig, String> {
        let config: AugmentConfig = toml::from_str(text).map_err(|e| e.to_string())?;
        config.validate().map_err(|e| e.to_string())?;
        Ok(config)
    }

    #[test]
    fn defaults_are_valid_and_toml_round_trips() {
        AugmentConfig::default().validate().unwrap();
        let text = toml::to_string(&AugmentConfig::default()).unwrap();
        assert_eq!(parse(&text).unwrap(), AugmentConfig::default());
        assert_eq!(parse("").unwrap(), AugmentConfig::default());
    }

    #[test]
    fn out_of_range_settings_name_their_key() {
        for (text, key, found) in [
            (
                "[noise]\nsnr_db = [-5.0, 10.0]",
                "augmentation.noise.snr_db",
                "-5.0",
            ),
            (
                "[noise]\nsnr_db = [20.0, 5.0]",
                "augmentation.noise.snr_db",
                "[20.0, 5.0]",
            ),
            ("[noise]\nkinds = []", "augmentation.noise.kinds", "[]"),
            (
                "[noise]\nprobability = 1.5",
                "augmentation.noise.probability",
                "1.5",
            ),
            (
                "[noise]\nbabble_talkers = [0, 3]",
                "augmentation.noise.babble_talkers",
                "[0, 3]",
            ),
            (
                "[reverb]\nrt60_seconds = [0.0, 0.5]",
                "augmentation.reverb.rt60_seconds",
                "0.0",
            ),
            (
                "[reverb]\nrt60_seconds = [-0.3, 0.5]",
                "augmentation.reverb.rt60_seconds",
                "-0.3",
            ),
            (
                "[reverb]\nrt60_seconds = [0.1, 0.5]",
                "augmentation.reverb.rt60_seconds",
                "0.1",
            ),
            (
                "[reverb]\nprobability = -0.1",
                "augmentation.reverb.probability",
                "-0.1",
            ),
            (
                "[reverb]\nroom_min_m = [1.0, 3.0, 2.4]",
                "augmentation.reverb.room_min_m",
                "1.0",
            ),
            (
                "[reverb]\nroom_max_m = [2.0, 8.0, 4.0]",
                "augmentation.reverb.room_max_m",
                "2.0",
            ),
            (
                "[reverb]\nbank_size = 0",
                "augmentation.reverb.bank_size",
                "0",
            ),
            (
                "[reverb]\nfractional_delay_taps = 80",
                "augmentation.reverb.fractional_delay_taps",
                "80",
            ),
            (
                "[band_limit]\nprobability = 2.0",
                "augmentation.band_limit.probability",
                "2.0",
            ),
            (
                "[band_limit]\ntelephone_probability = -1.0",
                "augmentation.band_limit.telephone_probability",
                "-1.0",
            ),
            (
                "[band_limit]\nhigh_cut_hz = [3000.0, 9000.0]",
                "augmentation.band_limit.high_cut_hz",
                "9000.0",
            ),
            (
                "[band_limit]\nlow_cut_hz = [0.0, 300.0]",
                "augmentation.band_limit.low_cut_hz",
                "0.0",
            ),
            (
                "[gain]\ngain_db = [6.0, -6.0]",
                "augmentation.gain.gain_db",
                "[6.0, -6.0]",
            ),
            (
                "[revoice]\nf0_hz = [30.0, 200.0]",
                "augmentation.revoice.f0_hz",
                "30.0",
            ),
            (
                "[revoice]\nbandwidth_factor = [0.9, 1.1]",
                "augmentation.revoice.bandwidth_factor",
                "1.1",
            ),
            (
                "[revoice]\ntilt = [0.5, -0.5]",
                "augmentation.revoice.tilt",
                "[0.5, -0.5]",
            ),
            (
                "[revoice]\nbreath = [0.0, 2.0]",
                "augmentation.revoice.breath",
                "2.0",
            ),
            (
                "[codec]\nprobability = 1.2",
                "augmentation.codec.probability",
                "1.2",
            ),
            (
                "[codec]\ncutoff_hz = [4000.0, 9000.0]",
                "augmentation.codec.cutoff_hz",
                "9000.0",
            ),
            (
                "[codec]\nband_snr_db = [-3.0, 10.0]",
                "augmentation.codec.band_snr_db",
                "-3.0",
            ),
            (
                "[codec]\nfloor_db = [0.0, 30.0]",
                "augmentation.codec.floor_db",
                "0.0",
            ),
        ] {
            let message = parse(text).unwrap_err();
            assert!(
                message.starts_with(key) && message.contains("expected") && message.contains(found),
                "{text}: {message}"
            );
        }
        // The shortest RT60 the largest room allows (Sabine), stated in the message.
        let message = parse("[reverb]\nrt60_seconds = [0.1, 0.5]").unwrap_err();
        assert!(message.contains("0.170 s"), "{message}");
        let message = parse("[noise]\nsnr = [5.0, 10.0]").unwrap_err();
        assert!(
            message.contains("unknown field") && message.contains("snr"),
            "{message}"
        );
    }

    fn always(kinds: Vec<NoiseKind>) -> AugmentConfig {
        let mut config = AugmentConfig::default().every_step();
        config.noise.kinds = kinds;
        config.reverb.bank_size = 3;
        config.reverb.rt60_seconds = [0.2, 0.4];
        config
    }

    /// `config` with every step's probability 0; a test switches on the step it looks at.
    fn all_off(mut config: AugmentConfig) -> AugmentConfig {
        config.revoice.probability = 0.0;
        config.reverb.probability = 0.0;
        config.noise.probability = 0.0;
        config.band_limit.probability = 0.0;
        config.gain.probability = 0.0;
        config.codec.probability = 0.0;
        config
    }

    fn utterance(seed: u64) -> Vec<f32> {
        (0..24_000)
            .map(|n| 0.2 * ((n as f32) * (0.03 + seed as f32 * 0.01)).sin())
            .collect()
    }

    #[test]
    fn the_chain_is_reproducible_from_the_generator_and_reports_what_it_drew() {
        let augmenter = Augmenter::new(always(vec![NoiseKind::Babble])).unwrap();
        let others: Vec<Vec<f32>> = (1..6).map(utterance).collect();
        let run = |seed: u64| {
            let mut samples = utterance(0);
            let mut rng = ChaCha8Rng::seed_from_u64(seed);
            let applied = augmenter
                .apply(&mut samples, &mut rng, Some(&others))
                .unwrap();
            (samples, applied)
        };
        let (first, applied) = run(5);
        assert_eq!(run(5), (first.clone(), applied.clone()));
        assert_ne!(run(6).0, first);
        assert!(applied.reverb.is_some() && applied.band_limit.is_some());
        let noise = applied.noise.unwrap();
        assert_eq!(noise.kind, NoiseKind::Babble);
        assert!(
            (3..=5).contains(&noise.talkers.len()),
            "{:?}",
            noise.talkers
        );
        assert!((5.0..=20.0).contains(&noise.snr_db));
        assert!(applied.gain_db.is_some_and(|db| (-6.0..=6.0).contains(&db)));
        let codec = applied.codec.unwrap();
        assert!((4_000.0..=7_000.0).contains(&codec.cutoff_hz));
        assert!((6.0..=18.0).contains(&codec.band_snr_db));
        assert!((25.0..=40.0).contains(&codec.floor_db));
        assert_eq!(first.len(), 24_000);
        assert!(first.iter().all(|x| x.is_finite()));
    }

    #[test]
    fn hum_is_a_noise_kind_of_the_config_file_and_needs_no_source() {
        let config = parse("[noise]\nprobability = 1.0\nkinds = [\"hum\"]").unwrap();
        assert_eq!(config.noise.kinds, [NoiseKind::Hum]);
        let mut only_noise = all_off(config);
        only_noise.noise.probability = 1.0;
        let augmenter = Augmenter::new(only_noise).unwrap();
        let clean = utterance(0);
        let mut samples = clean.clone();
        let mut rng = ChaCha8Rng::seed_from_u64(2);
        let applied = augmenter.apply(&mut samples, &mut rng, None).unwrap();
        let noise = applied.noise.unwrap();
        assert_eq!(noise.kind, NoiseKind::Hum);
        // What was added is at the drawn SNR, over the whole utterance.
        let added: Vec<f32> = samples.iter().zip(&clean).map(|(a, b)| a - b).collect();
        let measured = 10.0 * (mean_power(&clean) / mean_power(&added)).log10();
        assert!(
            (measured - noise.snr_db).abs() < 1e-3,
            "{measured} {noise:?}"
        );
    }

    #[test]
    fn an_augmenter_can_be_shared_by_training_threads() {
        fn shareable<T: Send + Sync>() {}
        shareable::<Augmenter>();
    }

    #[test]
    fn babble_without_a_source_is_an_error_and_probability_zero_does_nothing() {
        let augmenter = Augmenter::new(always(vec![NoiseKind::Babble])).unwrap();
        let mut rng = ChaCha8Rng::seed_from_u64(1);
        let error = augmenter
            .apply(&mut utterance(0), &mut rng, None)
            .unwrap_err()
            .to_string();
        assert!(error.contains("babble"), "{error}");
        let augmenter = Augmenter::new(all_off(AugmentConfig::default())).unwrap();
        assert!(augmenter.rir_bank().is_none());
        let mut samples = utterance(0);
        let applied = augmenter.apply(&mut samples, &mut rng, None).unwrap();
        assert_eq!(applied, Applied::default());
        assert_eq!(samples, utterance(0));
    }

    /// A configuration without the codec and re-voicing draws exactly what it drew before they
    /// existed: the generator is left where the gain step left it.
    #[test]
    fn a_codec_and_a_revoicing_that_are_off_draw_nothing() {
        let mut config = all_off(AugmentConfig::default());
        config.gain.probability = 1.0;
        config.codec = CodecConfig::off();
        config.revoice = RevoiceConfig::off();
        let augmenter = Augmenter::new(config).unwrap();
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        let applied = augmenter.apply(&mut utterance(0), &mut rng, None).unwrap();
        assert!(applied.codec.is_none() && applied.revoice.is_none() && applied.gain_db.is_some());
        // The draws by hand: four decisions (reverb, noise, band, gain) and the gain.
        let mut replay = ChaCha8Rng::seed_from_u64(3);
        for _ in 0..4 {
            let _ = replay.random::<f64>();
        }
        assert_eq!(Some(draw(&mut replay, [-6.0, 6.0])), applied.gain_db);
        assert_eq!(replay.random::<u64>(), rng.random::<u64>());
    }

    #[test]
    fn the_revoice_step_changes_the_audio_keeps_its_power_and_records_its_draw() {
        let mut config = all_off(AugmentConfig::default());
        config.revoice.probability = 1.0;
        let augmenter = Augmenter::new(config.clone()).unwrap();
        let mut rng = ChaCha8Rng::seed_from_u64(17);
        let mut samples = utterance(1);
        let applied = augmenter.apply(&mut samples, &mut rng, None).unwrap();
        let drawn = applied.revoice.expect("probability 1");
        let voice = &config.revoice;
        assert!((voice.f0_hz[0]..=voice.f0_hz[1]).contains(&drawn.f0_hz));
        assert!((voice.bandwidth_factor[0]..=voice.bandwidth_factor[1])
            .contains(&drawn.bandwidth_factor));
        assert!(samples.iter().all(|s| s.is_finite()));
        assert_ne!(samples, utterance(1));
        let ratio = mean_power(&samples) / mean_power(&utterance(1));
        assert!((ratio - 1.0).abs() < 1e-3, "{ratio}");
    }

    #[test]
    fn the_codec_step_changes_the_audio_and_keeps_it_finite() {
        let mut config = all_off(AugmentConfig::default());
        config.codec.probability = 1.0;
        let augmenter = Augmenter::new(config).unwrap();
        let mut rng = ChaCha8Rng::seed_from_u64(11);
        let mut samples = utterance(2);
        let applied = augmenter.apply(&mut samples, &mut rng, None).unwrap();
        assert!(applied.codec.is_some());
        assert_eq!(samples.len(), 24_000);
        assert!(samples.iter().all(|x| x.is_finite()));
        assert_ne!(samples, utterance(2));
    }
}
