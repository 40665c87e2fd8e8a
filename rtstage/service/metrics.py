"""Metrics for a station's monitoring system: the Prometheus text exposition over HTTP.

:class:`FeedCollector` is a ``prometheus_client`` custom collector: at every
scrape it calls a *snapshot provider* (a callable returning plain data, see
:func:`empty_snapshot` for the fields) and turns it into metric families.
Nothing is counted twice or kept here: the engine's own counters and the
meter thread's latest report are the single source, so a scrape reads the
same values as ``status`` and ``meters`` on the control socket.
:class:`MetricsServer` serves the registry with ``prometheus_client``'s own
HTTP server, on loopback unless told otherwise.

Names and units
---------------
Every name starts with ``rtstage_``; counters end in ``_total``; times are
in seconds (``_seconds``) and shares in ``_ratio`` (0..1), as Prometheus'
naming conventions ask.  Levels are the exception: they are exported in
decibels relative to full scale with the unit in the name (``_dbfs``,
``_dbtp`` for true peak, ``_db`` for a level difference).  A level meter is
read in dB; a linear power ratio would make every dashboard and alert take
a logarithm, and a threshold like "added noise above -90 dBFS" would have to
be written as 1e-9.  The conventions' point, a unit in every name and never a
mix of units in one metric, is kept.  Digital silence reads ``-Inf``
(a valid sample value in the exposition format); a level not measured yet
is absent.

Labels: ``feed`` (the feed's name) on every metric, ``channel`` (1-based)
on per-channel ones, ``kind`` on flagged callbacks, ``weighting``
(``unweighted``, ``a``, ``itu468``) on added noise, ``process``,
``thread`` and ``policy`` on thread scheduling.

Exposure
--------
The endpoint shows the feed's health and programme levels to anyone who can
reach it, and it has no authentication.  It therefore listens on loopback
(127.0.0.1) by default; another address needs the explicit option
``--metrics-listen-any`` (feed key ``metrics.listen_any = true``), meant for a
monitoring network the station controls, behind its firewall.

References
----------
.. [1] Prometheus, "Metric and label naming" (naming conventions: base
   units, ``_total`` suffix, unit suffixes).
.. [2] Prometheus, "Exposition formats" (text format 0.0.4).
.. [3] AES17-2020, dBFS: the RMS of a full-scale sine reads 0 dBFS.
.. [4] ITU-R BS.1770-4, true peak (dBTP) and loudness (LUFS).
.. [5] EBU Tech 3342, loudness range (LU).
"""

import ipaddress
import math

from ..errors import RtstageError

PREFIX = "rtstage_"

WEIGHTINGS = (("unweighted", "unweighted"), ("a_weighted", "a"), ("itu468", "itu468"))
"""Meter report key and exported ``weighting`` label value of each added-noise reading."""


def empty_snapshot():
    """The snapshot fields a provider returns (all optional but ``feed``).

    Returns
    -------
    dict
        ``feed`` (str), ``running`` (bool), ``ready`` (bool), ``uptime_s``,
        ``samplerate``, ``blocksize``, ``bits``, ``dither``, ``shaper``,
        ``frames`` (sent to the device), ``callbacks``, ``engine_frame``,
        ``flagged`` (dict kind -> count), ``restarts``, ``gaps``, ``gap_s``
        (total), ``cpu_load``, ``cpu_load_max`` (0..1),
        ``control_changes``, ``reloads``, ``tap_dropped_frames``,
        ``meter_dropped_frames``, ``watchdog_pings``, ``watchdog_missed``,
        ``meter_frames`` (frames in the current meter report),
        ``loudness`` (the meter report's loudness section: ``momentary_lufs``,
        ``short_term_lufs``, ``integrated_lufs``, ``loudness_range_lu``,
        ``target`` with ``pass``),
        ``channels``: list of dicts with ``added_noise_dbfs`` (dict
        reading -> dBFS or None), ``noise_modulation_db``,
        ``sample_peak_dbfs``, ``true_peak_dbtp``, ``clipped``, ``replaced``,
        ``auto_muted`` (bool), ``auto_muted_frames``; ``threads``: list of
        dicts with ``process``, ``thread``, ``policy``, ``priority``.
    """
    return {"feed": "", "channels": [], "flagged": {}, "threads": []}


