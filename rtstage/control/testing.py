"""Helpers for tests and benchmarks of the control layer: a server over an in-process engine.

Examples
--------
>>> with control_stack(driver=True) as stack:                 # doctest: +SKIP
...     with stack.client() as client:
...         client.request({"op": "set", "values": {"bits": 12}})
"""

import contextlib
from dataclasses import dataclass

from ..engine import Engine, EngineSettings
from .client import ControlClient
from .protocol import Controller, PresetStore
from .server import ControlServer
from .target import BlockDriver, EngineTarget


@dataclass
class ControlStack:
    """Engine, target, controller, server and (optionally) a running driver."""

    engine: Engine
    target: EngineTarget
    controller: Controller
    server: ControlServer
    driver: BlockDriver = None
    token: str = None

    def client(self, token=None, timeout_s=5.0):
        """A new, not yet connected, client of the server."""
        return ControlClient("127.0.0.1", self.server.port, token if token is not None else self.token, timeout_s)


@contextlib.contextmanager
def control_stack(settings=None, channels=2, samplerate=48000, blocksize=256, preset_dir=None, driver=False,
                  realtime=True, nblocks=None, automation_log=None, server_options=None, token=None, logger=None):
    """Start a control server on 127.0.0.1 (ephemeral port) over an :class:`EngineTarget`; stop it on exit.

    Parameters
    ----------
    settings : EngineSettings or None
        Engine settings; None: 16 bits, TPDF, seed 1.
    driver : bool
        Run a :class:`BlockDriver` (real-time paced unless ``realtime`` is False).
    server_options : dict or None
        Extra keyword arguments for :class:`ControlServer`.
    """
    settings = settings or EngineSettings(bits=16, dither="tpdf", seed=1)
    engine = Engine(settings, channels=channels, samplerate=samplerate)
    target = EngineTarget(engine, blocksize=blocksize, automation_log=automation_log)
    controller = Controller(target, PresetStore(preset_dir) if preset_dir else None)
    options = dict(server_options or {})
    if logger is not None:
        options["logger"] = logger
    server = ControlServer(controller, host="127.0.0.1", port=0, token=token, **options)
    drv = BlockDriver(target, nblocks=nblocks, realtime=realtime) if driver else None
    server.start()
    try:
        if drv is not None:
            drv.start()
        yield ControlStack(engine, target, controller, server, drv, token)
    finally:
        try:
            if drv is not None:
                drv.stop()
        finally:
            server.stop()
