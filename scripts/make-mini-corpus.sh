#!/usr/bin/env bash
# Regenerates tests/data/mini: four short synthetic utterances (espeak-ng) of two speakers from
# two regions of the invented Wendle Valley archive, as 16 kHz FLAC. Two rows cut segments out of
# one recording, as manifests of long interviews do. Needs espeak-ng, sox and flac.
set -euo pipefail
out="$(dirname "$0")/../tests/data/mini"
mkdir -p "$out/audio"
tmp="$(mktemp -d)"; trap 'rm -rf "$tmp"' EXIT

say() { # voice, text, output wav (16 kHz mono 16-bit)
  espeak-ng -v "$1" -s 185 -w "$tmp/raw.wav" "$2"
  sox "$tmp/raw.wav" -r 16000 -c 1 -b 16 "$3" silence 1 0.02 0.5% reverse silence 1 0.02 0.5% reverse
}
seconds() { soxi -D "$1"; }

say en-gb-scotland "we went doon tae the river" "$tmp/f1.wav"
say en-gb-scotland "the hoose stood aboot a mile oot" "$tmp/f2.wav"
say en-gb-x-gbclan "it were cowd in the owd days" "$tmp/m1.wav"
say en-gb-x-gbclan "we had nowt but salt" "$tmp/m2.wav"
flac --silent --force --best -o "$out/audio/fells07-001.flac" "$tmp/f1.wav"
flac --silent --force --best -o "$out/audio/fells07-002.flac" "$tmp/f2.wav"
# One recording holding both marsh utterances with 0.3 s of silence around and between them.
sox -n -r 16000 -c 1 -b 16 "$tmp/pause.wav" trim 0 0.3
sox "$tmp/pause.wav" "$tmp/m1.wav" "$tmp/pause.wav" "$tmp/m2.wav" "$tmp/pause.wav" "$tmp/marsh.wav"
flac --silent --force --best -o "$out/audio/marsh03-visit.flac" "$tmp/marsh.wav"

m1=$(seconds "$tmp/m1.wav"); m2=$(seconds "$tmp/m2.wav")
s1=0.3; e1=$(echo "0.3 + $m1" | bc -l); s2=$(echo "$e1 + 0.3" | bc -l); e2=$(echo "$s2 + $m2" | bc -l)
r() { printf '%.2f' "$1"; }
{
  printf 'id\taudio\tstart\tend\tspeaker\tdialect\tdialectal\tnormalized\n'
  printf 'fells07-001\taudio/fells07-001.flac\t\t\tfells07\tfells\twe went doon tae the river\twe went down to the river\n'
  printf 'fells07-002\taudio/fells07-002.flac\t\t\tfells07\tfells\tthe hoose stood aboot a mile oot\tthe house stood about a mile out\n'
  printf 'marsh03-001\taudio/marsh03-visit.flac\t%s\t%s\tmarsh03\tmarsh\tit were cowd in the owd days\tit was cold in the old days\n' "$(r "$s1")" "$(r "$e1")"
  printf 'marsh03-002\taudio/marsh03-visit.flac\t%s\t%s\tmarsh03\tmarsh\twe had nowt but salt\twe had nothing but salt\n' "$(r "$s2")" "$(r "$e2")"
} > "$out/manifest.tsv"
du -sh "$out"; cat "$out/manifest.tsv"
