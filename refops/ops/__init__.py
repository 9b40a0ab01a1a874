"""The oracles: float64 numpy forward and vjp of every op, looked up by name.

``refops.ops.conv2d(x, w)`` runs a forward, ``refops.ops.conv2d.vjp(g, x, w)`` its backward,
``refops.ops.get("conv2d")`` looks an op up and ``refops.ops.names()`` lists them all.
Nothing here imports a deep-learning framework.
"""
from ._registry import CaseConfig, ErrorTerms, Kink, Op, UnknownOpError, get, names
from .linear import *  # noqa: F401,F403  (each family module lists its ops in __all__)
from .conv import *  # noqa: F401,F403
from .pool import *  # noqa: F401,F403
from .activation import *  # noqa: F401,F403
from .softmax import *  # noqa: F401,F403
from .norm import *  # noqa: F401,F403
from .loss import *  # noqa: F401,F403
