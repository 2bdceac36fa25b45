#!/usr/bin/env bash
# Writes the frozen result files from the scenarios beside this script.  Run once, with the
# code whose numbers are to be kept; tests/test_frozen_results.py compares later code with them.
set -euo pipefail
cd "$(dirname "$0")"
for name in age seasonal; do
  for backend in numpy compiled; do
    ensemble run "$name.toml" --output "$name-$backend.nc" --backend "$backend" --workers 0 --force
  done
done
