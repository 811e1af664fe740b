"""Helpers shared by the reliability tests: a small TOML writer, a per-case time
limit and the check that an error message names its file and a place in it.

The standard library reads TOML but does not write it, and the fuzz tests must
turn a mutated scenario (a dict) back into text; the writer below covers what
scenario files use (tables, arrays of tables, inline tables, arrays, strings,
booleans, integers and floats including nan and inf).
"""
from __future__ import annotations

import math
import re
import signal
from contextlib import contextmanager

_BARE_KEY = re.compile(r"[A-Za-z0-9_-]+")


class CaseTimeout(Exception):
    """A single fuzz case ran longer than its time limit (a hang)."""


@contextmanager
def time_limit(seconds: float):
    """Raise :class:`CaseTimeout` inside the block once ``seconds`` have passed.

    Uses SIGALRM, so it works in the main thread only (where pytest runs tests).
    A hypothesis ``deadline`` would only measure a slow case after it returns;
    this interrupts a case that never returns.
    """
    def _raise(signum, frame):
        raise CaseTimeout(f"case still running after {seconds} s")

    previous = signal.signal(signal.SIGALRM, _raise)
    signal.setitimer(signal.ITIMER_REAL, seconds)
    try:
        yield
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, previous)


def toml_key(key: str) -> str:
    """A TOML key: bare where allowed, else a quoted basic string."""
    return key if _BARE_KEY.fullmatch(key) else toml_string(key)


def toml_string(s: str) -> str:
    """A TOML basic string; control characters become \\uXXXX escapes."""
    out = []
    for ch in s:
        if ch == "\\":
            out.append("\\\\")
        elif ch == '"':
            out.append('\\"')
        elif ord(ch) < 0x20 or ord(ch) == 0x7F:
            out.append(f"\\u{ord(ch):04X}")
        else:
            out.append(ch)
    return '"' + "".join(out) + '"'


def toml_value(v) -> str:
    """A TOML value (dicts become inline tables)."""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if math.isnan(v):
            return "nan"
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        return repr(v)
    if isinstance(v, str):
        return toml_string(v)
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(toml_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{" + ", ".join(f"{toml_key(str(k))} = {toml_value(x)}" for k, x in v.items()) + "}"
    raise TypeError(f"no TOML form for {type(v).__name__}")


def _is_table_array(v) -> bool:
    return isinstance(v, list) and len(v) > 0 and all(isinstance(x, dict) for x in v)


def to_toml(doc: dict) -> str:
    """Write a parsed scenario (or any dict of the same shape) as TOML text.

    Root scalars first, then ``[table]`` sections, then ``[[array]]`` sections;
    values inside a section that are tables are written inline.
    """
    lines = []
    for k, v in doc.items():
        if not isinstance(v, dict) and not _is_table_array(v):
            lines.append(f"{toml_key(k)} = {toml_value(v)}")
    for k, v in doc.items():
        if isinstance(v, dict):
            lines.append(f"\n[{toml_key(k)}]")
            lines.extend(f"{toml_key(str(kk))} = {toml_value(vv)}" for kk, vv in v.items())
    for k, v in doc.items():
        if _is_table_array(v):
            for item in v:
                lines.append(f"\n[[{toml_key(k)}]]")
                lines.extend(f"{toml_key(str(kk))} = {toml_value(vv)}" for kk, vv in item.items())
    return "\n".join(lines) + "\n"


# ---------------------------------------------------------------------------
# What an error message must look like

_POSITION = re.compile(r"(line \d+(, column \d+)?|end of file): ")


def key_paths(node, prefix: str = "") -> set[str]:
    """Every key path of a parsed TOML document as the project writes it: ``group[1].parameters.x``."""
    out = set()
    if isinstance(node, dict):
        for k, v in node.items():
            p = f"{prefix}.{k}" if prefix else str(k)
            out.add(p)
            out |= key_paths(v, p)
    elif isinstance(node, list):
        for i, v in enumerate(node):
            p = f"{prefix}[{i}]"
            out.add(p)
            out |= key_paths(v, p)
    return out


def names_file_and_place(message: str, path: str, doc: dict | None) -> bool:
    """True if ``message`` is ``"PATH: PLACE: problem"``.

    PLACE is a key path present in ``doc`` (the parsed file) or, for a file
    that does not parse (``doc`` None), a line and column. Root-level problems
    ("missing key 'scenario'") have no deeper key path than the key they
    quote; bytes that are not UTF-8 are placed by their byte offset.
    """
    prefix = f"{path}: "
    if not message.startswith(prefix):
        return False
    rest = message[len(prefix):]
    if _POSITION.match(rest):
        return True
    if doc is None:
        return rest.startswith("cannot read: ") and re.search(r"in position \d+", rest) is not None
    if rest.startswith("missing key '"):
        return True
    return any(rest.startswith(p + ": ") for p in key_paths(doc))
