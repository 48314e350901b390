"""The tidewatch config file: pydantic models, loading, and rule resolution.

One TOML file holds the runtime settings and an ordered list of per-service rules.
A service gets the settings of ``[defaults]`` overlaid with the first rule whose
``match`` glob matches its name. Validation happens here, at the edge; the hot path
only ever sees the frozen, plain :class:`ServiceSettings` that :func:`resolve` returns.

>>> cfg = parse_config('''
... [defaults]
... window = "5m"
... [[rules]]
... match = "ticket-*"
... threshold = 0.995
... ''')
>>> s = cfg.settings_for("ticket-api")
>>> s.window, s.model.threshold, s.rule_index
(300.0, 0.995, 0)
>>> cfg.settings_for("berth-planner").rule_index is None
True
"""

from __future__ import annotations

import fnmatch
import os
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import BaseModel, BeforeValidator, ConfigDict, Field, ValidationError, WithJsonSchema, field_validator, model_validator

from models import MODEL_KINDS, ModelSettings
from service.errors import ConfigError
from service.redact import MASK, is_secret_name
from service.timefmt import format_duration, parse_duration
from service.windows import FeatureSpec

__all__ = [
    "Config",
    "Defaults",
    "Rule",
    "ModelParams",
    "StateConfig",
    "HttpConfig",
    "LimitsConfig",
    "KafkaConfig",
    "ServiceSettings",
    "FeatureSpec",
    "load_config",
    "config_json_schema",
    "parse_config",
    "DEFAULT_FEATURES",
]

AGGREGATES = ("mean", "sum", "min", "max", "last", "count")
DEFAULT_FEATURES = ("*:mean", "count")


def _duration(value: Any) -> float:
    try:
        return parse_duration(value)
    except ValueError as exc:
        raise ValueError(str(exc)) from None


_DURATION_SCHEMA = {
    "anyOf": [
        {"type": "string", "pattern": r"^\s*\d+(\.\d+)?\s*(ms|s|m|h|d)\s*$", "examples": ["30s", "5m", "1h"]},
        {"type": "number", "minimum": 0, "description": "seconds"},
    ]
}
Duration = Annotated[float, BeforeValidator(_duration), WithJsonSchema(_DURATION_SCHEMA)]


class _Frozen(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, str_strip_whitespace=True)


class ModelParams(_Frozen):
    """Model parameters; each is optional so a rule can override one at a time."""

    trees: int | None = Field(None, ge=1, le=100, description="Half-space trees: number of trees.")
    height: int | None = Field(None, ge=1, le=15, description="Half-space trees: depth of each tree.")
    mass_window: int | None = Field(
        None, ge=4, le=100_000, description="Half-space trees: windows per reference-mass window."
    )
    half_life: float | None = Field(
        None, gt=0, le=1e6, description="Adaptive baseline: half-life of the exponential weights, in windows."
    )
    calibration_history: int | None = Field(
        None, ge=10, le=100_000, description="Half-space trees: how many past raw scores calibrate a new one."
    )
    exit_level: float | None = Field(
        None, gt=0, le=1, description="An open alert stays open while the score is at least this (hysteresis)."
    )
    calm_windows: int | None = Field(
        None, ge=1, le=10_000, description="Calm windows in a row that clear an open alert."
    )
    adapt_after: int | None = Field(
        None, ge=1, le=1_000_000,
        description="An alert still open after this many windows is taken as the new normal (a level shift).",
    )


def _check_features(value: tuple[str, ...]) -> tuple[str, ...]:
    for item in value:
        if item == "count":
            continue
        metric, sep, agg = item.rpartition(":")
        if not sep or not metric:
            raise ValueError(
                f"feature {item!r} must be 'count' or '<metric glob>:<aggregate>', e.g. '*:mean' or 'latency_p95_ms:max'"
            )
        if agg not in AGGREGATES:
            raise ValueError(f"feature {item!r}: aggregate {agg!r} is not one of {', '.join(AGGREGATES)}")
    if not value:
        raise ValueError("at least one feature is required")
    return value


class Defaults(_Frozen):
    """Settings every service gets unless a rule overrides them."""

    window: Duration = Field(60.0, gt=0, description="Tumbling window length, e.g. '1m', '5m'.")
    lateness: Duration = Field(
        10.0, ge=0, description="How far behind the newest event time an event may arrive and still count."
    )
    features: tuple[str, ...] = Field(DEFAULT_FEATURES, description="Features handed to the model per window.")
    model: Literal[MODEL_KINDS] = Field("combined", description="Model kind.")  # type: ignore[valid-type]
    threshold: float = Field(0.99, gt=0, le=1, description="Calibrated score at or above which a window is anomalous.")
    warm_up: int = Field(36, ge=0, le=100_000, description="Windows a new model only learns before it may flag.")
    seed: int = Field(0, ge=0, lt=2**32, description="Seed mixed with each service name for the model's randomness.")
    params: ModelParams = Field(default_factory=ModelParams, description="Model parameters.")

    @field_validator("features")
    @classmethod
    def _features(cls, v: tuple[str, ...]) -> tuple[str, ...]:
        return _check_features(v)


