# The compiled count-cache lookup (_count_probe.c); CountCache.python_get is its Python
# spelling.
import numpy as np
import numpy.typing as npt

def get(
    hashes: npt.NDArray[np.int64],
    table: npt.NDArray[np.int64],
    spilled: npt.NDArray[np.bool_],
    out_counts: npt.NDArray[np.int64],
    out_found: npt.NDArray[np.bool_],
    /,
) -> None: ...
def put_few(
    hashes: npt.NDArray[np.int64],
    counts: npt.NDArray[np.int64],
    table: npt.NDArray[np.int64],
    spilled: npt.NDArray[np.bool_],
    fill: npt.NDArray[np.uint8],
    room: int,
    /,
) -> int: ...
