#!/usr/bin/env bash
# Rebuild xbench's reference results from a clean model cache:
#   bash results/make.sh
# - results/demo/                the whole `demo` task (every explainer and metric); the CI check reproduces it
# - results/roads/, clearings/   the `roads` and `clearings` tasks with the cnn and forest models, seed 0
# - results/report/              tables, figures, methods text and BibTeX over the three runs
# Run folders keep records, manifest, curves, reliance, concepts and gallery artifacts (not the per-cell
# working files). Takes about half an hour on a 2-core CPU.
set -euo pipefail
cd "$(dirname "$0")/.."
export XBENCH_CACHE="${XBENCH_CACHE:-$(mktemp -d)}"
xbench run demo --out results/demo --quiet
xbench run roads --out results/roads --models cnn,forest --seeds 0 --quiet
xbench run clearings --out results/clearings --models cnn,forest --seeds 0 --quiet
rm -rf results/demo/cells results/roads/cells results/clearings/cells
xbench report results/demo results/roads results/clearings --out results/report
