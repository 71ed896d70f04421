"""Job tables for tests: one patch function, so every module edits jobs alike."""
from __future__ import annotations

import copy


def merged(base: dict, patch: dict) -> dict:
    """``base`` with ``patch`` merged in recursively (None deletes a key)."""
    out = copy.deepcopy(base)
    for key, value in patch.items():
        if value is None:
            out.pop(key, None)
        elif isinstance(value, dict) and isinstance(out.get(key), dict):
            out[key] = merged(out[key], value)
        else:
            out[key] = copy.deepcopy(value)
    return out
