"""Plain-JSON conversion of result payloads (numpy and pandas values to Python types)."""
from __future__ import annotations

import numpy as np
import pandas as pd


def json_safe(obj):
    """Recursively turn numpy scalars/arrays into Python types and NaN/inf into None.

    Dict keys become strings, timestamps ISO text, anything else unknown its ``str``.
    """
    if isinstance(obj, dict):
        return {str(k): json_safe(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [json_safe(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return [json_safe(v) for v in obj.tolist()]
    if isinstance(obj, (np.bool_, bool)):
        return bool(obj)
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        f = float(obj)
        return f if np.isfinite(f) else None
    if obj is None or isinstance(obj, (str, int)):
        return obj
    if obj is pd.NA or obj is pd.NaT:
        return None
    if isinstance(obj, pd.Timestamp):
        return obj.isoformat()
    return str(obj)


def json_float(x):
    """``x`` as a Python float, or None when it is NaN or infinite (for numeric JSON fields).

    Unlike :func:`json_safe`, an integer becomes a float (``3`` → ``3.0``), so a field keeps
    one JSON type whatever numpy type the value had.
    """
    return json_safe(float(x))
