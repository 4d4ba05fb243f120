# The compiled pair scan (_pair_hashes.c); pairs.python_first_pairs is its Python spelling.
import numpy as np
import numpy.typing as npt

def first_pairs(
    parts: list[npt.NDArray[np.int64]],
    window: int,
    room: int,
    per_part: int,
    out_hashes: npt.NDArray[np.int64],
    out_part: npt.NDArray[np.intp],
    out_at: npt.NDArray[np.intp],
    /,
) -> int: ...
