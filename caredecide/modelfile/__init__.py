"""Model files (TOML): one module each to read, validate and write.

- :mod:`caredecide.modelfile.reader`: :func:`load_model`, :func:`loads_model`;
- :mod:`caredecide.modelfile.validator`: :func:`validate_model`, :func:`structural_problems`;
- :mod:`caredecide.modelfile.writer`: :func:`dumps_model`, :func:`save_model`.

This package re-exports them so ``from caredecide.modelfile import load_model`` keeps working.
"""

from caredecide.limits import MAX_MODEL_BYTES
from caredecide.modelfile.reader import load_model, loads_model
from caredecide.modelfile.validator import (
    IDENTIFIER,
    ROW_TOLERANCE,
    ValidatedModel,
    structural_problems,
    validate_and_compile,
    validate_model,
)
from caredecide.modelfile.writer import dumps_model, save_model

__all__ = [
    "IDENTIFIER",
    "MAX_MODEL_BYTES",
    "ROW_TOLERANCE",
    "ValidatedModel",
    "dumps_model",
    "load_model",
    "loads_model",
    "save_model",
    "structural_problems",
    "validate_and_compile",
    "validate_model",
]
