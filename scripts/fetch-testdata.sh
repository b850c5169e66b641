#!/usr/bin/env bash
# Fetches the open test data the full test run needs into testdata/ext/
# (git-ignored). Idempotent: returns at once when the data are present.
#
# opencv-doc (Debian package): real photographs in examples/data
# (graf1.png, left01.jpg … left14.jpg, left_intrinsics.yml, …). Only
# examples/data and the package's copyright file are kept; the package
# itself is never committed.
#
# Usage: scripts/fetch-testdata.sh   (from anywhere inside the repo)
set -euo pipefail

root=$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)
dest="$root/testdata/ext/opencv-doc"
marker="$dest/examples/data/graf1.png"

if [[ -f "$marker" && -f "$dest/examples/data/left01.jpg" ]]; then
	exit 0
fi

command -v apt-get >/dev/null 2>&1 || {
	echo "fetch-testdata: apt-get not found; on Debian 12 install opencv-doc's examples/data into $dest by hand" >&2
	exit 1
}
command -v dpkg >/dev/null 2>&1 || {
	echo "fetch-testdata: dpkg not found; it is needed to unpack opencv-doc" >&2
	exit 1
}

tmp=$(mktemp -d)
trap 'rm -rf "$tmp"' EXIT
# apt-get download writes into the working directory; _apt cannot write to
# a private temp dir, which only produces a warning when run as root.
chmod 755 "$tmp"
cd "$tmp"
if ! apt-get download -qq opencv-doc >/dev/null 2>&1; then
	echo "fetch-testdata: opencv-doc not in the package lists; running apt-get update" >&2
	SUDO=""
	[[ $(id -u) -eq 0 ]] || SUDO="sudo"
	$SUDO apt-get update -qq
	apt-get download -qq opencv-doc >/dev/null
fi
deb=$(ls opencv-doc_*.deb)
dpkg -x "$deb" x
src="x/usr/share/doc/opencv-doc"
[[ -d "$src/examples/data" ]] || {
	echo "fetch-testdata: $deb has no examples/data; the package layout changed" >&2
	exit 1
}
rm -rf "$dest"
mkdir -p "$dest/examples"
cp -r "$src/examples/data" "$dest/examples/data"
cp "$src/copyright" "$dest/copyright"
echo "fetch-testdata: opencv-doc examples/data -> testdata/ext/opencv-doc ($deb)" >&2
