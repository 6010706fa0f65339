#!/usr/bin/env bash
# Install bandwatch as a systemd service from the checkout this script is in.
#
#   sudo deploy/install.sh
#
# For Debian 12, Ubuntu and Raspberry Pi OS. Safe to run again: an existing
# config is never overwritten, and a re-run after `git pull` upgrades the
# installed program and restarts the service if it was running.
#
# Environment (optional):
#   BANDWATCH_VENV      virtualenv to create and use (default /opt/bandwatch/venv)
#   BANDWATCH_PYTHON    interpreter that creates it (default python3, >= 3.9)
#   BANDWATCH_PIP_ARGS  extra pip arguments, e.g. for a board without internet:
#                       "--no-index --find-links /media/usb/wheels"
set -euo pipefail

readonly SERVICE=bandwatch
readonly SERVICE_USER=bandwatch
readonly CONFIG_DIR=/etc/bandwatch
readonly CONFIG_FILE=$CONFIG_DIR/bandwatch.toml
readonly STATE_DIR=/var/lib/bandwatch
readonly UNIT_DIR=/etc/systemd/system
readonly LINK=/usr/local/bin/bandwatch
# The path written in deploy/bandwatch.service; replaced when BANDWATCH_VENV differs.
readonly UNIT_VENV=/opt/bandwatch/venv

VENV=${BANDWATCH_VENV:-$UNIT_VENV}
PYTHON=${BANDWATCH_PYTHON:-python3}
read -r -a PIP_ARGS <<<"${BANDWATCH_PIP_ARGS:-}"

HERE=$(cd -- "$(dirname -- "${BASH_SOURCE[0]}")" && pwd)
REPO=$(dirname -- "$HERE")

say() { printf '==> %s\n' "$*"; }
warn() { printf 'warning: %s\n' "$*" >&2; }
die() {
    printf 'error: %s\n' "$*" >&2
    exit 1
}

