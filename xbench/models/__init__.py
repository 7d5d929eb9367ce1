"""Model zoo, training with a cache, and adapters for user models (torch modules or black boxes)."""

from xbench.models.base import CallCount, ModelHandle

__all__ = ["CallCount", "ModelHandle"]
