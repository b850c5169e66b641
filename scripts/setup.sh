#!/usr/bin/env bash
# Installs what trackfactor needs to build and test, and nothing when all is
# there. Debian 12: OpenCV 4.6 (libopencv-dev, matched by gocv v0.31.0),
# pkg-config and a C++ compiler for cgo. Extra packages can be asked for
# with TF_SETUP_EXTRA="pkg ..." (test.sh asks for what the tests need).
set -euo pipefail

need=()
pkg-config --exists opencv4 2>/dev/null || need+=(libopencv-dev)
command -v pkg-config >/dev/null 2>&1 || need+=(pkg-config)
command -v g++ >/dev/null 2>&1 || need+=(g++)
for p in ${TF_SETUP_EXTRA:-}; do
	dpkg -s "$p" >/dev/null 2>&1 || need+=("$p")
done

if ((${#need[@]})); then
	echo "setup: installing ${need[*]} (apt-get, non-interactive)" >&2
	SUDO=""
	if [[ $(id -u) -ne 0 ]]; then
		command -v sudo >/dev/null 2>&1 || {
			echo "setup: need root or sudo to install ${need[*]}; install them and run again" >&2
			exit 1
		}
		SUDO="sudo"
	fi
	export DEBIAN_FRONTEND=noninteractive
	$SUDO apt-get update -qq
	$SUDO apt-get install -y -qq --no-install-recommends "${need[@]}" >/dev/null
	echo "setup: installed ${need[*]}" >&2
fi

command -v go >/dev/null 2>&1 || {
	echo "setup: Go is not on PATH; install Go 1.26 or newer and run again" >&2
	exit 1
}
