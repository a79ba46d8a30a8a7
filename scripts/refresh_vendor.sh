#!/usr/bin/env bash
# Refresh the JavaScript vendored into supportgen/report/vendor/ from the npm registry,
# at the pinned version below (pass another version as $1 to move the pin deliberately).
#
# Pinned to 0.185.1: the last three release whose package ships minified builds
# (build/three.module.min.js and build/three.core.min.js); 0.186.0 and later ship
# only the unminified files, which would make every report page about 1.4 MB larger.
set -euo pipefail
VERSION="${1:-0.185.1}"
cd "$(dirname "$0")/.."
DEST=supportgen/report/vendor
TMP="$(mktemp -d)"
trap 'rm -rf "$TMP"' EXIT
( cd "$TMP" && npm pack --silent "three@${VERSION}" >/dev/null && tar xzf "three-${VERSION}.tgz" )
PKG="$TMP/package"
for f in build/three.module.min.js build/three.core.min.js examples/jsm/controls/OrbitControls.js LICENSE; do
  [ -f "$PKG/$f" ] || { echo "refresh_vendor: three@${VERSION} has no $f; pick a version that ships it" >&2; exit 1; }
done
mkdir -p "$DEST"
cp "$PKG/build/three.module.min.js" "$PKG/build/three.core.min.js" "$DEST/"
cp "$PKG/examples/jsm/controls/OrbitControls.js" "$DEST/OrbitControls.js"
cp "$PKG/LICENSE" "$DEST/LICENSE"
echo "three ${VERSION}" > "$DEST/VERSION"
( cd "$DEST" && sha256sum three.module.min.js three.core.min.js OrbitControls.js >> VERSION )
echo "vendored three ${VERSION} into ${DEST}"
