"""service/: the unit file, the udev rule and the install scripts.

The unit is checked twice: its settings are read back and compared with what a
headless stage rig needs (DOMAIN.md section 11, from the service manager's issue
tracker: Type=notify with a watchdog, no start limit, a dedicated account in the
dialout and audio groups), and the service manager's own checker
(``systemd-analyze verify``) must accept it without a single warning. The scripts run
for real where that is harmless (a per-user install into a temporary home) and as a
printed plan (--dry-run) everywhere else.
"""

from __future__ import annotations

import os
import re
import subprocess
from pathlib import Path

import pytest

from e2e.peers import require as need  # path, or skip (fail with FIELDBRIDGE_REQUIRE_PEERS=1)


ROOT = Path(__file__).resolve().parent.parent
SERVICE = ROOT / "service"
UNIT = SERVICE / "fieldbridge.service"
RULE = SERVICE / "99-fieldbridge.rules"
INSTALL = SERVICE / "install.sh"
UNINSTALL = SERVICE / "uninstall.sh"


def parse_unit(text: str) -> dict[str, dict[str, list[str]]]:
    """Sections -> key -> every value in order (a key may repeat, e.g. Environment).

    systemd.syntax(7): '#' and ';' start comment lines, a trailing backslash continues
    a line, an empty assignment resets the list (kept here as an empty string).
    """
    sections: dict[str, dict[str, list[str]]] = {}
    current: dict[str, list[str]] | None = None
    pending = ""
    for raw in text.splitlines():
        line = pending + raw.strip()
        pending = ""
        if not line or line[0] in "#;":
            continue
        if line.endswith("\\"):
            pending = line[:-1] + " "
            continue
        if line.startswith("[") and line.endswith("]"):
            current = sections.setdefault(line[1:-1], {})
            continue
        assert current is not None, f"assignment outside a section: {line}"
        key, sep, value = line.partition("=")
        assert sep, f"not an assignment: {line}"
        current.setdefault(key.strip(), []).append(value.strip())
    return sections


def one(unit: dict[str, dict[str, list[str]]], section: str, key: str) -> str:
    values = unit[section][key]
    assert len(values) == 1, f"{key} set {len(values)} times"
    return values[0]


def words(unit: dict[str, dict[str, list[str]]], section: str, key: str) -> list[str]:
    return [w for v in unit[section].get(key, []) for w in v.split()]


def seconds(value: str) -> float:
    """A systemd.time(7) span like '5s', '500ms', '2' (seconds) or '1min 30s'."""
    units = {"ms": 0.001, "s": 1.0, "sec": 1.0, "min": 60.0, "m": 60.0, "": 1.0}
    total = 0.0
    for num, unit in re.findall(r"(\d+(?:\.\d+)?)\s*([a-z]*)", value):
        total += float(num) * units[unit]
    return total


def sh(*args: str, env: dict[str, str] | None = None, check: bool = True) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        ["bash", *args], capture_output=True, text=True, timeout=60, check=check,
        env=None if env is None else {**os.environ, **env},
    )


# ------------------------------------------------------------------ the unit's settings


@pytest.fixture(scope="module")
def unit() -> dict[str, dict[str, list[str]]]:
    return parse_unit(UNIT.read_text())


def test_unit_is_a_notify_service_with_a_watchdog(unit: dict[str, dict[str, list[str]]]) -> None:
    # DOMAIN.md section 11 (systemd issue tracker lessons): Type=notify, READY=1 after
    # start-up, WATCHDOG=1 from the working loop.
    assert one(unit, "Service", "Type") == "notify"
    assert one(unit, "Service", "NotifyAccess") == "main"
    assert 1.0 <= seconds(one(unit, "Service", "WatchdogSec")) <= 30.0
    exec_start = one(unit, "Service", "ExecStart").split()
    assert exec_start[0].endswith("/venv/bin/fieldbridge")
    assert exec_start[1:3] == ["run", "--service"]
    assert exec_start[exec_start.index("--home") + 1] == "/var/lib/fieldbridge"


