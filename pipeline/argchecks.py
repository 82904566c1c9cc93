"""Checks of array and integer arguments shared by the fitting modules.

Each returns the argument converted (a float vector, an int) or raises
:class:`~lightledger.pipeline.errors.ParameterError` with a message that
names the argument and what is wrong with it.
"""

import numpy as np

from .errors import ParameterError

__all__ = ["order", "vector"]


def vector(x, name, n=None):
    """``x`` as a 1-D float array, of length ``n`` when given.

    Parameters
    ----------
    x : array_like of float
    name : str
        The argument's name, for the message.
    n : int, optional
        The length required.

    Returns
    -------
    ndarray of float, shape (n,)
    """
    a = np.asarray(x, dtype=float)
    if a.ndim != 1 or (n is not None and a.size != n):
        want = f"({n},)" if n is not None else "1-D"
        raise ParameterError(f"{name} must have shape {want}; got {a.shape}")
    return a


def order(value, name):
    """``value`` as a whole number >= 0 (a polynomial order).

    Parameters
    ----------
    value : int or float
    name : str
        The argument's name, for the message.

    Returns
    -------
    int
    """
    k = int(value)
    if k < 0 or k != value:
        raise ParameterError(f"{name} must be an integer >= 0; got {value!r}")
    return k
