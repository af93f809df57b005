#!/usr/bin/env bash
# Install fieldbridge as a service on a Linux machine (a single-board computer on stage,
# or a laptop). Safe to run again: every step checks first and skips what is done, so a
# re-run after `git pull` just upgrades the package and refreshes the unit and rule.
#
#   sudo service/install.sh                     system service, venv in /opt/fieldbridge
#   service/install.sh --user                   per-user service, no root needed
#   service/install.sh --dry-run                print the plan, change nothing
#
# Run with --help for every option. service/uninstall.sh undoes it.

set -euo pipefail

SERVICE=fieldbridge
ACCOUNT=fieldbridge
STATE_DIR=/var/lib/fieldbridge
SYSTEM_UNIT_DIR=/etc/systemd/system
UDEV_RULES_DIR=/etc/udev/rules.d
RULE_NAME=99-fieldbridge.rules
TEMPLATE_PREFIX=/opt/fieldbridge

here=$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)
source_dir=$(dirname "$here")
mode=system
prefix=""
dry_run=0
usb_id=""
start_now=0
enable=1
python=python3
print_unit=0
print_rule=0
service_only=0

usage() {
    cat <<EOF
Usage: $0 [options]

Installs fieldbridge into a virtual environment and sets it up as a service.

  --prefix DIR     where the virtual environment goes (DIR/venv). Default:
                   $TEMPLATE_PREFIX, or ~/.local/share/fieldbridge with --user.
  --user           install a per-user service (~/.config/systemd/user) instead of a
                   system one; needs no root, but cannot create the service account or
                   install the udev rule (it prints the commands for those).
  --usb-id V:P     the board's USB vendor:product IDs (4 hex digits each) for the udev
                   rule; find them with: udevadm info --query=property --name=/dev/ttyACM0
  --now            also start (or restart) the service after installing it.
  --no-enable      install but do not enable start at boot.
  --service-only   leave the virtual environment alone (no pip, works offline); only
                   refresh the account, unit file and udev rule.
  --source DIR     the fieldbridge checkout to install (default: $source_dir).
  --python PROG    the Python used to create the venv (default: python3, 3.10 or newer).
  --print-unit     print the unit file this would install, and exit.
  --print-rule     print the udev rule this would install, and exit.
  --dry-run        print each step instead of doing it.
  -h, --help       this text.
EOF
}

die() { echo "install.sh: $*" >&2; exit 1; }

while [ $# -gt 0 ]; do
    case "$1" in
        --prefix) [ $# -ge 2 ] || die "--prefix needs a folder"; prefix=$2; shift 2 ;;
        --prefix=*) prefix=${1#*=}; shift ;;
        --user) mode=user; shift ;;
        --usb-id) [ $# -ge 2 ] || die "--usb-id needs VVVV:PPPP"; usb_id=$2; shift 2 ;;
        --usb-id=*) usb_id=${1#*=}; shift ;;
        --now) start_now=1; shift ;;
        --no-enable) enable=0; shift ;;
        --service-only) service_only=1; shift ;;
        --source) [ $# -ge 2 ] || die "--source needs a folder"; source_dir=$2; shift 2 ;;
        --source=*) source_dir=${1#*=}; shift ;;
        --python) [ $# -ge 2 ] || die "--python needs a program"; python=$2; shift 2 ;;
        --python=*) python=${1#*=}; shift ;;
        --print-unit) print_unit=1; shift ;;
        --print-rule) print_rule=1; shift ;;
        --dry-run|-n) dry_run=1; shift ;;
        -h|--help) usage; exit 0 ;;
        *) usage >&2; die "unknown option: $1" ;;
    esac
done

if [ -z "$prefix" ]; then
    if [ "$mode" = user ]; then
        prefix="${XDG_DATA_HOME:-$HOME/.local/share}/fieldbridge"
    else
        prefix=$TEMPLATE_PREFIX
    fi
