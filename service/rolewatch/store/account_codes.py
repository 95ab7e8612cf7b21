"""Account ids of Arrow string columns coded once, without a Python object per event."""

from __future__ import annotations

from typing import Any

import numpy as np
import pyarrow as pa

__all__ = ["arrow_account_codes", "coded_accounts"]


def arrow_account_codes(actor: Any, target: Any) -> tuple[pa.Array, pa.Array, pa.Array]:
    """The distinct ids (an Arrow string array, in no particular order) and each event's
    actor and target code into them: Arrow's ``dictionary_encode`` over both columns at
    once. The columns are widened to 64-bit offsets before their chunks are joined, so no
    column or pair of columns meets Arrow's 2 GB limit."""

    def whole(column: Any) -> Any:
        wide = column.cast(pa.large_string())
        return wide.combine_chunks() if isinstance(wide, pa.ChunkedArray) else wide

    both = pa.concat_arrays([whole(actor), whole(target)]).dictionary_encode()
    n = len(actor)
    return both.dictionary, both.indices.slice(0, n), both.indices.slice(n)


def coded_accounts(actor: Any, target: Any) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """:func:`arrow_account_codes` as numpy arrays: the distinct ids as an object array of
    str, the codes as int64."""
    names, actor_code, target_code = arrow_account_codes(actor, target)
    return (
        np.asarray(names.to_numpy(zero_copy_only=False), dtype=object),
        actor_code.to_numpy().astype(np.int64),
        target_code.to_numpy().astype(np.int64),
    )