def test_unit_restarts_forever(unit: dict[str, dict[str, list[str]]]) -> None:
    # DOMAIN.md section 11: the default start limit gives up after 5 quick failures.
    assert one(unit, "Service", "Restart") == "always"
    assert seconds(one(unit, "Service", "RestartSec")) == 2.0
    assert one(unit, "Unit", "StartLimitIntervalSec") == "0"  # systemd.unit(5): 0 disables it


def test_unit_runs_as_a_dedicated_account_with_device_groups(
    unit: dict[str, dict[str, list[str]]],
) -> None:
    # DOMAIN.md section 11: a dedicated user in the dialout (serial) and audio groups.
    assert one(unit, "Service", "User") == "fieldbridge"
    assert {"dialout", "audio"} <= set(words(unit, "Service", "SupplementaryGroups"))


def test_unit_hardening(unit: dict[str, dict[str, list[str]]]) -> None:
    svc = unit["Service"]
    assert one(unit, "Service", "NoNewPrivileges") == "yes"
    assert one(unit, "Service", "ProtectSystem") == "strict"
    assert "/var/lib/fieldbridge" in words(unit, "Service", "ReadWritePaths")
    assert one(unit, "Service", "StateDirectory") == "fieldbridge"
    assert one(unit, "Service", "RuntimeDirectory") == "fieldbridge"
    assert one(unit, "Service", "PrivateTmp") == "yes"
    assert one(unit, "Service", "ProtectHome") in ("yes", "read-only")
    for key in ("ProtectKernelTunables", "ProtectKernelModules", "ProtectControlGroups"):
        assert one(unit, "Service", key) == "yes"
    # The serial ports and sound devices must stay visible (see the unit's comments).
    assert svc.get("PrivateDevices", ["no"]) == ["no"]
    assert "DevicePolicy" not in svc


def test_unit_environment_and_ordering(unit: dict[str, dict[str, list[str]]]) -> None:
    env = words(unit, "Service", "Environment")
    assert "PYTHONUNBUFFERED=1" in env  # DOMAIN.md section 11: log unbuffered to stderr
    assert "FIELDBRIDGE_HOME=/var/lib/fieldbridge" in env
    assert "sound.target" in words(unit, "Unit", "After")
    assert one(unit, "Install", "WantedBy") == "multi-user.target"


# ------------------------------------------------------------------ systemd-analyze


def verify(tmp_path: Path, text: str, *, user: bool = False) -> subprocess.CompletedProcess[str]:
    """Run the manager's unit checker on `text`, with ExecStart made runnable here.

    verify also checks that the ExecStart program exists; on a test machine the venv
    does not, so a copy points it at /bin/true and keeps every other line.
    """
    tool = need("systemd-analyze")
    unit_dir = tmp_path / "units"
    unit_dir.mkdir(exist_ok=True)
    path = unit_dir / "fieldbridge.service"
    path.write_text(re.sub(r"(?m)^ExecStart=\S+", "ExecStart=/bin/true", text))
    cmd = [tool, "verify", str(path)]
    env = dict(os.environ)
    if user:
        cmd.insert(1, "--user")
        runtime = tmp_path / "runtime"
        runtime.mkdir(mode=0o700, exist_ok=True)
        env["XDG_RUNTIME_DIR"] = str(runtime)  # a user manager needs one to start up
    return subprocess.run(
        cmd, capture_output=True, text=True, timeout=60, cwd=unit_dir, env=env, check=False
    )


@pytest.mark.peer
def test_systemd_analyze_accepts_the_unit_without_warnings(tmp_path: Path) -> None:
    result = verify(tmp_path, UNIT.read_text())
    assert result.returncode == 0, result.stderr
    assert result.stderr == ""  # an unknown key or bad value is reported here


