# The compiled digest-cache lookup (_digest_probe.c); DigestCache.python_probe is its
# Python spelling.
import numpy as np
import numpy.typing as npt

def probe(
    tokens: list[str],
    keys: npt.NDArray[np.int64],
    values: npt.NDArray[np.int64],
    mask: int,
    out_keys: npt.NDArray[np.int64],
    out_values: npt.NDArray[np.int64],
    /,
) -> list[int]: ...
