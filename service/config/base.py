"""What every configuration model shares: the strict base model, the error a config that
cannot be used raises, ids, names, host:port and the constants of the trade.

Knows nothing about files, tables, sockets, storage or the engine."""

from __future__ import annotations

from typing import Annotated, Any, Literal

from pydantic import AfterValidator, BaseModel, ConfigDict, Field

ID_PATTERN = r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$"
SHA256_PATTERN = r"^[0-9a-fA-F]{64}$"
FRAME_RATIO = 2.56  # fs = 2.56·Fmax and N = 2.56·lines (common practice)

Id = Annotated[str, Field(pattern=ID_PATTERN)]
Name = Annotated[str, Field(min_length=1, max_length=64)]
Role = Literal["viewer", "operator", "admin", "metrics"]
QUANTITY_OF_UNIT = {
    "g": "acceleration",
    "m/s2": "acceleration",
    "mm/s": "velocity",
    "in/s": "velocity",
    "um": "displacement",
    "mil": "displacement",
}



class ConfigError(ValueError):
    """A configuration that cannot be used; ``problems`` holds one line per problem."""

    def __init__(self, problems: list[str], source: str = "config") -> None:
        self.problems = list(problems)
        self.source = source
        head = f"{source}: {len(self.problems)} problem{'s' if len(self.problems) != 1 else ''}"
        super().__init__(head + "".join(f"\n  {p}" for p in self.problems))


class StrictModel(BaseModel):
    # strict: a TOML string or bool is never coerced into a number (sensitivity = true is an
    # error, not 1.0); TOML integers still fill float fields.
    model_config = ConfigDict(
        extra="forbid", validate_default=True, allow_inf_nan=False, strict=True
    )


def described(text: str) -> Any:
    return Field(description=text)


def parse_listen(text: str) -> tuple[str, int]:
    """Split ``host:port`` (``[v6addr]:port`` for IPv6) into (host, port 0…65535)."""
    if not isinstance(text, str) or ":" not in text:
        raise ValueError(f"{text!r} is not host:port (e.g. '127.0.0.1:8750')")
    host, _, port_s = text.rpartition(":")
    if host.startswith("[") and host.endswith("]"):
        host = host[1:-1]
    elif ":" in host:
        raise ValueError(f"{text!r}: write an IPv6 address in brackets, e.g. '[::1]:8750'")
    if not host or not port_s.isdigit() or not 0 <= int(port_s) <= 65535:
        raise ValueError(f"{text!r} is not host:port with a port in 0-65535")
    return host, int(port_s)


def _valid_listen(text: str) -> str:
    parse_listen(text)
    return text


Listen = Annotated[str, AfterValidator(_valid_listen)]
