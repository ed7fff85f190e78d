#!/usr/bin/env bash
# Regenerates the tiny real-audio fixtures used by crates/audio/tests/containers.rs: one short
# synthetic utterance (espeak-ng) in each container the audio crate reads. Needs espeak-ng, sox,
# flac, oggenc (vorbis-tools) and lame.
set -euo pipefail
out="$(dirname "$0")/../tests/fixtures/audio"
mkdir -p "$out"
tmp="$(mktemp -d)"; trap 'rm -rf "$tmp"' EXIT
espeak-ng -v en -s 150 -w "$tmp/raw.wav" "the mill by the river"
# espeak-ng writes 22.05 kHz mono 16-bit; keep that rate (the decoder must resample it).
sox "$tmp/raw.wav" -b 16 "$out/speech.wav"
flac --silent --force --best -o "$out/speech.flac" "$out/speech.wav"
oggenc --quiet -q 2 -o "$out/speech.ogg" "$out/speech.wav"
# lame writes the LAME tag that states encoder delay and padding, so decoders can trim them.
lame --quiet -b 64 "$out/speech.wav" "$out/speech.mp3"
# A stereo 44.1 kHz FLAC: both channels carry the utterance, so the mono mix equals it.
sox "$out/speech.wav" -r 44100 -c 2 "$tmp/stereo.wav"
flac --silent --force -o "$out/speech-stereo-44k.flac" "$tmp/stereo.wav"
ls -l "$out"
