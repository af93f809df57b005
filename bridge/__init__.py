"""fieldbridge: a contactless sensor board in, a playable synthesizer out.

A frame of counts flows one way::

    source -> decoder -> channel pipeline -> outputs
    sources    frames      pipeline           outputs/ (midi, osc, midifile)

See DEVELOPERS.md for the module map.
"""

__version__ = "0.1.0"
