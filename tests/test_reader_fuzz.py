"""Fuzz test of the spectrum reader: mutated demo exports read or refused by name.

The mutations (lines and bytes of the files under ``demo_data/``: junk tokens,
separators, decimal marks, encodings, NaN/inf, truncation, extra columns, stray
text lines) are those of ``tools/fuzz_reader.py``, which runs many more of them
and counts hangs; here hypothesis draws a few hundred and shrinks any failure.

Every outcome must be a spectrum that keeps the reader's promises (finite,
positive, strictly ascending wavelengths; finite values and noise; at least 5
points) or a :class:`~fitting.errors.PellucidError` that names the input. For
mutations with a known right answer (a text, comment or blank line between two
data rows; a last line cut short) the spectrum must also be that answer.
"""

from __future__ import annotations

import importlib.util
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from fitting.errors import PellucidError
from fitting.reader import ReaderOptions, parse_spectrum

_TOOL = Path(__file__).resolve().parents[1] / "tools" / "fuzz_reader.py"
_spec = importlib.util.spec_from_file_location("fuzz_reader", _TOOL)
fuzz = importlib.util.module_from_spec(_spec)
_spec.loader.exec_module(fuzz)

CORPUS = fuzz.demo_files()
OPTIONS = (ReaderOptions(), ReaderOptions(sigma="estimate"), ReaderOptions(y_kind="counts"),
           ReaderOptions(decimal=","))
LABEL = "<fuzzed>"


def _check(data: bytes, oracle, options: ReaderOptions):
    want = None
    if oracle is not None:
        try:
            want = parse_spectrum(fuzz.reference_input(data, oracle), options=options)
        except PellucidError:
            oracle = None                    # refused without the line as well
    try:
        spec = parse_spectrum(data, options=options, source=LABEL)
    except PellucidError as exc:
        assert str(exc).startswith(LABEL), str(exc)
        line = getattr(exc, "line", None)
        assert line is None or line >= 1
        assert oracle is None, f"refused, but reads without line {oracle[1]}: {exc}"
        return
    problem = fuzz.invariant_problem(spec)
    assert not problem, problem
    if oracle is not None:
        problem = fuzz.oracle_problem(spec, want, data, oracle, options)
        assert not problem, problem


@settings(max_examples=100, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(st.integers(0, len(CORPUS) - 1), st.randoms(use_true_random=False),
       st.sampled_from(OPTIONS))
def test_mutated_demo_exports_read_or_refused_by_name(which, rng, options):
    _, raw = CORPUS[which]
    label, data, oracle = fuzz.mutate(rng, raw)
    _check(data, oracle, options)


@settings(max_examples=40, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.too_slow])
@given(st.integers(0, len(CORPUS) - 1), st.randoms(use_true_random=False),
       st.booleans(), st.sampled_from(OPTIONS))
def test_stray_lines_and_cut_rows_give_the_right_answer(which, rng, cut, options):
    _, raw = CORPUS[which]
    label, data, oracle = (fuzz._cut_last_row if cut else fuzz._neutral_line)(rng, raw)
    _check(data, oracle, options)


@pytest.mark.parametrize("name, raw", CORPUS[:3], ids=[c[0] for c in CORPUS[:3]])
def test_the_fuzz_checks_can_fail(name, raw):
    # The oracle must catch a wrong answer: the last row cut to "1100<sep>0" and then
    # read as data (as a line break after it makes the reader do) is flagged.
    text, codec, bom = fuzz._decode(raw)
    lines = text.rstrip("\n").split("\n")
    first = len(lines[-1].split()[0]) if " " in lines[-1] else \
        min(i for i, ch in enumerate(lines[-1]) if ch in "\t;,")
    lines[-1] = lines[-1][:first + 2]
    cut = fuzz._encode("\n".join(lines), codec, bom)
    oracle = ("cut", len(lines), raw)
    want = parse_spectrum(fuzz.reference_input(cut, oracle))
    wrong = parse_spectrum(fuzz._encode("\n".join(lines) + "\n", codec, bom))
    assert len(wrong) == len(want) + 1
    assert "cut last line" in fuzz.oracle_problem(wrong, want, cut, oracle, ReaderOptions())
    assert fuzz.invariant_problem(wrong) == ""
    assert fuzz.oracle_problem(parse_spectrum(cut), want, cut, oracle, ReaderOptions()) == ""
