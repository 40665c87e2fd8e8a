"""Generated bad invocations (hypothesis): numbers and file contents nobody wrote by hand.

Each example is a batch of invocations of the real executable, run in
parallel by the catalogue's harness (tests/badinputs.py).  Whatever is drawn,
the command either refuses it (status 2, one line on stderr starting
``rtstage:``, nothing changed) or does its job (status 0, only its declared
output changed); never a traceback, never a half-written file.
"""

import pytest
from hypothesis import HealthCheck, given, settings, strategies as st

from badinputs import Case, check_either, run_all

BATCH = 6

number_text = st.one_of(
    st.integers(-10**20, 10**20).map(str),
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
    st.text(alphabet="0123456789.-+eEinfaxX_ ", min_size=0, max_size=10),
)
render_option = st.sampled_from(["--bits", "--gain-db", "--dither-scale", "--blocksize", "--seed", "--subtype",
                                 "--dither", "--shaper"])
slow = settings(max_examples=2, deadline=None,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])


def _run(tmp_path, cases):
    return run_all(cases, str(tmp_path))


@slow
@given(st.lists(st.tuples(render_option, number_text), min_size=BATCH, max_size=BATCH))
def test_render_numbers(tmp_path_factory, batch):
    cases = [Case(f"gen-render-{i}", ["render", "{d}/in.wav", "{d}/out.wav", option, value], None, files=("in.wav",))
             for i, (option, value) in enumerate(batch)]
    for result in _run(tmp_path_factory.mktemp("gen"), cases).values():
        check_either(result, {"out.wav"})


@slow
@given(st.lists(st.tuples(st.sampled_from(["--samplerate", "--channels", "--blocksize", "--bits"]), number_text),
                min_size=BATCH, max_size=BATCH))
def test_pipe_and_demo_numbers(tmp_path_factory, batch):
    cases = []
    for i, (option, value) in enumerate(batch):
        base = {"--samplerate": "48000", "--channels": "2", "--blocksize": "64", "--bits": "16"}
        base[option] = value
        argv = ["pipe", "--in-format", "s16le", "--out-format", "s16le"]
        for k, v in base.items():
            argv += [k, v]
        cases.append(Case(f"gen-pipe-{i}", argv, None, stdin=bytes(4 * 64)))
        if option in ("--samplerate", "--blocksize"):
            cases.append(Case(f"gen-demo-{i}", ["demo", "--offline", "--seconds", "0.5", option, value], None))
        else:
            cases.append(Case(f"gen-demo-{i}", ["demo", "--offline", "--seconds", value], None))
    for result in _run(tmp_path_factory.mktemp("gen"), cases).values():
        check_either(result, set())


file_bytes = st.one_of(
    st.binary(min_size=0, max_size=300),
    st.text(max_size=200).map(lambda t: t.encode("utf-8")),
    st.binary(min_size=0, max_size=200).map(lambda b: b"RIFF\x00\x01\x00\x00WAVEfmt " + b),
    st.binary(min_size=0, max_size=200).map(lambda b: b"FORM\x00\x00\x01\x00AIFFCOMM" + b),
)
SLOTS = (
    ("render", ["render", "{d}/x.wav", "{d}/out.wav"], "x.wav"),
    ("report", ["report", "{d}/x.json"], "x.json"),
    ("preset", ["render", "{d}/in.wav", "{d}/out.wav", "--preset", "{d}/x.toml"], "x.toml"),
    ("shaper", ["render", "{d}/in.wav", "{d}/out.wav", "--shaper", "{d}/x.toml"], "x.toml"),
    ("automation", ["render", "{d}/in.wav", "{d}/out.wav", "--automation", "{d}/x.jsonl"], "x.jsonl"),
    ("table", ["shaper", "design", "--samplerate", "48000", "--taps", "3", "--table", "{d}/x.txt"], "x.txt"),
    ("measure", ["measure", "{d}/x.wav"], "x.wav"),
    ("plot", ["shaper", "plot", "{d}/x.toml"], "x.toml"),
)


@slow
@given(st.lists(file_bytes, min_size=len(SLOTS), max_size=len(SLOTS)))
def test_file_contents(tmp_path_factory, blobs):
    cases = [Case(f"gen-file-{name}", argv, None, files=("in.wav",), contents={fname: blob})
             for (name, argv, fname), blob in zip(SLOTS, blobs)]
    for result in _run(tmp_path_factory.mktemp("gen"), cases).values():
        check_either(result, {"out.wav"})
