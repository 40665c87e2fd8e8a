"""An independent JACK client that records what other clients' output ports deliver.

It is someone else checking rtstage: a separate process built on the
``JACK-Client`` package (cffi, real JACK ports), sharing no code with rtstage's
live engine.  It registers one input port per channel, connects each to the
output port it is told to record (as soon as that port appears), and copies
every cycle's buffers into preallocated memory.  For every cycle it also keeps
``jack_last_frame_time`` (the exact frame count at the cycle's start), so a
cycle it missed itself shows as a step larger than one period in its own
record, and is never blamed on the client it records.

Usage::

    python tools/port_capture.py --ports 'PortAudio:out_0,PortAudio:out_1' --seconds 10 --out capture.npz

Prints ``{"ready": true, ...}`` on stdout once its ports exist, then, after
``--seconds`` of recording (counted from the first connected cycle) or a
``stop`` line on stdin, saves ``capture.npz`` (``audio`` float32 (frames,
channels), ``cycle_start`` and ``cycle_pos`` per recorded cycle) and prints a
JSON summary: frames, cycles, its own missed cycles and JACK xruns it was told
about.  :func:`compare_words` (importable) turns a capture into words and
finds missing or repeated stretches against a reference.
"""

import argparse
import json
import select
import sys
import threading
import time

import numpy as np


def compare_words(captured, reference, probe_frames=64):
    """Align ``captured`` words on ``reference`` and list every stretch missing or repeated.

    Parameters
    ----------
    captured : ndarray (n, channels) of int
        Words recorded from the port (float32 scaled back to integers).
    reference : ndarray (m, channels) of int
        The words ``rtstage render`` gives for the same source and settings.
    probe_frames : int
        Frames that must match to (re)align.

    Returns
    -------
    dict
        ``offset`` (reference index of captured frame 0, or None when no
        alignment was found), ``matched_frames``, ``gaps`` (list of
        ``{"captured_frame", "reference_frame", "frames"}``: positive frames
        are missing from the capture, negative repeated; ``damaged_frames``
        when the capture held frames matching no part of the reference there,
        as a read torn between two periods does), ``mismatch``
        (captured index of a difference that no realignment explains, or None).
        Trailing frames after the reference ends (silence after a file source
        completes) are not compared.
    """
    cap = np.ascontiguousarray(captured, dtype=np.int64)
    ref = np.ascontiguousarray(reference, dtype=np.int64)
    nch = ref.shape[1]
    mult = np.array([1 << (21 * c) for c in range(nch)], dtype=np.int64)
    cap_key = (cap & 0x1FFFFF) @ mult if nch <= 3 else cap[:, 0]
    ref_key = (ref & 0x1FFFFF) @ mult if nch <= 3 else ref[:, 0]

    def find(ci, start=0):
        """Reference index where cap[ci:ci+probe] occurs, searching from ``start``; None if nowhere."""
        n = min(probe_frames, cap.shape[0] - ci)
        if n <= 0:
            return None
        probe = cap_key[ci:ci + n]
        for ri in np.flatnonzero(ref_key[start:] == probe[0]) + start:
            if ri + n <= ref.shape[0] and np.array_equal(ref_key[ri:ri + n], probe):
                return int(ri)
        return None

    # The first captured frames may precede the source (zeros before the stream's first callback reached
    # the port) or be the stream's start; align on the first frame that is not digital zero.
    nz = np.flatnonzero(np.any(cap != 0, axis=1))
    result = {"offset": None, "matched_frames": 0, "gaps": [], "mismatch": None}
    if nz.size == 0:
        return result
    ci = int(nz[0])
    ri = find(ci)
    if ri is None:
        result["mismatch"] = ci
        return result
    result["offset"] = ri - ci
    matched = 0
    while ci < cap.shape[0] and ri < ref.shape[0]:
        n = min(cap.shape[0] - ci, ref.shape[0] - ri)
        eq = cap_key[ci:ci + n] == ref_key[ri:ri + n]
        bad = np.flatnonzero(~eq)
        if bad.size == 0:
            matched += n
            ci += n
            ri += n
            break
        k = int(bad[0])
        matched += k
        ci += k
        ri += k
        if ri >= ref.shape[0]:
            break
        # Realign near here (a lost or repeated period moves the capture by a few periods at most).
        lo = max(0, ri - 64 * probe_frames)
        new_ri = find(ci, lo)
        skip = 0
        while new_ri is None and skip < 4 * probe_frames:
            # A period read while its writer was already filling the next one is torn inside: skip frames of
            # the capture until it lines up again, and count them as damaged.
            skip += 1
            new_ri = find(ci + skip, lo)
        if new_ri is None:
            result["mismatch"] = ci
            break
        gap = {"captured_frame": ci, "reference_frame": ri, "frames": new_ri - skip - ri}
        if skip:
            gap["damaged_frames"] = skip
        result["gaps"].append(gap)
        ci += skip
        ri = new_ri
    result["matched_frames"] = matched
    return result


def compare_channels(captured, reference, probe_frames=64):
    """:func:`compare_words` on each channel alone (a read torn between two periods differs per channel).

    Returns
    -------
    list of dict
        One :func:`compare_words` result per channel.
    """
    return [compare_words(captured[:, [c]], reference[:, [c]], probe_frames) for c in range(reference.shape[1])]


