"""Outputs: where a :class:`~bridge.pipeline.Reading` goes after the pipeline.

Every output is a :class:`Sink` with the same five verbs::

    sink = make_sink("midi", settings)   # nothing opened yet
    with sink:                            # __enter__ opens, __exit__ closes
        sink.send(reading)                # once per frame
        sink.silence("sensor lost")       # end every note, level 0; any time, any number of times
    # close(): silence, then release; safe to call twice

Implementations are named in one table and imported only when first used, so a
MIDI-only rig never imports the OSC library (and the reverse).
"""

from __future__ import annotations

import abc
import importlib
import logging
from collections.abc import Callable
from types import TracebackType
from typing import Any, TypeVar, cast

from bridge.errors import ConfigError

log = logging.getLogger(__name__)

_S = TypeVar("_S", bound="Sink")

#: Output kind (as written in a rig file) -> "module:Class" of its implementation.
SINKS: dict[str, str] = {
    "midi": "bridge.outputs.midi:MidiSink",
    "midifile": "bridge.outputs.midifile:MidiFileSink",
    "osc": "bridge.outputs.osc:OscSink",
}


class Sink(abc.ABC):
    """The contract every output follows.

    Subclasses fill in :meth:`open`, :meth:`send`, :meth:`silence` and, when they hold
    something to release (a port, a socket, a file), :meth:`_release`. :meth:`close` is
    provided: it silences, then releases, exactly once.
    """

    #: Short name for logs and summaries; subclasses override.
    kind: str = "sink"

    _closed: bool = False

    @abc.abstractmethod
    def open(self) -> None:
        """Acquire what the output needs (ports, sockets, files). Calling it twice is harmless."""

    @abc.abstractmethod
    def send(self, reading: Any) -> None:
        """Send one reading (a ``bridge.pipeline.Reading`` or anything with the same attributes)."""

    @abc.abstractmethod
    def silence(self, reason: str) -> None:
        """End every held note and set every level to zero.

        Safe to call at any time, any number of times, also before :meth:`open` and after
        :meth:`close`. ``reason`` is for the log ("sensor lost", "profile switch", ...).
        """

    def _release(self) -> None:
        """Free ports, sockets or files. Called once, by :meth:`close`, after silencing."""

    @property
    def closed(self) -> bool:
        return self._closed

    def close(self) -> None:
        """Silence, then release. The second and later calls do nothing."""
        if self._closed:
            return
        self._closed = True
        try:
            self.silence("close")
        finally:
            self._release()

    def __enter__(self: _S) -> _S:
        self.open()
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.close()


def sink_class(kind: str) -> type[Sink]:
    """Import and return the implementation registered for ``kind`` (see :data:`SINKS`)."""
    try:
        target = SINKS[kind]
    except KeyError:
        known = ", ".join(sorted(SINKS))
        raise ConfigError(f"unknown output kind {kind!r}; choose one of: {known}") from None
    module_name, _, class_name = target.partition(":")
    module = importlib.import_module(module_name)
    cls: type[Sink] = getattr(module, class_name)
    return cls


def make_sink(kind: str, settings: Any, **kwargs: Any) -> Sink:
    """Build (but do not open) the output called ``kind`` with its settings model.

    Extra keyword arguments go to the implementation's constructor (for example
    ``ports=[...]`` to hand a MIDI sink ports that are already open).
    """
    factory = cast("Callable[..., Sink]", sink_class(kind))
    return factory(settings, **kwargs)


__all__ = ["SINKS", "Sink", "make_sink", "sink_class"]
