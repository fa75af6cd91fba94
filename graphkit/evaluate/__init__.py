"""Quality and drift measures of node vectors (the holdout, measures and alignment in
:mod:`graphkit.evaluate.measures`).

Step one of the split: the module moved whole; every name it held, private ones included, is served from here.
"""

from . import measures as _measures

globals().update({k: v for k, v in vars(_measures).items() if not k.startswith("__")})
__all__ = _measures.__all__
