"""Skip-gram training of node vectors (the kernels and the driver in :mod:`graphkit.train.kernels`).

Step one of the split: the module moved whole; every name it held, private ones included, is served from here.
"""

from . import kernels as _kernels

globals().update({k: v for k, v in vars(_kernels).items() if not k.startswith("__")})
__all__ = _kernels.__all__
