"""Running a feed around the clock: the feed file, sd_notify, metrics, rotating taps.

Modules
-------
feed (:mod:`rtstage.service.feed`)
    The feed TOML file: schema, strict checks, command-line overrides, the
    example and the template unit.
notify (:mod:`rtstage.service.notify`)
    The service manager's notification protocol (READY, STATUS, WATCHDOG,
    RELOADING, STOPPING) and the heartbeat thread.
metrics (:mod:`rtstage.service.metrics`)
    Prometheus collector and HTTP endpoint.
rotate (:mod:`rtstage.service.rotate`)
    Tap and automation log in segments, with retention.
runner (:mod:`rtstage.service.runner`)
    The glue ``rtstage run`` calls.

The journal's priority prefixes live in :mod:`rtstage.log`, the OSC server
in :mod:`rtstage.control.osc`, the ``feed`` command in :mod:`rtstage.cli.feed`.
See docs/service.md.
"""
