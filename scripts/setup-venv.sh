# Sourced by scripts/demo and scripts/test: make ./.venv and install bandwatch
# into it, with the extras named in $BANDWATCH_EXTRAS (e.g. "[test]").
# On Debian, Ubuntu and Raspberry Pi OS the venv module is a separate package
# (python3-venv); it is installed when missing.

as_root() {
    if [ "$(id -u)" -eq 0 ]; then "$@"; elif command -v sudo >/dev/null 2>&1; then sudo "$@"; else
        echo "need root for: $*" >&2; return 1; fi
}

apt_install() {
    # apt_install PKG...: install the Debian packages not yet installed.
    command -v apt-get >/dev/null 2>&1 || return 0
    missing=""
    for pkg in "$@"; do
        dpkg -s "$pkg" >/dev/null 2>&1 || missing="$missing $pkg"
    done
    [ -n "$missing" ] || return 0
    echo "installing Debian packages:$missing" >&2
    as_root apt-get update -qq
    # shellcheck disable=SC2086
    as_root env DEBIAN_FRONTEND=noninteractive apt-get install -y -qq $missing >/dev/null
}

if ! python3 -c "import venv, ensurepip" >/dev/null 2>&1; then
    apt_install python3-venv
fi
if [ ! -x .venv/bin/python ]; then
    python3 -m venv .venv
fi
.venv/bin/python -m pip install -q --disable-pip-version-check -e ".${BANDWATCH_EXTRAS:-}"