def _level(value):
    """A dB level for export: None stays absent, a silent reading is -Inf."""
    if value is None:
        return None
    value = float(value)
    return value if not math.isnan(value) else None


class FeedCollector:
    """Prometheus collector over a snapshot provider.

    Parameters
    ----------
    provider : callable
        ``provider() -> dict`` (see :func:`empty_snapshot`); called once per scrape.
    """

    def __init__(self, provider):
        self.provider = provider

    def describe(self):
        # No description at registration: the provider may not be ready yet.
        return []

    def collect(self):
        from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily, InfoMetricFamily

        snap = self.provider()
        feed = str(snap.get("feed", ""))
        fl = ["feed"]

        def gauge(name, doc, value, labels=None, extra=()):
            fam = GaugeMetricFamily(PREFIX + name, doc, labels=fl + list(extra))
            if value is not None:
                fam.add_metric([feed, *(labels or [])], float(value))
            return fam

        def counter(name, doc, value):
            fam = CounterMetricFamily(PREFIX + name, doc, labels=fl)
            if value is not None:
                fam.add_metric([feed], float(value))
            return fam

        info = InfoMetricFamily(PREFIX + "feed", "The feed's stream and engine settings", labels=fl)
        info.add_metric([feed], {k: str(snap.get(k, "")) for k in ("samplerate", "blocksize", "bits", "dither",
                                                                     "shaper", "seed", "device", "source")})
        yield info
        yield gauge("running", "1 while the stream is open and supervised", int(bool(snap.get("running"))))
        yield gauge("ready", "1 once READY was reached (audio flowing)", int(bool(snap.get("ready"))))
        yield gauge("uptime_seconds", "Time since the stream started", snap.get("uptime_s"))
        yield gauge("sample_index", "Engine sample index of the next frame", snap.get("engine_frame"))
        yield counter("frames", "Frames sent to the device", snap.get("frames"))
        yield counter("callbacks", "Audio callbacks run", snap.get("callbacks"))
        flagged = CounterMetricFamily(PREFIX + "flagged_callbacks", "Callbacks with a status flag, by kind",
                                      labels=fl + ["kind"])
        for kind, count in sorted((snap.get("flagged") or {}).items()):
            flagged.add_metric([feed, str(kind)], float(count))
        yield flagged
        yield counter("stream_restarts", "Times the stream failed and was reopened", snap.get("restarts"))
        yield counter("gaps", "Discontinuities in the output (one per restart)", snap.get("gaps"))
        yield counter("gap_seconds", "Total wall-clock length of the gaps", snap.get("gap_s"))
        yield gauge("cpu_load_ratio", "Share of the block period the callback used (PortAudio CPU load)",
                    snap.get("cpu_load"))
        yield gauge("cpu_load_max_ratio", "Largest CPU load seen after the settle time", snap.get("cpu_load_max"))
        yield counter("control_changes_applied", "Parameter changes the engine applied (all control paths)",
                      snap.get("control_changes"))
        yield counter("feed_reloads", "SIGHUP re-reads of the feed file", snap.get("reloads"))
        yield counter("tap_dropped_frames", "Frames the tap ring could not take (not written to the tap)",
                      snap.get("tap_dropped_frames"))
        yield counter("meter_dropped_frames", "Frames the meter ring could not take (not metered)",
                      snap.get("meter_dropped_frames"))
        yield counter("watchdog_pings", "WATCHDOG=1 notifications sent", snap.get("watchdog_pings"))
        yield counter("watchdog_missed", "Watchdog intervals without progress (no ping sent)",
                      snap.get("watchdog_missed"))
        yield gauge("metered_frames", "Frames in the current meter report (since the last change of word length, "
                    "dither or shaper)", snap.get("meter_frames"))

        chl = ["channel"]
        per_channel = {
            "noise": GaugeMetricFamily(PREFIX + "added_noise_dbfs", "Added noise (output minus input) level, "
                                       "RMS detector, by weighting", labels=fl + chl + ["weighting"]),
            "mod": GaugeMetricFamily(PREFIX + "noise_modulation_db", "Noise modulation: spread of the added "
                                     "noise power across signal-level bins", labels=fl + chl),
            "peak": GaugeMetricFamily(PREFIX + "sample_peak_dbfs", "Sample peak of the output words", labels=fl + chl),
            "tp": GaugeMetricFamily(PREFIX + "true_peak_dbtp", "True peak of the output words (BS.1770)",
                                    labels=fl + chl),
            "clip": CounterMetricFamily(PREFIX + "clipped_samples", "Samples limited to the word's range",
                                        labels=fl + chl),
            "repl": CounterMetricFamily(PREFIX + "replaced_samples", "Non-finite input samples replaced",
                                        labels=fl + chl),
            "am": GaugeMetricFamily(PREFIX + "auto_muted", "1 while the channel is auto-muted", labels=fl + chl),
            "amf": CounterMetricFamily(PREFIX + "auto_muted_frames", "Frames the channel spent auto-muted",
                                       labels=fl + chl),
        }
        for c, ch in enumerate(snap.get("channels") or []):
            lab = [feed, str(c + 1)]
            for key, label in WEIGHTINGS:
                value = _level((ch.get("added_noise_dbfs") or {}).get(key))
                if value is not None:
                    per_channel["noise"].add_metric(lab + [label], value)
            for fam, key in (("mod", "noise_modulation_db"), ("peak", "sample_peak_dbfs"), ("tp", "true_peak_dbtp")):
                value = _level(ch.get(key))
                if value is not None:
                    per_channel[fam].add_metric(lab, value)
            for fam, key in (("clip", "clipped"), ("repl", "replaced"), ("amf", "auto_muted_frames")):
                if ch.get(key) is not None:
                    per_channel[fam].add_metric(lab, float(ch[key]))
            if ch.get("auto_muted") is not None:
                per_channel["am"].add_metric(lab, float(bool(ch["auto_muted"])))
        yield from per_channel.values()

        loud = snap.get("loudness") or {}
        lufs = GaugeMetricFamily(PREFIX + "loudness_lufs", "Programme loudness of the output (BS.1770), by kind",
                                 labels=fl + ["kind"])
        for kind in ("momentary", "short_term", "integrated"):
            value = _level(loud.get(f"{kind}_lufs"))
            if value is not None:
                lufs.add_metric([feed, kind], value)
        yield lufs
        yield gauge("loudness_range_lu", "Loudness range (EBU Tech 3342)", _level(loud.get("loudness_range_lu")))
        verdict = (loud.get("target") or {}).get("pass")
        yield gauge("loudness_target_pass", "1 when the programme meets the loudness target, 0 when not (absent "
                    "while undecided or without a target)", None if verdict is None else int(bool(verdict)))

        sched = GaugeMetricFamily(PREFIX + "thread_realtime_priority", "Real-time priority the threads got "
                                  "(0: not real-time), by process, thread name and policy",
                                  labels=fl + ["process", "thread", "policy"])
        for t in snap.get("threads") or []:
            sched.add_metric([feed, str(t["process"]), str(t["thread"]), str(t["policy"])], float(t["priority"]))
        yield sched


