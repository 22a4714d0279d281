"""labseq: unattended line x load validation of flyback snubbers over SCPI.

From Python (a notebook, a script), a store's data is three lines away::

    import labseq
    store = labseq.open_store("labseq.sqlite")
    store.points("latest")

:func:`open_store` and the classes it returns live in :mod:`labseq.notebook`, imported only when
first used, so the ``labseq`` command starts without them.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

__version__ = "0.1.0"

__all__ = ["Capture", "StoreData", "__version__", "open_store"]
#: Names taken from :mod:`labseq.notebook` when first asked for.
_NOTEBOOK_NAMES = ("open_store", "StoreData", "Capture")

if TYPE_CHECKING:
    from labseq.notebook import Capture, StoreData, open_store


def __getattr__(name: str) -> Any:
    if name in _NOTEBOOK_NAMES:
        from labseq import notebook

        return getattr(notebook, name)
    raise AttributeError(f"module 'labseq' has no attribute {name!r}")