class Rule(_Frozen):
    """One per-service rule: a glob and the settings it overrides."""

    match: str = Field(min_length=1, description="Glob over service names, e.g. 'ticket-*'.")
    window: Duration | None = Field(None, gt=0)
    lateness: Duration | None = Field(None, ge=0)
    features: tuple[str, ...] | None = None
    model: Literal[MODEL_KINDS] | None = None  # type: ignore[valid-type]
    threshold: float | None = Field(None, gt=0, le=1)
    warm_up: int | None = Field(None, ge=0, le=100_000)
    seed: int | None = Field(None, ge=0, lt=2**32)
    params: ModelParams | None = None

    @field_validator("features")
    @classmethod
    def _features(cls, v: tuple[str, ...] | None) -> tuple[str, ...] | None:
        return None if v is None else _check_features(v)


class StateConfig(_Frozen):
    """Where and how often learned state is saved."""

    dir: str = Field("tidewatch-state", description="Local state directory (embedded mode).")
    checkpoint_interval: Duration = Field(30.0, gt=0, description="How often state and positions are saved.")


class HttpConfig(_Frozen):
    """The metrics and health endpoint."""

    listen: str = Field("127.0.0.1:9464", description="host:port for /metrics, /healthz and /readyz; '' disables it.")


class LimitsConfig(_Frozen):
    """Input and memory limits; a message beyond them is rejected with a reason."""

    max_message_bytes: int = Field(65_536, ge=64, description="Largest accepted message.")
    max_service_name: int = Field(200, ge=1, le=10_000, description="Longest accepted service name, in characters.")
    max_metrics: int = Field(256, ge=1, le=100_000, description="Most metrics accepted in one message.")
    max_future_skew: Duration = Field(
        86_400.0, ge=0, description="How far past the wall clock an event time may lie."
    )
    max_service_series: int = Field(
        5_000, ge=0, description="Most services exported as per-service Prometheus series."
    )
    max_services: int = Field(
        50_000, ge=1,
        description="Most services one process tracks (open windows, and models in memory or spilled to disk); "
        "messages of further new services are rejected with reason service_limit. Spilled models take about 40 KB "
        "of disk each.",
    )
    max_live_models: int = Field(
        50_000, ge=1,
        description="Most per-service models held in memory (about 85 KiB each at the default settings), at most "
        "max_services (a larger value is an error; left unset it is capped at max_services). Past it, the least "
        "recently scored service without an open window is evicted: its model goes to the spill store on disk and "
        "comes back, exactly as it was, when the service's next window closes.",
    )
    new_services_per_second: float = Field(
        100.0, ge=0,
        description="Sustained rate at which brand-new services may start (a token bucket on the wall clock); "
        "messages of further new services are rejected with reason new_service_rate. 0 turns the limit off.",
    )
    new_services_burst: int = Field(
        50_000, ge=1,
        description="New services that may start at once before new_services_per_second applies: a cold start or "
        "a backtest sees its whole fleet within seconds, so this admits max_services at the defaults.",
    )

    @model_validator(mode="after")
    def _live_models_within_services(self) -> "LimitsConfig":
        if "max_live_models" in self.model_fields_set and self.max_live_models > self.max_services:
            raise ValueError(
                f"max_live_models ({self.max_live_models}) must not exceed max_services ({self.max_services}): "
                "every live model belongs to a tracked service"
            )
        return self

    @property
    def live_model_limit(self) -> int:
        """The live-model limit in force: max_live_models, capped at max_services."""
        return min(self.max_live_models, self.max_services)


InputFormat = Literal["native", "otlp_json", "otlp_proto"]


class OtlpConfig(_Frozen):
    """OpenTelemetry metrics input (as the OpenTelemetry Collector's Kafka exporter writes them)."""

    service_attributes: tuple[str, ...] = Field(
        ("service.name",), min_length=1, description="Resource attributes that name the service, first present wins."
    )
    histogram_quantile: float = Field(0.95, gt=0, lt=1, description="Quantile estimated from histogram buckets.")
    max_series: int = Field(100_000, ge=1, description="Cumulative series remembered for rates (least recent evicted).")