fi
case "$prefix" in
    /*) ;;
    *) die "--prefix must be an absolute path, not '$prefix'" ;;
esac
prefix=${prefix%/}
[ -n "$prefix" ] || die "--prefix / is not allowed"
# The path goes into a unit file (where spaces, '%' and '$' have meanings) and through sed.
echo "$prefix" | grep -Eq '^[A-Za-z0-9._/+-]+$' \
    || die "--prefix may use only letters, digits and . _ / + - (not '$prefix')"
venv="$prefix/venv"

if [ -n "$usb_id" ]; then
    echo "$usb_id" | grep -Eq '^[0-9a-fA-F]{4}:[0-9a-fA-F]{4}$' \
        || die "--usb-id must look like 1a2b:3c4d (vendor:product, hex), not '$usb_id'"
    usb_vendor=$(echo "${usb_id%%:*}" | tr 'A-F' 'a-f')
    usb_product=$(echo "${usb_id##*:}" | tr 'A-F' 'a-f')
fi

if [ "$mode" = user ]; then
    config_home="${XDG_CONFIG_HOME:-$HOME/.config}"
    unit_dir="$config_home/systemd/user"
    systemctl_cmd=(systemctl --user)
else
    unit_dir=$SYSTEM_UNIT_DIR
    systemctl_cmd=(systemctl)
fi
unit_path="$unit_dir/$SERVICE.service"
rule_path="$UDEV_RULES_DIR/$RULE_NAME"

# ------------------------------------------------------------------ rendering

# The system unit: the template with the chosen prefix. ProtectHome=yes would hide a
# venv kept under /home or /root from the service, so it becomes read-only there.
render_system_unit() {
    local protect_home=yes
    case "$prefix/" in
        /home/*|/root/*|/run/user/*) protect_home=read-only ;;
    esac
    sed -e "s#$TEMPLATE_PREFIX/venv/#$venv/#g" \
        -e "s#^ProtectHome=.*#ProtectHome=$protect_home#" \
        "$here/$SERVICE.service"
}

# The user unit: a user manager cannot switch accounts, and most sandboxing settings
# need privileges it does not have, so this one is written out plainly.
render_user_unit() {
    cat <<EOF
# fieldbridge as a per-user service, written by service/install.sh --user.
#   systemctl --user status fieldbridge     journalctl --user -u fieldbridge -f
# To start it at boot without logging in: sudo loginctl enable-linger $(id -un)

[Unit]
Description=fieldbridge contactless sensor to MIDI/OSC bridge (user service)
StartLimitIntervalSec=0

[Service]
Type=notify
NotifyAccess=main
# No --home: the daemon uses your user data folder, the same store that the
# fieldbridge commands in your shell read and write.
ExecStart=$venv/bin/fieldbridge run --service
ExecReload=/bin/kill -HUP \$MAINPID
WatchdogSec=5s
Restart=always
RestartSec=2
TimeoutStopSec=10s
Environment=PYTHONUNBUFFERED=1
RuntimeDirectory=fieldbridge
NoNewPrivileges=yes

[Install]
WantedBy=default.target
EOF
}

render_unit() {
    if [ "$mode" = user ]; then render_user_unit; else render_system_unit; fi
}

render_rule() {
    if [ -n "$usb_id" ]; then
        sed -e "s/ATTRS{idVendor}==\"VVVV\"/ATTRS{idVendor}==\"$usb_vendor\"/" \
            -e "s/ATTRS{idProduct}==\"PPPP\"/ATTRS{idProduct}==\"$usb_product\"/" \
            "$here/$RULE_NAME"
    else
        cat "$here/$RULE_NAME"
    fi
}

if [ "$print_unit" = 1 ]; then
    render_unit
    exit 0
fi
if [ "$print_rule" = 1 ]; then
    render_rule
    exit 0
fi

# ------------------------------------------------------------------ doing

# run CMD...: do it, or with --dry-run only print it. Every changing command goes here.
# shell_word WORD: WORD as it would be typed, quoted only when it has to be.
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

# install_text DEST MODE: write stdin to DEST only if the content differs.
install_text() {
    local dest=$1 mode=$2 tmp
    tmp=$(mktemp)
    cat >"$tmp"
    if [ -f "$dest" ] && cmp -s "$tmp" "$dest"; then
        note "$dest is up to date"
        rm -f "$tmp"
        return 1
    fi
    if [ -f "$dest" ]; then
        echo "+ write $dest (changed)"
    else
        echo "+ write $dest (new)"
    fi
    if [ "$dry_run" = 0 ]; then
        mkdir -p "$(dirname "$dest")"
        install -m "$mode" "$tmp" "$dest"
    fi
    rm -f "$tmp"
    return 0
}

have_systemd() { [ -d /run/systemd/system ] && command -v systemctl >/dev/null 2>&1; }

# Preconditions --------------------------------------------------------------

[ -f "$source_dir/pyproject.toml" ] || die "no pyproject.toml in $source_dir; use --source"
if [ "$mode" = system ] && [ "$dry_run" = 0 ] && [ "$(id -u)" -ne 0 ]; then
    die "a system install needs root: run it with sudo, or use --user"
fi
note "fieldbridge $mode install from $source_dir into $venv"

# 1. Virtual environment and package -------------------------------------------

if [ "$service_only" = 1 ]; then
    if [ -x "$venv/bin/fieldbridge" ]; then
        note "--service-only: keeping the package in $venv as it is"
    else
        note "--service-only: $venv/bin/fieldbridge is missing; the service cannot start until it is installed"
    fi
else
    command -v "$python" >/dev/null 2>&1 || die "$python not found; install Python 3.10 or newer"
    "$python" -c 'import sys, venv, ensurepip; sys.exit(0 if sys.version_info >= (3, 10) else 1)' \
        || die "$python is too old or lacks the venv module (Debian: apt install python3-venv)"
    if [ -x "$venv/bin/python" ]; then
        note "virtual environment $venv exists: reusing it"
    else
        run mkdir -p "$prefix"
        run "$python" -m venv "$venv"
    fi
    # A plain (not editable) install copies the package into the venv, so the service
    # does not depend on the checkout staying where it is. pip skips what is current.
    run "$venv/bin/python" -m pip install --quiet --upgrade pip
    run "$venv/bin/python" -m pip install --quiet --upgrade "$source_dir"
fi

# 2. Account and device access ---------------------------------------------------

missing_groups() {  # missing_groups USER: the device groups USER is not in yet
    local g have
    have=" $(id -nG "$1" 2>/dev/null || true) "
    for g in dialout audio; do
        case "$have" in *" $g "*) ;; *) echo "$g" ;; esac
    done
}

if [ "$mode" = system ]; then
    for g in dialout audio; do
        if ! getent group "$g" >/dev/null; then
            run groupadd --system "$g"
        fi
    done
    if getent passwd "$ACCOUNT" >/dev/null; then
        note "account $ACCOUNT exists"
    else
        run useradd --system --user-group --home-dir "$STATE_DIR" --no-create-home \
            --shell /usr/sbin/nologin --comment "fieldbridge service" "$ACCOUNT"
    fi
    groups_needed=$(missing_groups "$ACCOUNT" | tr '\n' ',' | sed 's/,$//')
    if [ -n "$groups_needed" ]; then
        run usermod --append --groups "$groups_needed" "$ACCOUNT"
    else
        note "account $ACCOUNT is in dialout and audio"
    fi
    # The service manager creates the state folder too (StateDirectory=); creating it
    # now lets you copy a rig file and profiles in before the first start.
    if [ -d "$STATE_DIR" ]; then
        note "profile store $STATE_DIR exists: kept as it is"
    else
        run install -d -m 0750 -o "$ACCOUNT" -g "$ACCOUNT" "$STATE_DIR"
    fi
else
    groups_needed=$(missing_groups "$(id -un)" | tr '\n' ' ')
    if [ -n "$groups_needed" ]; then
        note "you are not in the group(s) ${groups_needed% }; ask an administrator to run:"
        note "  sudo usermod --append --groups dialout,audio $(id -un)   (then log in again)"
    fi
fi

# 3. Unit file and udev rule ----------------------------------------------------------

unit_changed=0
if render_unit | install_text "$unit_path" 0644; then unit_changed=1; fi

if [ "$mode" = system ]; then
    rule_changed=0
    if render_rule | install_text "$rule_path" 0644; then rule_changed=1; fi
    if [ -z "$usb_id" ] && grep -q '"VVVV"' "$here/$RULE_NAME"; then
        note "the udev rule still has placeholder USB IDs: re-run with --usb-id VVVV:PPPP"
        note "(see the comments in $rule_path for how to find them)"
    fi
else
    note "a udev rule needs root; to install it run:"
    note "  $0 --print-rule${usb_id:+ --usb-id $usb_id} | sudo tee $rule_path >/dev/null"
    note "  sudo udevadm control --reload-rules"
fi

# 4. Tell the service manager and udev ----------------------------------------------

if have_systemd || [ "$dry_run" = 1 ]; then
    if [ "$unit_changed" = 1 ]; then
        run "${systemctl_cmd[@]}" daemon-reload
    fi
    if [ "$enable" = 1 ]; then
        if [ "$dry_run" = 0 ] && "${systemctl_cmd[@]}" is-enabled --quiet "$SERVICE.service" 2>/dev/null; then
            note "$SERVICE.service is enabled"
        else
            run "${systemctl_cmd[@]}" enable "$SERVICE.service"
        fi
    fi
    if [ "$start_now" = 1 ]; then
        run "${systemctl_cmd[@]}" restart "$SERVICE.service"
    fi
else
    note "no running service manager here: enable the unit on the target with"
    note "  ${systemctl_cmd[*]} enable $SERVICE.service"
fi

if [ "$mode" = system ] && [ "${rule_changed:-0}" = 1 ]; then
    if command -v udevadm >/dev/null 2>&1 || [ "$dry_run" = 1 ]; then
        run udevadm control --reload-rules
        run udevadm trigger --subsystem-match=tty --subsystem-match=usb-serial --action=change
    else
        note "udevadm not found: replug the board (or reboot) to apply the rule"
    fi
fi

if [ "$dry_run" = 1 ]; then
    note "dry run: nothing was changed"
else
    note "done. Logs: journalctl ${systemctl_cmd[1]:+--user }-u $SERVICE -f"
fi
