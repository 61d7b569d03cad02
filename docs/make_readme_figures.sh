#!/usr/bin/env bash
# Regenerate the figures embedded in README.md ("Figures") with kinkfit's own
# commands.  Run from anywhere:
#
#   bash docs/make_readme_figures.sh              # montage and wake maps (~1 min)
#   bash docs/make_readme_figures.sh --with-fit   # also run 'kinkfit fit
#                                                 # configs/demo.toml' and
#                                                 # configs/demo_damping.toml
#
# Without --with-fit the fit figures are copied from earlier fits when their
# outputs are there: gallery and corner plot from 'kinkfit fit
# configs/demo.toml' (kinkfit_out/mirrowen/), the comparison across damping
# assumptions from 'kinkfit fit configs/demo_damping.toml'
# (kinkfit_out/mirrowen_damping/).
set -euo pipefail
cd "$(dirname "$0")/.."

images=docs/images
out=kinkfit_out/mirrowen
out_damping=kinkfit_out/mirrowen_damping
mkdir -p "$images"

kinkfit montage demo_cubes/mirrowen_12co21.fits --channels 18 -o "$images/demo_channels.png"
kinkfit wake configs/demo.toml -o "$images/demo_wake.png"

if [ "${1:-}" = "--with-fit" ]; then
    # exits non-zero (and stops this script) if the chains did not converge
    kinkfit fit configs/demo.toml --no-progress
    kinkfit fit configs/demo_damping.toml --no-progress
fi

copy_if_there() {  # source, destination
    if [ -f "$1" ]; then
        cp "$1" "$2"
        echo "copied $1 -> $2"
    else
        echo "skipped $2: $1 not found (run with --with-fit)" >&2
    fi
}
copy_if_there "$out/gallery.png" "$images/demo_gallery.png"
copy_if_there "$out/viscous/corner.png" "$images/demo_corner.png"
copy_if_there "$out_damping/comparison/comparison_corner.png" "$images/demo_comparison.png"
