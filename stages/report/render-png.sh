#!/bin/sh
# Render a report page to PNG with headless Chromium, for people to look at.
# Usage: render-png.sh REPORT.html OUT.png [WIDTH [HEIGHT]]
# Exits 3 with a message when no Chromium is installed (Debian: apt install chromium).
set -eu
page=$1
out=$2
width=${3:-1200}
height=${4:-6000}
browser=$(command -v chromium || command -v chromium-browser || command -v google-chrome || true)
if [ -z "$browser" ]; then
    echo "render-png.sh: no Chromium found (install the chromium package); nothing rendered" >&2
    exit 3
fi
profile=$(mktemp -d)
trap 'rm -rf "$profile"' EXIT
# No network: the page is self-contained, and the flags keep Chromium from calling out.
"$browser" --headless --no-sandbox --disable-gpu --disable-quic --no-first-run \
    --disable-background-networking --disable-component-update --disable-sync \
    --user-data-dir="$profile" --hide-scrollbars --window-size="$width,$height" \
    --screenshot="$out" "file://$(realpath "$page")" 2>/dev/null
echo "$out"