# ----------------------------------------------------------------------------- thread scheduling

_POLICIES = {0: "other", 1: "fifo", 2: "rr", 3: "batch", 5: "idle", 6: "deadline"}


def thread_scheduling(pid, process):
    """Scheduling of every thread of ``pid`` from ``/proc`` (Linux), merged by thread name.

    Returns
    -------
    list of dict
        ``process``, ``thread`` (the thread's name), ``policy`` (``fifo``,
        ``rr``, ``other`` ...), ``priority`` (the highest real-time priority
        among the threads of that name and policy; 0 for non-real-time).

    Notes
    -----
    Fields 40 (rt_priority) and 41 (policy) of ``/proc/<pid>/task/<tid>/stat``
    (proc(5)); the name is field 2, read after the last ``)``.
    """
    import os

    merged = {}
    base = f"/proc/{int(pid)}/task"
    try:
        tids = os.listdir(base)
    except OSError:
        return []
    for tid in tids:
        try:
            with open(f"{base}/{tid}/stat") as f:
                text = f.read()
        except OSError:
            continue
        name = text[text.find("(") + 1:text.rfind(")")]
        fields = text[text.rfind(")") + 2:].split()
        # fields[0] is field 3 (state); field k is fields[k - 3]
        try:
            rt_priority, policy = int(fields[40 - 3]), int(fields[41 - 3])
        except (IndexError, ValueError):
            continue
        key = (name, _POLICIES.get(policy, str(policy)))
        merged[key] = max(merged.get(key, 0), rt_priority)
    return [{"process": process, "thread": n, "policy": p, "priority": prio} for (n, p), prio in sorted(merged.items())]