class KafkaConfig(_Frozen):
    """The Kafka bus. When this table is present, ``tidewatch run`` without ``--input`` reads from Kafka.

    Every key can be overridden by an environment variable ``TIDEWATCH_KAFKA_<KEY>`` (upper case;
    lists comma-separated), and any librdkafka property by ``TIDEWATCH_KAFKA_PROPERTY_<NAME>`` with
    dots written as underscores (``TIDEWATCH_KAFKA_PROPERTY_SECURITY_PROTOCOL=SSL``).
    """

    bootstrap_servers: str = Field("127.0.0.1:9092", min_length=1, description="Broker list, host:port[,host:port].")
    input_topics: tuple[str, ...] = Field(("tidewatch-metrics",), min_length=1, description="Topics of metric messages.")
    input_formats: dict[str, InputFormat] = Field(
        default_factory=dict,
        description="Per input topic: native (default), otlp_json or otlp_proto (OpenTelemetry Collector Kafka exporter).",
    )
    output_topic: str = Field("tidewatch-scores", min_length=1, description="Where score messages go, keyed by service.")
    rejects_topic: str = Field("tidewatch-rejects", min_length=1, description="Dead-letter topic: original bytes, reason in headers.")
    changelog_topic: str = Field(
        "tidewatch-state", min_length=1, description="Compacted topic holding each service's model and open windows."
    )
    repartition_topic: str = Field(
        "tidewatch-repartition", min_length=1, description="Internal topic keyed by service, used when input_keyed is false."
    )
    input_keyed: bool = Field(
        True, description="True when producers key messages by service; false routes input through the repartition topic."
    )
    repartition_alignment: Duration = Field(
        5.0, ge=0,
        description="With input_keyed false: input partitions further ahead in event time than the slowest by more than "
        "this are paused, so re-keyed input interleaves in time order (keep lateness above it).",
    )
    group_id: str = Field("tidewatch", min_length=1, description="Consumer group shared by every instance.")
    instance_id: str | None = Field(
        None, description="Stable per-instance name (default: the host name); the transactional id is derived from it."
    )
    commit_interval: Duration = Field(1.0, gt=0, description="How often scores, state and offsets are committed together; sooner when caught up with scores waiting, up to ten intervals apart while working through a backlog.")
    batch_size: int = Field(2000, ge=1, le=1_000_000, description="Messages taken from the consumer per poll.")
    create_topics: bool = Field(True, description="Create the output, rejects, changelog and repartition topics if missing.")
    replication_factor: int = Field(1, ge=1, le=16, description="Replication factor of topics tidewatch creates.")
    properties: dict[str, str | int | float | bool] = Field(
        default_factory=dict, description="librdkafka properties for every client (security, timeouts, ...)."
    )
    consumer_properties: dict[str, str | int | float | bool] = Field(default_factory=dict)
    producer_properties: dict[str, str | int | float | bool] = Field(default_factory=dict)

    @model_validator(mode="after")
    def _formats_name_input_topics(self) -> "KafkaConfig":
        unknown = sorted(set(self.input_formats) - set(self.input_topics))
        if unknown:
            raise ValueError(f"input_formats names topics that are not in input_topics: {unknown}")
        return self


class LoggingConfig(_Frozen):
    """Structured JSON logs on stderr."""

    level: Literal["debug", "info", "warning", "error"] = Field(
        "info", description="Log level; --log-level and TIDEWATCH_LOG_LEVEL take precedence."
    )


class Config(_Frozen):
    """The whole config file."""

    defaults: Defaults = Field(default_factory=Defaults)
    rules: tuple[Rule, ...] = ()
    state: StateConfig = Field(default_factory=StateConfig)
    http: HttpConfig = Field(default_factory=HttpConfig)
    limits: LimitsConfig = Field(default_factory=LimitsConfig)
    kafka: KafkaConfig | None = Field(None, description="The Kafka bus; absent means embedded mode only.")
    otlp: OtlpConfig = Field(default_factory=OtlpConfig)
    logging: LoggingConfig = Field(default_factory=LoggingConfig)

    def settings_for(self, service: str) -> "ServiceSettings":
        """The resolved settings of one service (first matching rule wins)."""
        return resolve(self, service)


@dataclass(frozen=True, slots=True)
class ServiceSettings:
    """What the runtime needs for one service, plain and frozen (no pydantic on the hot path)."""

    window: float
    lateness: float
    features: tuple[FeatureSpec, ...]
    model: ModelSettings
    rule_index: int | None  # index into Config.rules, None for the defaults
    rule_match: str | None

    def describe(self) -> str:
        rule = "defaults" if self.rule_index is None else f"rule #{self.rule_index + 1} (match {self.rule_match!r})"
        m = self.model
        feats = ", ".join("count" if f.metric_glob is None else f"{f.metric_glob}:{f.aggregate}" for f in self.features)
        return (
            f"{rule}: window {format_duration(self.window)}, lateness {format_duration(self.lateness)}, "
            f"model {m.kind} (trees {m.trees}, height {m.height}, mass_window {m.mass_window}, "
            f"half_life {m.half_life:g}, calibration_history {m.calibration_history}, exit_level {m.exit_level:g}, "
            f"calm_windows {m.calm_windows}, adapt_after {m.adapt_after}), "
            f"threshold {m.threshold:g}, warm_up {m.warm_up}, seed {m.seed}, features [{feats}]"
        )


