"""The live engine: a GIL-free PortAudio stream running the rtstage kernel.

Public API
----------
LiveEngine
    Prepare, run, supervise and stop one stream; ``set_settings``,
    ``wait_applied`` and ``status`` for the control and meter layers.
parse_source, generate
    ``--source`` specs and the generated signals (the same samples live and offline).
JackDummyServer
    A private ``jackd -d dummy`` server (tests, benchmarks, machines without a sound card).

Modules: :mod:`.cfunc` (the compiled callback), :mod:`.shared` (preallocated
blocks, seqlock, SPSC ring), :mod:`.stream` (PortAudio through sounddevice),
:mod:`.devices`, :mod:`.sources`, :mod:`.tap`, :mod:`.supervisor`,
:mod:`.jackserver`, :mod:`.loadprobe`, :mod:`.cli`.  See docs/live.md.
"""

from .jackserver import JackDummyServer
from .sources import generate, parse_source


def __getattr__(name):
    if name == "LiveEngine":
        from .supervisor import LiveEngine

        return LiveEngine
    raise AttributeError(name)


__all__ = ["LiveEngine", "JackDummyServer", "generate", "parse_source"]
