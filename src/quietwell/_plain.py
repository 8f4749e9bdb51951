"""Python types for documents: the writer's JSON backup and the journal cannot hold
numpy arrays or numpy scalars."""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = ["plain"]


def plain(value: Any) -> Any:
    """``value`` with numpy arrays turned into lists and numpy scalars into Python ones."""
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, list | tuple):
        return [plain(v) for v in value]
    return value
