#!/usr/bin/env bash
# Rebuild xbench's reference results from a clean model cache:
#   bash results/make.sh
# - results/demo/                the whole `demo` task (every explainer and metric); CI reruns it and checks it
# - results/roads/, clearings/   the `roads` and `clearings` tasks: the `cnn` with three training seeds, the
#                                `forest` black box, and the tasks' protocol variants (faithfulness baselines,
#                                signed vs absolute maps) under variants/. MODELS=cnn,resnet,separable,forest
#                                adds the other torch families (about three times the CPU time).
# - results/demo-transplant/     the demo's structures transplanted into a generated Vellardine GeoTIFF scene
# - results/geotiff-roads/       a generated GeoTIFF with digitized roads and clear-cuts (no twins)
# - results/report/              recommendation page, tables, figures, methods text and BibTeX over the runs
# - results/report-geotiff/      the same for the GeoTIFF task
# Run folders keep records, reasons, manifest, curves, reliance, concepts and gallery arrays (not the per-cell
# working files). `JOBS` (default 2) sets the local worker processes.
set -euo pipefail
cd "$(dirname "$0")/.."
export XBENCH_CACHE="${XBENCH_CACHE:-$(mktemp -d)}"
JOBS="${JOBS:-2}"
MODELS="${MODELS:-cnn,forest}"
SECONDS=0
# from scratch: a run folder keeps what earlier runs put there, so stale folders would mix in old values
rm -rf results/demo results/roads results/clearings results/demo-transplant results/geotiff-roads results/report \
    results/report-geotiff
xbench run demo --out results/demo --quiet --jobs "$JOBS"
xbench run roads --out results/roads --models "$MODELS" --seeds 0,1,2 --quiet --jobs "$JOBS"
xbench run clearings --out results/clearings --models "$MODELS" --seeds 0,1,2 --quiet --jobs "$JOBS"
xbench run demo-transplant --out results/demo-transplant --quiet --jobs "$JOBS"
xbench run geotiff-roads --out results/geotiff-roads --quiet --jobs "$JOBS"
for d in demo roads clearings demo-transplant geotiff-roads; do
    rm -rf "results/$d/cells"
    find "results/$d" -path '*/variants/*/cells' -type d -prune -exec rm -rf {} +
done
xbench report results/demo results/roads results/clearings results/demo-transplant --out results/report
# the annotated GeoTIFF task runs a few explainers on tiles without twins: its own report, so that the
# cross-task rankings above keep every method
xbench report results/geotiff-roads --out results/report-geotiff
echo "results/make.sh: ${SECONDS} s"
