#!/usr/bin/env bash
# Regenerates the seed files of the fuzz campaigns (crates/fuzz/seeds/). Small on purpose: the
# mutator works fastest on files of a few kilobytes. Text seeds (manifest, lexicon, variants,
# hypotheses, sweep and rule files) are written by hand and kept as they are; this script makes
# the audio seeds (sox, ffmpeg, lame, oggenc) and the seeds written by isogloss itself (a tiny
# model, checkpoint, feature file, ARPA models and a G2P model from the mini corpus).
set -euo pipefail
cd "$(dirname "$0")/.."
seeds=crates/fuzz/seeds
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT
isogloss=target/release/isogloss
cargo build --release -p isogloss

# Audio: every sample format WAV offers, FLAC mono and stereo, MP3 with and without an ID3v2
# tag and with a VBR (Xing) header, Ogg Vorbis mono and stereo.
sox -n -r 16000 -c 1 -b 16 $seeds/wav/mono16k-s16.wav synth 0.05 sine 440 vol 0.5
sox -n -r 8000 -c 2 -b 8 -e unsigned-integer $seeds/wav/stereo8k-u8.wav synth 0.1 sine 300
sox -n -r 44100 -c 1 -b 24 $seeds/wav/mono44k-s24.wav synth 0.02 sine 1000
sox -n -r 48000 -c 1 -b 32 -e floating-point $seeds/wav/mono48k-f32.wav synth 0.02 sine 200
sox -n -r 22050 -c 3 -b 16 $seeds/wav/three22k-extensible.wav synth 0.01 sine 500
ffmpeg -y -loglevel error -f lavfi -i "sine=frequency=440:sample_rate=11025:duration=0.05" \
    -metadata title=interview -c:a pcm_s16le $seeds/wav/mono11k-list.wav
sox -n -r 16000 -c 1 $seeds/flac/mono16k.flac synth 0.1 sine 440 vol 0.5
sox -n -r 44100 -c 2 $seeds/flac/stereo44k.flac synth 0.05 sine 440 vol 0.5
sox -n -r 16000 -c 1 -b 16 "$work/tone16k.wav" synth 0.3 sine 440 vol 0.5
lame --quiet -b 16 --tt interview --ta archive --add-id3v2 "$work/tone16k.wav" $seeds/mp3/id3v2.mp3
lame --quiet -b 24 -t "$work/tone16k.wav" $seeds/mp3/plain.mp3
lame --quiet -V 9 "$work/tone16k.wav" $seeds/mp3/vbr-xing.mp3
oggenc --quiet -q 0 --serial 1 -o $seeds/ogg/mono16k.ogg "$work/tone16k.wav"
sox -n -r 22050 -c 2 -b 16 "$work/tone22k.wav" synth 0.1 sine 300
oggenc --quiet -q 0 --serial 2 -o $seeds/ogg/stereo22k.ogg "$work/tone22k.wav"

# A two-layer model of 6 units wide on 8 log-mel filters, one epoch on the mini corpus.
$isogloss train --manifest tests/data/mini/manifest.tsv --dev tests/data/mini/manifest.tsv \
    --column dialectal --out "$work/model" --config $seeds/model-config/tiny.toml --epochs 1
cp "$work/model/model.toml" $seeds/model-toml/
cp "$work/model/model.safetensors" $seeds/model-weights/
cp "$work/model/model.toml" "$work/model/model.safetensors" $seeds/companions/
cp "$work/model/checkpoint.safetensors" $seeds/checkpoint/
printf 'kind = "logmel"\nmel_filters = 8\n' > "$work/f8.toml"
$isogloss features --config "$work/f8.toml" --out $seeds/features-file/short.safetensors \
    $seeds/wav/mono16k-s16.wav

# Language models from the mini corpus's four sentences; the gzip seed compresses the trigram.
tail -n +2 tests/data/mini/manifest.tsv | cut -f7 > "$work/text.txt"
$isogloss lm build --sentences "$work/text.txt" --order 3 --out $seeds/arpa/tri.arpa
$isogloss lm build --sentences "$work/text.txt" --order 2 --smoothing witten-bell \
    --out $seeds/arpa/bi-wb.arpa
gzip -c $seeds/arpa/tri.arpa > $seeds/arpa-gzip/tri.arpa.gz
head -40 tests/fixtures/lexicon/cmudict-subset.tsv > "$work/dict.tsv"
$isogloss lexicon train-g2p --lexicon "$work/dict.tsv" --out $seeds/g2p/small.g2p --order 2 \
    --iterations 3
