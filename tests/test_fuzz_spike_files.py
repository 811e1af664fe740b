"""Fuzzing of the spike files ``compare`` reads: CSV/text and NPZ, mutated at random.

Every file must be read or refused with InputError whose one-line message
names the file; any other exception, or a case past its time limit, is a bug.
Cases are counted and the count asserted. Files that are read are also
compared with a clean reference (for a spread of them), through the library
and, for a few, through ``spikegauge compare`` itself, whose exit status must
then be 0 or 2.
"""
from __future__ import annotations

import io
import os
import re
import warnings

import hypothesis.strategies as st
import numpy as np
import pytest
from click.testing import CliRunner
from hypothesis import HealthCheck, given, seed, settings

from _fuzzutil import CaseTimeout, time_limit
from spikegauge.analysis import compare, load_rasters
from spikegauge.cli.main import cli
from spikegauge.errors import InputError

N_CASES = 1200          # the issue asks for at least 1,000 per CI run
CASE_LIMIT_S = 5.0
N_COMPARES = 25         # accepted cases also compared in full
N_CLI = 4               # ... and through the command line
# Derandomised in CI (a red run is reproducible); SPIKEGAUGE_FUZZ_SEED explores other cases.
FUZZ_SEED = os.environ.get("SPIKEGAUGE_FUZZ_SEED")

# Cell fields: good ids, and the ways a file gets them wrong. The gigantic ids
# are far beyond any real network (1e12 and int64's maximum).
GOOD_CELLS = [str(i) for i in range(12)]
BAD_CELLS = ["-1", "-7", "abc", "", "1.5", "1e3", "2.0", "nan", "inf", "-inf", "0x10", "+4", " 3 ",
             "\u0663", "1_000", "None", "true", "99999999999999999999", "9223372036854775807",
             "9223372036854775808", "1000000000000", "1e300", "-0", "'1'", '"2"']
GOOD_TIMES = ["0", "0.0", "1.5", "10", "12.25", "99.9", "3e1", "0.001"]
BAD_TIMES = ["nan", "NaN", "inf", "-inf", "Infinity", "1e400", "-5", "-0.0", "abc", "", "1e-400",
             "1.0.0", "12ms", "0x1p3", " 7 ", "1,5", "--1", "1e308", "-1e308"]
SEPARATORS = [",", ";", "\t", " ", ", "]
HEADERS = [None, "cell,time_ms", "time_ms,cell", "cell", "a,b,c", "id time", "cell;time_ms",
           "# a comment", "cell,time_ms,extra"]


@st.composite
def text_files(draw):
    """Bytes of a spike text file and the suffix to give it."""
    kind = draw(st.sampled_from(["rows"] * 8 + ["empty", "blank", "header-only", "binary"]))
    if kind == "empty":
        return b"", draw(st.sampled_from([".csv", ".txt"]))
    if kind == "blank":
        return draw(st.sampled_from([b"\n", b"\n\n  \n", b"\r\n", b" "])), ".csv"
    if kind == "binary":
        return draw(st.binary(max_size=64)), ".csv"
    sep = draw(st.sampled_from(SEPARATORS))
    header = draw(st.sampled_from(HEADERS))
    lines = [] if header is None else [header.replace(",", sep.strip() or " ")]
    if kind == "rows":
        n = draw(st.integers(0, 12))
        p_bad = draw(st.sampled_from([0.0, 0.1, 0.4]))
        for _ in range(n):
            cell = draw(st.sampled_from(BAD_CELLS if draw(st.floats(0, 1)) < p_bad else GOOD_CELLS))
            time = draw(st.sampled_from(BAD_TIMES if draw(st.floats(0, 1)) < p_bad else GOOD_TIMES))
            width = draw(st.sampled_from([2] * 8 + [0, 1, 3, 4]))
            fields = [cell, time, "1", "2"][:width] if width else []
            lines.append(sep.join(fields))
    eol = draw(st.sampled_from(["\n", "\r\n"]))
    text = eol.join(lines) + draw(st.sampled_from([eol, ""]))
    data = text.encode()
    if draw(st.integers(0, 9)) == 0:
        data = b"\xef\xbb\xbf" + data            # a byte-order mark
    if draw(st.integers(0, 19)) == 0:
        pos = draw(st.integers(0, len(data)))
        data = data[:pos] + b"\xff\xfe" + data[pos:]   # not UTF-8
    return data, draw(st.sampled_from([".csv"] * 4 + [".txt", ".dat"]))


