"""The versioned embedding store (moving into a subpackage: for now the whole of it is :mod:`.catalog`)."""

import sys

from . import catalog as _catalog

sys.modules[__name__] = _catalog  # graphkit.store is the module itself, private names included
