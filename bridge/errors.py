"""The project's one error family. Library code raises these; only the CLI maps them to exit codes."""

from __future__ import annotations


class BridgeError(Exception):
    """Base of every error fieldbridge raises on purpose. The message says what to fix."""


class ConfigError(BridgeError):
    """A settings or profile file is missing, unreadable or invalid."""


class DeviceError(BridgeError):
    """A serial board, MIDI system or network peer cannot be used."""


class CalibrationError(BridgeError):
    """Captured points cannot give a usable calibration."""


class ControlError(BridgeError):
    """The daemon's control channel refused or failed a request."""
