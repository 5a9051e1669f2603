"""JSON from user files with a bounded nesting depth (no RecursionError, no stack blow-up).

Recipes and model metadata are small, flat documents; a file nested deeper
than :data:`MAX_DEPTH` levels is damaged or hostile and is refused with a
ValueError before :func:`json.loads` recurses into it.  Callers turn the
ValueError into their own error naming the file.
"""

from __future__ import annotations

import json
import re
from typing import Any, Callable

import numpy as np

#: Deepest nesting of arrays/objects accepted (recipes use about 5 levels).
MAX_DEPTH = 64
_STRING = re.compile(r'"(?:[^"\\]|\\.)*"', re.DOTALL)


def nesting_depth(text: str) -> int:
    """Deepest ``[``/``{`` nesting of JSON ``text`` (brackets inside strings ignored)."""
    bare = _STRING.sub("", text).encode("utf-8", "surrogatepass")
    if not bare:
        return 0
    b = np.frombuffer(bare, dtype=np.uint8)
    step = (b == ord("[")).astype(np.int64) + (b == ord("{")) - (b == ord("]")) - (b == ord("}"))
    return int(np.cumsum(step).max(initial=0))


def loads(text: str | bytes, max_depth: int = MAX_DEPTH, parse_constant: Callable | None = None) -> Any:
    """:func:`json.loads` after refusing ``text`` nested deeper than ``max_depth`` (ValueError)."""
    if isinstance(text, (bytes, bytearray)):
        text = bytes(text).decode("utf-8")
    depth = nesting_depth(text)
    if depth > max_depth:
        raise ValueError(f"the JSON is nested {depth} levels deep; at most {max_depth} are read "
                         "(the file is damaged)")
    try:
        return json.loads(text, parse_constant=parse_constant)
    except RecursionError:  # pragma: no cover - the depth check comes first
        raise ValueError("the JSON is nested too deeply (the file is damaged)") from None
