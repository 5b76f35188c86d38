"""Secrets: never read from the site file; an option names an environment variable,
read from the environment or else from a secrets file of KEY=VALUE lines."""

import os
from collections.abc import Mapping
from pathlib import Path

from monitor.config.base import ENV_NAME, ConfigError

# --- secrets -----------------------------------------------------------------------------


def _read_secrets_file(path: Path) -> dict[str, str]:
    values: dict[str, str] = {}
    for line in Path(path).read_text(encoding="utf-8").splitlines():
        line = line.strip()
        if not line or line.startswith("#") or "=" not in line:
            continue
        key, _, value = line.partition("=")
        value = value.strip()
        if len(value) >= 2 and value[0] == value[-1] and value[0] in "\"'":
            value = value[1:-1]
        values[key.strip()] = value
    return values


def secret(
    env_name: str,
    *,
    secrets_file: Path | None = None,
    environ: Mapping[str, str] | None = None,
) -> str:
    """The value of the secret named ``env_name``: from the environment (``environ``,
    default ``os.environ``) or else from ``secrets_file`` (KEY=VALUE lines, # comments).
    Raises ``ConfigError`` naming the variable, never showing a value."""
    if not ENV_NAME.match(env_name):
        raise ConfigError("secrets", [f"{env_name!r}: not an environment variable name"])
    env = os.environ if environ is None else environ
    value = env.get(env_name, "")
    if not value and secrets_file is not None:
        try:
            value = _read_secrets_file(secrets_file).get(env_name, "")
        except OSError as exc:
            raise ConfigError(
                "secrets", [f"{secrets_file}: cannot read the secrets file: {exc.strerror}"]
            ) from None
    if not value:
        where = f" or in {secrets_file}" if secrets_file is not None else ""
        raise ConfigError("secrets", [f"{env_name}: not set in the environment{where}"])
    return value