@pytest.mark.peer
def test_systemd_analyze_would_catch_a_bad_key(tmp_path: Path) -> None:
    # The check above can fail: the same checker flags a mistyped key and a bad value.
    bad = UNIT.read_text().replace("Restart=always", "Restart=sometimes\nWatchdogSecs=5s")
    result = verify(tmp_path, bad)
    assert "WatchdogSecs" in result.stderr and "sometimes" in result.stderr


@pytest.mark.peer
@pytest.mark.parametrize("prefix", ["/srv/fieldbridge", "/home/performer/fieldbridge"])
def test_rendered_system_units_verify(tmp_path: Path, prefix: str) -> None:
    text = sh(str(INSTALL), "--print-unit", "--prefix", prefix).stdout
    parsed = parse_unit(text)
    assert one(parsed, "Service", "ExecStart").startswith(f"{prefix}/venv/bin/fieldbridge run")
    # A venv under /home stays reachable only if the home folders are not hidden.
    want_home = "read-only" if prefix.startswith("/home/") else "yes"
    assert one(parsed, "Service", "ProtectHome") == want_home
    result = verify(tmp_path, text)
    assert (result.returncode, result.stderr) == (0, "")


@pytest.mark.peer
def test_rendered_user_unit_verifies(tmp_path: Path) -> None:
    text = sh(str(INSTALL), "--user", "--print-unit", "--prefix", "/opt/x",
              env={"HOME": str(tmp_path)}).stdout
    parsed = parse_unit(text)
    assert one(parsed, "Service", "Type") == "notify"
    assert one(parsed, "Service", "ExecStart") == "/opt/x/venv/bin/fieldbridge run --service"
    assert "User" not in parsed["Service"]  # a user manager cannot switch accounts
    assert one(parsed, "Install", "WantedBy") == "default.target"
    result = verify(tmp_path, text, user=True)
    assert (result.returncode, result.stderr) == (0, "")


@pytest.mark.peer
def test_security_exposure_is_low(tmp_path: Path) -> None:
    tool = need("systemd-analyze")
    unit_dir = tmp_path / "sec"
    unit_dir.mkdir()
    (unit_dir / "fieldbridge.service").write_text(UNIT.read_text())
    result = subprocess.run(
        [tool, "security", "--offline=true", "--no-pager", "fieldbridge.service"],
        capture_output=True, text=True, timeout=60, cwd=unit_dir, check=False,
    )
    m = re.search(r"Overall exposure level for fieldbridge\.service: ([\d.]+) (\w+)", result.stdout)
    assert m is not None, result.stdout + result.stderr
    # systemd-analyze(1) rates 0..10; its own labels call below 4 "OK" or "SAFE".
    assert m.group(2) in ("OK", "SAFE") and float(m.group(1)) < 4.0


# ------------------------------------------------------------------ udev rule

# udev(7) rule syntax: comma-separated KEY OP "VALUE" items, KEY maybe with {ATTRIBUTE}.
_ITEM = re.compile(r'\s*([A-Z_]+(?:\{[^}]+\})?)\s*(==|!=|\+=|-=|:=|=)\s*"([^"]*)"\s*(?:,|$)')
# Keys this file may use, from the udev(7) manual page (matching and assignment keys).
_UDEV_KEYS = {
    "ACTION", "SUBSYSTEM", "SUBSYSTEMS", "DRIVER", "DRIVERS", "ATTR", "ATTRS", "ENV", "TAG",
    "KERNEL", "KERNELS", "SYMLINK", "GROUP", "MODE", "OWNER", "RUN",
}


def parse_rules(text: str) -> list[list[tuple[str, str, str]]]:
    rules = []
    for line in text.splitlines():
        if not line.strip() or line.lstrip().startswith("#"):
            continue
        items, pos = [], 0
        while pos < len(line):
            m = _ITEM.match(line, pos)
            assert m, f"udev(7) syntax error at column {pos}: {line}"
            items.append((m.group(1), m.group(2), m.group(3)))
            pos = m.end()
        for key, _, _ in items:
            assert key.split("{")[0] in _UDEV_KEYS, key
        rules.append(items)
    return rules


