#!/usr/bin/env bash
# Regenerates the synthetic speech used by the demo and the tests:
#   dsp/liftmag/data/talker_a.flac  (target talker, about 10 s)
#   dsp/liftmag/data/talker_b.flac  (competing talker / radio, about 46 s)
# The sentences are the project's own, invented for this purpose (see dsp/liftmag/data/README.md).
#
# Needs the Debian packages espeak-ng (formant synthesiser, its own built-in voices only)
# and sox. CI does not run this script: the FLAC files are committed. Re-running it on a
# machine with other espeak-ng or sox versions may give slightly different samples.
#
# Output: mono, 16 kHz, 16-bit PCM FLAC, peak normalised to -3 dBFS, sentences separated by
# short pauses so that speech presence varies the way it does in dialogue.
set -euo pipefail
for tool in espeak-ng sox; do
  command -v "$tool" >/dev/null || { echo "make_speech.sh needs $tool (apt-get install $tool)" >&2; exit 1; }
done
here="$(cd "$(dirname "$0")" && pwd)"
out="$here/../dsp/liftmag/data"
mkdir -p "$out"
work="$(mktemp -d)"
trap 'rm -rf "$work"' EXIT

# One sentence -> 16 kHz WAV with leading/trailing silence trimmed, then a pause appended.
# $1 voice, $2 words per minute, $3 pitch (0-99), $4 pause after (s), $5 output, $6 text
say() {
  espeak-ng -v "$1" -s "$2" -p "$3" -w "$work/raw.wav" "$6"
  sox -D "$work/raw.wav" -r 16000 -b 16 "$5" rate -v 16k \
    silence 1 0.01 -55d reverse silence 1 0.01 -55d reverse pad 0 "$4"
}

# $1 voice, $2 wpm, $3 pitch, $4 output flac; stdin: lines "pause_s|sentence"
speak_all() {
  local i=0 parts=()
  sox -D -n -r 16000 -b 16 -c 1 "$work/lead.wav" trim 0 0.15
  parts+=("$work/lead.wav")
  while IFS='|' read -r pause text; do
    [ -z "$text" ] && continue
    i=$((i + 1))
    say "$1" "$2" "$3" "$pause" "$work/s$i.wav" "$text"
    parts+=("$work/s$i.wav")
  done
  sox -D "${parts[@]}" -b 16 "$work/joined.wav"
  sox -D "$work/joined.wav" -r 16000 -c 1 -b 16 "$4" gain -n -3
  printf '%s: %s s\n' "$(basename "$4")" "$(soxi -D "$4")"
}

# Talker A: a guest at an outdoor interview (the target).
speak_all "en-gb-x-rp+m3" 160 45 "$out/talker_a.flac" <<'TEXT'
0.45|The old footbridge by the allotments was closed for most of the spring.
0.40|We put in new oak beams and painted the railings green.
0.30|Now people can walk along the river again.
TEXT

# Talker B: a presenter on a small radio (the competing talker), a different voice and pitch.
speak_all "en-us+f2" 178 70 "$out/talker_b.flac" <<'TEXT'
0.35|Good afternoon, here is the weather for the valley and the hills.
0.30|Clouds will gather over the coast this evening, with light rain after midnight.
0.40|Tomorrow starts cool and grey, but the sun should break through by lunchtime.
0.30|Winds stay gentle from the west, and it will reach about fourteen degrees.
0.60|In the garden this week, it is a good time to plant out beans and lettuce.
0.30|Keep young seedlings covered on cold nights, and water them early in the morning.
0.45|If slugs are a problem, a ring of sharp grit around each plant can help.
0.50|A listener in the north asks when to prune the apple trees.
0.30|The best time is late winter, while the branches are still bare.
0.40|Cut away any crossing branches first, then shorten the long shoots by a third.
0.60|And finally, the market on the square opens an hour earlier on Saturday.
TEXT
