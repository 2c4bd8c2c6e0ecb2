#!/bin/sh
# Regenerate the README screenshot with `longrun gui --screenshot` (no display needed).
# Run from anywhere after the set-up command of the README.
set -e
cd "$(dirname "$0")/../../.."
QT_QPA_PLATFORM=offscreen .venv/bin/longrun gui sample_models/credit_eras.json \
    --screenshot app/resources/screenshots/main.png --size 1600x1000 --panel simulation --run-plan
