"""The built-in demo: a simulated board on a pseudo-terminal, played by the real daemon.

Nothing here is a shortcut around the live path: the simulator's bytes go through a
pseudo-terminal, are read by pyserial exactly as a USB board would be, decoded, tracked,
calibrated, smoothed and mapped by the same code, and leave as real OSC datagrams, a real
Standard MIDI File and (where the machine has a MIDI system) a real virtual MIDI port.
The calibration comes from a simulated soundcheck run through the same fitting code.
"""

from __future__ import annotations

import logging
import os
import tempfile
from dataclasses import dataclass
from pathlib import Path

from .daemon import Setup
from .frames import FrameSettings
from .pipeline import ChannelSettings, VoiceSettings
from .sim import SimBoard, SimSettings, scenario
from .soundcheck import RigCalibration, fit_rig, simulated_holds
from .sources import PtyBoard, SourceSettings

log = logging.getLogger(__name__)


def demo_board_settings(seed: int = 7, window_s: float = 0.01) -> SimSettings:
    """The demo board: pitch and volume antennas timed by period (reciprocal counting)
    plus a reference oscillator, text frames with sequence numbers."""
    return SimSettings(
        seed=seed, window_s=window_s, kind="period", with_reference=True, text_seq=True
    )


def demo_channels(s: SimSettings) -> list[ChannelSettings]:
    roles = {"pitch": "pitch", "volume": "volume", "ref": "reference"}
    return [ChannelSettings(name=n, role=roles.get(n, "unused"), kind=s.kind) for n in s.names]


def demo_calibration(s: SimSettings, channels: list[ChannelSettings]) -> RigCalibration:
    holds = simulated_holds(s, [c.name for c in channels], seed=s.seed or 0, marks=(0.25, 0.1))
    return fit_rig(channels, holds, rate_hz=1.0 / s.window_s)


@dataclass
class DemoRig:
    board: PtyBoard
    setup: Setup
    sim: SimSettings
    link: str


def start_demo_board(
    seed: int = 7, performance: str = "warmup", window_s: float = 0.01, loop: bool = True
) -> DemoRig:
    """Calibrate on the simulator, then start a simulated board playing ``performance``
    on a pseudo-terminal reached through a stable link (like /dev/serial/by-id)."""
    s = demo_board_settings(seed, window_s)
    channels = demo_channels(s)
    cal = demo_calibration(s, channels)
    perf = scenario(performance, seed)
    perf.loop = loop
    board = SimBoard(s.model_copy(update={"seed": seed + 1}), perf)
    link = os.path.join(tempfile.mkdtemp(prefix="fieldbridge-demo-"), "board")
    pty = PtyBoard(board.next_bytes, s.window_s, link_path=link)
    pty.start()
    setup = Setup(
        channels=channels,
        voices=[VoiceSettings(name="lead", pitch_channel="pitch", volume_channel="volume")],
        frames=FrameSettings(format=s.format, leading_seq=s.text_seq),
        source=SourceSettings(url=link),
        rate_hz=1.0 / s.window_s,
        calibration=cal,
        profile="simulated-soundcheck",
    )
    return DemoRig(pty, setup, s, link)


def out_dir() -> Path:
    p = Path(os.environ.get("FIELDBRIDGE_OUT", "out"))
    p.mkdir(parents=True, exist_ok=True)
    return p
