"""Check families. Importing this package registers every check kind in :data:`REGISTRY`."""

from service.gate.checks.base import REGISTRY, CheckConfig, CheckContext, CheckSpec, register

# Each module registers its kinds on import; keep one module per family.
from service.gate.checks import drift, metric, paired, quality  # noqa: E402,F401  isort: skip
from service.gate.checks import creep, history, lists, skew  # noqa: E402,F401  isort: skip
from service.gate.checks import offpolicy  # noqa: E402,F401  isort: skip

__all__ = ["REGISTRY", "CheckConfig", "CheckContext", "CheckSpec", "register"]