def _arrays():
    """Arrays of the shapes and dtypes an NPZ may hold, valid or not."""
    n = st.integers(0, 8)
    return st.one_of(
        n.map(lambda k: np.arange(k, dtype=np.int64)),
        st.lists(st.integers(-5, 20), max_size=8).map(lambda v: np.array(v, dtype=np.int64)),
        st.lists(st.sampled_from([0.0, 1.5, 2.0, -1.0, np.nan, np.inf, -np.inf, 1e300, 7.0]),
                 max_size=8).map(lambda v: np.array(v, dtype=np.float64)),
        st.lists(st.sampled_from([0, 1, 2**63 - 1, 2**63 + 5, 2**64 - 1, 10**12]),
                 max_size=6).map(lambda v: np.array(v, dtype=np.uint64)),
        st.lists(st.sampled_from([0, 3, 10**12, 2**62, -(2**63)]),
                 max_size=6).map(lambda v: np.array(v, dtype=np.int64)),
        st.lists(st.sampled_from(["0", "a", "1.5", ""]), max_size=6).map(np.array),
        st.lists(st.booleans(), max_size=6).map(np.array),
        st.lists(st.floats(allow_nan=True, allow_infinity=True), max_size=6).map(
            lambda v: np.array(v, dtype=np.float64)),
        st.sampled_from([np.zeros((2, 3)), np.zeros((0, 2)), np.array(3), np.array(np.nan),
                         np.array("x"), np.array(-4), np.array(1e300), np.array(2**62),
                         np.array([1.0 + 2j]), np.array([1, 2], dtype=np.int8),
                         np.array([b"ab"]), np.array([[0, 1]])]),
    )


@st.composite
def npz_files(draw):
    """Bytes of an NPZ file: spikes with mutated arrays and scalars, or a damaged archive."""
    n = draw(st.integers(0, 8))
    good = {"cell": np.arange(n, dtype=np.int64) % 4, "time_ms": np.linspace(1.0, 50.0, n)}
    arrays = dict(good)
    choices = {
        "n_cells": [np.int64(4), np.int64(0), np.int64(-3), np.float64(np.nan), np.float64(2.5),
                    np.int64(10**12), np.array("four"), np.array([4, 5])],
        "t_start_ms": [np.float64(0.0), np.float64(-10.0), np.float64(np.nan), np.float64(np.inf),
                       np.float64(60.0), np.array("zero"), np.array([0.0, 1.0])],
        "t_stop_ms": [np.float64(100.0), np.float64(0.5), np.float64(np.nan), np.float64(-np.inf),
                      np.float64(1e300), np.array([1.0, 2.0])],
        "group_names": [np.array(["all"]), np.array(["a", "b"]), np.array([1, 2]),
                        np.array([], dtype=str)],
        "group_first": [np.array([0]), np.array([0, 2]), np.array([5, 1]), np.array([-1]),
                        np.array([0.5]), np.array(["0", "1.5"])],
    }
    for key, values in choices.items():
        if draw(st.booleans()):
            arrays[key] = draw(st.sampled_from(values))
    replaceable = ["cell", "time_ms", "n_cells", "t_stop_ms", "group_first"]
    for _ in range(draw(st.integers(0, 3))):
        op = draw(st.sampled_from(["replace", "delete", "extra"]))
        key = draw(st.sampled_from(replaceable))
        if op == "replace":
            arrays[key] = draw(_arrays())
        elif op == "delete":
            arrays.pop(key, None)
        else:
            arrays[draw(st.sampled_from(["extra", "cells", "times", "spikes"]))] = draw(_arrays())
    buf = io.BytesIO()
    np.savez(buf, **arrays)
    data = buf.getvalue()
    damage = draw(st.integers(0, 9))
    if damage == 0:
        data = data[:draw(st.integers(0, len(data)))]          # truncated archive
    elif damage == 1:
        pos = draw(st.integers(0, max(0, len(data) - 8)))
        data = data[:pos] + draw(st.binary(min_size=1, max_size=8)) + data[pos + 8:]
    elif damage == 2:
        data = draw(st.sampled_from([b"", b"PK", b"cell,time_ms\n0,1\n", b"\x93NUMPY"]))
    return data, ".npz"


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    d = tmp_path_factory.mktemp("fuzz-spikes")
    ref = d / "reference.csv"
    ref.write_text("cell,time_ms\n0,1.5\n1,10.0\n2,12.25\n3,40.0\n0,55.0\n")
    return ref