def test_udev_rule_gives_a_stable_name_and_keeps_the_modem_prober_away() -> None:
    rules = parse_rules(RULE.read_text())
    board = [r for r in rules if ("SYMLINK", "+=", "fieldbridge-board") in r]
    assert len(board) == 1
    r = board[0]
    assert ("SUBSYSTEM", "==", "tty") in r
    assert ("TAG", "+=", "systemd") in r
    assert ("ENV{ID_MM_DEVICE_IGNORE}", "=", "1") in r
    assert ("GROUP", "=", "dialout") in r
    # Placeholders until the user fills in the IDs.
    assert ("ATTRS{idVendor}", "==", "VVVV") in r and ("ATTRS{idProduct}", "==", "PPPP") in r


def test_udev_rule_sets_the_latency_timer() -> None:
    rules = parse_rules(RULE.read_text())
    latency = [r for r in rules if ("ATTR{latency_timer}", "=", "1") in r]
    assert len(latency) == 1
    # common practice: the ftdi_sio driver's latency_timer attribute on the usb-serial device
    assert ("DRIVERS", "==", "ftdi_sio") in latency[0]
    assert ("SUBSYSTEM", "==", "usb-serial") in latency[0]


def test_install_fills_in_the_usb_ids() -> None:
    text = sh(str(INSTALL), "--print-rule", "--usb-id", "1A2B:3c4d").stdout
    (board,) = [r for r in parse_rules(text) if ("SYMLINK", "+=", "fieldbridge-board") in r]
    assert ("ATTRS{idVendor}", "==", "1a2b") in board
    assert ("ATTRS{idProduct}", "==", "3c4d") in board
    bad = sh(str(INSTALL), "--print-rule", "--usb-id", "12345", check=False)
    assert bad.returncode != 0 and "--usb-id" in bad.stderr


# ------------------------------------------------------------------ the scripts


@pytest.mark.parametrize("script", [INSTALL, UNINSTALL])
def test_scripts_parse_and_are_strict(script: Path) -> None:
    sh("-n", str(script))  # bash(1) -n: read and syntax-check without running
    text = script.read_text()
    assert text.startswith("#!/usr/bin/env bash\n")
    assert "\nset -euo pipefail\n" in text
    assert os.access(script, os.X_OK)
    assert sh(str(script), "--help").stdout.startswith("Usage:")
    wrong = sh(str(script), "--frobnicate", check=False)
    assert wrong.returncode != 0 and "unknown option: --frobnicate" in wrong.stderr


def test_install_dry_run_plan(tmp_path: Path) -> None:
    prefix = tmp_path / "opt" / "fieldbridge"
    out = sh(str(INSTALL), "--dry-run", "--prefix", str(prefix)).stdout
    lines = out.splitlines()
    venv = f"{prefix}/venv"
    assert f"+ python3 -m venv {venv}" in lines
    assert f"+ {venv}/bin/python -m pip install --quiet --upgrade {ROOT}" in lines
    account = subprocess.run(
        ["getent", "passwd", "fieldbridge"], capture_output=True, check=False
    ).returncode == 0
    if account:
        assert "# account fieldbridge exists" in lines
    else:
        assert any(line.startswith("+ useradd --system") and line.endswith(" fieldbridge") for line in lines)
    unit_lines = [line for line in lines if "/etc/systemd/system/fieldbridge.service" in line]
    assert unit_lines and (unit_lines[0].startswith("+ write ") or "up to date" in unit_lines[0])
    assert any("/etc/udev/rules.d/99-fieldbridge.rules" in line for line in lines)
    assert "+ systemctl enable fieldbridge.service" in lines
    assert lines[-1] == "# dry run: nothing was changed"
    assert not prefix.exists() and not (tmp_path / "opt").exists()
    # Order matters: the package before the unit that runs it, the unit before enable.
    order = [next(i for i, line in enumerate(lines) if needle in line)
             for needle in ("-m venv", "pip install", "systemd/system/fieldbridge.service",
                            "systemctl enable")]
    assert order == sorted(order)


