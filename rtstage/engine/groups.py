"""An engine's channels run as independent groups on worker threads (offline drivers).

The kernel's channels never interact: each has its own error history and
counters, and its dither is a pure function of (seed, channel number, sample
index).  :class:`ChannelGroups` therefore gives each of a few threads a
contiguous group of channels with its own :class:`rtstage.kernel.KernelState`
(``IP_CHANNEL0`` set to the group's first channel, so the dither keys are the
stream's channel numbers), runs :func:`rtstage.kernel.process_block` on
column views of the block, and folds the groups' state back into the engine
after every block.  The kernel runs without the GIL, so the groups proceed
on separate cores; the words are the same for any number of threads.

Groups start at even channels where they can: the kernel runs channel pairs
side by side (two independent recurrences overlap on one core), so a pair is
split only when there are more threads than pairs.
"""

import queue
import threading

import numpy as np

from .. import kernel_layout as K


def group_bounds(channels, nthreads):
    """Channel boundaries ``[0, b1, ..., channels]`` of ``min(nthreads, channels)`` groups."""
    nthreads = max(1, min(int(nthreads), int(channels)))
    npairs = (channels + 1) // 2
    if nthreads <= npairs:
        bounds = [min(2 * (npairs * i // nthreads), channels) for i in range(nthreads)]
    else:
        bounds = [channels * i // nthreads for i in range(nthreads)]
    return bounds + [int(channels)]


class ChannelGroups:
    """Process an :class:`~rtstage.engine.Engine`'s blocks with its channels split over threads.

    Parameters
    ----------
    engine : Engine
        The engine whose settings, state and counters the groups follow; read
        its counters after a block as usual.  Settings applied to it between
        blocks reach the groups at the next block.
    nthreads : int
        Threads, the calling one included (at most one per channel).

    Use as a context manager, or call :meth:`close`.
    """

    def __init__(self, engine, nthreads):
        self.engine = engine
        st = engine.state
        self.bounds = group_bounds(engine.channels, nthreads)
        self.states = []
        for g0, g1 in zip(self.bounds, self.bounds[1:]):
            gs = K.KernelState(g1 - g0)
            gs.hist[:] = st.hist[g0:g1]
            gs.counts[:] = st.counts[g0:g1]
            gs.clock[:] = st.clock
            gs.ramp[:] = st.ramp
            self.states.append(gs)
        self._no_tap = [np.empty((0, g1 - g0)) for g0, g1 in zip(self.bounds, self.bounds[1:])]
        self._jobs = [queue.SimpleQueue() for _ in self.states[1:]]
        self._done = queue.SimpleQueue()
        self._threads = [threading.Thread(target=self._work, args=(i + 1, q), name=f"rtstage-group-{i + 1}", daemon=True)
                         for i, q in enumerate(self._jobs)]  # fmt: skip
        for t in self._threads:
            t.start()

    @property
    def nthreads(self):
        return len(self.states)

    def _run_group(self, i, x, out, vq, n):
        g0, g1 = self.bounds[i], self.bounds[i + 1]
        tap = vq[:, g0:g1] if vq is not None else self._no_tap[i]
        self.engine.process_block(x[:, g0:g1], out[:, g0:g1], tap, n, *self.states[i].arrays())

    def _work(self, i, jobs):
        while True:
            job = jobs.get()
            if job is None:
                return
            try:
                self._run_group(i, *job)
                self._done.put(None)
            except BaseException as exc:  # handed to the caller, which raises it
                self._done.put(exc)

    def process(self, x, out, quantizer_in=None):
        """Requantize the block ``x`` (frames, channels) into ``out``, as :meth:`Engine.process` would.

        ``quantizer_in`` (float64, at least as many rows as ``x``) receives
        ``x·gain`` for meters, as in :meth:`Engine.process`.
        """
        st = self.engine.state
        n = x.shape[0]
        if x.dtype not in (np.float32, np.float64):
            x = x.astype(np.float64)
        for (g0, _), gs in zip(zip(self.bounds, self.bounds[1:]), self.states):
            gs.iparams[:] = st.iparams
            gs.iparams[K.IP_CHANNEL0] = st.iparams[K.IP_CHANNEL0] + g0
            gs.fparams[:] = st.fparams
        vq = quantizer_in[:n] if quantizer_in is not None else None
        for jobs in self._jobs:
            jobs.put((x, out, vq, n))
        error = None
        try:
            self._run_group(0, x, out, vq, n)
        except BaseException as exc:
            error = exc
        for _ in self._jobs:
            result = self._done.get()
            if error is None and result is not None:
                error = result
        if error is not None:
            raise error
        # Every group's clock and ramp moved alike; the engine's state follows the groups'.
        st.clock[:] = self.states[0].clock
        st.ramp[:] = self.states[0].ramp
        for (g0, g1), gs in zip(zip(self.bounds, self.bounds[1:]), self.states):
            st.hist[g0:g1] = gs.hist
            st.counts[g0:g1] = gs.counts
        return out

    def close(self):
        """Stop the worker threads."""
        for jobs in self._jobs:
            jobs.put(None)
        for t in self._threads:
            t.join()
        self._jobs = []
        self._threads = []

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
