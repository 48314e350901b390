"""Keep secrets out of error output.

Config errors echo the offending value so an operator can see what was wrong; for a
password that is the one thing they must not do. :func:`secret_values` collects the
values of secret-looking settings (``TIDEWATCH_KAFKA_*`` environment variables and
``[kafka] *properties`` keys whose names say password, secret, token or key) and
:func:`redact` blanks them out of a message before it is printed or logged.
"""

from __future__ import annotations

import os
import re
import tomllib
from collections.abc import Iterable, Mapping
from typing import Any

__all__ = ["redact", "secret_values", "is_secret_name"]

# Name parts that mark a secret: sasl.password, ssl.key.password, ssl.key.pem,
# sasl.oauthbearer.client.secret, TIDEWATCH_STATE_KEY, ... ("keyed" and "key.location" are not secrets).
_SECRET = re.compile(r"(^|[._])(password|passwd|secret|token|credentials?|key)([._]|$)|(^|[._])key[._]pem($|[._])",
                     re.IGNORECASE)
_NOT_SECRET = re.compile(r"(location|file|path|keyed|id)$", re.IGNORECASE)
_MIN_LEN = 3  # shorter values would blank out ordinary words
MASK = "<redacted>"


def is_secret_name(name: str) -> bool:
    """True when a setting's name says it holds a secret.

    >>> [is_secret_name(n) for n in ("sasl.password", "SSL_KEY_PASSWORD", "ssl.key.location", "INPUT_KEYED", "sasl.username")]
    [True, True, False, False, False]
    >>> is_secret_name("TIDEWATCH_STATE_KEY"), is_secret_name("sasl.oauthbearer.client.secret")
    (True, True)
    """
    n = name.lower().replace("_", ".")
    if _NOT_SECRET.search(n):
        return False
    return _SECRET.search(n) is not None


def secret_values(environ: Mapping[str, str] | None = None, config_path: str | os.PathLike[str] | None = None) -> set[str]:
    """Values of secret settings in the environment and, when it parses as TOML, the config file."""
    env = os.environ if environ is None else environ
    out: set[str] = {v for k, v in env.items() if k.startswith("TIDEWATCH_") and is_secret_name(k[len("TIDEWATCH_"):])}
    if config_path is not None:
        try:
            with open(config_path, "rb") as f:
                data = tomllib.load(f)
        except (OSError, tomllib.TOMLDecodeError, UnicodeDecodeError):
            data = {}
        kafka = data.get("kafka") if isinstance(data, dict) else None
        if isinstance(kafka, dict):
            for table in ("properties", "consumer_properties", "producer_properties"):
                props = kafka.get(table)
                if isinstance(props, dict):
                    out.update(_flatten(v for k, v in props.items() if is_secret_name(str(k))))
            out.update(_flatten(v for k, v in kafka.items() if is_secret_name(str(k))))
    return {v for v in out if len(v) >= _MIN_LEN}


def _flatten(values: Iterable[Any]) -> Iterable[str]:
    for v in values:
        if isinstance(v, (list, tuple)):
            yield from _flatten(v)
        elif isinstance(v, dict):
            yield from _flatten(v.values())
        else:
            yield str(v)


def redact(text: str, secrets: Iterable[str]) -> str:
    """``text`` with every secret value (and its ``repr``) replaced by a mask.

    >>> redact("kafka.sasl_password: unknown key (value 'hunter22')", {"hunter22"})
    "kafka.sasl_password: unknown key (value '<redacted>')"
    """
    # Longest first, so a secret containing another is masked whole.
    for s in sorted(set(secrets), key=len, reverse=True):
        text = text.replace(repr(s)[1:-1], MASK).replace(s, MASK)
    return text
