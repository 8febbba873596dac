"""The statistics engine: pure numpy/scipy/numba; arrays in, frozen dataclasses out."""

from service.stats.imports import defer_numpy_f2py

defer_numpy_f2py()  # before any module of this package imports scipy.special
