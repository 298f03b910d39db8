#!/usr/bin/env bash
# Real microphone recordings of ticking timepieces for the tests (tests/test_real_recordings.py).
#
# They are not in this repository: they come from Debian's package gnome-shell-pomodoro-data
# (the background sounds of a time-management app; GPL-3+, see the package's copyright file),
# fetched with apt-get and unpacked here, and checked against the digests below so the tests
# always hear the same audio:
#   wall-clock.ogg   15 s, 48 kHz mono Vorbis: a clock beating once a second, each beat a
#                    cluster of impacts over ~40 ms, beats scattered by ~10 ms (not quartz)
#   kitchen-timer.ogg 4 s, 44.1 kHz stereo Vorbis: a mechanical timer's escapement, ~4.5 beats
#                    a second, tick and tock of unequal length
#
#   bash scripts/fetch-real-recordings.sh [DEST]     # default DEST: recordings/real
#
# Needs apt-get and dpkg-deb (Debian/Ubuntu); no root needed where the package lists are current.
set -euo pipefail
cd "$(dirname "$0")/.."
dest=${1:-recordings/real}
pkg=gnome-shell-pomodoro-data
declare -A want=(
  [wall-clock.ogg]="clock.ogg a43d715b09ea0873c6e728c2c087e5544cd1c0cacddac633a690da094a5ba7bd"
  [kitchen-timer.ogg]="timer.ogg cf9aa21c5ca1683596daf0ca7aa96105c68053fc01f384391691deb0b5e3206e"
)
ok() { [ -f "$dest/$1" ] && [ "$(sha256sum "$dest/$1" | cut -d' ' -f1)" = "$2" ]; }
missing=0
for name in "${!want[@]}"; do
  read -r _ sum <<<"${want[$name]}"
  ok "$name" "$sum" || missing=1
done
if [ "$missing" = 0 ]; then
  echo "real recordings: present in $dest"
  exit 0
fi
tmp=$(mktemp -d)
trap 'rm -rf "$tmp"' EXIT
chmod 755 "$tmp"  # apt's download sandbox user must be able to write here
if ! (cd "$tmp" && apt-get download -q "$pkg" >/dev/null 2>&1); then
  apt-get update -qq >/dev/null 2>&1 || true
  (cd "$tmp" && apt-get download -q "$pkg" >/dev/null 2>&1) || {
    echo "fetch-real-recordings: could not download the Debian package $pkg" >&2
    exit 1
  }
fi
dpkg-deb -x "$tmp"/"$pkg"_*.deb "$tmp/x"
mkdir -p "$dest"
for name in "${!want[@]}"; do
  read -r src sum <<<"${want[$name]}"
  cp "$tmp/x/usr/share/gnome-pomodoro/sounds/$src" "$dest/$name"
  ok "$name" "$sum" || {
    echo "fetch-real-recordings: $name from $pkg is not the recording the tests expect (digest differs)" >&2
    exit 1
  }
done
cp "$tmp/x/usr/share/doc/$pkg/copyright" "$dest/COPYRIGHT-$pkg"
echo "real recordings: fetched into $dest from $pkg"
