# The compiled f and choice (_fisher_pick.c); RobinsonFisher.python_pick is its Python spelling.
import numpy as np
import numpy.typing as npt

def pick(
    counts: npt.NDArray[np.int64],
    ham_total: int,
    spam_total: int,
    strength: float,
    assumed: float,
    min_deviation: float,
    cap: int,
    out_f: npt.NDArray[np.float64],
    out_chosen: npt.NDArray[np.intp],
    /,
) -> int: ...
