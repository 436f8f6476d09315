"""The stages, one module each. Importing this package registers all of them."""
from .base import REGISTRY, STAGE_NAMES, CorpusState, FileContext, Member, Option, Stage, StageResult, register

__all__ = ["REGISTRY", "STAGE_NAMES", "CorpusState", "FileContext", "Member", "Option", "Stage",
           "StageResult", "register"]
