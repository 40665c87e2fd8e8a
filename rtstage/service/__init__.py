"""Running a feed around the clock: the feed file, sd_notify, metrics, rotating taps.

Modules
-------
feed (:mod:`rtstage.service.feed`)
    The feed TOML file: schema, strict checks, command-line overrides, the
    example and the template unit.
notify (:mod:`rtstage.service.notify`)
    The service manager's notification protocol (READY, STATUS, WATCHDOG,
    RELOADING, STOPPING) and the heartbeat thread.
journal (:mod:`rtstage.service.journal`)
    Syslog priority prefixes when stderr goes to the journal.
metrics (:mod:`rtstage.service.metrics`)
    Prometheus collector and HTTP endpoint.
rotate (:mod:`rtstage.service.rotate`)
    Tap and automation log in segments, with retention.
runner (:mod:`rtstage.service.runner`)
    The glue ``rtstage run`` calls.

See docs/service.md.
"""