def _compile_features(items: tuple[str, ...]) -> tuple[FeatureSpec, ...]:
    out = []
    for item in items:
        if item == "count":
            out.append(FeatureSpec(None, "count"))
        else:
            glob, _, agg = item.rpartition(":")
            out.append(FeatureSpec(glob, agg))
    return tuple(out)


def resolve(config: Config, service: str) -> ServiceSettings:
    d = config.defaults
    rule_index = None
    rule: Rule | None = None
    for i, r in enumerate(config.rules):
        if fnmatch.fnmatchcase(service, r.match):
            rule_index, rule = i, r
            break

    def pick(name: str) -> Any:
        value = getattr(rule, name) if rule is not None else None
        return getattr(d, name) if value is None else value

    params: dict[str, Any] = {k: v for k, v in d.params.model_dump().items() if v is not None}
    if rule is not None and rule.params is not None:
        params.update({k: v for k, v in rule.params.model_dump().items() if v is not None})
    model = ModelSettings(
        kind=pick("model"), threshold=pick("threshold"), warm_up=pick("warm_up"), seed=pick("seed"), **params
    )
    return ServiceSettings(
        window=pick("window"),
        lateness=pick("lateness"),
        features=_compile_features(pick("features")),
        model=model,
        rule_index=rule_index,
        rule_match=rule.match if rule is not None else None,
    )


def _format_problem(source: str, err: dict[str, Any]) -> str:
    loc = ".".join(str(p) for p in err.get("loc", ())) or "(top level)"
    value = err.get("input")
    if any(is_secret_name(str(p)) for p in err.get("loc", ())):
        value = MASK  # a mistyped password is still a password: never echo it
    kind = err.get("type", "")
    msg = err.get("msg", "")
    if kind == "extra_forbidden":
        return f"{source}: {loc}: unknown key (value {value!r}); remove it or check its spelling"
    return f"{source}: {loc}: {msg} (got {value!r})"


_LIST_KEYS = {"input_topics"}


def _apply_env(data: dict[str, Any], environ: dict[str, str]) -> dict[str, Any]:
    """Overlay ``TIDEWATCH_KAFKA_*`` environment variables onto the ``[kafka]`` table."""
    keys = {k for k in environ if k.startswith("TIDEWATCH_KAFKA_")}
    if not keys:
        return data
    kafka = dict(data.get("kafka") or {})
    props = dict(kafka.get("properties") or {})
    for env_key in sorted(keys):
        value = environ[env_key]
        name = env_key[len("TIDEWATCH_KAFKA_"):].lower()
        if name.startswith("property_"):
            props[name[len("property_"):].replace("_", ".")] = value
        elif name in _LIST_KEYS:
            kafka[name] = [v.strip() for v in value.split(",") if v.strip()]
        else:
            kafka[name] = value
    if props:
        kafka["properties"] = props
    return {**data, "kafka": kafka}


def parse_config(text: str, source: str = "<config>", environ: dict[str, str] | None = None) -> Config:
    """Parse and validate config text; raise :class:`ConfigError` listing every problem.

    ``environ`` (default: none) supplies ``TIDEWATCH_KAFKA_*`` overrides.
    """
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{source}: not valid TOML: {exc}") from exc
    if environ:
        data = _apply_env(data, environ)
    try:
        config = Config.model_validate(data)
    except ValidationError as exc:
        problems = [_format_problem(source, e) for e in exc.errors(include_url=False)]
        raise ConfigError(f"{source}: {len(problems)} problem(s) in the config", problems) from exc
    # Model settings are validated once more by models/ itself (ranges that depend on each other).
    try:
        resolve(config, "")
        for r in config.rules:
            resolve(config, r.match)
    except ValueError as exc:
        raise ConfigError(f"{source}: {exc}") from exc
    return config


def config_json_schema() -> dict[str, Any]:
    """The JSON Schema of the config file (committed as ``config/tidewatch.schema.json``)."""
    schema = Config.model_json_schema()
    schema["$schema"] = "https://json-schema.org/draft/2020-12/schema"
    schema["title"] = "tidewatch config file"
    return schema


def load_config(path: str | os.PathLike[str] | None, environ: dict[str, str] | None = None) -> Config:
    """Load a config file (``None``: built-in defaults) with environment overrides applied."""
    env = dict(os.environ) if environ is None else environ
    if path is None:
        return parse_config("", "<defaults>", env)
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(f"{p}: cannot read the config file: {exc}") from exc
    return parse_config(text, str(p), env)
