#!/usr/bin/env bash
# Build .venv with the service, the test and lint extras, and lifelines (the Kaplan-Meier
# reference of the tests). lifelines' metadata caps pandas below 3 although it runs on pandas
# 3; it is installed without dependencies, which the `test` extra lists instead.
set -euo pipefail
cd "$(dirname "$0")/.."
export PIP_DISABLE_PIP_VERSION_CHECK=1
python3 -m venv .venv
.venv/bin/pip install -q -e '.[test,lint]'
.venv/bin/pip install -q --no-deps 'lifelines==0.30.3'
