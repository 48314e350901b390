"""Per-service models, created on first sight from the rule that matches the service."""

from __future__ import annotations

from models import ServiceModel, build_model
from service.config import Config, ServiceSettings, resolve
from service.stats import RuntimeStats

__all__ = ["ModelRegistry"]


class ModelRegistry:
    """The live models of one process and the settings each service resolved to.

    ``dirty`` holds the services whose model changed since the last checkpoint, so a
    checkpoint writes only those.
    """

    def __init__(self, config: Config, stats: RuntimeStats) -> None:
        self.config = config
        self.stats = stats
        self.resolved: dict[str, ServiceSettings] = {}  # service -> settings, filled on first sight
        self.models: dict[str, ServiceModel] = {}
        self.dirty: set[str] = set()

    def settings(self, service: str) -> ServiceSettings:
        s = self.resolved.get(service)
        if s is None:
            s = self.resolved[service] = resolve(self.config, service)
        return s

    def model(self, service: str) -> ServiceModel:
        m = self.models.get(service)
        if m is None:
            m = self.models[service] = build_model(service, self.settings(service).model)
            self.stats.models_created += 1
        return m

    def reconfigure(self, config: Config) -> tuple[int, int]:
        """Take a new config: later windows use the new rules; a model whose kind or parameters
        changed is rebuilt (fresh, it learns again), every other model is kept. Returns (kept, rebuilt)."""
        self.config = config
        self.resolved.clear()
        kept = rebuilt = 0
        for service, model in list(self.models.items()):
            wanted = self.settings(service).model
            if model.settings == wanted:
                kept += 1
                continue
            self.models[service] = build_model(service, wanted)
            self.dirty.add(service)
            self.stats.models_created += 1
            rebuilt += 1
        return kept, rebuilt

    def put(self, service: str, model: ServiceModel) -> None:
        """Install a restored model (its settings are kept as saved)."""
        self.models[service] = model
        self.stats.models_restored += 1

    def drop(self, service: str) -> None:
        self.models.pop(service, None)
        self.dirty.discard(service)

    def __len__(self) -> int:
        return len(self.models)
