#!/usr/bin/env bash
# A virtual microphone for tests: a PulseAudio null sink whose monitor is captured through the
# ALSA 'pulse' device.  Whatever is played into the sink (paplay --device=$SINK) comes back,
# sample for sample, from PortAudio's 'pulse' input.  No sound hardware needed.
#
#   bash scripts/audio-loopback.sh install   # apt packages (Debian/Ubuntu, as root)
#   bash scripts/audio-loopback.sh start     # start the server; prints the variables clients need
#   bash scripts/audio-loopback.sh stop      # stop it by its pid file
#
# Clients need PULSE_SERVER=unix:$PA_DIR/native and PULSE_COOKIE=$PA_DIR/cookie, set before
# sounddevice is imported.  Settings: PA_DIR (default /tmp/tickscope-loopback), SINK (tsink).
set -euo pipefail
PA_DIR=${PA_DIR:-/tmp/tickscope-loopback}
SINK=${SINK:-tsink}

alive() { local st; st=$(sed 's/.*) //' "/proc/$1/stat" 2>/dev/null | cut -d' ' -f1) || return 1; [ -n "$st" ] && [ "$st" != Z ]; }
server_pid() { local p; p=$(cat "$PA_DIR/run/pid" 2>/dev/null) || return 1; alive "$p" && echo "$p"; }

install() {
  export DEBIAN_FRONTEND=noninteractive
  local need=() p
  for p in libportaudio2 pulseaudio pulseaudio-utils libasound2-plugins; do
    dpkg-query -W -f='${Status}' "$p" 2>/dev/null | grep -q 'ok installed' || need+=("$p")
  done
  if ((${#need[@]})); then
    apt-get update -qq
    apt-get install -y -q --no-install-recommends -o DPkg::Lock::Timeout=300 "${need[@]}"
  fi
}

start() {
  if server_pid >/dev/null; then echo "already running"; return 0; fi
  mkdir -p "$PA_DIR" && chmod 700 "$PA_DIR"
  rm -f "$PA_DIR/run/pid" "$PA_DIR/native"  # stale files after a crash make the daemon refuse to start
  # 48 kHz mono float32 sink and capture: nothing is resampled, the loopback is bit-exact
  cat > "$PA_DIR/server.pa" <<PA
load-module module-native-protocol-unix socket=$PA_DIR/native auth-anonymous=1
load-module module-null-sink sink_name=$SINK format=float32le rate=48000 channels=1 sink_properties=device.description=$SINK
set-default-sink $SINK
set-default-source $SINK.monitor
PA
  (
    export HOME="$PA_DIR" XDG_CONFIG_HOME="$PA_DIR/config" XDG_RUNTIME_DIR="$PA_DIR/xdg" \
           PULSE_RUNTIME_PATH="$PA_DIR/run" PULSE_STATE_PATH="$PA_DIR/state"
    unset PULSE_SERVER
    mkdir -p "$XDG_CONFIG_HOME" "$XDG_RUNTIME_DIR" && chmod 700 "$XDG_RUNTIME_DIR"
    pulseaudio -n -F "$PA_DIR/server.pa" --daemonize=yes --use-pid-file=yes \
      --exit-idle-time=-1 --log-target="file:$PA_DIR/pulseaudio.log" --log-level=info </dev/null
  ) || { echo "pulseaudio failed to start:" >&2; cat "$PA_DIR/pulseaudio.log" >&2; return 1; }
  export PULSE_SERVER="unix:$PA_DIR/native" PULSE_COOKIE="$PA_DIR/cookie"
  local i
  for i in $(seq 50); do pactl info >/dev/null 2>&1 && break; sleep 0.1; done
  pactl info >/dev/null
  echo "export PULSE_SERVER=$PULSE_SERVER PULSE_COOKIE=$PULSE_COOKIE"
}

stop() {
  local pid i
  pid=$(server_pid) || { echo "not running"; return 0; }
  kill -TERM "$pid"
  for i in $(seq 100); do alive "$pid" || break; sleep 0.05; done  # never wait on kill -0: zombies
  alive "$pid" && kill -KILL "$pid"
  echo "stopped $pid"
}

case "${1:-}" in
  install|start|stop) "$1" ;;
  *) echo "usage: $0 install|start|stop" >&2; exit 2 ;;
esac