def cycle_events(cycle_start, cycle_pos, period):
    """Read a client's own per-cycle record: server frame jumps, and its own late cycles.

    For every process call the client kept ``jack_last_frame_time`` (the
    exact frame count at the start of the cycle it ran in) and its write
    position.  ``k = (frames the server advanced - frames received) / period``
    is constant while every cycle calls the client once.  A call that ran in
    the next cycle sees that cycle's start (``k`` + 1) and the call after it,
    in the same cycle, brings ``k`` back: a *late* cycle (its buffers were read
    late, possibly while the upstream client was already writing the next
    period).  A change of ``k`` that holds is a *jump*: cycles the server
    counted and nobody in the graph ran (a stall of the server itself, seen by
    every client at once).

    Returns
    -------
    (jumps, late) : list of (position, periods), list of position
        Positions are frame indices in the client's own recording.
    """
    cs = np.asarray(cycle_start, dtype=np.int64)
    pos = np.asarray(cycle_pos, dtype=np.int64)
    jumps, late = [], []
    if cs.size == 0:
        return jumps, late
    advanced = (cs - cs[0]) & 0xFFFFFFFF
    k_all = (advanced - (pos - pos[0])) // int(period)
    net, pend, cand, cand_pos = 0, False, 0, 0
    for k, p in zip(k_all.tolist(), pos.tolist()):
        if k == net:
            if pend:
                late.append(cand_pos)
                pend = False
        elif not pend or cand != k:
            cand, cand_pos, pend = k, p, True
        else:
            jumps.append((cand_pos, k - net))
            net, pend = k, False
    return jumps, late


def words_from_float(audio, container_bits):
    """Words from JACK's float32 samples: ``x · 2^(container_bits - 1)`` is exact for 16- and 24-bit words."""
    scale = float(2 ** (container_bits - 1))
    w = np.asarray(audio, dtype=np.float64) * scale
    words = np.rint(w).astype(np.int64)
    if not np.array_equal(words, w):
        raise ValueError("captured samples are not on the integer grid of the container")
    return words


def main(argv=None):
    import jack

    p = argparse.ArgumentParser(prog="port_capture.py")
    p.add_argument("--ports", required=True, help="comma-separated output ports to record")
    p.add_argument("--seconds", type=float, required=True)
    p.add_argument("--out", required=True)
    p.add_argument("--name", default="portcheck")
    args = p.parse_args(argv)
    sources = args.ports.split(",")
    client = jack.Client(args.name, no_start_server=True)
    sr = client.samplerate
    period = client.blocksize
    max_frames = int(args.seconds * sr) + 4 * period
    max_cycles = max_frames // period + 8
    audio = np.zeros((max_frames, len(sources)), dtype=np.float32)
    cycle_start = np.zeros(max_cycles, dtype=np.int64)
    cycle_pos = np.zeros(max_cycles, dtype=np.int64)
    state = {"pos": 0, "cycles": 0, "recording": False, "xruns": 0, "full": False}
    inports = [client.inports.register(f"in_{c + 1}") for c in range(len(sources))]

    @client.set_process_callback
    def process(frames):
        if not state["recording"] or state["full"]:
            return
        pos = state["pos"]
        if pos + frames > max_frames or state["cycles"] >= max_cycles:
            state["full"] = True
            return
        for c, port in enumerate(inports):
            audio[pos:pos + frames, c] = port.get_array()
        i = state["cycles"]
        cycle_start[i] = client.last_frame_time
        cycle_pos[i] = pos
        state["cycles"] = i + 1
        state["pos"] = pos + frames

    @client.set_xrun_callback
    def xrun(delay_usecs):
        state["xruns"] += 1

    client.activate()
    print(json.dumps({"ready": True, "samplerate": sr, "period": period}), flush=True)
    deadline = time.monotonic() + 900  # the recorded client may first compile its callback (cold cache)
    connected = set()
    while len(connected) < len(sources) and time.monotonic() < deadline:
        for c, src in enumerate(sources):
            if src in connected:
                continue
            if client.get_ports(src, is_output=True):
                client.connect(src, inports[c])
                connected.add(src)
        if len(connected) < len(sources):
            ready, _, _ = select.select([sys.stdin], [], [], 0.002)
            if ready and sys.stdin.readline().strip() == "stop":
                break
    state["recording"] = True
    stop = threading.Event()

    def watch_stdin():
        for line in sys.stdin:
            if line.strip() == "stop":
                break
        stop.set()

    threading.Thread(target=watch_stdin, daemon=True).start()
    stop.wait(args.seconds)
    state["recording"] = False
    time.sleep(4 * period / sr)
    client.deactivate()
    client.close()
    n = state["cycles"]
    steps = np.diff(cycle_start[:n]) & 0xFFFFFFFF
    own_missed = int(np.sum(steps // period - 1)) if n > 1 else 0
    np.savez(args.out, audio=audio[:state["pos"]], cycle_start=cycle_start[:n], cycle_pos=cycle_pos[:n],
             samplerate=sr, period=period)
    print(json.dumps({"frames": int(state["pos"]), "cycles": n, "own_missed_cycles": own_missed,
                      "xruns": state["xruns"], "full": state["full"], "connected": sorted(connected)}), flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
