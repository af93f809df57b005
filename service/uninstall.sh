#!/usr/bin/env bash
# Remove what service/install.sh set up: the service, the udev rule and the virtual
# environment. Your profiles and rig file in /var/lib/fieldbridge (and the fieldbridge
# account that owns them) stay, so a later install finds them again; --purge removes
# those too. Safe to run again: each step checks first.
#
#   sudo service/uninstall.sh                   remove the system service
#   service/uninstall.sh --user                 remove the per-user service
#   service/uninstall.sh --dry-run              print the plan, change nothing

set -euo pipefail

SERVICE=fieldbridge
ACCOUNT=fieldbridge
STATE_DIR=/var/lib/fieldbridge
SYSTEM_UNIT_DIR=/etc/systemd/system
UDEV_RULES_DIR=/etc/udev/rules.d
RULE_NAME=99-fieldbridge.rules
DEFAULT_PREFIX=/opt/fieldbridge

mode=system
prefix=""
dry_run=0
purge=0

usage() {
    cat <<EOF
Usage: $0 [options]

  --prefix DIR   where install.sh put the virtual environment (default:
                 $DEFAULT_PREFIX, or ~/.local/share/fieldbridge with --user).
  --user         remove the per-user service instead of the system one.
  --purge        also delete the profile store ($STATE_DIR) and the
                 $ACCOUNT account (system), or the venv's folder (--user).
                 Your calibrations are gone after this.
  --dry-run      print each step instead of doing it.
  -h, --help     this text.
EOF
}

die() { echo "uninstall.sh: $*" >&2; exit 1; }

while [ $# -gt 0 ]; do
    case "$1" in
        --prefix) [ $# -ge 2 ] || die "--prefix needs a folder"; prefix=$2; shift 2 ;;
        --prefix=*) prefix=${1#*=}; shift ;;
        --user) mode=user; shift ;;
        --purge) purge=1; shift ;;
        --dry-run|-n) dry_run=1; shift ;;
        -h|--help) usage; exit 0 ;;
        *) usage >&2; die "unknown option: $1" ;;
    esac
done

if [ -z "$prefix" ]; then
    if [ "$mode" = user ]; then
        prefix="${XDG_DATA_HOME:-$HOME/.local/share}/fieldbridge"
    else
        prefix=$DEFAULT_PREFIX
    fi
fi
case "$prefix" in
    /*) ;;
    *) die "--prefix must be an absolute path, not '$prefix'" ;;
esac
prefix=${prefix%/}
[ -n "$prefix" ] || die "--prefix / is not allowed"
venv="$prefix/venv"

if [ "$mode" = user ]; then
    unit_dir="${XDG_CONFIG_HOME:-$HOME/.config}/systemd/user"
    systemctl_cmd=(systemctl --user)
else
    unit_dir=$SYSTEM_UNIT_DIR
    systemctl_cmd=(systemctl)
fi
unit_path="$unit_dir/$SERVICE.service"
rule_path="$UDEV_RULES_DIR/$RULE_NAME"

shell_word() {
    case "$1" in
        ''|*[!A-Za-z0-9._/+=:,@%-]*) printf "'%s'" "$(printf '%s' "$1" | sed "s/'/'\\\\''/g")" ;;
        *) printf '%s' "$1" ;;
    esac
}

run() {
    local word line="+"
    for word in "$@"; do line="$line $(shell_word "$word")"; done
    echo "$line"
    if [ "$dry_run" = 0 ]; then
        "$@"
    fi
}
note() { echo "# $*"; }

have_systemd() { [ -d /run/systemd/system ] && command -v systemctl >/dev/null 2>&1; }

if [ "$mode" = system ] && [ "$dry_run" = 0 ] && [ "$(id -u)" -ne 0 ]; then
    die "removing the system service needs root: run it with sudo, or use --user"
fi

# 1. Stop and disable the service, remove the unit ----------------------------------

if [ -f "$unit_path" ]; then
    if have_systemd || [ "$dry_run" = 1 ]; then
        # disable --now also stops it; the daemon silences its outputs on SIGTERM.
        run "${systemctl_cmd[@]}" disable --now "$SERVICE.service"
    fi
    run rm -f "$unit_path"
    if have_systemd || [ "$dry_run" = 1 ]; then
        run "${systemctl_cmd[@]}" daemon-reload
    fi
else
    note "no unit at $unit_path"
fi
if [ -d "$unit_path.d" ]; then
    note "local settings kept: $unit_path.d (from systemctl edit); remove it by hand if unwanted"
fi

# 2. udev rule ----------------------------------------------------------------------

if [ "$mode" = system ]; then
    if [ -f "$rule_path" ]; then
        run rm -f "$rule_path"
        if command -v udevadm >/dev/null 2>&1 || [ "$dry_run" = 1 ]; then
            run udevadm control --reload-rules
        fi
    else
        note "no udev rule at $rule_path"
    fi
fi

# 3. Virtual environment ----------------------------------------------------------------

# Only delete a folder that really is a virtual environment (it has pyvenv.cfg), so a
# mistyped --prefix cannot remove anything else.
if [ -f "$venv/pyvenv.cfg" ]; then
    run rm -rf "$venv"
elif [ -e "$venv" ]; then
    note "$venv is not a virtual environment (no pyvenv.cfg): left alone"
else
    note "no virtual environment at $venv"
fi
if [ -d "$prefix" ] && [ "$mode" = system ]; then
    # rmdir removes the prefix only if nothing else is in it.
    if [ -z "$(ls -A "$prefix" 2>/dev/null)" ] || [ "$dry_run" = 1 ]; then
        run rmdir --ignore-fail-on-non-empty "$prefix"
    fi
fi

# 4. Profiles and account (only with --purge) -------------------------------------------

if [ "$purge" = 1 ]; then
    if [ "$mode" = system ]; then
        if [ -d "$STATE_DIR" ]; then
            run rm -rf "$STATE_DIR"
        fi
        if getent passwd "$ACCOUNT" >/dev/null; then
            run userdel "$ACCOUNT"
        fi
    else
        note "your profiles are in your user data folder; remove them by hand if you mean to:"
        note "  $prefix (and anything else the fieldbridge commands created there)"
    fi
else
    if [ "$mode" = system ]; then
        note "kept: profiles in $STATE_DIR and the $ACCOUNT account (use --purge to remove)"
    else
        note "kept: profiles in your user data folder ($prefix)"
    fi
fi

if [ "$dry_run" = 1 ]; then
    note "dry run: nothing was changed"
else
    note "done"
fi
