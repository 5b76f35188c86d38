"""Reading and checking a site file: secrets in clear are refused, every problem is
reported with its key path, old key names still load with a deprecation note."""

import logging
import tomllib
from collections.abc import Mapping
from pathlib import Path
from urllib.parse import urlsplit

import pydantic

from monitor.config.base import (
    _SECRET_KEYS,
    ConfigError,
)
from monitor.config.problems import _key_path, _problem
from monitor.config.site import SiteConfig

# --- reading and checking ----------------------------------------------------------------


def default_config() -> SiteConfig:
    """A configuration with every default: the six built-in rules, a log channel."""
    return SiteConfig()


def _secrets_in_clear(node: object, path: str = "") -> list[str]:
    """Keys or URLs in the raw file that carry a secret in clear."""
    problems: list[str] = []
    if isinstance(node, Mapping):
        for key, value in node.items():
            here = f"{path}.{key}" if path else str(key)
            if isinstance(key, str) and _SECRET_KEYS.search(key) and not key.endswith("_env"):
                problems.append(
                    f"{here}: secrets are not read from the configuration file; put the "
                    f"value in an environment variable and name it with {key}_env"
                )
            else:
                problems += _secrets_in_clear(value, here)
    elif isinstance(node, list):
        for i, item in enumerate(node):
            problems += _secrets_in_clear(item, f"{path}[{i}]")
    elif isinstance(node, str) and "://" in node:
        try:
            has_password = urlsplit(node).password is not None
        except ValueError:
            has_password = False
        if has_password:
            problems.append(
                f"{path}: URL carries a password; name an environment variable for it "
                "instead (e.g. database.url_env)"
            )
    return problems


#: Keys of older site files and their names now: ``{old: new}`` (top-level sections).
RENAMED_KEYS = {"alerts": "flags"}

log = logging.getLogger("gasgap.config")


def config_notes(raw: Mapping[str, object]) -> list[str]:
    """Deprecation notes for a parsed file: old key names that still load."""
    return [
        f"{old}: renamed to [{new}]; the old name still loads but will stop working"
        for old, new in RENAMED_KEYS.items()
        if old in raw
    ]


def _renamed(raw: Mapping[str, object]) -> tuple[dict[str, object], dict[str, str]]:
    """``raw`` with old section names moved to the new ones (a file naming both is
    left as it is, so the unknown old key is reported), and the renames made."""
    out = dict(raw)
    done: dict[str, str] = {}
    for old, new in RENAMED_KEYS.items():
        if old in out and new not in out:
            out[new] = out.pop(old)
            done[new] = old
    return out, done


def validate_config(raw: Mapping[str, object], source: str = "<mapping>") -> SiteConfig:
    """Check a parsed configuration; raise ``ConfigError`` listing every problem."""
    problems = _secrets_in_clear(raw)
    if problems:
        raise ConfigError(source, problems)
    for note in config_notes(raw):
        log.warning("configuration %s: %s", source, note)
    current, renamed = _renamed(raw)
    try:
        return SiteConfig.model_validate(current)
    except pydantic.ValidationError as exc:
        for error in exc.errors():
            key = _key_path(tuple(error["loc"]), current)
            head, dot, rest = key.partition(".")
            key = renamed.get(head, head) + dot + rest
            for line in _problem(error).splitlines():
                problems.append(f"{key}: {line}" if key and not line.startswith(key) else line)
        raise ConfigError(source, problems) from None


def load_config(path: Path) -> SiteConfig:
    """Read and check a TOML site configuration. Raises ``ConfigError`` naming the key
    path and the problem for everything wrong with it."""
    try:
        text = Path(path).read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigError(str(path), [f"cannot read the file: {exc.strerror}"]) from None
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(str(path), [f"not valid TOML: {exc}"]) from None
    return validate_config(raw, str(path))


def file_notes(path: Path) -> list[str]:
    """Deprecation notes for the file at ``path`` (empty when unreadable: ``check_config``
    reports that)."""
    try:
        return config_notes(tomllib.loads(Path(path).read_text(encoding="utf-8")))
    except (OSError, tomllib.TOMLDecodeError):
        return []


def check_config(path: Path) -> list[str]:
    """Every problem with the configuration at ``path``; empty when it is fine."""
    try:
        load_config(path)
    except ConfigError as exc:
        return list(exc.problems)
    return []
