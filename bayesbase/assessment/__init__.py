"""Assessment of the latest (or a chosen) specimen of every patient against its own history,
as a pipeline of named stages (see :mod:`.pipeline`)."""
from .pipeline import assess
from .result import Assessment
from .roles import FEEDING_SENSITIVE_DEFAULT

__all__ = ["assess", "Assessment", "FEEDING_SENSITIVE_DEFAULT"]
