# The compiled digest-cache lookup and fill (_digest_probe.c); DigestCache.python_probe and
# DigestCache.python_fill are their Python spelling, hashlib's blake2b blake64's.
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
def fill(
    tokens: list[str],
    missing: list[int],
    keys: npt.NDArray[np.int64],
    values: npt.NDArray[np.int64],
    mask: int,
    token_keys: npt.NDArray[np.int64],
    token_values: npt.NDArray[np.int64],
    /,
) -> list[int]: ...
def blake64(data: bytes, /) -> int: ...
