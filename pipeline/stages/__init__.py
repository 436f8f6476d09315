"""The stages, one module each; ``stage_class`` imports a stage's module on first use, which
registers it."""
from __future__ import annotations

import importlib

from .base import (REGISTRY, CorpusState, FileContext, Member, Option, Stage,
                   StageResult, register)

#: Module (under pipeline.stages) of each contract stage name.
STAGE_MODULES = {"validate": "validate", "transpose": "transpose", "key_meter": "key_meter",
                 "dedup": "dedup", "filter": "filter", "split": "split"}


def known_stages() -> list[str]:
    """Every stage name a config may use: the contract's six plus any registered extra."""
    return list(STAGE_MODULES) + sorted(set(REGISTRY) - set(STAGE_MODULES))


def stage_class(name: str) -> type[Stage]:
    """The class of a stage, importing its module on first use (so unused stages cost nothing)."""
    if name not in REGISTRY and name in STAGE_MODULES:
        importlib.import_module(f"{__name__}.{STAGE_MODULES[name]}")
    try:
        return REGISTRY[name]
    except KeyError:
        raise KeyError(name) from None


__all__ = ["REGISTRY", "CorpusState", "FileContext", "Member", "Option", "Stage",
           "StageResult", "register", "known_stages", "stage_class"]
