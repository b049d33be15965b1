"""Model text -> python-control systems, canonical digests and plant families.

Importing this package does not import python-control; it is imported when a model is
evaluated.
"""

from ledger.systems.blocks import BLOCKS
from ledger.systems.digest import is_proper, system_digest
from ledger.systems.family import ParamSpec, build_family
from ledger.systems.model import Evaluated, Model, compile_model, parse_model

__all__ = [
    "BLOCKS",
    "Evaluated",
    "Model",
    "ParamSpec",
    "build_family",
    "compile_model",
    "is_proper",
    "parse_model",
    "system_digest",
]
