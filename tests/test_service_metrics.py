"""The Prometheus endpoint, parsed by prometheus_client's own parser (the reference for the text format).

In-process: a fixed snapshot served over real loopback HTTP, fetched with
urllib and parsed with ``prometheus_client.parser.text_string_to_metric_families``.
The live run is in ``test_service_live``.
"""

import math
import urllib.request

import pytest
from prometheus_client.parser import text_string_to_metric_families

from rtstage.errors import RtstageError
from rtstage.service.metrics import MetricsServer, parse_listen, thread_scheduling


def samples(text):
    out = {}
    for family in text_string_to_metric_families(text):
        for s in family.samples:
            out[(s.name, tuple(sorted(s.labels.items())))] = s.value
    return out


SNAP = {
    "feed": "link-a", "running": True, "ready": True, "uptime_s": 12.5, "samplerate": 48000, "blocksize": 256,
    "bits": 16, "dither": "tpdf", "shaper": "flat", "seed": 7, "frames": 600000, "callbacks": 2343,
    "engine_frame": 600000, "flagged": {"output_underflow": 2, "flagged_callbacks": 3}, "restarts": 1, "gaps": 1,
    "gap_s": 0.75, "cpu_load": 0.031, "cpu_load_max": 0.07, "control_changes": 4, "reloads": 0,
    "tap_dropped_frames": 0, "meter_dropped_frames": 256, "watchdog_pings": 20, "watchdog_missed": 1,
    "meter_frames": 598016,
    "loudness": {"momentary_lufs": -22.5, "short_term_lufs": -23.1, "integrated_lufs": None,
                 "loudness_range_lu": 4.5, "target": {"pass": False}},
    "channels": [
        {"added_noise_dbfs": {"unweighted": -101.2, "a_weighted": -103.4, "itu468": -92.1},
         "noise_modulation_db": 0.4, "sample_peak_dbfs": -0.5, "true_peak_dbtp": 0.3, "clipped": 12, "replaced": 1,
         "auto_muted": False, "auto_muted_frames": 0},
        {"added_noise_dbfs": {"unweighted": None, "a_weighted": None, "itu468": None},
         "noise_modulation_db": None, "sample_peak_dbfs": float("-inf"), "true_peak_dbtp": None, "clipped": 0,
         "replaced": 0, "auto_muted": True, "auto_muted_frames": 48000},
    ],
    "threads": [{"process": "stream", "thread": "jack-client", "policy": "fifo", "priority": 70}],
}


def test_exposition_over_loopback_http():
    server = MetricsServer(lambda: SNAP, "127.0.0.1", 0).start()
    try:
        with urllib.request.urlopen(server.url, timeout=10) as reply:
            text = reply.read().decode()
            ctype = reply.headers["Content-Type"]
    finally:
        server.stop()
    assert ctype.startswith("text/plain")
    got = samples(text)
    feed = ("feed", "link-a")
    # counters carry _total (Prometheus naming conventions); the parser hands them back with it
    assert got[("rtstage_frames_total", (feed,))] == 600000
    assert got[("rtstage_flagged_callbacks_total", (feed, ("kind", "output_underflow")))] == 2
    assert got[("rtstage_stream_restarts_total", (feed,))] == 1
    assert got[("rtstage_gap_seconds_total", (feed,))] == 0.75
    assert got[("rtstage_cpu_load_ratio", (feed,))] == 0.031
    assert got[("rtstage_added_noise_dbfs", (("channel", "1"), feed, ("weighting", "a")))] == -103.4
    assert got[("rtstage_true_peak_dbtp", (("channel", "1"), feed))] == 0.3
    assert got[("rtstage_clipped_samples_total", (("channel", "1"), feed))] == 12
    assert got[("rtstage_replaced_samples_total", (("channel", "1"), feed))] == 1
    assert got[("rtstage_auto_muted", (("channel", "2"), feed))] == 1
    assert got[("rtstage_meter_dropped_frames_total", (feed,))] == 256
    # digital silence is -Inf; a reading not measured yet is absent
    assert got[("rtstage_sample_peak_dbfs", (("channel", "2"), feed))] == -math.inf
    assert ("rtstage_added_noise_dbfs", (("channel", "2"), feed, ("weighting", "a"))) not in got
    assert got[("rtstage_thread_realtime_priority", (feed, ("policy", "fifo"), ("process", "stream"),
                                                     ("thread", "jack-client")))] == 70
    assert got[("rtstage_loudness_lufs", (feed, ("kind", "short_term")))] == -23.1
    assert ("rtstage_loudness_lufs", (feed, ("kind", "integrated"))) not in got  # not defined yet
    assert got[("rtstage_loudness_range_lu", (feed,))] == 4.5
    assert got[("rtstage_loudness_target_pass", (feed,))] == 0
    info = [k for k in got if k[0] == "rtstage_feed_info"]
    assert dict(info[0][1])["shaper"] == "flat"


def test_listen_addresses():
    assert parse_listen("127.0.0.1:9100") == ("127.0.0.1", 9100)
    assert parse_listen("[::1]:9100") == ("::1", 9100)
    assert parse_listen("9100") == ("127.0.0.1", 9100)
    assert parse_listen("localhost:0") == ("127.0.0.1", 0)
    # 198.51.100.0/24 is TEST-NET-2 (RFC 5737): parsed, never bound
    with pytest.raises(RtstageError, match="not a loopback"):
        parse_listen("198.51.100.7:9100")
    assert parse_listen("198.51.100.7:9100", listen_any=True) == ("198.51.100.7", 9100)
    for bad in ("nohost", "127.0.0.1:x", "127.0.0.1:70000", "example.org:80"):
        with pytest.raises(RtstageError):
            parse_listen(bad)


def test_thread_scheduling_reads_proc():
    import os
    import threading

    # proc(5): policy 0 is SCHED_OTHER with rt_priority 0 for an ordinary thread
    threading.current_thread()
    rows = thread_scheduling(os.getpid(), "engine")
    assert rows and all(r["process"] == "engine" for r in rows)
    main = [r for r in rows if r["policy"] == "other"]
    assert main and all(r["priority"] == 0 for r in main)
    if hasattr(os, "sched_setscheduler"):
        # a thread we make SCHED_FIFO 10 (real-time is granted on this machine) shows as fifo/10
        ready, done = threading.Event(), threading.Event()

        def rt():
            import ctypes

            ctypes.CDLL(None).prctl(15, b"rt-probe", 0, 0, 0)  # PR_SET_NAME (prctl(2)): the name /proc shows
            os.sched_setscheduler(0, os.SCHED_FIFO, os.sched_param(10))
            ready.set()
            done.wait(10)

        t = threading.Thread(target=rt, name="rt-probe")
        t.start()
        ready.wait(10)
        try:
            rows = thread_scheduling(os.getpid(), "engine")
        finally:
            done.set()
            t.join()
        assert {"process": "engine", "thread": "rt-probe", "policy": "fifo", "priority": 10} in rows
