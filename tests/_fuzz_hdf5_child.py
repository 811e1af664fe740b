"""Child process of the HDF5 fuzz test: read each case, print one JSON line per outcome.

Run as ``python _fuzz_hdf5_child.py CASES.json``. Before each case it prints
``{"begin": i}`` (flushed), so if the HDF5 C library crashes the process or
the case hangs, the parent knows which file did it and restarts after it.
"""
from __future__ import annotations

import json
import sys
import warnings


def run(case: dict) -> None:
    from spikegauge.analysis import as_raster
    from spikegauge.scenario import load_scenario

    if case["kind"] == "scenario":
        load_scenario(case["path"])
    else:
        as_raster(case["path"], t_stop_ms=2000.0, **case.get("options", {}))


def main() -> None:
    from spikegauge.errors import InputError

    warnings.simplefilter("ignore")
    cases = json.loads(open(sys.argv[1]).read())
    start = int(sys.argv[2]) if len(sys.argv) > 2 else 0
    for i in range(start, len(cases)):
        print(json.dumps({"begin": i}), flush=True)
        try:
            run(cases[i])
            out = {"i": i, "outcome": "ok", "msg": ""}
        except InputError as exc:
            out = {"i": i, "outcome": "input", "msg": str(exc)}
        except Exception as exc:  # what the test is looking for: anything but a clean InputError
            out = {"i": i, "outcome": "other", "msg": f"{type(exc).__name__}: {exc}"}
        print(json.dumps(out), flush=True)


if __name__ == "__main__":
    main()
