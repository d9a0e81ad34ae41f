#!/usr/bin/env bash
# The live daemon's benchmark (not a test): throughput and alert latency of `glint run` with three
# subscribers, measured by the hidden `glint bench-live` subcommand (the daemon in-process, the producer and the
# subscribers as `glint feed` / `glint listen` child processes; it also prints the CPU the hypervisor stole).
# Run from the repository root:
#   bash daemon/glint/benches/live.sh
# 0. the host's own floor at rest (probe threads only: a channel hand-off, a 2 ms sleep, append+fdatasync);
#    every run below prints the same probe measured while the producer feeds, beside the daemon's figures.
# 1. stress-20khz at max speed: sustained photons per second through ingest and the engine.
# 2. stress-bursts (20 kHz background, 109 bursts over 20 minutes) at 5x real time (100k photons/s): latency from the read of
#    the frame that completes a trigger to the alert frame written to each subscriber's socket.
set -euo pipefail
cd "$(dirname "$0")/../../.."
cargo build --release -q -p glint
bin="${CARGO_TARGET_DIR:-target}/release/glint"
work="$(mktemp -d)"
trap 'rm -rf "$work"' EXIT
echo "== host floor at rest, 60 s"
"$bin" bench-live --probe-only 60
echo
echo "== throughput: stress-20khz at max speed, 3 subscribers"
"$bin" bench-live deploy/scenarios/stress-20khz.toml --speed max --subscribers 3 --recording "$work/stress.glrec.zst"
echo
echo "== latency: stress-bursts at 5x real time (100k photons/s), 3 subscribers"
"$bin" bench-live daemon/glint/benches/stress-bursts.toml --speed 5 --subscribers 3 --recording "$work/bursts.glrec.zst"
echo
echo "== throughput: stress-bursts at max speed, 3 subscribers"
"$bin" bench-live daemon/glint/benches/stress-bursts.toml --speed max --subscribers 3 --recording "$work/bursts.glrec.zst"
