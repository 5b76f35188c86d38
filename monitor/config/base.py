"""What every part of the site configuration shares: the name patterns, the error
that lists every problem, and the strict section base (unknown keys are errors)."""

import re
from typing import Annotated, Literal

from pydantic import BaseModel, ConfigDict, Field

from monitor.engine.errors import MonitorError

ENV_NAME = re.compile(r"^[A-Z_][A-Z0-9_]*$")
ALIAS = re.compile(r"^[a-z0-9][a-z0-9_-]*$")
RULE_ID = re.compile(r"^[a-z0-9][a-z0-9-]*$")

#: Keys that would hold a secret in clear. Their ``*_env`` form names a variable instead.
_SECRET_KEYS = re.compile(
    r"^(password|passwd|token|secret|api_key|apikey|bearer|hmac_secret|client_secret)$"
    r"|_(password|token|secret)$"
)


class ConfigError(MonitorError, ValueError):
    """The configuration cannot be used. ``problems`` lists each as "key.path: what"."""

    def __init__(self, source: str, problems: list[str]) -> None:
        self.source = source
        self.problems = problems
        super().__init__(f"configuration {source}: " + "; ".join(problems))


class _Section(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


EnvName = Annotated[str, Field(pattern=ENV_NAME.pattern)]
PriorityWord = Literal["low", "medium", "high"]
