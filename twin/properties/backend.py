"""The one module of twin that imports CoolProp: its IF97 backend and input pairs.

Everything else in :mod:`twin.properties` reaches CoolProp through the names
here, so that the library enters twin through one module.
"""

from __future__ import annotations

from typing import Any

import CoolProp.CoolProp as _CP

PT = _CP.PT_INPUTS
HP = _CP.HmassP_INPUTS  # argument order (h, p)
PS = _CP.PSmass_INPUTS  # argument order (p, s)
PQ = _CP.PQ_INPUTS
QT = _CP.QT_INPUTS  # argument order (Q, T)


def new_state() -> Any:
    """A fresh low-level CoolProp ``AbstractState("IF97", "Water")`` (not thread-safe)."""
    return _CP.AbstractState("IF97", "Water")