def test_install_plan_is_the_same_twice(tmp_path: Path) -> None:
    args = ("--dry-run", "--prefix", str(tmp_path / "p"), "--usb-id", "1a2b:3c4d", "--now")
    first = sh(str(INSTALL), *args).stdout
    second = sh(str(INSTALL), *args).stdout
    assert first == second
    assert "+ systemctl restart fieldbridge.service" in first.splitlines()


def test_install_rejects_unsafe_prefixes() -> None:
    for prefix in ("relative/path", "/opt/my fieldbridge", "/opt/100%"):
        result = sh(str(INSTALL), "--dry-run", "--prefix", prefix, check=False)
        assert result.returncode != 0 and "--prefix" in result.stderr


def _user_env(home: Path) -> dict[str, str]:
    return {
        "HOME": str(home),
        "XDG_CONFIG_HOME": str(home / ".config"),
        "XDG_DATA_HOME": str(home / ".local" / "share"),
    }


def test_user_install_and_uninstall_for_real(tmp_path: Path) -> None:
    """A per-user install changes only files under the (temporary) home: run it."""
    env = _user_env(tmp_path)
    unit_path = tmp_path / ".config" / "systemd" / "user" / "fieldbridge.service"
    data = tmp_path / ".local" / "share" / "fieldbridge"

    first = sh(str(INSTALL), "--user", "--service-only", env=env).stdout
    assert f"+ write {unit_path} (new)" in first.splitlines()
    assert unit_path.read_text() == sh(str(INSTALL), "--user", "--print-unit", env=env).stdout

    second = sh(str(INSTALL), "--user", "--service-only", env=env).stdout
    assert f"# {unit_path} is up to date" in second.splitlines()  # idempotent: no rewrite

    # A venv (marked by pyvenv.cfg) and a profile beside it.
    (data / "venv").mkdir(parents=True)
    (data / "venv" / "pyvenv.cfg").write_text("home = /usr/bin\n")
    (data / "profiles").mkdir()
    (data / "profiles" / "harbour-hall.toml").write_text("# demo venue\n")

    removed = sh(str(UNINSTALL), "--user", env=env).stdout.splitlines()
    assert f"+ rm -f {unit_path}" in removed
    assert f"+ rm -rf {data}/venv" in removed
    assert not unit_path.exists() and not (data / "venv").exists()
    assert (data / "profiles" / "harbour-hall.toml").exists()  # profiles are kept

    again = sh(str(UNINSTALL), "--user", env=env).stdout.splitlines()
    assert f"# no unit at {unit_path}" in again
    assert f"# no virtual environment at {data}/venv" in again


def test_uninstall_leaves_a_folder_that_is_not_a_venv(tmp_path: Path) -> None:
    env = _user_env(tmp_path)
    prefix = tmp_path / "elsewhere"
    (prefix / "venv").mkdir(parents=True)
    (prefix / "venv" / "precious.txt").write_text("not a virtual environment\n")
    out = sh(str(UNINSTALL), "--user", "--prefix", str(prefix), env=env).stdout
    assert "is not a virtual environment" in out
    assert (prefix / "venv" / "precious.txt").exists()


def test_uninstall_dry_run_purge_plan(tmp_path: Path) -> None:
    prefix = tmp_path / "p"
    (prefix / "venv").mkdir(parents=True)
    (prefix / "venv" / "pyvenv.cfg").write_text("")
    out = sh(str(UNINSTALL), "--dry-run", "--purge", "--prefix", str(prefix)).stdout.splitlines()
    assert f"+ rm -rf {prefix}/venv" in out
    if Path("/var/lib/fieldbridge").is_dir():
        assert "+ rm -rf /var/lib/fieldbridge" in out
    assert out[-1] == "# dry run: nothing was changed"
    assert (prefix / "venv" / "pyvenv.cfg").exists()
    kept = sh(str(UNINSTALL), "--dry-run", "--prefix", str(prefix)).stdout
    assert "kept: profiles in /var/lib/fieldbridge" in kept
