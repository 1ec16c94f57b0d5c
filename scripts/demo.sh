#!/usr/bin/env bash
# The main job on the bundled demo scenario: fit a model on the demo training
# logs, calibrate it on generated nominal data, replay every drift scenario
# through the firmware detector on the host, and write the model and the report
# to out/demo/. Needs only cargo (the first run builds the tool, ~1-2 minutes).
set -euo pipefail
cd "$(dirname "$0")/.."
cargo run --release --locked -q -p plumb -- demo "$@"
