"""Online per-service anomaly scorers for tidewatch, and their persistence.

Examples
--------
>>> import models
>>> model = models.build_model("inventory", models.ModelSettings(warm_up=5))
>>> result = model.assess({"latency_p95_ms.mean": 120.0, "errors.mean": 0.0, "count": 30.0})
>>> result.warming_up, 0.0 <= result.score <= 1.0
(True, True)
>>> service, restored = models.decode_state(models.encode_state("inventory", model))
>>> service, restored.windows_seen
('inventory', 1)
"""

from models.errors import (
    CorruptState,
    FeatureError,
    ModelError,
    SettingsError,
    StateError,
    StateSignatureMismatch,
    UnsupportedStateVersion,
)
from models.persistence import decode_state, encode_state
from models.service_model import Assessment, Contribution, ServiceModel, build_model
from models.settings import MODEL_KINDS, ModelSettings

__all__ = [
    "MODEL_KINDS",
    "Assessment",
    "Contribution",
    "CorruptState",
    "FeatureError",
    "ModelError",
    "ModelSettings",
    "ServiceModel",
    "SettingsError",
    "StateError",
    "StateSignatureMismatch",
    "UnsupportedStateVersion",
    "build_model",
    "decode_state",
    "encode_state",
]
