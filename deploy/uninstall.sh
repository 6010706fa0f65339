#!/usr/bin/env bash
# Remove the bandwatch service installed by deploy/install.sh.
#
#   sudo deploy/uninstall.sh           stop and remove the service and the program;
#                                      keep /etc/bandwatch (config) and
#                                      /var/lib/bandwatch (event queue, ids)
#   sudo deploy/uninstall.sh --purge   also remove those, local unit overrides,
#                                      and the bandwatch user and group
#
# BANDWATCH_VENV must match the value install.sh was run with, if any.
set -euo pipefail

readonly SERVICE=bandwatch
readonly SERVICE_USER=bandwatch
readonly CONFIG_DIR=/etc/bandwatch
readonly STATE_DIR=/var/lib/bandwatch
readonly UNIT_DIR=/etc/systemd/system
readonly UNIT=$UNIT_DIR/$SERVICE.service
readonly LINK=/usr/local/bin/bandwatch
readonly DEFAULT_VENV=/opt/bandwatch/venv

VENV=${BANDWATCH_VENV:-$DEFAULT_VENV}

say() { printf '==> %s\n' "$*"; }
warn() { printf 'warning: %s\n' "$*" >&2; }
die() {
    printf 'error: %s\n' "$*" >&2
    exit 1
}
usage() { sed -n '2,11s/^# \{0,1\}//p' "${BASH_SOURCE[0]}"; }

purge=0
for arg in "$@"; do
    case $arg in
        --purge) purge=1 ;;
        -h | --help)
            usage
            exit 0
            ;;
        *)
            usage >&2
            die "unknown argument: $arg"
            ;;
    esac
done

[[ $EUID -eq 0 ]] || die "run as root: sudo $0"
[[ $VENV =~ ^/[A-Za-z0-9._/-]+$ && $VENV != / ]] ||
    die "BANDWATCH_VENV must be an absolute path: '$VENV'"

# --- Service --------------------------------------------------------------------
systemd_running=0
[[ -d /run/systemd/system ]] && systemd_running=1
if ((systemd_running)) && systemctl is-active --quiet "$SERVICE.service"; then
    say "Stopping $SERVICE"
    systemctl stop "$SERVICE.service"
fi
# disable works on the files alone, so it also cleans an image without a
# running systemd.
if [[ -e $UNIT ]]; then
    systemctl disable --quiet "$SERVICE.service" || warn "could not disable $SERVICE.service"
    rm -f -- "$UNIT"
    say "Removed $UNIT"
fi
if ((purge)) && [[ -d $UNIT.d ]]; then
    rm -rf -- "$UNIT.d"
    say "Removed local overrides $UNIT.d"
fi
if ((systemd_running)); then
    systemctl daemon-reload
    systemctl reset-failed "$SERVICE.service" >/dev/null 2>&1 || true
fi

# --- Program --------------------------------------------------------------------
if [[ -L $LINK && $(readlink -- "$LINK") == "$VENV/bin/bandwatch" ]]; then
    rm -f -- "$LINK"
fi
if [[ -e $VENV ]]; then
    # Only ever delete something that is a virtualenv: a mistyped
    # BANDWATCH_VENV must not take a system directory with it.
    [[ -f $VENV/pyvenv.cfg ]] || die "$VENV is not a virtualenv (no pyvenv.cfg); not removing it"
    rm -rf -- "$VENV"
    say "Removed $VENV"
fi
if [[ $VENV == "$DEFAULT_VENV" && -d ${DEFAULT_VENV%/*} ]]; then
    rmdir --ignore-fail-on-non-empty -- "${DEFAULT_VENV%/*}"
fi

# --- Data -----------------------------------------------------------------------
if ((purge)); then
    rm -rf -- "$CONFIG_DIR" "$STATE_DIR"
    say "Removed $CONFIG_DIR and $STATE_DIR"
    if id -u "$SERVICE_USER" >/dev/null 2>&1; then
        userdel "$SERVICE_USER"
        say "Removed user $SERVICE_USER"
    fi
    # userdel drops a same-named group only under USERGROUPS_ENAB.
    if getent group "$SERVICE_USER" >/dev/null; then
        groupdel "$SERVICE_USER"
    fi
else
    say "Kept $CONFIG_DIR (config) and $STATE_DIR (queued events); --purge removes them"
fi
say "bandwatch is uninstalled"
