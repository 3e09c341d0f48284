#!/usr/bin/env bash
# Screenshots of the app's main views, taken under a virtual X server with software OpenGL,
# so no GPU and no desktop session are needed. Writes PNGs to assets/screenshots/.
#
# Needs (Debian/Ubuntu package names):
#   xvfb xauth           virtual X server
#   libgl1-mesa-dri      Mesa's software OpenGL (llvmpipe)
#   libegl1              EGL loader (the glow renderer asks for it)
#   imagemagick          `import`, to grab the screen
#   xdotool              to focus the window and press keys
# e.g.  sudo apt-get install -y --no-install-recommends xvfb xauth libgl1-mesa-dri libegl1 imagemagick xdotool
#
# Usage: scripts/screenshot.sh            (builds the release binary first)
set -euo pipefail
cd "$(dirname "$0")/.."

for tool in Xvfb import xdotool; do
    command -v "$tool" > /dev/null || { echo "screenshot.sh: $tool is missing (see the package list at the top)" >&2; exit 2; }
done

WORK="$(mktemp -d)"
cargo build --release --bin receptor
# A private copy, so another build in a shared target folder cannot swap it mid-run.
cp "${CARGO_TARGET_DIR:-target}/release/receptor" "$WORK/receptor"
BIN="$WORK/receptor"
OUT=assets/screenshots
mkdir -p "$OUT"

DISPLAY_NUM="${SCREENSHOT_DISPLAY:-:97}"
Xvfb "$DISPLAY_NUM" -screen 0 1280x800x24 -nolisten tcp > "$WORK/xvfb.log" 2>&1 &
XVFB_PID=$!
APP_PID=""
cleanup() {
    [ -n "$APP_PID" ] && kill "$APP_PID" 2> /dev/null || true
    kill "$XVFB_PID" 2> /dev/null || true
    rm -rf "$WORK"
}
trap cleanup EXIT
export DISPLAY="$DISPLAY_NUM"
# Mesa's software rasteriser; a fresh data folder so saved preferences of earlier runs
# (tile size, sort order, recent files) do not change the pictures.
export LIBGL_ALWAYS_SOFTWARE=1
export XDG_DATA_HOME="$WORK/data"
sleep 1

# Starts the app with the given arguments and waits for its window (WID).
start_app() {
    "$BIN" "$@" > "$WORK/app.log" 2>&1 &
    APP_PID=$!
    WID=""
    for _ in $(seq 1 60); do
        kill -0 "$APP_PID" 2> /dev/null || { echo "screenshot.sh: the app exited:" >&2; cat "$WORK/app.log" >&2; exit 2; }
        WID="$(xdotool search --name '^receptor$' 2> /dev/null | head -1 || true)"
        [ -n "$WID" ] && break
        sleep 0.5
    done
    [ -n "$WID" ] || { echo "screenshot.sh: no receptor window appeared" >&2; exit 2; }
    # The demo models are small; their analysis (statistics, screening, preferred inputs,
    # pruning sweeps) finishes within a few seconds even on software rendering.
    sleep 6
    xdotool windowfocus --sync "$WID"
    # Park the pointer on the status bar so no tooltip covers the views.
    xdotool mousemove 1000 792
}

start_app

shot() {
    sleep 2
    import -window root "$OUT/$1"
    echo "wrote $OUT/$1"
}

# Controls without a key are clicked at their place in the 1280 x 800 window (the layer list
# keeps its default width): the middle pane's view buttons and its Table / Tiles switch.
click_at() {
    xdotool mousemove "$1" "$2" click 1
    sleep 0.5
    xdotool mousemove 1000 792
}
sparsity_view() { click_at 398 43; }
tiles_mode() { click_at 353 75; }
table_mode() { click_at 300 75; }

# 1. First layer as tiles: the wall of incoming-weight maps, unit 5 selected, its weights
#    in detail.
tiles_mode
xdotool key --delay 200 Right Right Right Right Right
shot units-first-layer.png

