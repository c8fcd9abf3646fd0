"""The ``[opcua]`` table: the optional OPC UA server (endpoint, namespace, security policy,
certificate) and the check that no unsecured endpoint listens beyond this machine.

Knows pydantic and the shape of an ``opc.tcp://`` URL; nothing of asyncua, the hub or other
tables (the cross-checks with ``[[tokens]]`` and files are :func:`opcua_problems`)."""

from __future__ import annotations

import ipaddress
import re
from pathlib import Path
from typing import TYPE_CHECKING, Literal

from pydantic import Field, model_validator

from ..entries import EntryProblem
from .base import ID_PATTERN, StrictModel

if TYPE_CHECKING:
    from .models import Config

__all__ = [
    "DEFAULT_ENDPOINT", "OpcuaConfig", "anchor_opcua_paths", "endpoint_host", "is_loopback",
    "opcua_problems",
]

DEFAULT_ENDPOINT = "opc.tcp://127.0.0.1:4840/quaver"
# opc.tcp://host:port[/path]; IPv6 hosts in brackets (IEC 62541-6 uses URL syntax)
_ENDPOINT = re.compile(r"^opc\.tcp://(\[[0-9A-Fa-f:.]+\]|[A-Za-z0-9.-]+):(\d{1,5})(/[^\s]*)?$")
SecurityPolicy = Literal["None", "Basic256Sha256"]
SecurityMode = Literal["Sign", "SignAndEncrypt"]


def endpoint_host(endpoint: str) -> tuple[str, int]:
    """(host, port) of an ``opc.tcp://host:port/path`` endpoint; ValueError if it is not one."""
    m = _ENDPOINT.match(endpoint)
    if m is None or not 0 < int(m.group(2)) <= 65535:
        raise ValueError(f"{endpoint!r} is not opc.tcp://host:port[/path] with a port in "
                         "1-65535")
    return m.group(1).strip("[]"), int(m.group(2))


def is_loopback(host: str) -> bool:
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False  # a host name may resolve to anything


class OpcuaConfig(StrictModel):
    enabled: bool = Field(
        False,
        description="Serve the plant's values, states and alarms over OPC UA (needs the "
        "'opcua' extra: pip install 'quaver[opcua]'); see docs/opcua.md.",
    )
    endpoint: str = Field(
        DEFAULT_ENDPOINT,
        max_length=256,
        description="Endpoint URL the server listens on and announces, "
        "opc.tcp://host:port/path. A host that is not loopback needs security_policy "
        "Basic256Sha256 and [[tokens]].",
    )
    site: str = Field(
        "site",
        pattern=ID_PATTERN,
        description="Names the namespace: urn:quaver:<site>. Keep it when the service moves, "
        "so clients' node ids stay valid.",
    )
    security_policy: SecurityPolicy = Field(
        "None",
        description="None (loopback endpoints only: nothing is signed or encrypted) | "
        "Basic256Sha256 (messages signed, or signed and encrypted, with the server's "
        "certificate).",
    )
    security_mode: SecurityMode = Field(
        "SignAndEncrypt",
        description="With Basic256Sha256: Sign | SignAndEncrypt (passwords travel "
        "encrypted either way).",
    )
    certificate: str | None = Field(
        None,
        max_length=4096,
        description="Server certificate (DER or PEM) for Basic256Sha256; default: a "
        "self-signed one quaver makes on first start in <data_dir>/opcua/ (renewed when "
        "expired). Give private_key with it.",
    )
    private_key: str | None = Field(
        None,
        max_length=4096,
        description="Private key (PEM) of certificate.",
    )
    spectra: bool = Field(
        True,
        description="Publish each profile's spectrum as a Float array (the largest part of "
        "the server's work: turn off when clients read band values only).",
    )
    max_loop_share: float = Field(
        0.1, ge=0.02, le=1.0,
        description="Largest share of the service's event loop the hand-off to the OPC UA "
        "worker process may take (packing each push into arrays; 0.02…1): beyond it, it "
        "waits and each channel skips to its newest frame; /health counts the skipped "
        "frames (dropped). The asyncua server itself runs in its own process. See "
        "docs/opcua.md.",
    )
    alarm_refresh_s: float = Field(
        1.0, ge=0.1, le=60,
        description="How often every alarm's value is written to the Alarms folder, s "
        "(states, limits and acknowledgements are written at once on each change).",
    )

    @model_validator(mode="after")
    def _secure_off_loopback(self) -> OpcuaConfig:
        try:
            host, _ = endpoint_host(self.endpoint)
        except ValueError as e:
            raise EntryProblem("endpoint", str(e)) from None
        if self.security_policy == "None" and not is_loopback(host):
            raise EntryProblem(
                "security_policy",
                f"'None' is refused for the endpoint {self.endpoint!r}, which is not a "
                "loopback address: anyone on the network could read the plant and the "
                "passwords in clear; set security_policy = \"Basic256Sha256\" or listen on "
                "127.0.0.1",
            )
        if (self.certificate is None) != (self.private_key is None):
            raise EntryProblem("private_key" if self.private_key is None else "certificate",
                               "give certificate and private_key together (or neither: "
                               "quaver makes a self-signed pair)")
        return self


def anchor_opcua_paths(o: OpcuaConfig, base_dir: Path) -> None:
    """Take relative certificate and key paths from the config file's folder."""
    if o.certificate is not None:
        o.certificate = str(base_dir / o.certificate)
    if o.private_key is not None:
        o.private_key = str(base_dir / o.private_key)


def opcua_problems(cfg: Config, base_dir: Path | None = None) -> list[str]:
    """What ``[opcua]`` cannot see alone: an endpoint beyond loopback without ``[[tokens]]``
    (anyone could read), certificate or key files that do not exist (relative paths from
    ``base_dir``, the config file's folder)."""
    o = cfg.opcua
    if not o.enabled:
        return []
    out = []
    host, _ = endpoint_host(o.endpoint)
    if not is_loopback(host) and not cfg.tokens:
        out.append(f"opcua.endpoint: {o.endpoint!r} is not a loopback address; add [[tokens]] "
                   "(OPC UA users sign in with a token's name and the token) before serving "
                   "beyond this machine")
    for key in ("certificate", "private_key"):
        path = getattr(o, key)
        if path is not None and not (base_dir or Path()).joinpath(path).is_file():
            out.append(f"opcua.{key}: {path!r} is not a file")
    return out