# ----------------------------------------------------------------------------- server


def parse_listen(text, listen_any=False, what="--metrics"):
    """``HOST:PORT`` (``[v6]:PORT``, or ``PORT`` alone for loopback) to ``(host, port)``.

    Raises
    ------
    RtstageError
        Malformed, or not a loopback address without ``listen_any``.
    """
    text = str(text).strip()
    if text.isdigit():
        host, port_text = "127.0.0.1", text
    elif text.startswith("["):
        host, sep, port_text = text[1:].partition("]:")
        if not sep:
            raise RtstageError(f"{what}: expected [IPv6]:PORT, got {text!r}")
    else:
        host, sep, port_text = text.rpartition(":")
        if not sep or not host:
            raise RtstageError(f"{what}: expected HOST:PORT, got {text!r}")
    try:
        port = int(port_text)
    except ValueError:
        raise RtstageError(f"{what}: port must be an integer, got {port_text!r}") from None
    if not 0 <= port <= 65535:
        raise RtstageError(f"{what}: port must be 0..65535, got {port}")
    if host == "localhost":
        host = "127.0.0.1"
    try:
        addr = ipaddress.ip_address(host)
    except ValueError:
        raise RtstageError(f"{what}: {host!r} is not an IP address (give a numeric address)") from None
    if not addr.is_loopback and not listen_any:
        raise RtstageError(f"{what}: {host} is not a loopback address; the endpoint has no authentication, so "
                           "listening elsewhere needs the explicit --metrics-listen-any (see docs/service.md)")
    return str(addr), port


class MetricsServer:
    """Serve a :class:`FeedCollector` over HTTP (``/metrics``, and any path) with prometheus_client.

    Parameters
    ----------
    provider : callable
        Snapshot provider (see :func:`empty_snapshot`).
    host : str
        Listen address (loopback by default; see the module notes).
    port : int
        TCP port; 0 chooses a free one (see :attr:`port` after :meth:`start`).
    """

    def __init__(self, provider, host="127.0.0.1", port=0):
        from prometheus_client import CollectorRegistry

        self.host = host
        self.port = int(port)
        self.registry = CollectorRegistry(auto_describe=False)
        self.registry.register(FeedCollector(provider))
        self._httpd = None
        self._thread = None

    def start(self):
        """Start listening; returns self."""
        from prometheus_client import start_http_server

        try:
            self._httpd, self._thread = start_http_server(self.port, addr=self.host, registry=self.registry)
        except OSError as exc:
            raise RtstageError(f"metrics: cannot listen on {self.host}:{self.port}: {exc.strerror or exc}") from None
        self.port = self._httpd.server_address[1]
        return self

    @property
    def url(self):
        """The endpoint's URL."""
        host = f"[{self.host}]" if ":" in self.host else self.host
        return f"http://{host}:{self.port}/metrics"

    def stop(self):
        """Stop serving and close the socket."""
        if self._httpd is not None:
            self._httpd.shutdown()
            self._httpd.server_close()
            self._thread.join(5.0)
            self._httpd = None