# 2. Second layer: preferred inputs in the grid, unit 2's preferred input in detail.
xdotool key Next
xdotool key --delay 200 Right Right
xdotool key p
shot deeper-unit-preferred.png

# 3. Second layer, incoming weights as a bar chart over the first layer's units.
xdotool key w
shot deeper-unit-weights.png

# 4. The unit table (the default view) of the first layer, sorted by active % (least
#    active first), the first row selected.
table_mode
xdotool key Prior
click_at 400 188
xdotool key Home
shot unit-table.png

# 5. Sparsity and pruning view; then scrolled down to the pruning curves: magnitude and
#    unit removal for the whole model, one curve per layer beside them, the table below.
sparsity_view
shot sparsity-and-pruning.png
xdotool mousemove 700 500
xdotool click --repeat 6 --delay 50 5
xdotool mousemove 1000 792
shot pruning-curves.png

# 6. The over-driven demo with its labelled probe: the Compact model window (Ctrl+K) over
#    the pruning view, with what it would remove and the check of the outputs.
kill "$APP_PID" 2> /dev/null || true
wait "$APP_PID" 2> /dev/null || true
start_app demo-models/solder-joints-overdriven.json --probe demo-models/solder-joints-probe.csv
sparsity_view
sleep 2
xdotool key ctrl+k
shot compact-model.png

# 7. The convolutional demo with its labelled probe: the first layer's filters as colour
#    tiles, channel 2 in detail (filter, effective receptive field, feature map).
kill "$APP_PID" 2> /dev/null || true
wait "$APP_PID" 2> /dev/null || true
start_app demo-models/solder-joints-cnn.json --probe demo-models/solder-joints-cnn-probe.csv
tiles_mode
xdotool key --delay 200 Right Right
sleep 4
shot cnn-first-layer.png

# 8. A model opened by its path finds the reference data named after it beside it: the
#    model summary names the file, says it was found there, and shows the accuracy.
kill "$APP_PID" 2> /dev/null || true
wait "$APP_PID" 2> /dev/null || true
start_app demo-models/solder-joints.json
table_mode
shot reference-beside-model.png

# 9. The same model alone in a folder: screened on uniform samples of the box, and warned.
kill "$APP_PID" 2> /dev/null || true
wait "$APP_PID" 2> /dev/null || true
mkdir -p "$WORK/alone"
cp demo-models/solder-joints.json "$WORK/alone/"
start_app "$WORK/alone/solder-joints.json"
table_mode
shot no-reference-data.png

# 9. The cold-storage demo (sensor readings in physical units) with its reference data: the
#    first layer's weight glyphs, unit 2's weights as a per-feature chart; then a second-layer
#    unit's preferred input with its box, the reference band and the kind of optimum.
kill "$APP_PID" 2> /dev/null || true
wait "$APP_PID" 2> /dev/null || true
start_app demo-models/cold-storage.json --probe demo-models/cold-storage-probe.csv
xdotool key --delay 200 Right Right
shot tabular-unit.png
xdotool key Next
xdotool key --delay 200 Right
xdotool key p
sleep 2
shot tabular-preferred.png

# 10. The over-driven demo's training run (a folder of checkpoints) with the labelled probe:
#     the timeline under the unit grid. A click at the right end of the dead-units plot goes
#     to the last checkpoint (the unit view follows), then a click on the first cell of
#     "Units by when they died" selects the h1 unit that died first.
kill "$APP_PID" 2> /dev/null || true
wait "$APP_PID" 2> /dev/null || true
start_app demo-models/solder-joints-overdriven-run --probe demo-models/solder-joints-probe.csv
xdotool mousemove 246 620 click 1
sleep 4
xdotool mousemove 47 740 click 1
xdotool mousemove 1000 792
sleep 3
shot training-run.png
