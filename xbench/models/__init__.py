"""Model zoo, training with a cache, and adapters for user models (torch modules or black boxes)."""

from xbench.models.adapters import check_images, load_user_torch_model, wrap_callable
from xbench.models.base import CallCount, ModelHandle
from xbench.models.train import TrainedModel, cache_key, state_dict_hash, train_model
from xbench.models.zoo import ALL_KINDS, TORCH_KINDS, build_torch_model, count_parameters

__all__ = [
    "ALL_KINDS",
    "CallCount",
    "ModelHandle",
    "TORCH_KINDS",
    "TrainedModel",
    "build_torch_model",
    "cache_key",
    "check_images",
    "count_parameters",
    "load_user_torch_model",
    "state_dict_hash",
    "train_model",
    "wrap_callable",
]
