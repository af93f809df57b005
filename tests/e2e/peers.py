"""Finding the outside programs that peer tests talk to.

A peer test needs a real program (an OSC dump tool, a JACK server, a soft synth, a pitch
tracker). On a developer's machine without it the test is skipped, with a reason that
names the program; CI installs every peer and sets ``FIELDBRIDGE_REQUIRE_PEERS=1``, and
then a missing program fails the test instead, so a skip can never pass for a pass::

    from peers import require

    def test_something() -> None:
        oscdump = require("oscdump")     # absolute path, or skip / fail
"""

from __future__ import annotations

import os
import shutil

import pytest

#: Environment variable that turns "peer missing" from a skip into a failure.
REQUIRE_ENV = "FIELDBRIDGE_REQUIRE_PEERS"


def peers_required() -> bool:
    """True when missing peers must fail the run (CI sets FIELDBRIDGE_REQUIRE_PEERS=1)."""
    return os.environ.get(REQUIRE_ENV, "").strip() == "1"


def require(program: str) -> str:
    """Absolute path of `program` on PATH; otherwise skip the test, or fail it under CI."""
    path = shutil.which(program)
    if path:
        return path
    reason = f"peer program {program!r} is not installed (not found on PATH)"
    if peers_required():
        pytest.fail(f"{reason}, and {REQUIRE_ENV}=1 forbids skipping", pytrace=False)
    pytest.skip(reason)
