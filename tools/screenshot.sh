#!/usr/bin/env bash
# Makes docs/area-view.png, the README's picture of the area view: runs the real `consensor demo`
# (fresh temporary database, public reading, a free port), opens /areas/velloran-basin in Debian's
# headless Chromium once its charts are drawn, and saves the screenshot. The work is done by the
# ignored test `demo_area_view_screenshot` in crates/consensor-server/tests/web_page.rs.
#
#   tools/screenshot.sh
set -euo pipefail
cd "$(dirname "$0")/.."
if [ ! -x /usr/bin/chromium ] || [ ! -x /usr/bin/chromedriver ]; then
  export DEBIAN_FRONTEND=noninteractive
  apt-get update -qq && apt-get install -y -qq chromium chromium-driver >/dev/null
fi
cargo test -p consensor-server --test web_page -- --ignored --exact demo_area_view_screenshot
