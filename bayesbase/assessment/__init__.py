"""Assessment of the latest (or a chosen) specimen of every patient against its own history."""
from .core import FEEDING_SENSITIVE_DEFAULT, Assessment, assess

__all__ = ["assess", "Assessment", "FEEDING_SENSITIVE_DEFAULT"]
