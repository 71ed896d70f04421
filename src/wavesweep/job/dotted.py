"""Dotted keys into a job table (``potential.0.height``, ``packet.packets.-1.width``):
the one home for walking them, used by ``--set`` overrides, sweeps, the order
of error messages and ``collect``'s parameters.  Parts name table keys or list
indices (negative ones count from the end)."""
from __future__ import annotations

import copy
import tomllib

from ..errors import JobError

__all__ = ["parse_override", "apply_overrides", "set_dotted", "get_dotted", "walk", "canonical_path",
           "file_position"]

_MISSING = object()


def walk(table, key: str):
    """``(parent, part, node)`` for each part of the dotted ``key`` from
    ``table`` down: ``part`` with a list index made non-negative where it is
    in range, ``node`` the value it names or ``_MISSING`` (and every later
    step too) where the table has none."""
    node = table
    for part in key.split("."):
        parent = node
        if isinstance(parent, dict):
            node = parent.get(part, _MISSING)
        elif isinstance(parent, list):
            try:
                i = int(part)
            except ValueError:
                node = _MISSING
            else:
                if -len(parent) <= i < len(parent):
                    part, node = str(i % len(parent)), parent[i]
                else:
                    node = _MISSING
        else:
            node = _MISSING
        yield parent, part, node


def get_dotted(table, key: str, default=None):
    """The value at ``key``, or ``default`` where the table has none."""
    node = _MISSING
    for _, _, node in walk(table, key):
        if node is _MISSING:
            return default
    return node


def canonical_path(table, key: str) -> tuple:
    """A dotted key as a tuple of parts, list indices made non-negative
    where ``table`` has that list (``potential.-1.height`` and
    ``potential.1.height`` of two potentials are the same field)."""
    return tuple(part for _, part, _ in walk(table, key))


def file_position(raw: dict, field: str) -> list[int]:
    """Where a dotted field sits in the job table ``raw``, as a sort key:
    the index of each part among its table's keys (as written: TOML tables
    keep the file's order) or its list index; a key the table lacks sorts
    after the keys it has, a field outside the job (``--set ...``) last."""
    pos = []
    for parent, part, node in walk(raw, field):
        if isinstance(parent, dict):
            keys = list(parent)
            if node is _MISSING:
                pos.append(len(keys))
                break
            pos.append(keys.index(part))
        elif isinstance(parent, list):
            if not part.lstrip("-").isdigit():
                break
            if node is _MISSING:
                pos.append(len(parent))
                break
            pos.append(int(part))
        else:
            break
    return pos


def parse_override(text: str) -> tuple[str, object]:
    """``"packet.width=15"`` -> ("packet.width", 15); values are read as TOML
    (numbers, strings, lists, booleans), bare words as strings."""
    if "=" not in text:
        raise JobError("--set", f"{text!r} is not key=value, e.g. --set packet.width=15")
    key, raw = text.split("=", 1)
    key, raw = key.strip(), raw.strip()
    if not key:
        raise JobError("--set", f"{text!r} has no key")
    if any(ord(c) < 32 or c == "\x7f" for c in key):
        raise JobError("--set", f"the key of {text!r} holds a line break or control character; "
                                "give a dotted key such as packet.width")
    try:
        parsed = tomllib.loads(f"v = {raw}")
    except tomllib.TOMLDecodeError:
        parsed = None
    if parsed is not None and set(parsed) == {"v"}:
        return key, parsed["v"]   # one TOML value (a multi-line list is one value too)
    if parsed is not None or "\n" in raw or "\r" in raw:
        # the text after the first value would be dropped: refuse, never truncate
        raise JobError(f"--set {key}", f"the value {raw!r} is more than one value (it runs over lines or "
                                       "holds more TOML after the first); give one value on one line, "
                                       "such as 15, 'text' or [1, 2]")
    return key, raw   # a bare word is a string


def apply_overrides(table: dict, overrides) -> dict:
    """Set dotted keys (``potential.0.height``) in a copy of ``table``."""
    out = copy.deepcopy(table)
    for item in overrides or ():
        key, value = parse_override(item) if isinstance(item, str) else item
        set_dotted(out, key, value)
    return out


def set_dotted(table: dict, key: str, value) -> None:
    parts = key.split(".")
    node = table
    for depth, part in enumerate(parts[:-1]):
        here = ".".join(parts[: depth + 1])
        if isinstance(node, list):
            node = _list_item(node, part, here)
        else:
            if part not in node:
                if parts[depth + 1].lstrip("-").isdigit():
                    raise JobError(key, f"the job has no {here} entries to index; "
                                        f"add a [[{here}]] table to the job file first")
                node[part] = {}
            node = node[part]
        if not isinstance(node, (dict, list)):
            raise JobError(key, f"{here} is a value, not a table")
    last = parts[-1]
    if isinstance(node, list):
        idx = _index(node, last, key)
        node[idx] = value
    else:
        node[last] = value


def _index(seq: list, part: str, where: str) -> int:
    try:
        i = int(part)
    except ValueError:
        raise JobError(where, f"{part!r} must be an index into the list (0..{len(seq) - 1})") from None
    if not -len(seq) <= i < len(seq):
        valid = f"valid indices are 0..{len(seq) - 1}" if seq else "there are no entries"
        raise JobError(where, f"index {i} is out of range; {valid} (negative ones count from the end)")
    return i


def _list_item(seq, part, where):
    return seq[_index(seq, part, where)]
