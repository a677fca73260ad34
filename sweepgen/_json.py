"""JSON output in one place: NumPy values become plain numbers, NaN and infinities null."""

from __future__ import annotations

import json
import math


def plain(obj):
    """Convert NumPy scalars/arrays and non-finite floats to plain JSON values (NaN -> null)."""
    if isinstance(obj, dict):
        return {str(k): plain(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [plain(v) for v in obj]
    if hasattr(obj, "tolist") and not isinstance(obj, (str, bytes)):
        return plain(obj.tolist())      # NumPy arrays and scalars
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, (str, int, bool)) or obj is None:
        return obj
    return str(obj)


def dumps(doc) -> str:
    """``doc`` as indented JSON text ending in a newline (strict: no NaN in the output)."""
    return json.dumps(plain(doc), indent=2, allow_nan=False) + "\n"