if (($#)); then
    sed -n '2,14s/^# \{0,1\}//p' "${BASH_SOURCE[0]}"
    [[ $1 == -h || $1 == --help ]] && exit 0
    die "install.sh takes no arguments; settings come from the environment"
fi
[[ $EUID -eq 0 ]] || die "run as root: sudo $0"
[[ -f $REPO/pyproject.toml || -f $REPO/setup.py ]] ||
    die "$REPO does not look like a bandwatch checkout (no pyproject.toml)"
[[ -f $HERE/$SERVICE.service ]] || die "missing $HERE/$SERVICE.service"
# The path goes into ExecStart= and a sed expression unquoted, so keep it plain.
[[ $VENV =~ ^/[A-Za-z0-9._/-]+$ && $VENV != / ]] ||
    die "BANDWATCH_VENV must be an absolute path of letters, digits and . _ - /: '$VENV'"
# ProtectHome= in the unit hides these trees from the service.
case $VENV/ in
    /home/* | /root/* | /run/user/*) die "BANDWATCH_VENV must be outside /home, /root and /run/user: the service cannot see them" ;;
esac

# --- Python with venv support -------------------------------------------------
# Debian and Ubuntu ship venv/ensurepip in a separate package.
if ! command -v "$PYTHON" >/dev/null 2>&1 || ! "$PYTHON" -c 'import venv, ensurepip' >/dev/null 2>&1; then
    command -v apt-get >/dev/null 2>&1 ||
        die "$PYTHON with the venv module is needed and apt-get is not available to install it"
    say "Installing python3-venv"
    apt-get update
    DEBIAN_FRONTEND=noninteractive apt-get install -y python3 python3-venv
fi
"$PYTHON" -c 'import sys; sys.exit(sys.version_info < (3, 9))' ||
    die "bandwatch needs Python 3.9 or newer; $PYTHON is $("$PYTHON" -V 2>&1)"
# The venv links back to this interpreter, so the service must be able to see it.
python_home=$("$PYTHON" -c 'import os, sys; print(os.path.realpath(sys.base_prefix))')
case $python_home/ in
    /home/* | /root/* | /run/user/*) die "$PYTHON lives in $python_home, which the service cannot see (ProtectHome=); use the system python3" ;;
esac

# --- Service user ---------------------------------------------------------------
# dialout owns the serial devices; it exists on every Debian system, but a
# trimmed image may lack it.
getent group dialout >/dev/null || groupadd --system dialout
getent group "$SERVICE_USER" >/dev/null || groupadd --system "$SERVICE_USER"
if id -u "$SERVICE_USER" >/dev/null 2>&1; then
    usermod --append --groups dialout "$SERVICE_USER"
else
    say "Creating system user $SERVICE_USER"
    nologin=$(command -v nologin || true)
    useradd --system --gid "$SERVICE_USER" --groups dialout \
        --home-dir "$STATE_DIR" --no-create-home \
        --shell "${nologin:-/bin/false}" \
        --comment "bandwatch vibration monitor" "$SERVICE_USER"
fi
# systemd creates it too (StateDirectory=); doing it here lets a manual run as
# the service user use the same queue before the service ever started.
install -d -m 0750 -o "$SERVICE_USER" -g "$SERVICE_USER" "$STATE_DIR"

# --- Program --------------------------------------------------------------------
src='' unit_tmp=''
trap 'rm -rf -- "$src" "$unit_tmp"' EXIT
# A venv whose interpreter vanished (e.g. after a distribution upgrade) is rebuilt.
if [[ -x $VENV/bin/python ]] && "$VENV/bin/python" -c '' >/dev/null 2>&1; then
    say "Reusing virtualenv $VENV"
else
    say "Creating virtualenv $VENV"
    install -d -m 0755 "$(dirname -- "$VENV")"
    "$PYTHON" -m venv --clear "$VENV"
fi
say "Installing bandwatch from $REPO"
# Build from a scratch copy: pip builds in the source tree, and root-owned
# build/ and *.egg-info left in the checkout would break later builds by its owner.
src=$(mktemp -d)
tar -C "$REPO" --exclude=./build --exclude=./dist --exclude='*.egg-info' \
    --exclude=./.venv --exclude=__pycache__ -cf - . | tar -C "$src" -xf -
"$VENV/bin/python" -m pip install --disable-pip-version-check ${PIP_ARGS[@]+"${PIP_ARGS[@]}"} "$src"
[[ -x $VENV/bin/bandwatch ]] || die "pip did not install the bandwatch command into $VENV/bin"

# A short name for commissioning over SSH (bandwatch check / view); never
# replace a different program of the same name.
command=$VENV/bin/bandwatch
if [[ ! -e $LINK && ! -L $LINK ]] || [[ $(readlink -- "$LINK") == "$VENV/bin/bandwatch" ]]; then
    ln -sfn -- "$VENV/bin/bandwatch" "$LINK"
    command=bandwatch
else
    warn "$LINK exists and is not ours; left alone"
fi

# --- Config ---------------------------------------------------------------------
install -d -m 0755 "$CONFIG_DIR"
if [[ -e $CONFIG_FILE ]]; then
    say "Keeping existing $CONFIG_FILE"
elif [[ -f $REPO/config/demo.toml ]]; then
    say "Installing the demo config as $CONFIG_FILE"
    # Readable by the service, changeable only by root.
    install -m 0640 -o root -g "$SERVICE_USER" "$REPO/config/demo.toml" "$CONFIG_FILE"
else
    warn "no config/demo.toml in $REPO; write $CONFIG_FILE before starting the service"
fi

# --- Unit -----------------------------------------------------------------------
unit_tmp=$(mktemp)
sed "s#$UNIT_VENV/#$VENV/#g" "$HERE/$SERVICE.service" >"$unit_tmp"
install -m 0644 "$unit_tmp" "$UNIT_DIR/$SERVICE.service"
say "Installed $UNIT_DIR/$SERVICE.service"

# Without a running systemd (chroot, image build) the unit is simply picked up
# at the next boot.
if [[ -d /run/systemd/system ]]; then
    systemctl daemon-reload
    if systemctl is-active --quiet "$SERVICE.service"; then
        say "Restarting the running service on the new version"
        systemctl restart "$SERVICE.service" ||
            warn "the service did not come back; see: journalctl -u $SERVICE -e"
    fi
else
    warn "systemd is not running here; skipped daemon-reload"
fi

# --- Check the config as the service user sees it ---------------------------------
if [[ -e $CONFIG_FILE ]]; then
    say "Checking $CONFIG_FILE as user $SERVICE_USER"
    if ! runuser -u "$SERVICE_USER" -- "$VENV/bin/bandwatch" check -c "$CONFIG_FILE"; then
        warn "the config does not pass 'bandwatch check' yet; fix it before starting the service"
    fi
fi

cat <<EOF

bandwatch is installed.

Next steps:
  1. Edit the config (source device, bands and limits, [mqtt]):
       sudoedit $CONFIG_FILE
  2. Check it:
       sudo -u $SERVICE_USER $command check -c $CONFIG_FILE
  3. Start the service now and at every boot:
       sudo systemctl enable --now $SERVICE
  4. Follow its log:
       journalctl -u $SERVICE -f
After editing the config later: sudo systemctl reload $SERVICE
EOF