def _check_refusal(exc: InputError, path) -> None:
    msg = str(exc)
    # One line (the CLI prints it as is) that names the file at fault.
    assert "\n" not in msg, msg
    assert str(path) in msg, msg


def test_fuzzed_spike_files_are_read_or_refused_with_the_file_named(reference, tmp_path):
    counts = dict(tried=0, read=0, refused=0, csv=0, npz=0)
    accepted = []
    failures = []

    @settings(max_examples=N_CASES, deadline=None, database=None, derandomize=FUZZ_SEED is None,
              suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
    @given(st.one_of(text_files(), text_files(), npz_files()), st.booleans(), st.booleans())
    def case(file, fuzzed_first, give_stop):
        data, suffix = file
        counts["tried"] += 1
        counts["npz" if suffix == ".npz" else "csv"] += 1
        path = tmp_path / f"spikes{suffix}"
        path.write_bytes(data)
        sources = [path, reference] if fuzzed_first else [reference, path]
        try:
            with time_limit(CASE_LIMIT_S), warnings.catch_warnings():
                warnings.simplefilter("ignore")     # "no interval given" is expected without a stop
                rasters = load_rasters(sources, t_stop_ms=100.0 if give_stop else None)
        except InputError as exc:
            # Either file may be blamed for a mismatch between the two (cell counts, intervals).
            msg = str(exc)
            assert "\n" not in msg, msg
            # Either file may be blamed, or both when they disagree (cell counts,
            # intervals); a non-finite value must be traced to its file.
            assert (str(path) in msg or str(reference) in msg
                    or msg.startswith("the sources describe")
                    or (msg.startswith("empty interval") and not re.search(r"nan|inf", msg))), msg
            counts["refused"] += 1
            return
        except CaseTimeout:
            failures.append((data, "hang"))
            raise
        except Exception as exc:  # noqa: BLE001 - anything else is the bug we hunt
            failures.append((data, repr(exc)))
            raise
        counts["read"] += 1
        assert all(r.n_cells == rasters[0].n_cells for r in rasters)
        if len(accepted) < 300:
            accepted.append((data, suffix, fuzzed_first, give_stop))

    (seed(int(FUZZ_SEED))(case) if FUZZ_SEED else case)()
    assert not failures
    assert counts["tried"] >= 1000, counts
    assert counts["read"] + counts["refused"] == counts["tried"]
    assert counts["npz"] >= 250 and counts["csv"] >= 500, counts
    assert counts["read"] >= 100 and counts["refused"] >= 300, counts

    # Full comparisons on a spread of the files that were read.
    step = max(1, len(accepted) // N_COMPARES)
    compared = 0
    for data, suffix, fuzzed_first, give_stop in accepted[::step][:N_COMPARES]:
        path = tmp_path / f"again{suffix}"
        path.write_bytes(data)
        a, b = (path, reference) if fuzzed_first else (reference, path)
        with time_limit(4 * CASE_LIMIT_S), warnings.catch_warnings():
            warnings.simplefilter("ignore")
            try:
                result = compare(a, b, t_stop_ms=100.0 if give_stop else None)
            except InputError as exc:
                _check_refusal(exc, path if str(path) in str(exc) else reference)
                continue
        s = result.summary
        assert s["matched"] + s["missed"] == s["n_ref"] and s["matched"] + s["extra"] == s["n_test"]
        compared += 1
    assert compared >= 10

    runner = CliRunner()
    for k, (data, suffix, fuzzed_first, give_stop) in enumerate(accepted[::step][:N_CLI]):
        path = tmp_path / f"cli{k}{suffix}"
        path.write_bytes(data)
        args = ["compare", str(reference), str(path), "--no-figures", "--out", str(tmp_path / f"out{k}")]
        res = runner.invoke(cli, args + (["--t-stop-ms", "100"] if give_stop else []))
        assert res.exit_code in (0, 2), (res.output, res.exception)
        assert "Traceback" not in res.output
    print(f"spike-file fuzz: {counts}, compared {compared}")
