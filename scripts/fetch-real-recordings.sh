#!/usr/bin/env bash
# Real microphone recordings of ticking timepieces for the tests (tests/test_real_recordings.py).
#
# They are not in this repository: they come from Debian packages, fetched with apt-get and
# unpacked here, and checked against the digests below so the tests always hear the same audio:
#   from gnome-shell-pomodoro-data (the background sounds of a time-management app; GPL-3+):
#   wall-clock.ogg   15 s, 48 kHz mono Vorbis: a clock beating once a second, each beat a
#                    cluster of impacts over ~40 ms, beats scattered by ~10 ms (not quartz)
#   kitchen-timer.ogg 4 s, 44.1 kHz stereo Vorbis: a mechanical timer's escapement, ~4.5 beats
#                    a second, tick and tock of unequal length
#   from qabcs-data (the sounds of an alphabet-learning program; GPL-3+):
#   two-ticks.ogg    1.45 s, 44.1 kHz mono Vorbis: two steps of a clock one second apart, each a
#                    burst of ~60 ms behind a noise gate (digital silence between)
# Each package's copyright file is copied beside them.
#
#   bash scripts/fetch-real-recordings.sh [DEST]     # default DEST: recordings/real
#
# Needs apt-get and dpkg-deb (Debian/Ubuntu); no root needed where the package lists are current.
set -euo pipefail
cd "$(dirname "$0")/.."
dest=${1:-recordings/real}
# name -> "package path-in-package sha256"
declare -A want=(
  [wall-clock.ogg]="gnome-shell-pomodoro-data usr/share/gnome-pomodoro/sounds/clock.ogg a43d715b09ea0873c6e728c2c087e5544cd1c0cacddac633a690da094a5ba7bd"
  [kitchen-timer.ogg]="gnome-shell-pomodoro-data usr/share/gnome-pomodoro/sounds/timer.ogg cf9aa21c5ca1683596daf0ca7aa96105c68053fc01f384391691deb0b5e3206e"
  [two-ticks.ogg]="qabcs-data usr/share/qabcs/abcs/all/noises/clock.ogg 227f1ab6af9ee2d87556623d624b81a131909ba4342c43219b7b30e74a3ad9d4"
)
ok() { [ -f "$dest/$1" ] && [ "$(sha256sum "$dest/$1" | cut -d' ' -f1)" = "$2" ]; }
declare -A need=()
for name in "${!want[@]}"; do
  read -r pkg _ sum <<<"${want[$name]}"
  ok "$name" "$sum" || need[$pkg]=1
done
if [ "${#need[@]}" = 0 ]; then
  echo "real recordings: present in $dest"
  exit 0
fi
tmp=$(mktemp -d)
trap 'rm -rf "$tmp"' EXIT
chmod 755 "$tmp"  # apt's download sandbox user must be able to write here
mkdir -p "$dest"
updated=0
for pkg in "${!need[@]}"; do
  if ! (cd "$tmp" && apt-get download -q "$pkg" >/dev/null 2>&1); then
    [ "$updated" = 1 ] || { apt-get update -qq >/dev/null 2>&1 || true; updated=1; }
    (cd "$tmp" && apt-get download -q "$pkg" >/dev/null 2>&1) || {
      echo "fetch-real-recordings: could not download the Debian package $pkg" >&2
      exit 1
    }
  fi
  dpkg-deb -x "$tmp"/"$pkg"_*.deb "$tmp/$pkg"
  cp "$tmp/$pkg/usr/share/doc/$pkg/copyright" "$dest/COPYRIGHT-$pkg"
  for name in "${!want[@]}"; do
    read -r p src sum <<<"${want[$name]}"
    [ "$p" = "$pkg" ] || continue
    cp "$tmp/$pkg/$src" "$dest/$name"
    ok "$name" "$sum" || {
      echo "fetch-real-recordings: $name from $pkg is not the recording the tests expect (digest differs)" >&2
      exit 1
    }
  done
  echo "real recordings: fetched $pkg's into $dest"
done
