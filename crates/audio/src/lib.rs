//! Audio input: decoding WAV/FLAC/MP3/Ogg Vorbis, resampling to 16 kHz mono, cutting segments, and waveform augmentation.
#![deny(missing_docs)]
