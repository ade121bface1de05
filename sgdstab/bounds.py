"""``sgdstab.bounds`` as before the subpackages: the same module object as ``sgdstab.theory.bounds``
(numpy/scipy only, loads no torch), so every name, lazy re-export and patch is shared."""

import sys
from typing import TYPE_CHECKING

from .theory import bounds as _bounds

if TYPE_CHECKING:
    from .theory.bounds import *  # noqa: F403

sys.modules[__name__] = _bounds
